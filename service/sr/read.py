"""Read a DICOM SR into a :class:`~service.model.SourceDocument` (no DICOM types leave here).

The content tree is walked with plain pydicom (highdicom cannot parse by-reference items).
Containers pass their concept modifiers (Finding Site, Image Mode, Stage ...) down to the
items they contain; an item's own modifier beats an inherited one.  By-reference
relationships are counted, never followed.  Any malformed element is skipped with a warning;
anything that makes the object unusable raises :class:`~service.errors.RejectedInput`.
"""

from __future__ import annotations

import datetime as dt
import math
import os
import re
import struct
from dataclasses import dataclass, field
from typing import Any

import pydicom
from pydicom.charset import convert_encodings
from pydicom.datadict import dictionary_VR, tag_for_keyword
from pydicom.dataelem import RawDataElement
from pydicom.dataset import Dataset
from pydicom.errors import InvalidDicomError
from pydicom.valuerep import VR as _VR

from service.errors import RejectedInput
from service.model import Code, CodedItem, Modifier, Observation, SourceDocument
from service.sr.identity import is_valid_uid
from service.vocabulary.srt import normalise

SUPPORTED_SR_SOP_CLASSES: dict[str, str] = {
    "1.2.840.10008.5.1.4.1.1.88.11": "Basic Text SR",
    "1.2.840.10008.5.1.4.1.1.88.22": "Enhanced SR",
    "1.2.840.10008.5.1.4.1.1.88.33": "Comprehensive SR",
    "1.2.840.10008.5.1.4.1.1.88.34": "Comprehensive 3D SR",
    "1.2.840.10008.5.1.4.1.1.88.35": "Extensible SR",
    "1.2.840.10008.5.1.4.1.1.88.72": "Simplified Adult Echo SR",
}

#: relationships through which a CODE child qualifies its parent (PS3.3 C.17.3.2.4)
MODIFIER_RELATIONSHIPS = frozenset({"HAS CONCEPT MOD", "HAS ACQ CONTEXT", "HAS PROPERTIES"})
#: container modifiers that descendants inherit (TID 5202 Finding Site, group Image Mode, Stage)
INHERITED_RELATIONSHIPS = frozenset({"HAS CONCEPT MOD", "HAS ACQ CONTEXT"})
#: never inherited: they describe one value, not a group
NOT_INHERITED = frozenset({("DCM", "121404"), ("DCM", "121401")})

SUBJECT_AGE = ("DCM", "121033")
CARDIAC_RHYTHM = ("LN", "8884-9")
AGE_UNITS = {"a": 1.0, "mo": 1 / 12, "wk": 7 / 365.25, "d": 1 / 365.25}
_AS = re.compile(r"^(\d{3})([DWMY])$")
_AS_FACTOR = {"Y": 1.0, "M": 1 / 12, "W": 7 / 365.25, "D": 1 / 365.25}
MAX_DEPTH = 64


@dataclass
class _Walk:
    uid: str
    observations: list[Observation] = field(default_factory=list)
    coded: list[CodedItem] = field(default_factory=list)
    warnings: list[str] = field(default_factory=list)
    by_reference: int = 0


def _text(value: Any) -> str:
    if value is None:
        return ""
    return str(value).strip()


#: Codes already made, by (designator, value, meaning) as read: an SR repeats a few dozen codes
#: many times, and Code is immutable so one instance serves every occurrence
_CODES: dict[tuple[str, str, str], Code] = {}
_CACHE_SIZE = 4096


def read_code(seq: Any) -> Code | None:
    """First item of a code sequence as a Code (SRT normalised to SCT); None if unusable."""
    try:
        if seq is None or len(seq) == 0:
            return None
        item = seq[0]
        scheme = _text(item.get("CodingSchemeDesignator"))
        value = (
            _text(item.get("CodeValue"))
            or _text(item.get("LongCodeValue"))
            or _text(item.get("URNCodeValue"))
        )
        if not scheme or not value:
            return None
        meaning = _text(item.get("CodeMeaning"))
        key = (scheme, value, meaning)
        found = _CODES.get(key)
        if found is None:
            scheme, value = normalise(scheme, value)
            found = Code(value=value, scheme=scheme, meaning=meaning)
            if len(_CODES) >= _CACHE_SIZE:
                _CODES.clear()
            _CODES[key] = found
        return found
    except Exception:
        return None


def _own_modifiers(item: Dataset, path: str, w: _Walk) -> list[Modifier]:
    """CODE children related by a modifier relationship (and their own nested modifiers)."""
    mods: list[Modifier] = []
    for i, child in enumerate(_children(item, path, w), 1):
        try:
            if _text(child.get("ValueType")) != "CODE":
                continue
            if _text(child.get("RelationshipType")) not in MODIFIER_RELATIONSHIPS:
                continue
            name = read_code(child.get("ConceptNameCodeSequence"))
            value = read_code(child.get("ConceptCodeSequence"))
            if name is None or value is None:
                w.warnings.append(f"{path}.{i}: modifier without a usable code; skipped")
                continue
            mods.append(Modifier(name=name, value=value))
            # e.g. Topographical Modifier on a Finding Site
            mods.extend(_own_modifiers(child, f"{path}.{i}", w))
        except Exception as exc:  # malformed element: skip, never crash
            w.warnings.append(f"{path}.{i}: malformed modifier skipped ({type(exc).__name__})")
    return mods


def _children(item: Dataset, path: str, w: _Walk) -> list[Dataset]:
    try:
        seq = item.get("ContentSequence")
        if seq is None:
            return []
        return [c for c in seq if isinstance(c, _ITEM_TYPES)]
    except Exception as exc:
        w.warnings.append(f"{path}: unreadable ContentSequence skipped ({type(exc).__name__})")
        return []


def _values(raw: Any) -> list[Any]:
    """The values of an element as a list ([] when absent or empty)."""
    if raw is None:
        return []
    if isinstance(raw, str | bytes):
        return [raw] if _text(raw) != "" else []
    if hasattr(raw, "__len__"):
        return list(raw)
    return [raw]


def _number(raw: Any) -> float | None:
    try:
        value = float(raw) if _text(raw) != "" else None
    except (TypeError, ValueError):
        return None
    return value


def _agree(fp: float, numeric: float, text: str) -> bool:
    """A Floating Point Value agrees with the Numeric Value when it rounds to it: the decimal
    string holds the same number with fewer digits (PS3.3 C.18.1, Numeric Measurement Macro;
    from memory)."""
    text = text.strip().lower()
    if "e" in text:  # exponent form: agree to 6 significant digits
        tolerance = 1e-6 * max(abs(numeric), abs(fp))
    else:  # half a unit of the last decimal written
        decimals = len(text.split(".")[1]) if "." in text else 0
        tolerance = 0.5 * 10.0**-decimals
    return abs(fp - numeric) <= tolerance * (1 + 1e-9) + 1e-12


def _num(item: Dataset, path: str, w: _Walk) -> tuple[float | None, Code | None, str]:
    """(value, unit, problem): ``problem`` says why a value that is there cannot be used."""
    seq = item.get("MeasuredValueSequence")
    if seq is None or len(seq) == 0:
        return None, None, ""
    mv = seq[0]
    unit = read_code(mv.get("MeasurementUnitsCodeSequence"))
    try:
        fps = _values(mv.get("FloatingPointValue"))
        numerics = _values(mv.get("NumericValue"))
    except Exception as exc:  # e.g. a DS element that is not a number
        w.warnings.append(f"{path}: unreadable measured value ({exc}); value ignored")
        return None, unit, ""
    for name, values in (("Numeric Value", numerics), ("Floating Point Value", fps)):
        if len(values) > 1:
            shown = ", ".join(_text(v) for v in values)
            return (
                None,
                unit,
                (
                    f"{len(values)} values in {name} ({shown}); a measurement has one "
                    "(PS3.3 C.18.1, value multiplicity 1)"
                ),
            )
    raw = fps[0] if fps else (numerics[0] if numerics else None)
    if raw is None:
        return None, unit, ""
    value = _number(raw)
    if value is None:
        w.warnings.append(f"{path}: non-numeric measured value {raw!r}; value ignored")
        return None, unit, ""
    if not math.isfinite(value):
        w.warnings.append(f"{path}: non-finite measured value {raw!r}; value ignored")
        return None, unit, ""
    if fps and numerics:
        numeric = _number(numerics[0])
        if numeric is not None and not _agree(value, numeric, _text(numerics[0])):
            return (
                None,
                unit,
                (
                    f"Floating Point Value {value:g} and Numeric Value {_text(numerics[0])} "
                    "disagree; it is not known which one is right"
                ),
            )
    return value, unit, ""


def _walk(items: list[Dataset], inherited: list[Modifier], path: str, w: _Walk, depth: int) -> None:
    if depth > MAX_DEPTH:
        w.warnings.append(f"{path}: content tree deeper than {MAX_DEPTH}; rest skipped")
        return
    for i, item in enumerate(items, 1):
        p = f"{path}.{i}"
        try:
            _visit(item, inherited, p, w, depth)
        except Exception as exc:  # malformed item: skip with a warning, never crash
            w.warnings.append(f"{p}: malformed content item skipped ({type(exc).__name__}: {exc})")


def _visit(item: Dataset, inherited: list[Modifier], p: str, w: _Walk, depth: int) -> None:
    if "ReferencedContentItemIdentifier" in item and "ValueType" not in item:
        w.by_reference += 1
        return
    vt = _text(item.get("ValueType"))
    if not vt:
        w.warnings.append(f"{p}: content item without Value Type skipped")
        return
    if vt not in VALUE_TYPES:
        _invalid_value_type(item, vt, inherited, p, w)
        return
    rel = _text(item.get("RelationshipType"))
    if vt == "CODE" and rel in MODIFIER_RELATIONSHIPS:
        # read as a modifier of its parent; a Cardiac Rhythm is also kept as a coded item
        concept = read_code(item.get("ConceptNameCodeSequence"))
        value = read_code(item.get("ConceptCodeSequence"))
        if concept is not None and value is not None and concept.key == CARDIAC_RHYTHM:
            w.coded.append(CodedItem(path=p, concept=concept, value=value, source_uid=w.uid))
        return
    own = _own_modifiers(item, p, w)
    mods = own + list(inherited)  # own first: Observation.modifier() returns the nearest
    if vt == "NUM":
        concept = read_code(item.get("ConceptNameCodeSequence"))
        if concept is None:
            w.warnings.append(f"{p}: NUM without a usable concept name skipped")
        else:
            value, unit, problem = _num(item, p, w)
            qualifier = read_code(item.get("NumericValueQualifierCodeSequence"))
            w.observations.append(
                Observation(
                    path=p,
                    concept=concept,
                    value=value,
                    unit=unit,
                    qualifier=qualifier,
                    modifiers=tuple(mods),
                    source_uid=w.uid,
                    problem=problem,
                )
            )
    elif vt == "CODE":
        concept = read_code(item.get("ConceptNameCodeSequence"))
        value = read_code(item.get("ConceptCodeSequence"))
        if concept is None or value is None:
            w.warnings.append(f"{p}: CODE item without usable codes skipped")
        else:
            w.coded.append(
                CodedItem(
                    path=p, concept=concept, value=value, modifiers=tuple(mods), source_uid=w.uid
                )
            )
    children = _children(item, p, w)
    if not children:
        return
    if vt == "CONTAINER":
        passed = [
            Modifier(name=m.name, value=m.value, inherited=True)
            for m in mods
            if m.name.key not in NOT_INHERITED
            and (m.inherited or _rel_of(item, m) in INHERITED_RELATIONSHIPS)
        ]
    else:
        passed = list(inherited)
    # modifier children were consumed above; walk the rest (containers, NUMs, nested items)
    _walk(children, passed, p, w, depth + 1)


#: the Value Types of SR content items (PS3.3 C.17.3.2.1, Table C.17-9 and its extensions)
VALUE_TYPES = frozenset(
    {
        "TEXT",
        "NUM",
        "CODE",
        "DATETIME",
        "DATE",
        "TIME",
        "UIDREF",
        "PNAME",
        "COMPOSITE",
        "IMAGE",
        "WAVEFORM",
        "SCOORD",
        "SCOORD3D",
        "TCOORD",
        "CONTAINER",
        "TABLE",
    }
)


def _invalid_value_type(
    item: Dataset, vt: str, inherited: list[Modifier], p: str, w: _Walk
) -> None:
    """A content item whose Value Type is not one of PS3.3's: when it carries a measured value
    it is reported (and excluded) with the reason, never dropped; otherwise a warning."""
    why = (
        f"invalid Value Type {vt!r} (PS3.3 C.17.3.2.1: one of the defined terms, upper case, "
        "e.g. NUM); its value is not used"
    )
    concept = read_code(item.get("ConceptNameCodeSequence"))
    if item.get("MeasuredValueSequence") is None or concept is None:
        w.warnings.append(f"{p}: content item with {why}")
        return
    value, unit, _ = _num(item, p, w)
    w.observations.append(
        Observation(
            path=p,
            concept=concept,
            value=value,
            unit=unit,
            modifiers=tuple(_own_modifiers(item, p, w) + list(inherited)),
            source_uid=w.uid,
            problem=why,
        )
    )


def _rel_of(item: Dataset, mod: Modifier) -> str:
    for child in item.get("ContentSequence") or []:
        if _text(child.get("ValueType")) == "CODE":
            name = read_code(child.get("ConceptNameCodeSequence"))
            if name is not None and name == mod.name:
                return _text(child.get("RelationshipType"))
    return ""


def _age_from_as(text: str) -> float | None:
    m = _AS.match(text)
    if m is None:
        return None
    return int(m.group(1)) * _AS_FACTOR[m.group(2)]


def _parse_date(text: str) -> dt.date | None:
    try:
        return dt.datetime.strptime(text[:8], "%Y%m%d").date()
    except ValueError:
        return None


def _patient_age(ds: Dataset, obs: list[Observation], warnings: list[str]) -> float | None:
    raw = _text(ds.get("PatientAge"))
    if raw:
        age = _age_from_as(raw)
        if age is not None:
            return round(age, 4)
        warnings.append(f"Patient's Age {raw!r} is not a DICOM age string; ignored")
    for o in obs:
        if o.concept.key == SUBJECT_AGE and o.value is not None and o.unit is not None:
            factor = AGE_UNITS.get(o.unit.value)
            if factor is not None:
                return round(o.value * factor, 4)
    birth = _parse_date(_text(ds.get("PatientBirthDate")))
    study = _parse_date(_text(ds.get("StudyDate")) or _text(ds.get("ContentDate")))
    if birth is not None and study is not None and study >= birth:
        return round((study - birth).days / 365.25, 4)
    return None


def _datetime(date: str, time: str) -> str:
    if not re.fullmatch(r"\d{8}", date):
        return ""
    t = re.sub(r"[^0-9.]", "", time)
    whole, _, frac = t.partition(".")
    whole = (whole + "000000")[:6] if whole else "000000"
    frac = (frac + "000000")[:6]
    return f"{date}{whole}.{frac}"


def created_at(ds: Dataset) -> str:
    """When a document was made, as "YYYYMMDDHHMMSS.ffffff" (sorts as text): its Content Date
    and Time (SR Document General module, PS3.3 C.17.2), else its Instance Creation Date and
    Time (SOP Common module, PS3.3 C.12.1); "" when it carries neither in a valid form."""
    for d, t in (("ContentDate", "ContentTime"), ("InstanceCreationDate", "InstanceCreationTime")):
        value = _datetime(_text(ds.get(d)), _text(ds.get(t)))
        if value:
            return value
    return ""


def _template(root: Any, title: Code | None, top: list[Dataset]) -> str | None:
    try:
        seq = root.get("ContentTemplateSequence")
        if seq:
            tid = _text(seq[0].get("TemplateIdentifier"))
            if tid:
                return tid
    except Exception:
        pass
    names = set()
    for child in top:
        if not isinstance(child, _ITEM_TYPES):
            continue
        c = read_code(child.get("ConceptNameCodeSequence"))
        if c is not None:
            names.add(c.key)
    if names & {("DCM", "125301"), ("DCM", "125302"), ("DCM", "125303")}:
        return "5300"
    if title is not None and title.key == ("DCM", "125200"):
        return "5200"
    return None


_IDENTIFYING_UIDS = (
    ("SOPInstanceUID", "SOP Instance UID"),
    ("StudyInstanceUID", "Study Instance UID"),
    ("SeriesInstanceUID", "Series Instance UID"),
)


def read_document(ds: Dataset) -> SourceDocument:
    """Observations, coded items and identity of one SR dataset.

    Raises :class:`RejectedInput` when the object is not a supported SR or has no content."""
    if not isinstance(ds, Dataset):
        raise RejectedInput("not a DICOM dataset")
    try:
        return _read(ds)
    except RejectedInput:
        raise
    except Exception as exc:  # anything unexpected in a malformed object
        raise RejectedInput(f"malformed SR object ({type(exc).__name__}: {exc})") from None


def _read(ds: Dataset) -> SourceDocument:
    # the content tree from its encoded bytes when it is in the plain form (fast), else through
    # pydicom's elements; both give the same values (see _decoded_root)
    try:
        root: Any = _decoded_root(ds)
    except _NotPlain:
        root = ds
    sop_class = _text(ds.get("SOPClassUID"))
    if not sop_class:
        raise RejectedInput("no SOP Class UID: not a DICOM composite object")
    if sop_class not in SUPPORTED_SR_SOP_CLASSES:
        name = pydicom.uid.UID(sop_class).name if pydicom.uid.UID(sop_class).is_valid else ""
        shown = f"{name} ({sop_class})" if name and name != sop_class else sop_class
        raise RejectedInput(f"not a structured report: SOP class {shown} is not an SR class")
    uid = _text(ds.get("SOPInstanceUID"))
    if not uid:
        raise RejectedInput("no SOP Instance UID")
    # a result references its sources by these UIDs (PS3.3 C.17.2.3): they must be valid
    for keyword, name in _IDENTIFYING_UIDS:
        value = _text(ds.get(keyword))
        if not is_valid_uid(value):
            shown = repr(value[:80]) if value else "missing"
            raise RejectedInput(
                f"{name} {shown} is not a valid DICOM UID (PS3.5 9.1); "
                "a result could not reference this object"
            )
    if _text(root.get("ValueType")) not in ("", "CONTAINER"):
        raise RejectedInput("root content item is not a CONTAINER")
    top = root.get("ContentSequence")
    if top is None or len(top) == 0:
        raise RejectedInput(f"{SUPPORTED_SR_SOP_CLASSES[sop_class]} has no content tree")
    w = _Walk(uid=uid)
    top_items = [c for c in top if isinstance(c, _ITEM_TYPES)]
    title = read_code(root.get("ConceptNameCodeSequence"))
    root_mods = [
        Modifier(name=m.name, value=m.value, inherited=True)
        for m in _own_modifiers(root, "1", w)
        if m.name.key not in NOT_INHERITED and _rel_of(root, m) in INHERITED_RELATIONSHIPS
    ]
    _walk(top_items, root_mods, "1", w, 1)
    warnings = list(w.warnings)
    try:
        age = _patient_age(ds, w.observations, warnings)
    except Exception as exc:  # malformed patient attributes: no age, not a rejection
        warnings.append(f"patient age unreadable ({type(exc).__name__}); ignored")
        age = None
    try:
        created = created_at(ds)
    except Exception as exc:
        warnings.append(f"content date/time unreadable ({type(exc).__name__}); ignored")
        created = ""
    return SourceDocument(
        sop_instance_uid=uid,
        sop_class_uid=sop_class,
        study_instance_uid=_text(ds.get("StudyInstanceUID")),
        series_instance_uid=_text(ds.get("SeriesInstanceUID")),
        created=created,
        template=_template(root, title, top_items),
        document_title=title,
        patient_age_years=age,
        observations=tuple(w.observations),
        coded_items=tuple(w.coded),
        by_reference_items=w.by_reference,
        warnings=tuple(warnings),
    )


# -- content tree from the encoded bytes -------------------------------------------------------
#
# pydicom decodes a sequence item by item into Dataset objects, which costs far more than the
# walk itself.  The walk reads a handful of elements per content item, so those are decoded here
# straight from the element bytes into plain dicts (_Item) keyed by keyword, holding the value
# pydicom would give.  Anything outside the plain form decoded here (big endian, a VR other than
# the dictionary's, multiple values, a number pydicom would reinterpret, text in a character set
# other than a single-byte or UTF-8 one, lengths that do not fit) raises _NotPlain and the whole
# document is read through pydicom instead, so the result never depends on which way was taken.


class _Item(dict):
    """A content item (or code, measured-value, template item): {keyword: value}."""

    __slots__ = ()


_ITEM_TYPES = (Dataset, _Item)


class _NotPlain(Exception):
    """Not in the form decoded here: read the document through pydicom."""


#: the elements the walk reads: tag -> (keyword, dictionary VR) (PS3.6)
_WANTED: dict[int, tuple[str, str]] = {
    tag_for_keyword(k): (k, str(dictionary_VR(k)))  # type: ignore[misc]
    for k in (
        "ValueType",
        "RelationshipType",
        "ConceptNameCodeSequence",
        "ConceptCodeSequence",
        "ContentSequence",
        "ReferencedContentItemIdentifier",
        "MeasuredValueSequence",
        "MeasurementUnitsCodeSequence",
        "FloatingPointValue",
        "NumericValue",
        "NumericValueQualifierCodeSequence",
        "CodingSchemeDesignator",
        "CodeValue",
        "LongCodeValue",
        "URNCodeValue",
        "CodeMeaning",
        "ContentTemplateSequence",
        "TemplateIdentifier",
    )
}
_WANTED_VR_BYTES = {tag: vr.encode() for tag, (_, vr) in _WANTED.items()}
_SPECIFIC_CHARACTER_SET = 0x00080005
_KNOWN_VRS = frozenset(v.value.encode() for v in _VR)
_SHORT_VRS = _KNOWN_VRS - {
    b"OB",
    b"OD",
    b"OF",
    b"OL",
    b"OV",
    b"OW",
    b"SQ",
    b"SV",
    b"UC",
    b"UN",
    b"UR",
    b"UT",
    b"UV",
}
#: a plain decimal string: what pydicom turns into the same float as float() does (PS3.5 6.2 DS)
_PLAIN_DS = re.compile(r" *[+-]?(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d+)? *")
#: single-byte and UTF-8 character sets: a value decodes the same as a whole (no ISO 2022)
_PLAIN_CODECS = frozenset({"iso8859", "latin_1", "UTF8", "utf_8"}) | {
    f"iso8859_{n}" for n in range(2, 16)
}
_MAX_ITEM_DEPTH = 128


@dataclass(frozen=True)
class _Coding:
    implicit: bool
    codec: str  # Python codec of SH / LO / UC text (the data set's character set)


def _decoded_root(ds: Dataset) -> _Item:
    """The root content item with its tree decoded from the element bytes; _NotPlain when any
    element the walk needs is not in the plain form."""
    charset = ds.get_item(_SPECIFIC_CHARACTER_SET, keep_deferred=True)
    if isinstance(charset, RawDataElement):
        raise _NotPlain  # pydicom decodes it on reading; not here then
    try:
        codecs = convert_encodings(None if charset is None else charset.value)
    except Exception:
        raise _NotPlain from None
    if len(codecs) != 1 or codecs[0] not in _PLAIN_CODECS:
        raise _NotPlain
    return _item_of(ds, codecs[0], root=True)


def _item_of(ds: Dataset, codec: str, *, root: bool = False) -> _Item:
    """A pydicom data set (already split into elements) as an _Item."""
    item = _Item()
    for tag, (keyword, vr) in _WANTED.items():
        elem = ds.get_item(tag, keep_deferred=True)  # never converts
        if elem is None:
            continue
        if isinstance(elem, RawDataElement):
            if not elem.is_little_endian or elem.value is None or elem.length == _UNDEFINED:
                raise _NotPlain
            if elem.VR is not None and vr != elem.VR:
                raise _NotPlain
            coding = _Coding(bool(elem.is_implicit_VR), codec)
            data = elem.value
            if vr == "SQ":
                item[keyword] = _sequence(data, 0, len(data), True, coding, True, 0)[0]
            else:
                item[keyword] = _value(vr, data, coding)
        elif elem.VR == "SQ":
            children = []
            for child in elem.value:
                if not isinstance(child, Dataset):
                    raise _NotPlain
                children.append(_item_of(child, codec))
            item[keyword] = children
        else:  # set in memory or decoded already: the value pydicom gives
            item[keyword] = elem.value
    if not root and _SPECIFIC_CHARACTER_SET in ds:
        raise _NotPlain  # an item with its own character set
    return item


def _sequence(
    buf: bytes, pos: int, end: int, defined: bool, coding: _Coding, keep: bool, depth: int
) -> tuple[list[_Item], int]:
    """The items of a sequence value starting at ``pos``: all of ``pos..end`` when ``defined``,
    else up to its Sequence Delimitation Item.  Returns (items, position after the value)."""
    if depth > _MAX_ITEM_DEPTH:
        raise _NotPlain
    items: list[_Item] = []
    while True:
        if defined and pos == end:
            return items, pos
        if pos + 8 > end:
            raise _NotPlain
        group, elem, length = struct.unpack_from("<HHI", buf, pos)
        pos += 8
        if group != 0xFFFE:
            raise _NotPlain
        if elem == _SEQ_END and not defined and length == 0:
            return items, pos
        if elem != _ITEM:
            raise _NotPlain
        if length == _UNDEFINED:
            item, pos = _elements(buf, pos, end, None, coding, keep, depth + 1)
        else:
            stop = pos + length
            if stop > end:
                raise _NotPlain
            item, pos = _elements(buf, pos, stop, stop, coding, keep, depth + 1)
        items.append(item)


_EXPLICIT_HEAD = struct.Struct("<HH2sH")  # tag, VR, 2-byte length (PS3.5 7.1.2)
_IMPLICIT_HEAD = struct.Struct("<HHI")  # tag, 4-byte length (PS3.5 7.1.3)
_LENGTH_32 = struct.Struct("<I")
#: how a wanted element is decoded: a sequence, text in the default repertoire, text in the
#: data set's character set, or another VR (_value)
_SEQ, _DEFAULT_TEXT, _CHARSET_TEXT, _OTHER = range(4)
_HOW: dict[int, tuple[str, str, bytes, int]] = {
    tag: (
        keyword,
        vr,
        vr.encode(),
        _SEQ
        if vr == "SQ"
        else _DEFAULT_TEXT
        if vr == "CS"
        else _CHARSET_TEXT
        if vr in ("SH", "LO", "UC")
        else _OTHER,
    )
    for tag, (keyword, vr) in _WANTED.items()
}


#: decoded small sequence values (code sequences, mostly) by their bytes: the same few dozen
#: recur in every SR.  The items are shared, so nothing may change a decoded item.
_SMALL_SEQUENCES: dict[tuple[bytes, _Coding], list[_Item]] = {}
_SMALL = 256


def _small_sequence(buf: bytes, pos: int, after: int, coding: _Coding, depth: int) -> list[_Item]:
    """The items of the defined-length sequence value ``buf[pos:after]``."""
    if after - pos > _SMALL or depth > _MAX_ITEM_DEPTH - _SMALL // 8:
        return _sequence(buf, pos, after, True, coding, True, depth)[0]
    key = (buf[pos:after], coding)
    items = _SMALL_SEQUENCES.get(key)
    if items is None:
        items = _sequence(buf, pos, after, True, coding, True, depth)[0]
        if len(_SMALL_SEQUENCES) >= _CACHE_SIZE:
            _SMALL_SEQUENCES.clear()
        _SMALL_SEQUENCES[key] = items
    return items


def _elements(
    buf: bytes,
    pos: int,
    end: int,
    stop: int | None,
    coding: _Coding,
    keep: bool,
    depth: int,
) -> tuple[_Item, int]:
    """The elements of one item from ``pos``: up to ``stop``, or (``stop`` None) up to its Item
    Delimitation Item.  Only the wanted elements are decoded (and only when ``keep``); the
    others are stepped over as pydicom does (undefined-length sequences parsed, the rest by
    length)."""
    item = _Item()
    implicit = coding.implicit
    limit = end if stop is None else stop
    how_of = _HOW.get
    while pos != stop:
        if pos + 8 > limit:
            raise _NotPlain
        if implicit:
            group, elem, length = _IMPLICIT_HEAD.unpack_from(buf, pos)
            vr = None
        else:
            group, elem, vr, length = _EXPLICIT_HEAD.unpack_from(buf, pos)
        if group == 0xFFFE:
            if stop is None and elem == _ITEM_END and buf[pos + 4 : pos + 8] == b"\0\0\0\0":
                return item, pos + 8
            raise _NotPlain
        if implicit or vr in _SHORT_VRS:
            pos += 8
        elif vr in _KNOWN_VRS:
            if pos + 12 > limit:
                raise _NotPlain
            (length,) = _LENGTH_32.unpack_from(buf, pos + 8)
            pos += 12
        else:
            raise _NotPlain
        tag = group << 16 | elem
        if tag == _SPECIFIC_CHARACTER_SET:
            raise _NotPlain  # an item with its own character set
        how = how_of(tag)
        if how is not None and vr is not None and vr != how[2]:
            raise _NotPlain
        if length == _UNDEFINED:
            if how is not None:
                is_sequence = how[3] == _SEQ
            elif vr is not None:
                is_sequence = vr == b"SQ"
            else:
                try:
                    is_sequence = dictionary_VR(tag) == "SQ"
                except KeyError:
                    is_sequence = False
            if not is_sequence:
                raise _NotPlain
            items, pos = _sequence(buf, pos, end, False, coding, keep and how is not None, depth)
            if keep and how is not None:
                item[how[0]] = items
            continue
        after = pos + length
        if after > limit:
            raise _NotPlain
        if keep and how is not None:
            kind = how[3]
            if kind == _SEQ:
                item[how[0]] = _small_sequence(buf, pos, after, coding, depth)
            elif kind == _OTHER or length == 0:
                item[how[0]] = _value(how[1], buf[pos:after], coding)
            else:
                data = buf[pos:after]
                if b"\\" in data or b"\x1b" in data:
                    raise _NotPlain  # several values, or an escape sequence
                try:
                    text = data.decode("latin_1" if kind == _DEFAULT_TEXT else coding.codec)
                except UnicodeError:
                    raise _NotPlain from None
                item[how[0]] = text.rstrip(" \x00")
        pos = after
    return item, pos


def _value(vr: str, data: bytes, coding: _Coding) -> Any:
    """The value pydicom gives for a plain element of these VRs (pydicom.values converters)."""
    if not data:
        if vr in ("CS", "SH", "LO", "UC", "UR"):
            return ""
        raise _NotPlain
    if vr == "FD":
        if len(data) != 8:
            raise _NotPlain
        return struct.unpack("<d", data)[0]
    if vr == "UL":
        if len(data) % 4:
            raise _NotPlain
        values = list(struct.unpack(f"<{len(data) // 4}I", data))
        return values[0] if len(values) == 1 else values
    if vr == "DS":
        text = data.decode("latin_1")
        if _PLAIN_DS.fullmatch(text) is None:
            raise _NotPlain
        number = float(text.strip())
        if not math.isfinite(number):
            raise _NotPlain
        return number
    if vr == "UR":
        return data.decode("latin_1").rstrip()
    try:
        text = data.decode("latin_1" if vr == "CS" else coding.codec)
    except UnicodeError:
        raise _NotPlain from None
    if "\\" in text or "\x1b" in text:
        raise _NotPlain  # several values, or an escape sequence
    return text.rstrip(" \x00")


# -- structure check ---------------------------------------------------------------------------

#: explicit VR little endian VRs with a 2-byte reserved field and a 4-byte length (PS3.5 7.1.2)
_LONG_VRS = frozenset(
    {b"OB", b"OD", b"OF", b"OL", b"OV", b"OW", b"SQ", b"SV", b"UC", b"UN", b"UR", b"UT", b"UV"}
)
_UNDEFINED = 0xFFFFFFFF
_ITEM, _ITEM_END, _SEQ_END = 0xE000, 0xE00D, 0xE0DD
_MAX_NESTING = 256
IMPLICIT_VR_LE = "1.2.840.10008.1.2"
EXPLICIT_VR_LE = "1.2.840.10008.1.2.1"


class _Broken(Exception):
    pass


def _dataset_end(
    buf: bytes, pos: int, end: int, implicit: bool, depth: int, *, item: bool, order: str = "<"
) -> int:
    """Walk the elements from ``pos``; return where they stop.  ``item``: an undefined-length
    item, ended by an Item Delimitation Item; otherwise the elements fill ``pos..end``.
    ``order``: "<" little endian, ">" big endian (PS3.5 7.3)."""
    if depth > _MAX_NESTING:
        raise _Broken(f"sequences nested deeper than {_MAX_NESTING}")
    tag_format, short, long = f"{order}HH", f"{order}H", f"{order}I"
    while item or pos < end:
        if pos + 8 > end:
            raise _Broken(f"element header cut at byte {pos}")
        group, elem = struct.unpack_from(tag_format, buf, pos)
        if group == 0xFFFE:
            if item and elem == _ITEM_END:
                return pos + 8
            raise _Broken(f"unexpected delimiter (FFFE,{elem:04X}) at byte {pos}")
        vr = b""
        if implicit:
            (length,) = struct.unpack_from(long, buf, pos + 4)
            pos += 8
        elif (vr := buf[pos + 4 : pos + 6]) in _LONG_VRS:
            if pos + 12 > end:
                raise _Broken(f"element header cut at byte {pos}")
            (length,) = struct.unpack_from(long, buf, pos + 8)
            pos += 12
        else:
            (length,) = struct.unpack_from(short, buf, pos + 6)
            pos += 8
        if length == _UNDEFINED and vr == b"UN":
            # PS3.5 6.2.2: the value of an undefined-length UN element (a sequence relayed by
            # a system that did not know its VR) is encoded in implicit VR little endian
            pos = _sequence_end(buf, pos, end, True, depth + 1, "<")
        elif length == _UNDEFINED:
            pos = _sequence_end(buf, pos, end, implicit, depth + 1, order)
        elif pos + length > end:
            raise _Broken(
                f"element ({group:04X},{elem:04X}) needs {length} bytes, {end - pos} left"
            )
        else:
            pos += length
    return pos


def _sequence_end(
    buf: bytes, pos: int, end: int, implicit: bool, depth: int, order: str = "<"
) -> int:
    """Items of an undefined-length sequence from ``pos``; where its delimiter ends."""
    head = f"{order}HHI"
    while True:
        if pos + 8 > end:
            raise _Broken("sequence without its end (Sequence Delimitation Item)")
        group, elem, length = struct.unpack_from(head, buf, pos)
        pos += 8
        if group == 0xFFFE and elem == _SEQ_END:
            return pos
        if group != 0xFFFE or elem != _ITEM:
            raise _Broken(f"({group:04X},{elem:04X}) where a sequence item was expected")
        if length == _UNDEFINED:
            pos = _dataset_end(buf, pos, end, implicit, depth + 1, item=True, order=order)
        elif pos + length > end:
            raise _Broken(f"sequence item needs {length} bytes, {end - pos} left")
        else:
            pos += length


#: Explicit VR Big Endian (PS3.5 A.3; retired, still found in old archives)
EXPLICIT_VR_BE = "1.2.840.10008.1.2.2"


def structure_problem(data: bytes, transfer_syntax: str, start: int = 0) -> str | None:
    """Why the encoded data set ``data[start:]`` is cut short or damaged, or None when every
    element, sequence and item length fits what is there (PS3.5 7.1, 7.5).

    pydicom reads a file that ends inside a sequence without complaint and returns the items
    it found: a truncated measurement SR would then be graded from part of its content.
    Checked for implicit and explicit VR little endian and explicit VR big endian; other
    transfer syntaxes (deflated, compressed): None."""
    if transfer_syntax not in (IMPLICIT_VR_LE, EXPLICIT_VR_LE, EXPLICIT_VR_BE):
        return None
    order = ">" if transfer_syntax == EXPLICIT_VR_BE else "<"
    try:
        _dataset_end(
            data,
            start,
            len(data),
            transfer_syntax == IMPLICIT_VR_LE,
            0,
            item=False,
            order=order,
        )
    except (_Broken, struct.error) as exc:
        return str(exc) or "damaged"
    return None


def file_structure_problem(data: bytes, transfer_syntax: str) -> str | None:
    """:func:`structure_problem` for a Part 10 file (preamble, "DICM", file meta group)."""
    if data[128:132] != b"DICM":
        return None
    start = file_body_start(data)
    if start is None:
        return "file meta information cut short"
    return structure_problem(data, transfer_syntax, start)


#: byte size of one value of the binary number VRs (PS3.5 6.2)
_NUMBER_SIZES = {
    b"US": 2,
    b"SS": 2,
    b"UL": 4,
    b"SL": 4,
    b"FL": 4,
    b"AT": 4,
    b"FD": 8,
    b"SV": 8,
    b"UV": 8,
}


def _decodable_elements(buf: bytes, pos: int, end: int, stop: int | None, depth: int) -> int:
    """Step over the elements of an explicit VR little endian data set (``stop`` None: an item
    ended by its delimiter); _NotPlain where pydicom's decoding of a value might fail."""
    if depth > _MAX_ITEM_DEPTH:
        raise _NotPlain
    limit = end if stop is None else stop
    size_of = _NUMBER_SIZES.get
    while pos != stop:
        if pos + 8 > limit:
            raise _NotPlain
        group, elem, vr, length = _EXPLICIT_HEAD.unpack_from(buf, pos)
        if group == 0xFFFE:
            if stop is None and elem == _ITEM_END and buf[pos + 4 : pos + 8] == b"\0\0\0\0":
                return pos + 8
            raise _NotPlain
        if vr in _SHORT_VRS:
            pos += 8
        elif vr in _KNOWN_VRS and vr != b"UN":
            if pos + 12 > limit:
                raise _NotPlain
            (length,) = _LENGTH_32.unpack_from(buf, pos + 8)
            pos += 12
        else:
            raise _NotPlain  # unknown VR, or UN (pydicom may re-read it with another VR)
        if vr == b"SQ":
            small = length <= _SMALL and depth < _MAX_ITEM_DEPTH - _SMALL // 8
            if small and pos + length <= limit:
                value = buf[pos : pos + length]
                if value not in _DECODABLE:
                    _decodable_items(buf, pos, end, length, depth + 1)
                    if len(_DECODABLE) >= _CACHE_SIZE:
                        _DECODABLE.clear()
                    _DECODABLE.add(value)
                pos += length
            else:
                pos = _decodable_items(buf, pos, end, length, depth + 1)
            continue
        if length == _UNDEFINED or pos + length > limit:
            raise _NotPlain
        size = size_of(vr)
        if size is not None and length % size:
            raise _NotPlain
        pos += length
    return pos


#: small sequence values already stepped through without a problem (code sequences, mostly)
_DECODABLE: set[bytes] = set()


def _decodable_items(buf: bytes, pos: int, end: int, length: int, depth: int) -> int:
    defined = length != _UNDEFINED
    if defined:
        end = pos + length
        if end > len(buf):
            raise _NotPlain
    while True:
        if defined and pos == end:
            return pos
        if pos + 8 > end:
            raise _NotPlain
        group, elem, item_length = struct.unpack_from("<HHI", buf, pos)
        pos += 8
        if group == 0xFFFE and elem == _SEQ_END and not defined and item_length == 0:
            return pos
        if group != 0xFFFE or elem != _ITEM:
            raise _NotPlain
        if item_length == _UNDEFINED:
            pos = _decodable_elements(buf, pos, end, None, depth)
        elif pos + item_length > end:
            raise _NotPlain
        else:
            pos = _decodable_elements(buf, pos, end, pos + item_length, depth)


def decodes_without_error(data: bytes, transfer_syntax: str, start: int) -> bool:
    """True when every element of the explicit VR little endian data set ``data[start:]`` is in
    a form whose decoding by pydicom cannot fail (known VRs other than UN, lengths that fit,
    whole binary numbers, sequences of proper items); False means "not known", not "broken"."""
    if transfer_syntax != EXPLICIT_VR_LE:
        return False
    try:
        _decodable_elements(data, start, len(data), len(data), 0)
    except (_NotPlain, struct.error):
        return False
    return True


def file_body_start(data: bytes) -> int | None:
    """Where the data set of a Part 10 file starts (after the file meta group); None if not."""
    if data[128:132] != b"DICM":
        return None
    try:
        pos = _meta_end(data)
    except struct.error:
        return None
    return pos if pos <= len(data) else None


def _meta_end(data: bytes) -> int:
    """The offset just past the file meta group (group 0002, explicit VR little endian) of a
    Part 10 file; struct.error when an element header is cut short."""
    return _meta_walk(data, None)


#: the VRs of PS3.5 Table 6.2-1, as the two bytes of an explicit VR element
_KNOWN_VRS = frozenset(vr.value.encode("ascii") for vr in _VR)


def _meta_walk(data: bytes, values: dict[int, bytes] | None) -> int:
    pos = 132
    while pos + 8 <= len(data) and struct.unpack_from("<H", data, pos)[0] == 0x0002:
        if data[pos + 4 : pos + 6] not in _KNOWN_VRS:
            # the meta group is explicit VR (PS3.10 7.1); a damaged VR leaves the element's
            # length unknown (pydicom then guesses implicit VR), so nothing after it is trusted
            raise struct.error("file meta element with an unknown VR")
        if data[pos + 4 : pos + 6] in _LONG_VRS:
            (length,) = struct.unpack_from("<I", data, pos + 8)
            start = pos + 12
        else:
            (length,) = struct.unpack_from("<H", data, pos + 6)
            start = pos + 8
        if values is not None:
            values[struct.unpack_from("<H", data, pos + 2)[0]] = data[start : start + length]
        pos = start + length
    return pos


#: the file meta elements :func:`file_meta_uids` returns (PS3.10 Table 7.1-1)
_META_UIDS = {
    0x0002: "MediaStorageSOPClassUID",
    0x0003: "MediaStorageSOPInstanceUID",
    0x0010: "TransferSyntaxUID",
}


def file_meta_uids(data: bytes) -> dict[str, str] | None:
    """Media Storage SOP Class UID, Media Storage SOP Instance UID and Transfer Syntax UID
    from the file meta group of a Part 10 file's bytes, by keyword; None when the file has no
    Part 10 header, its meta group is cut short, or one of the three is missing or not
    ASCII."""
    if data[128:132] != b"DICM":
        return None
    values: dict[int, bytes] = {}
    try:
        end = _meta_walk(data, values)
    except struct.error:
        return None
    if end > len(data) or not all(values.get(e) for e in _META_UIDS):
        return None
    try:
        return {
            keyword: values[e].rstrip(b"\x00 ").decode("ascii") for e, keyword in _META_UIDS.items()
        }
    except UnicodeDecodeError:  # a UID is digits and dots (PS3.5 9.1)
        return None


def read_path(path: str | os.PathLike[str]) -> tuple[Dataset, SourceDocument]:
    """Read an SR file; RejectedInput for a missing, non-DICOM or unreadable file."""
    ds = load_path(path)
    return ds, read_document(ds)


def load_path(path: str | os.PathLike[str]) -> Dataset:
    """The data set of a DICOM file, every element decodable (what :func:`read_path` reads
    before the content tree); RejectedInput for a missing, non-DICOM or unreadable file."""
    p = os.fspath(path)
    if not os.path.exists(p):
        raise RejectedInput(f"file not found: {p}")
    if os.path.isdir(p):
        raise RejectedInput(f"is a directory, not a file: {p}")
    try:
        ds = pydicom.dcmread(p)
    except InvalidDicomError:
        raise RejectedInput(f"not a DICOM file: {p}") from None
    except Exception as exc:
        raise RejectedInput(
            f"unreadable or truncated DICOM file: {p} ({type(exc).__name__})"
        ) from None
    meta = getattr(ds, "file_meta", None)
    syntax = str(meta.get("TransferSyntaxUID", "")) if meta is not None else ""
    with open(p, "rb") as fh:
        data = fh.read()
    start = file_body_start(data)
    if start is None or not decodes_without_error(data, syntax, start):
        try:
            # decode every element now (a truncated or damaged file fails here, not later);
            # not needed when the bytes show that every value decodes
            for _ in ds.iterall():
                pass
        except Exception as exc:
            raise RejectedInput(
                f"unreadable or truncated DICOM file: {p} ({type(exc).__name__})"
            ) from None
    problem = file_structure_problem(data, syntax)
    if problem:
        raise RejectedInput(f"unreadable or truncated DICOM file: {p} ({problem})")
    return ds

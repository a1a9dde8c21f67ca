"""Content items of the result SR: small immutable value types (PS3.3 C.17.3).

The item checks its arguments when it is made, so an item that could not be encoded does not
exist: a coded concept needs a value, a scheme designator and a meaning within their VR limits;
a TEXT item needs a non-empty text (Text Value is Type 1, PS3.3 C.17.3.2.1); a NUM item needs a
finite number and a unit; a UIDREF or COMPOSITE item needs valid UIDs.  Relationship types are
highdicom's enumeration (``RelationshipTypeValues``, the Defined Terms of PS3.3 C.17.3.2.4).

The items carry no DICOM encoding of their own: :mod:`service.sr.encode` turns a tree of them
into the bytes of a Content Sequence.  They mirror highdicom's content item classes (same
attributes, same rules) without being pydicom datasets, which makes a result tree of a few
hundred items cheap to build; ``tests/test_sr_encode.py`` checks that highdicom's classes,
given the same arguments, encode to the same bytes.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass, field

from highdicom.sr import RelationshipTypeValues as Rel
from pydicom.sr.coding import Code

from service.sr.identity import is_valid_uid

__all__ = [
    "Code",
    "Item",
    "Reference",
    "Rel",
    "code_item",
    "composite_item",
    "container_item",
    "num_item",
    "reference_item",
    "text_item",
    "uidref_item",
]

# PS3.5 6.2: SH 16 characters, LO 64
_SH, _LO = 16, 64

#: checked concepts (a result names the same few dozen concepts hundreds of times)
_CHECKED: set[tuple[str, str, str, str | None]] = set()


#: control characters each text VR allows (PS3.5 6.2, Table 6.2-1): none in SH and LO (ESC only
#: for ISO 2022 code extensions, which a UTF-8 document does not use); TAB, LF, FF and CR in
#: ST, LT and UT.  SH and LO values must not hold a backslash (the value delimiter).
_ALLOWED_CONTROLS = {"SH": "", "LO": "", "ST": "\t\n\f\r", "LT": "\t\n\f\r", "UT": "\t\n\f\r"}
_CONTROLS = frozenset(chr(c) for c in (*range(0x20), *range(0x7F, 0xA0)))


def _banned_pattern(vr: str) -> re.Pattern[str]:
    """One character class of what ``vr`` does not allow (a result holds a hundred texts or
    more: one regular-expression search each instead of a test per character)."""
    banned = (_CONTROLS - set(_ALLOWED_CONTROLS[vr])) | ({"\\"} if vr in ("SH", "LO") else set())
    return re.compile("[" + "".join(re.escape(ch) for ch in sorted(banned)) + "]")


_BANNED = {vr: _banned_pattern(vr) for vr in _ALLOWED_CONTROLS}


def clean_text(value: str, vr: str) -> str:
    """``value`` with every character its VR does not allow (control characters; a backslash
    in SH or LO) replaced by a space: text copied from a source (a code meaning, a note) may
    hold them, and a result must not."""
    banned = _BANNED[vr]
    if banned.search(value) is None:
        return value
    cleaned = banned.sub(" ", value)
    return cleaned if cleaned.strip() else "?"


def _clean_code(code: Code) -> Code:
    """The code with its meaning cleaned for LO (the other parts are identifiers: refused by
    the checks below when they are not valid)."""
    meaning = clean_text(code.meaning, "LO")
    if meaning == code.meaning:
        return code
    return Code(code.value, code.scheme_designator, meaning, code.scheme_version)


def _check_code(code: Code, what: str) -> Code:
    if not isinstance(code, Code):
        raise TypeError(f"{what} must be a pydicom Code, not {type(code).__name__}")
    key = (code.value, code.scheme_designator, code.meaning, code.scheme_version)
    if key in _CHECKED:
        return code
    code = _clean_code(code)
    if not code.value or not code.scheme_designator or not code.meaning:
        raise ValueError(f"{what} needs a code value, a scheme designator and a meaning: {code}")
    if len(code.scheme_designator) > _SH:
        raise ValueError(f"{what}: scheme designator {code.scheme_designator!r} is over 16 chars")
    if len(code.meaning) > _LO:
        raise ValueError(f"{what}: code meaning {code.meaning!r} is over 64 characters")
    if code.scheme_version is not None and len(code.scheme_version) > _SH:
        raise ValueError(f"{what}: scheme version {code.scheme_version!r} is over 16 characters")
    _CHECKED.add((code.value, code.scheme_designator, code.meaning, code.scheme_version))
    return code


def _check_uid(value: str, what: str) -> str:
    if not is_valid_uid(value):
        raise ValueError(f"{what} {value!r} is not a valid DICOM UID")
    return value


def _check_rel(rel: Rel | None, *, root_allowed: bool) -> Rel | None:
    if rel is None:
        if not root_allowed:
            raise ValueError("only a container can be the root (no relationship type)")
        return None
    return Rel(rel)


#: value types this module makes (PS3.3 C.17.3.2.1)
VALUE_TYPES = frozenset({"CONTAINER", "TEXT", "CODE", "NUM", "UIDREF", "COMPOSITE"})


@dataclass(frozen=True, slots=True)
class Item:
    """One content item.  The constructor checks every argument (the ``*_item`` functions
    below are the readable way to call it): an item that could not be encoded cannot exist."""

    value_type: str  # PS3.3 C.17.3.2.1 Value Type
    name: Code
    relationship: Rel | None
    children: tuple[Item | Reference, ...] = ()
    #: the item's value: Code (CODE), str (TEXT, UIDREF), (number, unit Code) (NUM),
    #: (SOP Class UID, SOP Instance UID) (COMPOSITE), None (CONTAINER)
    value: object = field(default=None)

    def __post_init__(self) -> None:
        vt = self.value_type
        if vt not in VALUE_TYPES:
            raise ValueError(f"value type {vt!r} is not one of {sorted(VALUE_TYPES)}")
        name = _check_code(self.name, "concept name")
        if name is not self.name:
            object.__setattr__(self, "name", name)
        _check_rel(self.relationship, root_allowed=vt == "CONTAINER")
        if self.relationship is not None and not isinstance(self.relationship, Rel):
            object.__setattr__(self, "relationship", Rel(self.relationship))
        for c in self.children:
            if isinstance(c, Reference):
                continue
            if not isinstance(c, Item) or c.relationship is None:
                raise ValueError("a child content item needs a relationship type")
        value = self.value
        if vt == "CONTAINER":
            if value is not None:
                raise ValueError("a CONTAINER has no value")
        elif vt == "TEXT":
            if not isinstance(value, str) or not value:
                raise ValueError(f"TEXT item {name.meaning!r} needs a non-empty text value")
            object.__setattr__(self, "value", clean_text(value, "UT"))  # Text Value is UT
        elif vt == "CODE":
            code = _check_code(value, "coded value")  # type: ignore[arg-type]
            if code is not value:
                object.__setattr__(self, "value", code)
        elif vt == "NUM":
            number, unit = value  # type: ignore[misc]
            if isinstance(number, bool) or not isinstance(number, int | float):
                raise TypeError(f"NUM item {name.meaning!r}: value must be int or float")
            if not math.isfinite(number):
                raise ValueError(f"NUM item {name.meaning!r}: value {number!r} is not finite")
            checked = _check_code(unit, "unit")
            if checked is not unit:
                object.__setattr__(self, "value", (number, checked))
        elif vt == "UIDREF":
            _check_uid(value, "UIDREF value")  # type: ignore[arg-type]
        else:  # COMPOSITE
            sop_class, sop_instance = value  # type: ignore[misc]
            _check_uid(sop_class, "referenced SOP Class UID")
            _check_uid(sop_instance, "referenced SOP Instance UID")

    def with_children(
        self, children: tuple[Item | Reference | None, ...] | list[Item | Reference | None]
    ) -> Item:
        """The same item with ``children`` (None entries dropped) as its content."""
        kept = tuple(c for c in children if c is not None)
        return Item(self.value_type, self.name, self.relationship, kept, self.value)


@dataclass(frozen=True, slots=True)
class Reference:
    """A by-reference relationship (PS3.3 C.17.3.2.5): a child that names another content item
    of the same tree, by its position, instead of holding it.  ``target`` is the item itself;
    :mod:`service.sr.encode` writes its position (Referenced Content Item Identifier) when the
    whole tree is laid out.  Comprehensive SR allows by-reference INFERRED FROM and HAS
    PROPERTIES relationships (PS3.3 A.35.3.3.1.2, Table A.35.3-2)."""

    relationship: Rel
    target: Item

    def __post_init__(self) -> None:
        rel = _check_rel(self.relationship, root_allowed=False)
        if rel not in _BY_REFERENCE:
            raise ValueError(f"a by-reference relationship cannot be {rel}")
        object.__setattr__(self, "relationship", rel)
        if not isinstance(self.target, Item):
            raise TypeError("a by-reference relationship needs a content item as its target")
        if self.target.value_type == "CONTAINER" and self.target.relationship is None:
            raise ValueError("the root container cannot be the target of a reference")


#: relationship types used by reference here (PS3.3 Table A.35.3-2 allows them by reference)
_BY_REFERENCE = frozenset({Rel.INFERRED_FROM, Rel.HAS_PROPERTIES})


def reference_item(rel: Rel, target: Item) -> Reference:
    return Reference(rel, target)


def container_item(
    name: Code, children: list[Item | Reference | None], rel: Rel | None = Rel.CONTAINS
) -> Item:
    """CONTAINER with Continuity of Content CONTINUOUS (highdicom's default); ``rel`` None makes
    it a document's root."""
    return Item("CONTAINER", name, rel).with_children(children)


def text_item(name: Code, value: str, rel: Rel) -> Item:
    return Item("TEXT", name, rel, (), value)


def code_item(name: Code, value: Code, rel: Rel) -> Item:
    return Item("CODE", name, rel, (), value)


def num_item(name: Code, value: float, unit: Code, rel: Rel) -> Item:
    return Item("NUM", name, rel, (), (value, unit))


def uidref_item(name: Code, uid: str, rel: Rel) -> Item:
    return Item("UIDREF", name, rel, (), uid)


def composite_item(name: Code, sop_class_uid: str, sop_instance_uid: str, rel: Rel) -> Item:
    return Item("COMPOSITE", name, rel, (), (str(sop_class_uid), str(sop_instance_uid)))

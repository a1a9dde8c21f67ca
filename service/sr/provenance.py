"""Recognise what this software wrote itself: its result SRs and its summary PDFs.

A PACS that forwards every new object of a study to every node that took part in it sends the
node's own results back to it.  Graded again, a result would become the source of a new
result, and so on.  An object is the node's own when it carries any of the marks every result
and every summary is written with, whatever version or configuration of the node made it:

* equipment identity (General Equipment module, PS3.3 C.7.5.1): Manufacturer, Manufacturer's
  Model Name, or Software Versions naming this software; the Device UID of its device
  observer (written into every result's header and content, PS3.16 TID 1004);
* the project's own coding scheme ``99DSRG``: declared in the Coding Scheme Identification
  Sequence (PS3.3 C.12.1) or used by a concept in the document title or the content tree.

Neither the file name, the document title's wording nor the template's layout is used: they
change between versions.  The UID root alone is not a mark either: a hospital's UID root is
shared by its other equipment, and results without a configured root use the UUID-derived
root 2.25 that any device may use (PS3.5 Annex B.2).
"""

from __future__ import annotations

from collections.abc import Iterator
from typing import Any

from pydicom import Dataset
from pydicom.multival import MultiValue
from pydicom.uid import EncapsulatedPDFStorage

from service import SOFTWARE_NAME
from service.sr.codes import PRIVATE_SCHEME
from service.sr.write import DEVICE_UID, MANUFACTURER, MODEL_NAME

#: what the journal and the command line call an object recognised by :func:`own_result_reason`
IGNORED_OWN_RESULT = "ignored: own result"

#: content items looked at before giving up on finding a private code (a result names its
#: grade among its first few items; a measurement SR can hold thousands)
_MAX_ITEMS = 2000

#: the tags :func:`own_result_reason` reads at the root of the data set, all before Study
#: Instance UID (0020,000D): what a receiver decoding only the identifying attributes needs
EQUIPMENT_TAGS = (
    0x00080070,  # Manufacturer
    0x00080110,  # Coding Scheme Identification Sequence
    0x00081090,  # Manufacturer's Model Name
    0x00181002,  # Device UID
    0x00181020,  # Software Versions
)


def _text(ds: Dataset, keyword: str) -> list[str]:
    """The values of a text attribute, stripped; [] when absent or undecodable."""
    try:
        value = ds.get(keyword)
    except Exception:
        return []
    if value is None:
        return []
    values = list(value) if isinstance(value, MultiValue | list | tuple) else [value]
    out = []
    for v in values:
        text = v.decode("latin-1") if isinstance(v, bytes) else str(v)
        if text.strip():
            out.append(text.strip())
    return out


def _named_software(text: str) -> bool:
    first = text.split()[0] if text.split() else ""
    return first.lower() == SOFTWARE_NAME


def _equipment_marks(ds: Dataset) -> list[str]:
    marks = []
    software = [s for s in _text(ds, "SoftwareVersions") if _named_software(s)]
    if software:
        marks.append(f"Software Versions {software[0]!r}")
    if MANUFACTURER in _text(ds, "Manufacturer"):
        marks.append(f"Manufacturer {MANUFACTURER!r}")
    if MODEL_NAME in _text(ds, "ManufacturerModelName"):
        marks.append(f"Manufacturer's Model Name {MODEL_NAME!r}")
    if DEVICE_UID in _text(ds, "DeviceUID"):
        marks.append("this software's Device UID")
    return marks


def _codes(item: Dataset) -> Iterator[Any]:
    for keyword in ("ConceptNameCodeSequence", "ConceptCodeSequence"):
        seq = item.get(keyword)
        if seq:
            yield from seq


def _uses_private_scheme(ds: Dataset) -> str:
    """Where ``99DSRG`` is declared or used ("" when nowhere)."""
    for item in ds.get("CodingSchemeIdentificationSequence") or ():
        if _text(item, "CodingSchemeDesignator")[:1] == [PRIVATE_SCHEME]:
            return f"declares the coding scheme {PRIVATE_SCHEME}"
    stack: list[Any] = [ds]
    seen = 0
    while stack and seen < _MAX_ITEMS:
        item = stack.pop()
        seen += 1
        for code in _codes(item):
            if _text(code, "CodingSchemeDesignator")[:1] == [PRIVATE_SCHEME]:
                return f"uses {PRIVATE_SCHEME} codes in its content"
        children = item.get("ContentSequence")
        if children:
            stack.extend(reversed(list(children)))
    return ""


def _kind(ds: Dataset) -> str:
    try:
        sop_class = str(ds.get("SOPClassUID", "") or "")
    except Exception:
        sop_class = ""
    return "summary PDF" if sop_class == EncapsulatedPDFStorage else "result SR"


def own_result_reason(dataset: Dataset) -> str | None:
    """Why ``dataset`` is a result SR or summary PDF written by this software (of any version
    or configuration), or None when it is not.  Never raises: an undecodable attribute is no
    mark."""
    marks = _equipment_marks(dataset)
    try:
        scheme = _uses_private_scheme(dataset)
    except Exception:
        scheme = ""
    if scheme:
        marks.append(scheme)
    if not marks:
        return None
    shown = "; ".join(marks[:2]) + (f"; {len(marks) - 2} more marks" if len(marks) > 2 else "")
    return f"{_kind(dataset)} written by {SOFTWARE_NAME} ({shown})"


def received_own_result_reason(identifying: Dataset, body: bytes, *, implicit: bool) -> str | None:
    """:func:`own_result_reason` for an object a receiver decoded only in part.

    ``identifying``: the root attributes up to Study Instance UID, with :data:`EQUIPMENT_TAGS`
    among them; ``body``: the data set's bytes.  The content tree is decoded only when its
    bytes hold the private scheme's designator at all."""
    reason = own_result_reason(identifying)
    if reason is not None or PRIVATE_SCHEME.encode("ascii") not in body:
        return reason
    from io import BytesIO

    from pydicom.filereader import read_dataset

    try:
        full = read_dataset(BytesIO(body), implicit, True)
    except Exception:
        return None
    return own_result_reason(full)

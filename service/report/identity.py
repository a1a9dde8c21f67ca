"""Who and which study a summary is about: taken from the source SRs' headers, shown as a
reader expects (names "Family, Given", dates YYYY-MM-DD, age in years)."""

from __future__ import annotations

import re
from datetime import date

import pydicom
from pydantic import BaseModel, ConfigDict

from service.errors import UserError


class _Frozen(BaseModel):
    model_config = ConfigDict(frozen=True, extra="forbid")


class SourceDescription(_Frozen):
    """One source SR as the header names it."""

    sop_instance_uid: str
    description: str = ""  # Series Description, else the document title's meaning
    manufacturer: str = ""
    model: str = ""


class SummaryIdentity(_Frozen):
    """Patient and study identity for the header, as plain strings in DICOM formats
    (dates YYYYMMDD, age as DICOM AS such as "064Y", sex M/F/O)."""

    patient_name: str = ""  # DICOM PN, e.g. "Quayle^Oona"
    patient_id: str = ""
    birth_date: str = ""
    age: str = ""
    sex: str = ""
    study_date: str = ""
    accession_number: str = ""
    study_description: str = ""
    institution: str = ""
    sources: tuple[SourceDescription, ...] = ()


def _text(ds: pydicom.Dataset, keyword: str) -> str:
    try:
        value = ds.get(keyword, None)
    except Exception:  # a malformed element must not stop the summary
        return ""
    if value is None:
        return ""
    if isinstance(value, pydicom.valuerep.PersonName):
        return str(value)
    if isinstance(value, pydicom.multival.MultiValue):
        return "\\".join(str(v) for v in value)
    return str(value).strip()


def _describe_source(ds: pydicom.Dataset) -> SourceDescription:
    description = _text(ds, "SeriesDescription")
    if not description:
        try:
            seq = ds.get("ConceptNameCodeSequence")
            if seq:
                description = str(seq[0].get("CodeMeaning", "")).strip()
        except Exception:
            description = ""
    return SourceDescription(
        sop_instance_uid=_text(ds, "SOPInstanceUID"),
        description=description,
        manufacturer=_text(ds, "Manufacturer"),
        model=_text(ds, "ManufacturerModelName"),
    )


def identity_from_dataset(ds: pydicom.Dataset, *more: pydicom.Dataset) -> SummaryIdentity:
    """Header identity from a source SR; further source SRs of the same study add to the list
    of sources.  Missing or malformed attributes give empty strings, never an exception."""
    if not isinstance(ds, pydicom.Dataset):
        raise UserError(f"identity_from_dataset needs a pydicom Dataset, got {type(ds).__name__}")
    return SummaryIdentity(
        patient_name=_text(ds, "PatientName"),
        patient_id=_text(ds, "PatientID"),
        birth_date=_text(ds, "PatientBirthDate"),
        age=_text(ds, "PatientAge"),
        sex=_text(ds, "PatientSex"),
        study_date=_text(ds, "StudyDate"),
        accession_number=_text(ds, "AccessionNumber"),
        study_description=_text(ds, "StudyDescription"),
        institution=_text(ds, "InstitutionName"),
        sources=tuple(_describe_source(d) for d in (ds, *more)),
    )


# ---------------------------------------------------------------------------------------------
# As a reader reads them
# ---------------------------------------------------------------------------------------------


def shown_date(value: str) -> str:
    v = value.strip()
    if re.fullmatch(r"\d{8}", v):
        return f"{v[:4]}-{v[4:6]}-{v[6:]}"
    return v


def _parse_date(value: str) -> date | None:
    v = value.strip()
    if not re.fullmatch(r"\d{8}", v):
        return None
    try:
        return date(int(v[:4]), int(v[4:6]), int(v[6:]))
    except ValueError:
        return None


def shown_age(identity: SummaryIdentity) -> str:
    """Patient's Age (DICOM AS) in words, else computed from the birth and study dates."""
    m = re.fullmatch(r"(\d{3})([DWMY])", identity.age.strip())
    if m:
        unit = {"D": "days", "W": "weeks", "M": "months", "Y": "years"}[m.group(2)]
        return f"{int(m.group(1))} {unit}"
    born, seen = _parse_date(identity.birth_date), _parse_date(identity.study_date)
    if born and seen and seen >= born:
        years = seen.year - born.year - ((seen.month, seen.day) < (born.month, born.day))
        return f"{years} years"
    return identity.age.strip()


def shown_name(pn: str) -> str:
    """DICOM PN "Family^Given^Middle^Prefix^Suffix" as "Family, Prefix Given Middle Suffix"."""
    alphabetic = pn.split("=")[0]
    parts = [p.strip() for p in alphabetic.split("^")]
    parts += [""] * (5 - len(parts))
    family, given, middle, prefix, suffix = parts[:5]
    rest = " ".join(p for p in (prefix, given, middle) if p)
    name = f"{family}, {rest}" if family and rest else family or rest
    return f"{name} {suffix}".strip()


SEX_WORDS = {"M": "male", "F": "female", "O": "other"}

"""Wrap the one-page PDF summary as a DICOM Encapsulated PDF instance.

The object (SOP Class 1.2.840.10008.5.1.4.1.1.104.1, PS3.3 A.45.1) sits in the patient and
study of its source, in a series of its own, and names the result SR it summarises (and the
source SR) in the Source Instance Sequence of the Encapsulated Document module (PS3.3
C.24.2): the PDF was derived from those instances.  highdicom has no encapsulated-document
class, so the dataset is built with pydicom.
"""

from __future__ import annotations

from collections.abc import Iterable
from datetime import datetime

import pydicom
from pydicom.dataset import Dataset, FileMetaDataset
from pydicom.uid import (
    PYDICOM_IMPLEMENTATION_UID,
    EncapsulatedPDFStorage,
    ExplicitVRLittleEndian,
)
from pydicom.valuerep import DA, TM

from service import SOFTWARE_NAME, __version__
from service.errors import UserError
from service.sr.identity import is_valid_uid
from service.sr.write import MANUFACTURER, MODEL_NAME

MIME_TYPE = "application/pdf"
DOCUMENT_TITLE = "Automated LV diastolic function assessment: summary (decision support)"
SERIES_DESCRIPTION = "Automated LV diastolic function assessment (summary PDF)"
#: default series number: after the scanner's series and the result SR's (9901)
SERIES_NUMBER = 9902


#: Patient module (PS3.3 C.7.1.1), General Study (C.7.2.1) and Patient Study (C.7.2.2)
#: attributes copied from the source when present.  The first group is Type 2 in the IOD and
#: is written empty when the source lacks it.
_TYPE2_IDENTITY = (
    "PatientName",
    "PatientID",
    "PatientBirthDate",
    "PatientSex",
    "StudyDate",
    "StudyTime",
    "ReferringPhysicianName",
    "StudyID",
    "AccessionNumber",
)
_OPTIONAL_IDENTITY = (
    "IssuerOfPatientID",
    "IssuerOfPatientIDQualifiersSequence",
    "OtherPatientIDsSequence",
    "PatientBirthTime",
    "IssuerOfAccessionNumberSequence",
    "StudyDescription",
    "PatientAge",
    "PatientSize",
    "PatientWeight",
)


def summary_uids(
    result_sr_uid: str, study_instance_uid: str, *, root: str | None = None
) -> tuple[str, str]:
    """(SOP Instance UID, Series Instance UID) of the summary of one result SR: derived from
    the result's UID (and the study, for the series), so re-grading the same sources under the
    same rules gives the same summary instance, and every summary of a study shares a series."""
    from service.sr.identity import derive_uid

    _check_uid(result_sr_uid, "result SR SOP Instance UID")
    _check_uid(study_instance_uid, "Study Instance UID")
    instance = derive_uid(SOFTWARE_NAME, "summary pdf", result_sr_uid, root=root)
    series = derive_uid(SOFTWARE_NAME, "summary pdf series", study_instance_uid, root=root)
    return instance, series


def _check_uid(value: object, what: str) -> str:
    if not is_valid_uid(value):
        raise UserError(f"{what} {value!r} is not a valid DICOM UID")
    return value


def _reference(ds: Dataset, what: str) -> Dataset:
    item = Dataset()
    item.ReferencedSOPClassUID = _check_uid(str(ds.get("SOPClassUID", "")), f"{what} SOP Class UID")
    item.ReferencedSOPInstanceUID = _check_uid(
        str(ds.get("SOPInstanceUID", "")), f"{what} SOP Instance UID"
    )
    return item


def _copy(source: Dataset, target: Dataset, keywords: Iterable[str], *, type2: bool) -> None:
    for kw in keywords:
        elem = source.data_element(kw) if kw in source else None
        if elem is not None and not elem.is_empty:
            target.add(pydicom.DataElement(elem.tag, elem.VR, elem.value))
        elif type2:
            setattr(target, kw, "")


def build_encapsulated_pdf(
    pdf: bytes,
    source: Dataset,
    *,
    result_sr: Dataset | None,
    sop_instance_uid: str,
    series_instance_uid: str,
    document_title: str,
    content_datetime: datetime | None = None,
    series_number: int = SERIES_NUMBER,
    instance_number: int = 1,
) -> Dataset:
    """An Encapsulated PDF dataset (with file meta information) holding ``pdf``.

    Patient and study identity come from ``source``; the Source Instance Sequence names
    ``result_sr`` first (when given), then ``source``.  With ``content_datetime`` given, the
    output is fully determined by the arguments."""
    if not isinstance(pdf, bytes | bytearray) or not bytes(pdf[:5]) == b"%PDF-":
        raise UserError("the summary to encapsulate is not a PDF document (no %PDF- header)")
    if not isinstance(source, Dataset):
        raise UserError("the source of an Encapsulated PDF must be a DICOM dataset")
    study_uid = _check_uid(str(source.get("StudyInstanceUID", "")), "source Study Instance UID")
    _check_uid(sop_instance_uid, "SOP Instance UID")
    _check_uid(series_instance_uid, "Series Instance UID")
    if series_instance_uid == str(source.get("SeriesInstanceUID", "")):
        raise UserError("the summary needs a new series, not the source's series")
    if result_sr is not None:
        if str(result_sr.get("StudyInstanceUID", "")) != study_uid:
            raise UserError("the result SR belongs to another study than the source")
        if series_instance_uid == str(result_sr.get("SeriesInstanceUID", "")):
            raise UserError("the summary needs its own series, not the result SR's series")
    title = " ".join(str(document_title).split())
    if not title:
        raise UserError("an Encapsulated PDF needs a document title")
    if len(title) > 1024:  # ST holds at most 1024 characters (PS3.5 Table 6.2-1)
        raise UserError("the document title is longer than 1024 characters")
    if not 0 < series_number < 2**31 or not 0 < instance_number < 2**31:
        raise UserError("series and instance numbers must be positive (IS range)")

    when = content_datetime or datetime.now()
    ds = Dataset()
    ds.SpecificCharacterSet = "ISO_IR 192"  # UTF-8; identity strings are re-encoded
    # SOP Common (PS3.3 C.12.1)
    ds.SOPClassUID = EncapsulatedPDFStorage
    ds.SOPInstanceUID = sop_instance_uid
    ds.InstanceCreationDate = DA(when.date())
    ds.InstanceCreationTime = TM(when.time())
    if when.utcoffset() is not None:
        offset = int(when.utcoffset().total_seconds() // 60)  # type: ignore[union-attr]
        sign = "+" if offset >= 0 else "-"
        ds.TimezoneOffsetFromUTC = f"{sign}{abs(offset) // 60:02d}{abs(offset) % 60:02d}"

    # Patient, General Study, Patient Study: the source's identity
    _copy(source, ds, _TYPE2_IDENTITY, type2=True)
    _copy(source, ds, _OPTIONAL_IDENTITY, type2=False)
    ds.StudyInstanceUID = study_uid

    # Encapsulated Document Series (PS3.3 C.24.1)
    ds.Modality = "DOC"
    ds.SeriesInstanceUID = series_instance_uid
    ds.SeriesNumber = series_number
    ds.SeriesDescription = SERIES_DESCRIPTION

    # General Equipment (C.7.5.1) and SC Equipment (C.8.6.1)
    ds.Manufacturer = MANUFACTURER
    ds.ManufacturerModelName = MODEL_NAME
    ds.SoftwareVersions = f"{SOFTWARE_NAME} {__version__}"
    ds.ConversionType = "WSD"  # workstation (PS3.3 C.8.6.1 defined terms)

    # Encapsulated Document (C.24.2)
    ds.InstanceNumber = instance_number
    ds.ContentDate = DA(when.date())
    ds.ContentTime = TM(when.time())
    ds.AcquisitionDateTime = ""
    ds.BurnedInAnnotation = "YES"  # the page shows the patient's name and ID
    ds.RecognizableVisualFeatures = "NO"
    ds.DocumentTitle = title
    ds.ConceptNameCodeSequence = []
    references = [_reference(result_sr, "result SR")] if result_sr is not None else []
    if "SOPInstanceUID" in source and "SOPClassUID" in source:
        references.append(_reference(source, "source"))
    if references:
        ds.SourceInstanceSequence = references
    ds.MIMETypeOfEncapsulatedDocument = MIME_TYPE
    body = bytes(pdf)
    ds.EncapsulatedDocumentLength = len(body)  # before padding
    if len(body) % 2:
        body += b"\x00"  # OB values have even length (PS3.5 section 7.1)
    ds.EncapsulatedDocument = body

    meta = FileMetaDataset()
    meta.MediaStorageSOPClassUID = EncapsulatedPDFStorage
    meta.MediaStorageSOPInstanceUID = sop_instance_uid
    meta.TransferSyntaxUID = ExplicitVRLittleEndian
    meta.ImplementationClassUID = PYDICOM_IMPLEMENTATION_UID
    ds.file_meta = meta
    return ds

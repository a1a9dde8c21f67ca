"""The DICOM header of a result SR: every module of the Comprehensive SR IOD (PS3.3 A.35.3)
except the content tree.

Patient, General Study and Patient Study come from the first source, as highdicom's SR
constructor takes them: every root-level attribute the source has of the modules of the
Patient and Study information entities (the same five modules in every SR IOD).  The
result is in a new series (SR Document Series), made by this software (General Equipment),
COMPLETE, UNVERIFIED and PRELIMINARY (SR Document General, PS3.3 C.17.2), and lists its
sources as Current Requested Procedure Evidence (same study) or Pertinent Other Evidence
(another study), grouped by study and series (SOP Instance Reference Macro, PS3.3 C.17.2.3).

This builds what highdicom's ``ComprehensiveSR`` constructor builds, without its per-document
checks of a content tree that is made and checked elsewhere (:mod:`service.sr.content`).
``tests/test_sr_encode.py`` compares the two attribute by attribute.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from datetime import datetime

from pydicom import Dataset
from pydicom.datadict import dictionary_VR, tag_for_keyword
from pydicom.dataelem import RawDataElement
from pydicom.dataset import FileMetaDataset
from pydicom.sr.coding import Code
from pydicom.uid import ExplicitVRLittleEndian
from pydicom.valuerep import DA, TM

from service.model import InstanceRef
from service.sr.encode import (
    REF_SOP_SEQUENCE,
    code_sequence_value,
    element,
    raw_element,
    sequence_value,
    sop_reference,
    tag_bytes,
    text_value,
    uid_value,
)

COMPREHENSIVE_SR = "1.2.840.10008.5.1.4.1.1.88.33"

#: Type 2 attributes of the Patient and General Study modules (PS3.3 C.7.1.1, C.7.2.1):
#: present, empty when the source lacks them
TYPE2_FROM_SOURCE = (
    "PatientID",
    "PatientName",
    "PatientBirthDate",
    "PatientSex",
    "AccessionNumber",
    "StudyID",
    "StudyDate",
    "StudyTime",
    "ReferringPhysicianName",
)


#: Root-level attributes of the modules of the Patient and Study information entities of every
#: SR IOD (PS3.3 A.35), as highdicom 0.28's module tables list them (derived from PS3.3);
#: ``tests/test_sr_encode.py`` checks this table against those tables for each SR class.
PATIENT_AND_STUDY_MODULES: dict[str, tuple[str, ...]] = {
    # PS3.3 C.7.1.1
    "Patient": (
        "ReferencedPatientSequence",
        "PatientName",
        "PatientID",
        "IssuerOfPatientID",
        "TypeOfPatientID",
        "IssuerOfPatientIDQualifiersSequence",
        "SourcePatientGroupIdentificationSequence",
        "GroupOfPatientsIdentificationSequence",
        "PatientBirthDate",
        "PatientBirthTime",
        "PatientBirthDateInAlternativeCalendar",
        "PatientDeathDateInAlternativeCalendar",
        "PatientAlternativeCalendar",
        "PatientSex",
        "QualityControlSubject",
        "StrainDescription",
        "StrainNomenclature",
        "StrainStockSequence",
        "StrainAdditionalInformation",
        "StrainCodeSequence",
        "GeneticModificationsSequence",
        "OtherPatientNames",
        "OtherPatientIDsSequence",
        "ReferencedPatientPhotoSequence",
        "EthnicGroupCodeSequence",
        "PatientSpeciesDescription",
        "PatientSpeciesCodeSequence",
        "PatientBreedDescription",
        "PatientBreedCodeSequence",
        "BreedRegistrationSequence",
        "ResponsiblePerson",
        "ResponsiblePersonRole",
        "ResponsibleOrganization",
        "PatientComments",
        "PatientIdentityRemoved",
        "DeidentificationMethod",
        "DeidentificationMethodCodeSequence",
    ),
    # PS3.3 C.7.1.3
    "Clinical Trial Subject": (
        "ClinicalTrialSponsorName",
        "ClinicalTrialProtocolID",
        "ClinicalTrialProtocolName",
        "IssuerOfClinicalTrialProtocolID",
        "OtherClinicalTrialProtocolIDsSequence",
        "ClinicalTrialSiteID",
        "ClinicalTrialSiteName",
        "IssuerOfClinicalTrialSiteID",
        "ClinicalTrialSubjectID",
        "IssuerOfClinicalTrialSubjectID",
        "ClinicalTrialSubjectReadingID",
        "IssuerOfClinicalTrialSubjectReadingID",
        "ClinicalTrialProtocolEthicsCommitteeName",
        "ClinicalTrialProtocolEthicsCommitteeApprovalNumber",
    ),
    # PS3.3 C.7.2.1
    "General Study": (
        "StudyDate",
        "StudyTime",
        "AccessionNumber",
        "IssuerOfAccessionNumberSequence",
        "ReferringPhysicianName",
        "ReferringPhysicianIdentificationSequence",
        "ConsultingPhysicianName",
        "ConsultingPhysicianIdentificationSequence",
        "StudyDescription",
        "ProcedureCodeSequence",
        "PhysiciansOfRecord",
        "PhysiciansOfRecordIdentificationSequence",
        "NameOfPhysiciansReadingStudy",
        "PhysiciansReadingStudyIdentificationSequence",
        "ReferencedStudySequence",
        "StudyInstanceUID",
        "StudyID",
        "RequestingService",
        "RequestingServiceCodeSequence",
        "ReasonForPerformedProcedureCodeSequence",
    ),
    # PS3.3 C.7.2.2
    "Patient Study": (
        "AdmittingDiagnosesDescription",
        "AdmittingDiagnosesCodeSequence",
        "PatientAge",
        "PatientSize",
        "PatientSizeCodeSequence",
        "PatientBodyMassIndex",
        "MeasuredAPDimension",
        "MeasuredLateralDimension",
        "PatientWeight",
        "MedicalAlerts",
        "Allergies",
        "Occupation",
        "SmokingStatus",
        "AdditionalPatientHistory",
        "PregnancyStatus",
        "LastMenstrualDate",
        "PatientSexNeutered",
        "ReasonForVisit",
        "ReasonForVisitCodeSequence",
        "AdmissionID",
        "IssuerOfAdmissionIDSequence",
        "ServiceEpisodeID",
        "ServiceEpisodeDescription",
        "IssuerOfServiceEpisodeIDSequence",
        "PatientState",
    ),
    # PS3.3 C.7.2.3
    "Clinical Trial Study": (
        "ClinicalTrialTimePointID",
        "ClinicalTrialTimePointDescription",
        "LongitudinalTemporalOffsetFromEvent",
        "LongitudinalTemporalEventType",
        "ClinicalTrialTimePointTypeCodeSequence",
        "IssuerOfClinicalTrialTimePointID",
        "ConsentForClinicalTrialUseSequence",
    ),
}

_COPIED_TAGS: tuple[int, ...] = tuple(
    int(tag_for_keyword(k))  # type: ignore[arg-type]
    for keywords in PATIENT_AND_STUDY_MODULES.values()
    for k in keywords
)

#: (tag, VR) of each Type 2 attribute filled in empty when the source lacks it
_TYPE2_TAGS: tuple[tuple[int, str], ...] = tuple(
    (int(tag_for_keyword(k)), dictionary_VR(k))  # type: ignore[arg-type]
    for k in TYPE2_FROM_SOURCE
)

#: Specific Character Set values (PS3.3 C.12.1.1.2) whose G0 set is ASCII and which use no
#: code extension: in them, as in UTF-8 (ISO_IR 192, the result's), a value made only of
#: ASCII bytes is the same text.  (ISO_IR 13 is left out: its G0 set is JIS X 0201, which puts
#: the yen sign at 5C; ISO 2022 sets are left out: their values may switch sets with ESC.)
_ASCII_G0_CHARSETS = frozenset(
    {
        "",
        "ISO_IR 6",
        "ISO_IR 100",
        "ISO_IR 101",
        "ISO_IR 109",
        "ISO_IR 110",
        "ISO_IR 126",
        "ISO_IR 127",
        "ISO_IR 138",
        "ISO_IR 144",
        "ISO_IR 148",
        "ISO_IR 166",
        "ISO_IR 203",
        "ISO_IR 192",
    }
)


def _ascii_compatible(ds: Dataset) -> bool:
    """Whether ``ds``'s character set writes an ASCII-only value as UTF-8 would."""
    charset = ds.get("SpecificCharacterSet", "")
    return isinstance(charset, str) and charset.strip() in _ASCII_G0_CHARSETS


def _as_encoded(ds: Dataset, tag: int) -> RawDataElement | None:
    """The element ``tag`` of ``ds`` as read, when it can go into the result byte for byte:
    not decoded yet, explicit VR little endian with the VR PS3.6 gives the attribute, an even
    length (PS3.5 7.1.1), not a sequence, and ASCII without ESC.  None otherwise: pydicom
    decodes it and writes it again, as highdicom's copy would."""
    elem = ds.get_item(tag)
    if not isinstance(elem, RawDataElement) or elem.is_implicit_VR or not elem.is_little_endian:
        return None
    value = elem.value
    if (
        not isinstance(value, bytes)
        or elem.VR == "SQ"
        or dictionary_VR(tag) != elem.VR
        or len(value) % 2
        or elem.length != len(value)
        or not value.isascii()
        or b"\x1b" in value
    ):
        return None
    return elem


def references(refs: Sequence[InstanceRef]) -> bytes:
    """The value of a SOP Instance Reference Macro sequence (PS3.3 Table C.17-3): items grouped
    by study then series in the order given; a repeated instance is listed once."""
    studies: dict[str, dict[str, list[InstanceRef]]] = {}
    seen: set[str] = set()
    for r in refs:
        if r.sop_instance_uid in seen:
            continue
        seen.add(r.sop_instance_uid)
        studies.setdefault(r.study_instance_uid, {}).setdefault(r.series_instance_uid, []).append(r)
    study_items = []
    for study_uid, series in studies.items():
        series_items = []
        for series_uid, instances in series.items():
            sops = [sop_reference(r.sop_class_uid, r.sop_instance_uid) for r in instances]
            series_items.append(
                element(REF_SOP_SEQUENCE, "SQ", sequence_value(sops))
                + element(_SERIES_UID, "UI", uid_value(series_uid))
            )
        study_items.append(
            element(_REF_SERIES_SEQUENCE, "SQ", sequence_value(series_items))
            + element(_STUDY_UID, "UI", uid_value(study_uid))
        )
    return sequence_value(study_items)


def instance_ref(ds: Dataset) -> InstanceRef:
    return InstanceRef(
        study_instance_uid=str(ds.StudyInstanceUID),
        series_instance_uid=str(ds.SeriesInstanceUID),
        sop_class_uid=str(ds.SOPClassUID),
        sop_instance_uid=str(ds.SOPInstanceUID),
    )


@dataclass(frozen=True)
class CodingScheme:
    """A Coding Scheme Identification Sequence item (PS3.3 C.12.1.1.4)."""

    designator: str
    name: str
    version: str
    responsible_organization: str

    def encoded(self) -> bytes:
        return (
            element(_SCHEME_DESIGNATOR, "SH", text_value(self.designator))
            + element(_SCHEME_VERSION, "SH", text_value(self.version))
            + element(_SCHEME_NAME, "ST", text_value(self.name))
            + element(_SCHEME_ORGANISATION, "ST", text_value(self.responsible_organization))
        )


# tags of the elements encoded here (PS3.6)
_REF_SERIES_SEQUENCE = tag_bytes(0x0008, 0x1115)
_STUDY_UID = tag_bytes(0x0020, 0x000D)
_SERIES_UID = tag_bytes(0x0020, 0x000E)
_SCHEME_DESIGNATOR = tag_bytes(0x0008, 0x0102)
_SCHEME_VERSION = tag_bytes(0x0008, 0x0103)
_SCHEME_NAME = tag_bytes(0x0008, 0x0115)
_SCHEME_ORGANISATION = tag_bytes(0x0008, 0x0116)


def _put(ds: Dataset, tag: int, vr: str, value: bytes) -> None:
    ds[tag] = raw_element(tag, vr, value)


def _text(ds: Dataset, tag: int, vr: str, value: str) -> None:
    _put(ds, tag, vr, text_value(value))


def _uid(ds: Dataset, tag: int, value: str) -> None:
    _put(ds, tag, "UI", uid_value(value))


def result_header(
    evidence: Sequence[Dataset],
    *,
    title: Code,
    sop_instance_uid: str,
    series_instance_uid: str,
    series_number: int,
    instance_number: int,
    series_description: str,
    manufacturer: str,
    model_name: str,
    software_versions: str,
    device_uid: str,
    coding_scheme: CodingScheme,
    predecessors: Sequence[InstanceRef],
    when: datetime,
) -> Dataset:
    """The header of a COMPLETE, UNVERIFIED, PRELIMINARY Comprehensive SR in the patient and
    study of ``evidence[0]``, with file meta for explicit VR little endian and Specific
    Character Set ISO_IR 192 (UTF-8).  Creation and content date/time are ``when`` (with its
    offset from UTC when it has one); ``predecessors`` fill the Predecessor Documents Sequence.

    The elements made here are stored already encoded (pydicom writes them as they are). The
    ones copied from the source are too when they were read from its bytes and mean the same
    in UTF-8 (:func:`_as_encoded`); the others are pydicom's, encoded when the document is
    written."""
    first = evidence[0]
    ds = Dataset()
    meta = FileMetaDataset()
    meta.MediaStorageSOPClassUID = COMPREHENSIVE_SR
    meta.MediaStorageSOPInstanceUID = sop_instance_uid
    meta.TransferSyntaxUID = ExplicitVRLittleEndian
    ds.file_meta = meta
    # Patient, General Study, Patient Study...: copied; the caller's dataset is left unchanged.
    # An element read from the source's bytes that means the same in the result's character
    # set goes as it was read, others are decoded and written again by pydicom.
    present = first.keys()
    as_read = _ascii_compatible(first)
    for tag in _COPIED_TAGS:
        if tag in present:
            raw = _as_encoded(first, tag) if as_read else None
            if raw is not None:
                ds[tag] = raw
            else:
                ds.add(first[tag])
    for tag, vr in _TYPE2_TAGS:
        if tag not in ds:
            _put(ds, tag, vr, b"")
    study_uid = str(first.StudyInstanceUID)
    _uid(ds, 0x0020000D, study_uid)  # Study Instance UID
    # SOP Common, SR Document Series, General Equipment
    date, time = str(DA(when.date())), str(TM(when.time()))
    _text(ds, 0x00080005, "CS", "ISO_IR 192")  # Specific Character Set
    _text(ds, 0x00080012, "DA", date)  # Instance Creation Date
    _text(ds, 0x00080013, "TM", time)  # Instance Creation Time
    _uid(ds, 0x00080016, COMPREHENSIVE_SR)  # SOP Class UID
    _uid(ds, 0x00080018, sop_instance_uid)  # SOP Instance UID
    _text(ds, 0x00080023, "DA", date)  # Content Date
    _text(ds, 0x00080033, "TM", time)  # Content Time
    _text(ds, 0x00080060, "CS", "SR")  # Modality
    _text(ds, 0x00080070, "LO", manufacturer)  # Manufacturer
    _put(ds, 0x00080110, "SQ", sequence_value([coding_scheme.encoded()]))
    _text(ds, 0x0008103E, "LO", series_description)  # Series Description
    _text(ds, 0x00081090, "LO", model_name)  # Manufacturer's Model Name
    _put(ds, 0x00081111, "SQ", b"")  # Referenced Performed Procedure Step Sequence (Type 2)
    _uid(ds, 0x00181002, device_uid)  # Device UID
    _text(ds, 0x00181020, "LO", software_versions)  # Software Versions
    _uid(ds, 0x0020000E, series_instance_uid)  # Series Instance UID
    _text(ds, 0x00200011, "IS", str(int(series_number)))  # Series Number
    _text(ds, 0x00200013, "IS", str(int(instance_number)))  # Instance Number
    offset = when.utcoffset()
    if offset is not None:
        minutes = int(offset.total_seconds() // 60)
        sign = "+" if minutes >= 0 else "-"
        _text(ds, 0x00080201, "SH", f"{sign}{abs(minutes) // 60:02d}{abs(minutes) % 60:02d}")
    # SR Document General, and the root of the content tree
    _text(ds, 0x0040A040, "CS", "CONTAINER")  # Value Type
    _put(ds, 0x0040A043, "SQ", code_sequence_value(title))  # Concept Name Code Sequence
    _text(ds, 0x0040A050, "CS", "CONTINUOUS")  # Continuity Of Content
    if predecessors:
        _put(ds, 0x0040A360, "SQ", references(predecessors))  # Predecessor Documents
    _put(ds, 0x0040A372, "SQ", b"")  # Performed Procedure Code Sequence (Type 2)
    refs = [instance_ref(e) for e in evidence]
    same = [r for r in refs if r.study_instance_uid == study_uid]
    other = [r for r in refs if r.study_instance_uid != study_uid]
    if same:  # Current Requested Procedure Evidence Sequence
        _put(ds, 0x0040A375, "SQ", references(same))
    if other:  # Pertinent Other Evidence Sequence
        _put(ds, 0x0040A385, "SQ", references(other))
    _text(ds, 0x0040A491, "CS", "COMPLETE")  # Completion Flag
    _text(ds, 0x0040A493, "CS", "UNVERIFIED")  # Verification Flag
    _text(ds, 0x0040A496, "CS", "PRELIMINARY")  # Preliminary Flag
    return ds

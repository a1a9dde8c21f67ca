"""The DICOM header of a result SR: every module of the Comprehensive SR IOD (PS3.3 A.35.3)
except the content tree.

Patient, General Study and Patient Study come from the first source, as highdicom's SR
constructor takes them: every root-level attribute the source has of the modules of the
source's IOD that belong to the Patient and Study information entities (highdicom's module
tables, derived from PS3.3).  The
result is in a new series (SR Document Series), made by this software (General Equipment),
COMPLETE, UNVERIFIED and PRELIMINARY (SR Document General, PS3.3 C.17.2), and lists its
sources as Current Requested Procedure Evidence (same study) or Pertinent Other Evidence
(another study), grouped by study and series (SOP Instance Reference Macro, PS3.3 C.17.2.3).

This builds what highdicom's ``ComprehensiveSR`` constructor builds, without its per-document
checks of a content tree that is made and checked elsewhere (:mod:`service.sr.content`).
``tests/test_sr_encode.py`` compares the two attribute by attribute.
"""

from __future__ import annotations

import functools
from collections.abc import Sequence
from datetime import datetime

from pydicom import Dataset
from pydicom.datadict import tag_for_keyword
from pydicom.dataset import FileMetaDataset
from pydicom.sr.coding import Code
from pydicom.uid import ExplicitVRLittleEndian
from pydicom.valuerep import DA, TM

from service.model import InstanceRef

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


@functools.lru_cache(maxsize=64)
def patient_and_study_tags(sop_class_uid: str) -> tuple[int, ...]:
    """Tags of the root-level attributes of the Patient and Study information entities' modules
    in the IOD of ``sop_class_uid`` (Comprehensive SR's IOD for a class highdicom's tables do
    not know), in the order highdicom copies them."""
    from highdicom._standard_utils import (
        get_iod_module_map,
        get_module_attribute_map,
        get_sop_class_iod_map,
    )

    iods = get_sop_class_iod_map()
    iod = iods.get(sop_class_uid) or iods[COMPREHENSIVE_SR]
    modules = get_iod_module_map()[iod]
    attributes = get_module_attribute_map()
    tags: list[int] = []
    for ie in ("Patient", "Study"):
        for module in modules:
            if module["ie"] != ie:
                continue
            for attribute in attributes[module["key"]]:
                if len(attribute["path"]) == 0:
                    tag = tag_for_keyword(str(attribute["keyword"]))
                    if tag is not None:
                        tags.append(int(tag))
    return tuple(tags)


def references(refs: Sequence[InstanceRef]) -> list[Dataset]:
    """Items of a SOP Instance Reference Macro sequence (PS3.3 Table C.17-3), grouped by study
    then series in the order given; a repeated instance is listed once."""
    studies: dict[str, dict[str, list[InstanceRef]]] = {}
    seen: set[str] = set()
    for r in refs:
        if r.sop_instance_uid in seen:
            continue
        seen.add(r.sop_instance_uid)
        studies.setdefault(r.study_instance_uid, {}).setdefault(r.series_instance_uid, []).append(r)
    items = []
    for study_uid, series in studies.items():
        series_items = []
        for series_uid, instances in series.items():
            sops = []
            for r in instances:
                sop = Dataset()
                sop.ReferencedSOPClassUID = r.sop_class_uid
                sop.ReferencedSOPInstanceUID = r.sop_instance_uid
                sops.append(sop)
            series_item = Dataset()
            series_item.SeriesInstanceUID = series_uid
            series_item.ReferencedSOPSequence = sops
            series_items.append(series_item)
        study_item = Dataset()
        study_item.StudyInstanceUID = study_uid
        study_item.ReferencedSeriesSequence = series_items
        items.append(study_item)
    return items


def instance_ref(ds: Dataset) -> InstanceRef:
    return InstanceRef(
        study_instance_uid=str(ds.StudyInstanceUID),
        series_instance_uid=str(ds.SeriesInstanceUID),
        sop_class_uid=str(ds.SOPClassUID),
        sop_instance_uid=str(ds.SOPInstanceUID),
    )


def _code_item(code: Code) -> Dataset:
    item = Dataset()
    item.CodeValue = code.value
    item.CodingSchemeDesignator = code.scheme_designator
    item.CodeMeaning = code.meaning
    return item


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
    when: datetime,
) -> Dataset:
    """The header of a COMPLETE, UNVERIFIED, PRELIMINARY Comprehensive SR in the patient and
    study of ``evidence[0]``, with file meta for
    explicit VR little endian and Specific Character Set ISO_IR 192 (UTF-8)."""
    first = evidence[0]
    ds = Dataset()
    meta = FileMetaDataset()
    meta.MediaStorageSOPClassUID = COMPREHENSIVE_SR
    meta.MediaStorageSOPInstanceUID = sop_instance_uid
    meta.TransferSyntaxUID = ExplicitVRLittleEndian
    ds.file_meta = meta
    # Patient, General Study, Patient Study: copied; the caller's dataset is left unchanged
    for tag in patient_and_study_tags(str(first.SOPClassUID)):
        if tag in first:
            ds.add(first[tag])
    for keyword in TYPE2_FROM_SOURCE:
        if keyword not in ds:
            setattr(ds, keyword, "")
    study_uid = str(first.StudyInstanceUID)
    ds.StudyInstanceUID = study_uid
    # SR Document Series, General Equipment, SOP Common
    ds.SeriesInstanceUID = series_instance_uid
    ds.SeriesNumber = series_number
    ds.Modality = "SR"
    ds.SeriesDescription = series_description
    ds.Manufacturer = manufacturer
    ds.ManufacturerModelName = model_name
    ds.SoftwareVersions = software_versions
    ds.SOPInstanceUID = sop_instance_uid
    ds.SOPClassUID = COMPREHENSIVE_SR
    ds.InstanceNumber = instance_number
    ds.InstanceCreationDate = DA(when.date())
    ds.InstanceCreationTime = TM(when.time())
    ds.SpecificCharacterSet = "ISO_IR 192"
    ds.ContentDate = DA(when.date())
    ds.ContentTime = TM(when.time())
    # SR Document General, and the root of the content tree
    ds.CompletionFlag = "COMPLETE"
    ds.VerificationFlag = "UNVERIFIED"
    ds.PreliminaryFlag = "PRELIMINARY"
    ds.ValueType = "CONTAINER"
    ds.ConceptNameCodeSequence = [_code_item(title)]
    ds.ContinuityOfContent = "CONTINUOUS"
    refs = [instance_ref(e) for e in evidence]
    same = [r for r in refs if r.study_instance_uid == study_uid]
    other = [r for r in refs if r.study_instance_uid != study_uid]
    if same:
        ds.CurrentRequestedProcedureEvidenceSequence = references(same)
    if other:
        ds.PertinentOtherEvidenceSequence = references(other)
    ds.PerformedProcedureCodeSequence = []
    ds.ReferencedPerformedProcedureStepSequence = []
    return ds

"""Build INPUT echo measurement SRs (what a scanner would send) for tests and the demo.

Invented content only (fictional "Harbour Vale Cardiac Centre" and patients).  Supported
shapes:

* ``Template.tid5300``: root (125200, DCM) with the TID 5300 containers (125301 pre-coordinated
  CID 12300 items, 125302 post-coordinated TID 5302 items with a private row-1 code and
  Measured Property / Finding Site / Cardiac Cycle Point / Image Mode / Flow Direction);
  usable with the Simplified Adult Echo SR class (88.72) or any other SR class.
* ``Template.tid5200``: root (125200, DCM) with Findings sections (121070, DCM) carrying a
  Finding Site, Measurement Groups (125007, DCM) carrying Image Mode and optional Stage.

Per item, ``encoding`` chooses how the measure is coded (pre-coordinated LOINC, TID 5302
post-coordinated, TID 5200 section concept, or a site-private code).  ``raw_content`` is the
escape hatch for odd test content (use :func:`num_item`, :func:`code_item`,
:func:`container`).
"""

from __future__ import annotations

from collections.abc import Sequence
from enum import StrEnum

from pydantic import BaseModel, ConfigDict
from pydicom.dataset import Dataset, FileMetaDataset
from pydicom.sequence import Sequence as DicomSequence
from pydicom.uid import ExplicitVRLittleEndian, generate_uid

from service.model import Code, Measure
from service.vocabulary.measures import Component, Quantity
from service.vocabulary.standard import code

PRIVATE_SCHEME = "99HVCC"
INSTITUTION = "Harbour Vale Cardiac Centre"


class SopClass(StrEnum):
    comprehensive = "1.2.840.10008.5.1.4.1.1.88.33"
    enhanced = "1.2.840.10008.5.1.4.1.1.88.22"
    comprehensive_3d = "1.2.840.10008.5.1.4.1.1.88.34"
    extensible = "1.2.840.10008.5.1.4.1.1.88.35"
    simplified_echo = "1.2.840.10008.5.1.4.1.1.88.72"


class Template(StrEnum):
    tid5300 = "5300"
    tid5200 = "5200"


class Encoding(StrEnum):
    pre = "pre"  # CID 12300 pre-coordinated LOINC (TID 5301)
    post = "post"  # TID 5302: private row-1 code + Measured Property and modifiers
    tid5200 = "tid5200"  # TID 5200 section concept (e.g. 18037-2 in the Mitral Valve section)
    generic = "generic"  # TID 5200 generic concept (59080-2 ...) relying on the section site
    private = "private"  # site-private code (99HVCC), mapped by config/mappings/example-site.toml


class Selection(StrEnum):
    user = "user"
    mean = "mean"
    recent = "recent"


class Patient(BaseModel):
    model_config = ConfigDict(frozen=True)

    name: str = "Testcase^Ada"
    id: str = "HV000001"
    birth_date: str = "19600315"
    sex: str = "F"
    age: str | None = "066Y"  # DICOM AS; None omits Patient's Age


class Study(BaseModel):
    model_config = ConfigDict(frozen=True)

    study_uid: str | None = None  # generated from ``seed`` when None
    series_uid: str | None = None
    sop_uid: str | None = None
    accession: str = "HVACC0001"
    study_id: str = "1"
    study_date: str = "20260301"
    study_time: str = "101500"
    content_date: str | None = None  # defaults to study date/time
    content_time: str | None = None
    seed: str = "harbour-vale-demo"  # entropy for deterministic UIDs


class Equipment(BaseModel):
    """The sending device as the General Equipment module states it (invented devices)."""

    model_config = ConfigDict(frozen=True)

    manufacturer: str = "Harbour Vale test scanner (fictional)"
    model: str = "HV-Echo"
    station_name: str | None = None  # (0008,1010); None leaves it out
    serial_number: str = "HV-0001"


class EchoItem(BaseModel):
    """One measurement to write.  ``unit`` None writes no unit (a defect, for tests)."""

    model_config = ConfigDict(frozen=True, arbitrary_types_allowed=True)

    measure: Measure | Component
    value: float | None
    unit: str | None = "canonical"
    encoding: Encoding = Encoding.pre
    selection: Selection | None = None
    derivation_mean: bool = False
    stage_valsalva: bool = False
    float_value: bool = False  # also write FloatingPointValue
    qualifier: Code | None = None  # Numeric Value Qualifier (value should be None)
    concept: Code | None = None  # override the concept name code
    extra_modifiers: tuple[tuple[Code, Code], ...] = ()


def _c(value: str, scheme: str, meaning: str) -> Code:
    return Code(value=value, scheme=scheme, meaning=meaning)


# ---------------------------------------------------------------------------------------------
# Code choices per encoding
# ---------------------------------------------------------------------------------------------

CANONICAL_OUT: dict[Quantity, str] = {
    Component.pv_s_velocity: "cm/s",
    Component.pv_d_velocity: "cm/s",
    Component.pv_ar_duration: "ms",
    Component.mitral_a_duration: "ms",
}

PRE: dict[Quantity, str] = {
    Measure.mitral_e: "mv_e_vmax",
    Measure.mitral_a: "mv_a_vmax",
    Measure.e_a_ratio: "mv_e_a",
    Measure.deceleration_time: "mv_dt",
    Measure.e_prime_septal: "septal_e_prime",
    Measure.e_prime_lateral: "lateral_e_prime",
    Measure.tr_peak_velocity: "tr_vmax",
    Measure.lavi: "lavi_mod",
    Measure.lvef: "lvef_mod",
    Measure.ivrt: "ivrt_doppler",
    Component.pv_s_velocity: "pv_s_vmax",
    Component.pv_d_velocity: "pv_d_vmax",
    Component.pv_ar_duration: "pv_ar_dur",
    Component.mitral_a_duration: "mv_a_dur",
}

# measure -> (section site, item concept, image mode, item-level modifiers)
SECTION_5200: dict[Quantity, tuple[str, str, str | None, tuple[tuple[str, str], ...]]] = {
    Measure.mitral_e: ("mitral_valve", "mv_e_peak", "pw_doppler", ()),
    Measure.mitral_a: ("mitral_valve", "mv_a_peak", "pw_doppler", ()),
    Measure.e_a_ratio: ("mitral_valve", "mv_e_a", "pw_doppler", ()),
    Measure.deceleration_time: ("mitral_valve", "mv_dt_sct", "pw_doppler", ()),
    Component.mitral_a_duration: ("mitral_valve", "mv_a_dur_sct", "pw_doppler", ()),
    Measure.e_prime_septal: (
        "left_ventricle",
        "lv_e_prime",
        "tdi",
        (("finding_site", "medial_annulus"),),
    ),
    Measure.e_prime_lateral: (
        "left_ventricle",
        "lv_e_prime",
        "tdi",
        (("finding_site", "lateral_annulus"),),
    ),
    Measure.e_e_prime_septal: (
        "mitral_valve",
        "e_over_annulus_e",
        "tdi",
        (("finding_site", "medial_annulus"),),
    ),
    Measure.e_e_prime_lateral: (
        "mitral_valve",
        "e_over_annulus_e",
        "tdi",
        (("finding_site", "lateral_annulus"),),
    ),
    Measure.tr_peak_velocity: (
        "tricuspid_valve",
        "peak_blood_velocity",
        "cw_doppler",
        (("flow_direction", "regurgitant_flow"),),
    ),
    Measure.lavi: ("left_atrium", "la_volume", None, (("measurement_method", "mod_biplane"),)),
    Measure.lvef: ("left_ventricle", "lvef_us", None, (("measurement_method", "mod_biplane"),)),
    Measure.ivrt: ("left_ventricle", "ivrt_doppler", "pw_doppler", ()),
    Measure.pv_s_d_ratio: ("pulmonary_venous_structure", "pv_s_d", "pw_doppler", ()),
    Component.pv_s_velocity: ("pulmonary_venous_structure", "pv_s_peak", "pw_doppler", ()),
    Component.pv_d_velocity: ("pulmonary_venous_structure", "pv_d_peak", "pw_doppler", ()),
    Component.pv_ar_duration: ("pulmonary_venous_structure", "pv_ar_dur_sct", "pw_doppler", ()),
    Measure.heart_rate: ("mitral_valve", "heart_rate", None, ()),
    Measure.e_acceleration_rate: ("mitral_valve", "accel_slope", "pw_doppler", ()),
}

GENERIC_5200: dict[Quantity, str] = {
    Measure.mitral_e: "e_wave_peak",
    Measure.mitral_a: "a_wave_peak",
    Measure.deceleration_time: "decel_time",
    Measure.e_a_ratio: "e_a_generic",
}

# measure -> (private row-1 code, measured property, modifiers) for TID 5302
POST_5302: dict[Quantity, tuple[str, str, tuple[tuple[str, str], ...]]] = {
    Measure.mitral_e: (
        "PC-MVE",
        "peak_blood_velocity",
        (
            ("finding_site", "mitral_valve"),
            ("cardiac_phase", "e_wave_phase"),
            ("image_mode", "pw_doppler"),
        ),
    ),
    Measure.mitral_a: (
        "PC-MVA",
        "peak_blood_velocity",
        (
            ("finding_site", "mitral_valve"),
            ("cardiac_phase", "a_wave_phase"),
            ("image_mode", "pw_doppler"),
        ),
    ),
    Measure.e_prime_septal: (
        "PC-SEPE",
        "peak_tissue_velocity",
        (
            ("finding_site", "medial_annulus"),
            ("cardiac_phase", "e_wave_phase"),
            ("image_mode", "tdi"),
        ),
    ),
    Measure.e_prime_lateral: (
        "PC-LATE",
        "peak_tissue_velocity",
        (
            ("finding_site", "lateral_annulus"),
            ("cardiac_phase", "e_wave_phase"),
            ("image_mode", "tdi"),
        ),
    ),
    Measure.tr_peak_velocity: (
        "PC-TRV",
        "peak_blood_velocity",
        (
            ("finding_site", "tricuspid_valve"),
            ("flow_direction", "regurgitant_flow"),
            ("image_mode", "cw_doppler"),
        ),
    ),
    Measure.deceleration_time: (
        "PC-MVDT",
        "decel_time",
        (("finding_site", "mitral_valve"), ("image_mode", "pw_doppler")),
    ),
    Measure.la_reservoir_strain: (
        "PC-LASR",
        "peak_la_strain",
        (("finding_site", "left_atrium"),),
    ),
    Measure.lvef: ("PC-LVEF", "ejection_fraction", (("finding_site", "left_ventricle"),)),
    Component.pv_s_velocity: (
        "PC-PVS",
        "peak_blood_velocity",
        (("finding_site", "pulmonary_vein"), ("cardiac_phase", "s_wave_phase")),
    ),
    Component.pv_d_velocity: (
        "PC-PVD",
        "peak_blood_velocity",
        (("finding_site", "pulmonary_vein"), ("cardiac_phase", "d_wave_phase")),
    ),
}

#: site-private codes of the fictional scanner; mapped in config/mappings/example-site.toml
PRIVATE_CODES: dict[Quantity, Code] = {
    Measure.mitral_e: _c("HV-MVE", PRIVATE_SCHEME, "MV E peak velocity"),
    Measure.mitral_a: _c("HV-MVA", PRIVATE_SCHEME, "MV A peak velocity"),
    Measure.e_prime_septal: _c("HV-EPS", PRIVATE_SCHEME, "Septal annulus e' velocity"),
    Measure.e_prime_lateral: _c("HV-EPL", PRIVATE_SCHEME, "Lateral annulus e' velocity"),
    Measure.e_prime_average: _c("HV-EPA", PRIVATE_SCHEME, "Average annular e' velocity"),
    Measure.e_e_prime_average: _c("HV-EEA", PRIVATE_SCHEME, "E over average e'"),
    Measure.tr_peak_velocity: _c("HV-TRV", PRIVATE_SCHEME, "TR jet peak velocity"),
    Measure.lavi: _c("HV-LAVI", PRIVATE_SCHEME, "LA volume index"),
    Measure.pasp: _c("HV-PASP", PRIVATE_SCHEME, "PA systolic pressure estimate"),
    Measure.la_reservoir_strain: _c("HV-LASR", PRIVATE_SCHEME, "LA reservoir strain"),
    Measure.lvef: _c("HV-EF", PRIVATE_SCHEME, "LV ejection fraction"),
}

SELECTION_CODES = {
    Selection.user: "user_chosen",
    Selection.mean: "mean_chosen",
    Selection.recent: "most_recent",
}
STAGE = _c("18139-6", "LN", "Stage")  # from memory (TID 5202); not in pydicom's dictionary
UNIT_MEANINGS = {"{ratio}": "ratio", "1": "no units", "%": "percent"}


# ---------------------------------------------------------------------------------------------
# Content item helpers (also the raw escape hatch)
# ---------------------------------------------------------------------------------------------


def code_seq(c: Code) -> DicomSequence:
    item = Dataset()
    if len(c.value) > 16:
        item.LongCodeValue = c.value
    else:
        item.CodeValue = c.value
    item.CodingSchemeDesignator = c.scheme
    item.CodeMeaning = (c.meaning or c.value)[:64]
    return DicomSequence([item])


def code_item(name: Code, value: Code, relationship: str = "HAS CONCEPT MOD") -> Dataset:
    ds = Dataset()
    ds.RelationshipType = relationship
    ds.ValueType = "CODE"
    ds.ConceptNameCodeSequence = code_seq(name)
    ds.ConceptCodeSequence = code_seq(value)
    return ds


def container(name: Code, children: Sequence[Dataset], relationship: str = "CONTAINS") -> Dataset:
    ds = Dataset()
    ds.RelationshipType = relationship
    ds.ValueType = "CONTAINER"
    ds.ConceptNameCodeSequence = code_seq(name)
    ds.ContinuityOfContent = "SEPARATE"
    ds.ContentSequence = DicomSequence(list(children))
    return ds


def _ds_text(value: float) -> str:
    text = f"{value:.10g}"
    if len(text) > 16:
        text = f"{value:.8e}"
    return text


def num_item(
    name: Code,
    value: float | None,
    unit: str | None,
    children: Sequence[Dataset] = (),
    *,
    float_value: bool = False,
    qualifier: Code | None = None,
    relationship: str = "CONTAINS",
    unit_scheme: str = "UCUM",
) -> Dataset:
    ds = Dataset()
    ds.RelationshipType = relationship
    ds.ValueType = "NUM"
    ds.ConceptNameCodeSequence = code_seq(name)
    if value is None:
        ds.MeasuredValueSequence = DicomSequence([])
    else:
        mv = Dataset()
        mv.NumericValue = _ds_text(value)
        if float_value:
            mv.FloatingPointValue = float(value)
        if unit is not None:
            mv.MeasurementUnitsCodeSequence = code_seq(
                Code(value=unit, scheme=unit_scheme, meaning=UNIT_MEANINGS.get(unit, unit))
            )
        ds.MeasuredValueSequence = DicomSequence([mv])
    if qualifier is not None:
        ds.NumericValueQualifierCodeSequence = code_seq(qualifier)
    if children:
        ds.ContentSequence = DicomSequence(list(children))
    return ds


# ---------------------------------------------------------------------------------------------
# Building
# ---------------------------------------------------------------------------------------------


def _unit_of(item: EchoItem) -> str | None:
    if item.unit != "canonical":
        return item.unit
    from service.vocabulary.measures import SPECS

    return SPECS[item.measure].unit


def _mods(item: EchoItem, pairs: Sequence[tuple[str, str]] = ()) -> list[Dataset]:
    # extra modifiers first: the reader takes the first modifier of a name as the nearest
    out = [code_item(name, value) for name, value in item.extra_modifiers]
    out += [code_item(code(n), code(v)) for n, v in pairs]
    if item.derivation_mean:
        out.append(code_item(code("derivation"), code("mean")))
    if item.selection is not None:
        out.append(
            code_item(
                code("selection_status"), code(SELECTION_CODES[item.selection]), "HAS PROPERTIES"
            )
        )
    return out


def _num_for(item: EchoItem, concept: Code, children: list[Dataset]) -> Dataset:
    return num_item(
        item.concept or concept,
        item.value,
        _unit_of(item),
        children,
        float_value=item.float_value,
        qualifier=item.qualifier,
    )


def _stage_mod(relationship: str = "HAS ACQ CONTEXT") -> Dataset:
    """Stage = Valsalva; on a NUM of TID 5300 content as a concept modifier (the Simplified
    Adult Echo SR IOD allows no HAS ACQ CONTEXT below a NUM, DCMTK dsrdump)."""
    return code_item(STAGE, code("valsalva"), relationship)


def _item_flat(item: EchoItem) -> tuple[str, Dataset]:
    """Item for the TID 5300 containers: returns (container key, NUM)."""
    stage = [_stage_mod("HAS CONCEPT MOD")] if item.stage_valsalva else []
    if item.encoding is Encoding.pre:
        if item.measure not in PRE:
            raise ValueError(f"no pre-coordinated CID 12300 code for {item.measure}")
        return "pre", _num_for(item, code(PRE[item.measure]), _mods(item) + stage)
    if item.encoding is Encoding.post:
        if item.measure not in POST_5302:
            raise ValueError(f"no TID 5302 recipe for {item.measure}")
        row1, prop, pairs = POST_5302[item.measure]
        concept = _c(row1, PRIVATE_SCHEME, f"Post-coordinated {item.measure}")
        children = [code_item(code("measured_property"), code(prop)), *_mods(item, pairs), *stage]
        return "post", _num_for(item, concept, children)
    if item.encoding is Encoding.private:
        if item.measure not in PRIVATE_CODES:
            raise ValueError(f"no private code for {item.measure}")
        return "post", _num_for(item, PRIVATE_CODES[item.measure], _mods(item) + stage)
    raise ValueError(f"encoding {item.encoding} needs the TID 5200 template")


def _content_5300(items: Sequence[EchoItem]) -> list[Dataset]:
    pre: list[Dataset] = []
    post: list[Dataset] = []
    for it in items:
        key, ds = _item_flat(it)
        (pre if key == "pre" else post).append(ds)
    out = []
    if pre:
        out.append(container(_c("125301", "DCM", "Pre-coordinated Measurements"), pre))
    if post:
        out.append(container(_c("125302", "DCM", "Post-coordinated Measurements"), post))
    return out


def _content_5200(items: Sequence[EchoItem]) -> list[Dataset]:
    # section site -> group key (image mode, valsalva) -> NUMs
    sections: dict[str, dict[tuple[str | None, bool], list[Dataset]]] = {}
    flat: list[Dataset] = []
    for it in items:
        if it.encoding in (Encoding.pre, Encoding.post, Encoding.private):
            _key, ds = _item_flat(it)
            flat.append(ds)
            continue
        if it.measure not in SECTION_5200:
            raise ValueError(f"no TID 5200 section concept for {it.measure}")
        site, concept_name, mode, pairs = SECTION_5200[it.measure]
        if it.encoding is Encoding.generic:
            if it.measure not in GENERIC_5200:
                raise ValueError(f"no generic concept for {it.measure}")
            concept_name = GENERIC_5200[it.measure]
        ds = _num_for(it, code(concept_name), _mods(it, pairs))
        sections.setdefault(site, {}).setdefault((mode, it.stage_valsalva), []).append(ds)
    out: list[Dataset] = []
    for site, groups in sections.items():
        children: list[Dataset] = [code_item(code("finding_site"), code(site))]
        for (mode, valsalva), nums in groups.items():
            gchildren: list[Dataset] = []
            if mode is not None:
                gchildren.append(code_item(code("image_mode"), code(mode)))
            if valsalva:
                gchildren.append(_stage_mod())
            children.append(container(_c("125007", "DCM", "Measurement Group"), gchildren + nums))
        out.append(container(_c("121070", "DCM", "Findings"), children))
    if flat:
        out.append(container(_c("125301", "DCM", "Pre-coordinated Measurements"), flat))
    return out


def build_echo_sr(
    items: Sequence[EchoItem] = (),
    *,
    patient: Patient | None = None,
    study: Study | None = None,
    sop_class: SopClass | str = SopClass.comprehensive,
    template: Template = Template.tid5300,
    rhythm: Code | None = None,
    findings: Sequence[Code] = (),
    raw_content: Sequence[Dataset] = (),
    instance_number: int = 1,
    equipment: Equipment | None = None,
) -> Dataset:
    """An echo measurement SR dataset with file meta (``save_as(..., enforce_file_format=True)``
    works).  ``rhythm`` adds a (8884-9, LN, "Cardiac Rhythm") CODE item; each of ``findings``
    a (121071, DCM, "Finding") CODE item with that value (PS3.16 CID 7002)."""
    patient = patient or Patient()
    study = study or Study()
    sop_class = str(sop_class)

    def uid(kind: str) -> str:
        return generate_uid(entropy_srcs=[study.seed, kind])

    study_uid = study.study_uid or uid("study")
    series_uid = study.series_uid or uid(f"series:{sop_class}:{template}")
    sop_uid = study.sop_uid or uid(f"sop:{sop_class}:{template}:{instance_number}")

    ds = Dataset()
    ds.SpecificCharacterSet = "ISO_IR 100"
    ds.SOPClassUID = sop_class
    ds.SOPInstanceUID = sop_uid
    ds.InstanceCreationDate = study.content_date or study.study_date
    ds.InstanceCreationTime = study.content_time or study.study_time
    ds.TimezoneOffsetFromUTC = "+0000"  # Timezone Module: Type 1 in the 88.72 IOD (DCMTK)
    # Patient / General Study / Patient Study
    ds.PatientName = patient.name
    ds.PatientID = patient.id
    ds.PatientBirthDate = patient.birth_date
    ds.PatientSex = patient.sex
    if patient.age is not None:
        ds.PatientAge = patient.age
    ds.StudyInstanceUID = study_uid
    ds.StudyDate = study.study_date
    ds.StudyTime = study.study_time
    ds.ReferringPhysicianName = ""
    ds.StudyID = study.study_id
    ds.AccessionNumber = study.accession
    # SR Document Series / General Equipment
    ds.Modality = "SR"
    ds.SeriesInstanceUID = series_uid
    ds.SeriesNumber = 1
    ds.ReferencedPerformedProcedureStepSequence = DicomSequence([])
    equipment = equipment or Equipment()
    ds.Manufacturer = equipment.manufacturer
    ds.InstitutionName = INSTITUTION
    if equipment.station_name is not None:
        ds.StationName = equipment.station_name
    ds.ManufacturerModelName = equipment.model
    ds.DeviceSerialNumber = equipment.serial_number
    ds.SoftwareVersions = "1.0"
    # SR Document General
    ds.InstanceNumber = instance_number
    ds.CompletionFlag = "COMPLETE"
    ds.VerificationFlag = "UNVERIFIED"
    ds.ContentDate = study.content_date or study.study_date
    ds.ContentTime = study.content_time or study.study_time
    ds.PerformedProcedureCodeSequence = DicomSequence([])
    if sop_class == SopClass.simplified_echo:
        ds.PreliminaryFlag = "FINAL"
    # SR Document Content
    ds.ValueType = "CONTAINER"
    ds.ConceptNameCodeSequence = code_seq(
        _c("125200", "DCM", "Adult Echocardiography Procedure Report")
    )
    ds.ContinuityOfContent = "SEPARATE"
    tmpl = Dataset()
    tmpl.MappingResource = "DCMR"
    tmpl.TemplateIdentifier = str(template.value)
    ds.ContentTemplateSequence = DicomSequence([tmpl])
    content: list[Dataset] = []
    if rhythm is not None:
        content.append(code_item(code("cardiac_rhythm"), rhythm, "CONTAINS"))
    for finding in findings:
        content.append(code_item(_c("121071", "DCM", "Finding"), finding, "CONTAINS"))
    if template is Template.tid5300:
        content += _content_5300(items)
    else:
        content += _content_5200(items)
    content += list(raw_content)
    ds.ContentSequence = DicomSequence(content)
    # private coding scheme declaration (SOP Common)
    cs = Dataset()
    cs.CodingSchemeDesignator = PRIVATE_SCHEME
    cs.CodingSchemeName = "Harbour Vale scanner measurement codes (fictional)"
    cs.CodingSchemeResponsibleOrganization = INSTITUTION
    ds.CodingSchemeIdentificationSequence = DicomSequence([cs])

    meta = FileMetaDataset()
    meta.MediaStorageSOPClassUID = sop_class
    meta.MediaStorageSOPInstanceUID = sop_uid
    meta.TransferSyntaxUID = ExplicitVRLittleEndian
    ds.file_meta = meta
    return ds

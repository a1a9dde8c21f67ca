"""The demo scenario: invented echo studies from the fictional Harbour Vale Cardiac Centre.

Every patient, identifier and value here is made up.  The cases cover normal function, each
ASE/EACVI 2016 grade, an indeterminate and a not-gradable study, a borderline value, atrial
fibrillation stated by a coded rhythm item, mitral stenosis (a special situation) stated by a
coded finding, and a study sent as two SRs; they use both
encodings (TID 5300 pre-/post-coordinated, TID 5200 sections, site-private codes) and mixed
units (m/s and cm/s, s and ms), as scanners do.
"""

from __future__ import annotations

from pathlib import Path

from pydantic import BaseModel, ConfigDict
from pydicom import Dataset

from service.model import Code, Grade, Measure
from service.sr.echo_builder import (
    EchoItem,
    Encoding,
    Patient,
    Selection,
    SopClass,
    Study,
    Template,
    build_echo_sr,
)

M = Measure
#: the site mapping table for the fictional scanner's private codes (also shipped as
#: config/mappings/example-site.toml)
SITE_MAPPING = Path(__file__).with_name("harbour-vale-mapping.toml")
AF = Code(value="49436004", scheme="SCT", meaning="Atrial Fibrillation")
#: PS3.16 CID 12248 / 3728 (pydicom's dictionary): the value of a coded finding
MITRAL_STENOSIS = Code(value="79619009", scheme="SCT", meaning="Mitral stenosis")


class DemoCase(BaseModel):
    model_config = ConfigDict(frozen=True, arbitrary_types_allowed=True)

    key: str
    title: str
    expected_2016: Grade  # what ASE/EACVI 2016 gives (checked by tests/test_demo.py)
    patient: Patient
    study: Study
    template: Template = Template.tid5300
    sop_class: SopClass = SopClass.comprehensive
    rhythm: Code | None = None
    #: coded findings the SR states, e.g. a special situation
    findings: tuple[Code, ...] = ()
    items: tuple[EchoItem, ...]
    #: a second SR of the same study, created later (the newer SR wins for shared measures)
    follow_up: tuple[EchoItem, ...] = ()


def _i(measure, value, unit="canonical", **kw) -> EchoItem:
    return EchoItem(measure=measure, value=value, unit=unit, **kw)


def _study(n: int, day: str) -> Study:
    return Study(
        accession=f"HV26{n:04d}",
        study_id=str(n),
        study_date=f"202611{day}",
        study_time=f"0930{n:02d}",
        seed=f"harbour-vale-demo-{n}",
    )


CASES: tuple[DemoCase, ...] = (
    DemoCase(
        key="normal",
        title="Normal diastolic function (pre-coordinated codes, velocities in m/s)",
        expected_2016=Grade.normal,
        patient=Patient(
            name="Marlowe^Tessa", id="HV100201", birth_date="19840412", sex="F", age="042Y"
        ),
        study=_study(1, "02"),
        sop_class=SopClass.simplified_echo,
        items=(
            _i(M.lvef, 63, "%"),
            _i(M.mitral_e, 0.82, "m/s"),
            _i(M.mitral_a, 0.61, "m/s"),
            _i(M.deceleration_time, 0.188, "s"),
            _i(M.e_prime_septal, 10.2, "cm/s"),
            _i(M.e_prime_lateral, 14.1, "cm/s"),
            _i(M.tr_peak_velocity, 2.2, "m/s"),
            _i(M.lavi, 24, "ml/m2"),
        ),
    ),
    DemoCase(
        key="grade-1",
        title="Grade I, reduced LVEF (TID 5200 sections, repeats averaged)",
        expected_2016=Grade.grade_1,
        patient=Patient(
            name="Penrose^Aldous", id="HV100202", birth_date="19590103", sex="M", age="067Y"
        ),
        study=_study(2, "03"),
        template=Template.tid5200,
        items=(
            _i(M.lvef, 38, "%", encoding=Encoding.tid5200),
            _i(M.mitral_e, 44, "cm/s", encoding=Encoding.tid5200),
            _i(M.mitral_e, 46, "cm/s", encoding=Encoding.tid5200),
            _i(M.mitral_a, 74, "cm/s", encoding=Encoding.generic),
            _i(M.deceleration_time, 246, "ms", encoding=Encoding.tid5200),
            _i(M.e_prime_septal, 4.8, "cm/s", encoding=Encoding.tid5200),
            _i(M.e_prime_lateral, 6.9, "cm/s", encoding=Encoding.tid5200),
            _i(M.tr_peak_velocity, 2.4, "m/s", encoding=Encoding.tid5200),
            _i(M.lavi, 29, "ml/m2", encoding=Encoding.tid5200),
        ),
    ),
    DemoCase(
        key="grade-2",
        title="Grade II, normal LVEF (post-coordinated and site-private codes)",
        expected_2016=Grade.grade_2,
        patient=Patient(
            name="Quillfeather^Noor", id="HV100203", birth_date="19550719", sex="F", age="071Y"
        ),
        study=_study(3, "04"),
        items=(
            _i(M.lvef, 58, "%"),
            _i(M.mitral_e, 96, "cm/s", encoding=Encoding.post),
            _i(M.mitral_a, 79, "cm/s", encoding=Encoding.post),
            _i(M.e_prime_septal, 5.1, "cm/s", encoding=Encoding.post),
            _i(M.e_prime_lateral, 7.0, "cm/s", encoding=Encoding.post),
            _i(M.tr_peak_velocity, 3.25, "m/s", encoding=Encoding.post),
            _i(M.lavi, 41, "ml/m2", encoding=Encoding.private),
        ),
    ),
    DemoCase(
        key="grade-3",
        title="Grade III, reduced LVEF (restrictive filling; E in m/s, DT in s)",
        expected_2016=Grade.grade_3,
        patient=Patient(
            name="Okonkwo^Bram", id="HV100204", birth_date="19680227", sex="M", age="058Y"
        ),
        study=_study(4, "05"),
        items=(
            _i(M.lvef, 29, "%"),
            _i(M.mitral_e, 1.12, "m/s", selection=Selection.user),
            _i(M.mitral_e, 1.05, "m/s"),
            _i(M.mitral_a, 0.44, "m/s"),
            _i(M.deceleration_time, 0.128, "s"),
            _i(M.e_prime_septal, 4.1, "cm/s"),
            _i(M.e_prime_lateral, 5.9, "cm/s"),
            _i(M.tr_peak_velocity, 3.3, "m/s"),
            _i(M.lavi, 49, "ml/m2"),
        ),
    ),
    DemoCase(
        key="indeterminate",
        title="Indeterminate: two of four criteria met, normal LVEF",
        expected_2016=Grade.indeterminate,
        patient=Patient(
            name="Lindqvist^Hedda", id="HV100205", birth_date="19710830", sex="F", age="055Y"
        ),
        study=_study(5, "06"),
        items=(
            _i(M.lvef, 61, "%"),
            _i(M.mitral_e, 71, "cm/s"),
            _i(M.mitral_a, 66, "cm/s"),
            _i(M.e_prime_septal, 6.2, "cm/s"),
            _i(M.e_prime_lateral, 10.8, "cm/s"),
            _i(M.tr_peak_velocity, 3.2, "m/s"),
            _i(M.lavi, 27, "ml/m2"),
        ),
    ),
    DemoCase(
        key="borderline",
        title="Grade I with a borderline average E/e′ (13.6 against > 14)",
        expected_2016=Grade.grade_1,
        patient=Patient(
            name="Abernethy^Colm", id="HV100206", birth_date="19500914", sex="M", age="076Y"
        ),
        study=_study(6, "09"),
        items=(
            _i(M.lvef, 44, "%"),
            _i(M.mitral_e, 68, "cm/s"),
            _i(M.mitral_a, 72, "cm/s"),
            _i(M.e_prime_septal, 4.0, "cm/s"),
            _i(M.e_prime_lateral, 6.0, "cm/s"),
            _i(M.tr_peak_velocity, 3.1, "m/s"),
            _i(M.lavi, 30, "ml/m2"),
        ),
    ),
    DemoCase(
        key="not-gradable",
        title="Not gradable: inflow only, none of the four criteria recorded",
        expected_2016=Grade.not_gradable,
        patient=Patient(
            name="Faraday^Ines", id="HV100207", birth_date="19900521", sex="F", age="036Y"
        ),
        study=_study(7, "10"),
        items=(
            _i(M.lvef, 60, "%"),
            _i(M.mitral_e, 84, "cm/s"),
            _i(M.mitral_a, 58, "cm/s"),
            _i(M.deceleration_time, 172, "ms"),
        ),
    ),
    DemoCase(
        key="atrial-fibrillation",
        title="Atrial fibrillation stated by a coded Cardiac Rhythm item",
        expected_2016=Grade.not_applicable,
        patient=Patient(
            name="Vasquez-Hale^Ruben", id="HV100208", birth_date="19470306", sex="M", age="079Y"
        ),
        study=_study(8, "11"),
        rhythm=AF,
        items=(
            _i(M.lvef, 52, "%"),
            _i(M.mitral_e, 104, "cm/s"),
            _i(M.deceleration_time, 150, "ms"),
            _i(M.e_prime_septal, 7.5, "cm/s"),
            _i(M.e_prime_lateral, 10.5, "cm/s"),
            _i(M.tr_peak_velocity, 3.0, "m/s"),
            _i(M.lavi, 52, "ml/m2"),
        ),
    ),
    DemoCase(
        key="mitral-stenosis",
        title="Special situation: mitral stenosis stated by a coded finding",
        expected_2016=Grade.not_applicable,
        patient=Patient(
            name="Ashgrove^Petra", id="HV100210", birth_date="19610922", sex="F", age="065Y"
        ),
        study=_study(10, "13"),
        findings=(MITRAL_STENOSIS,),
        items=(
            _i(M.lvef, 60, "%"),
            _i(M.mitral_e, 1.46, "m/s"),
            _i(M.mitral_a, 1.72, "m/s"),
            _i(M.ivrt, 52, "ms"),
            _i(M.e_prime_septal, 6.4, "cm/s"),
            _i(M.e_prime_lateral, 8.1, "cm/s"),
            _i(M.tr_peak_velocity, 2.9, "m/s"),
            _i(M.lavi, 52, "ml/m2"),
        ),
    ),
    DemoCase(
        key="two-reports",
        title="One study sent as two SRs; the later SR adds TR velocity and LAVI",
        expected_2016=Grade.grade_2,
        patient=Patient(
            name="Tremaine^Odile", id="HV100209", birth_date="19521117", sex="F", age="074Y"
        ),
        study=_study(9, "12"),
        items=(
            _i(M.lvef, 57, "%"),
            _i(M.mitral_e, 102, "cm/s"),
            _i(M.mitral_a, 81, "cm/s"),
            _i(M.e_prime_septal, 5.5, "cm/s"),
            _i(M.e_prime_lateral, 7.4, "cm/s"),
        ),
        follow_up=(
            _i(M.tr_peak_velocity, 3.2, "m/s"),
            _i(M.lavi, 38, "ml/m2"),
        ),
    ),
)


def case_datasets(case: DemoCase) -> list[Dataset]:
    """The SR(s) of one case; a follow-up SR is created ten minutes after the first."""
    first = build_echo_sr(
        case.items,
        patient=case.patient,
        study=case.study,
        sop_class=case.sop_class,
        template=case.template,
        rhythm=case.rhythm,
        findings=case.findings,
    )
    if not case.follow_up:
        return [first]
    later_time = f"{int(case.study.study_time[:2]):02d}{int(case.study.study_time[2:4]) + 10:02d}00"
    later = build_echo_sr(
        case.follow_up,
        patient=case.patient,
        study=case.study.model_copy(
            update={"content_time": later_time, "study_uid": str(first.StudyInstanceUID)}
        ),
        sop_class=case.sop_class,
        template=case.template,
        instance_number=2,
    )
    return [first, later]


def demo_datasets() -> list[Dataset]:
    return [ds for case in CASES for ds in case_datasets(case)]


def write_demo_files(out_dir: Path) -> list[Path]:
    """Write every demo SR as a DICOM file; returns the paths in case order."""
    out_dir.mkdir(parents=True, exist_ok=True)
    paths = []
    for case in CASES:
        for n, ds in enumerate(case_datasets(case), 1):
            suffix = "" if n == 1 else f"-part{n}"
            path = out_dir / f"{case.key}{suffix}.dcm"
            ds.save_as(path, enforce_file_format=True)
            paths.append(path)
    return paths

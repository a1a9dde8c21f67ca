"""Result SR writer: structure, identity, references, determinism, round trip.

Sources named beside checks: PS3.3 (SR Document General Module, SOP Common Module) as
summarised in the project's DICOM reference; highdicom ``srread`` for the round trip.
All patients and clinics are invented ("Harbour Vale Cardiac Centre").
"""

from __future__ import annotations

from datetime import datetime

import pytest
from highdicom.sr import srread
from pydicom import Dataset, dcmread
from pydicom.dataset import FileMetaDataset
from pydicom.uid import ExplicitVRLittleEndian

import service
from service.errors import UserError
from service.model import (
    CAUTION,
    Assessment,
    AssessmentSet,
    BorderlineFlag,
    Comparison,
    Criterion,
    FillingPressure,
    Grade,
    Guideline,
    InstanceRef,
    Measure,
    Measurements,
    MeasureValue,
    Origin,
    Pathway,
    Rhythm,
    SpecialSituation,
    SupportingFinding,
    Verdict,
)
from service.sr import codes as C
from service.sr.identity import derive_uid
from service.sr.write import build_result_sr, summary_text

COMPREHENSIVE_SR = "1.2.840.10008.5.1.4.1.1.88.33"
ENHANCED_SR = "1.2.840.10008.5.1.4.1.1.88.22"
SIMPLIFIED_ECHO_SR = "1.2.840.10008.5.1.4.1.1.88.72"
EXTENSIBLE_SR = "1.2.840.10008.5.1.4.1.1.88.35"
WHEN = datetime(2026, 3, 14, 9, 26, 53)
PAPER = "Nagueh 2016 JASE 29:277"


# ---------------------------------------------------------------------------------------------
# Fixtures: invented source SRs and assessments
# ---------------------------------------------------------------------------------------------


def make_source(n: int = 1, sop_class: str = COMPREHENSIVE_SR, study: str | None = None) -> Dataset:
    """A small echo SR as a scanner would send it (invented patient)."""
    ds = Dataset()
    ds.SpecificCharacterSet = "ISO_IR 100"
    ds.SOPClassUID = sop_class
    ds.SOPInstanceUID = derive_uid("test source", str(n), sop_class)
    ds.StudyInstanceUID = study or derive_uid("test study")
    ds.SeriesInstanceUID = derive_uid("test series", str(n))
    ds.Modality = "SR"
    ds.PatientName = "Quayle^Marina"
    ds.PatientID = "HVCC-000417"
    ds.IssuerOfPatientID = "HVCC"
    ds.PatientBirthDate = "19580612"
    ds.PatientSex = "F"
    ds.PatientAge = "067Y"
    ds.AccessionNumber = "HV26-3141"
    ds.StudyID = "E2607"
    ds.StudyDate = "20260314"
    ds.StudyTime = "091500"
    ds.ReferringPhysicianName = "Brightwater^Owen"
    ds.StudyDescription = "Transthoracic echocardiogram"
    ds.InstitutionName = "Harbour Vale Cardiac Centre"
    ds.Manufacturer = "Harbour Vale test bench"
    ds.SeriesNumber = 3
    ds.InstanceNumber = n
    ds.ValueType = "CONTAINER"
    ds.ContinuityOfContent = "SEPARATE"
    title = Dataset()
    title.CodeValue, title.CodingSchemeDesignator = "125200", "DCM"
    title.CodeMeaning = "Adult Echocardiography Procedure Report"
    ds.ConceptNameCodeSequence = [title]
    ds.ContentSequence = []
    ds.CompletionFlag = "COMPLETE"
    ds.VerificationFlag = "UNVERIFIED"
    ds.ContentDate, ds.ContentTime = "20260314", "092000"
    ds.file_meta = FileMetaDataset()
    ds.file_meta.TransferSyntaxUID = ExplicitVRLittleEndian
    return ds


def crit(
    cid: str,
    measure: Measure,
    value: float | None,
    comparison: Comparison,
    threshold: float,
    label: str,
    step: str = "algorithm A",
) -> Criterion:
    unit = {
        Measure.e_e_prime_average: "{ratio}",
        Measure.e_prime_septal: "cm/s",
        Measure.e_prime_lateral: "cm/s",
        Measure.tr_peak_velocity: "m/s",
        Measure.lavi: "mL/m2",
        Measure.e_a_ratio: "{ratio}",
        Measure.mitral_e: "cm/s",
    }[measure]
    if value is None:
        verdict = Verdict.unavailable
    else:
        verdict = Verdict.met if comparison.holds(value, threshold) else Verdict.not_met
    return Criterion(
        id=cid,
        step=step,
        label=label,
        measure=measure,
        value=value,
        unit=unit,
        comparison=comparison,
        threshold=threshold,
        verdict=verdict,
        source=f"{PAPER}, Fig 8A",
    )


def criteria_a(ee: float | None, sep: float | None, tr: float | None, lavi: float | None):
    return (
        crit(
            "ase16.a.ee_avg", Measure.e_e_prime_average, ee, Comparison.gt, 14, "Average E/e′ > 14"
        ),
        crit("ase16.a.e_sep", Measure.e_prime_septal, sep, Comparison.lt, 7, "Septal e′ < 7 cm/s"),
        crit(
            "ase16.a.tr", Measure.tr_peak_velocity, tr, Comparison.gt, 2.8, "TR velocity > 2.8 m/s"
        ),
        crit("ase16.a.lavi", Measure.lavi, lavi, Comparison.gt, 34, "LAVI > 34 mL/m²"),
    )


def assessment(
    grade: Grade,
    pressure: FillingPressure,
    *,
    guideline: Guideline = Guideline.ase_eacvi_2016,
    pathway: Pathway = Pathway.normal_lvef,
    criteria=(),
    **kw,
) -> Assessment:
    return Assessment(
        guideline=guideline,
        guideline_citation=f"{PAPER}-314 (ASE/EACVI 2016)",
        rule_set_version="ase16-1",
        pathway=pathway,
        pathway_reason=kw.pop("pathway_reason", "LVEF 62 % is normal and no myocardial disease"),
        grade=grade,
        filling_pressure=pressure,
        criteria=criteria,
        reasoning=kw.pop("reasoning", ("Four criteria available.", "Result follows Fig 8A.")),
        **kw,
    )


def measurements() -> Measurements:
    return Measurements(
        values={
            Measure.mitral_e: MeasureValue(
                measure=Measure.mitral_e, value=92.0, unit="cm/s", origin=Origin.measured,
                codes=("80070-6 LN",), paths=("1.4.1",), source_uids=("1.2.3",),
            ),
            Measure.e_prime_septal: MeasureValue(
                measure=Measure.e_prime_septal, value=5.0, unit="cm/s",
                origin=Origin.mean_of_repeats, n=3, detail="mean of 3 unmarked repeats",
                codes=("79911-4 LN",),
            ),
            Measure.e_e_prime_average: MeasureValue(
                measure=Measure.e_e_prime_average, value=15.3, unit="{ratio}",
                origin=Origin.derived, n=1, detail="E / average e′",
            ),
            Measure.lvef: MeasureValue(
                measure=Measure.lvef, value=62.0, unit="%", origin=Origin.device_mean, n=2
            ),
            Measure.age: MeasureValue(
                measure=Measure.age, value=67, unit="a", origin=Origin.patient
            ),
        },
        notes=("Reported E/e′ differs from its components by 12 %; components used.",),
    )  # fmt: skip


def _set(primary: Assessment, *others: Assessment, disagreements=()) -> AssessmentSet:
    return AssessmentSet(primary=primary, others=others, disagreements=disagreements)


AF_REASON = "atrial fibrillation, stated by a coded Cardiac Rhythm item in the source SR"
STUDY_NOTE = "A note about the study that every guideline would give."

#: constructed cases: every grade, indeterminate, not-gradable with a reason, borderline,
#: compared guidelines, special situation, AF pathway
CASES: dict[str, AssessmentSet] = {
    "normal": _set(
        assessment(Grade.normal, FillingPressure.normal, criteria=criteria_a(9, 8.5, 2.2, 28))
    ),
    "grade-1": _set(
        assessment(Grade.grade_1, FillingPressure.normal, rhythm=Rhythm.sinus,
                   criteria=criteria_a(10, 6, 2.4, 30))
    ),
    "grade-2": _set(
        assessment(Grade.grade_2, FillingPressure.elevated, criteria=criteria_a(15.3, 5, 3.0, 38),
                   pathway=Pathway.reduced_lvef_or_myocardial_disease)
    ),
    "grade-3": _set(
        assessment(Grade.grade_3, FillingPressure.elevated, criteria=criteria_a(18, 4, 3.3, 45))
    ),
    "indeterminate": _set(
        assessment(Grade.indeterminate, FillingPressure.indeterminate,
                   criteria=criteria_a(15, 8, None, None),
                   notes=("TR velocity and LAVI unavailable.",))
    ),
    "not-gradable": _set(
        assessment(Grade.not_gradable, FillingPressure.not_estimated,
                   criteria=criteria_a(None, None, None, None),
                   reasoning=("Algorithm A: none of the 4 criteria is available; not gradable.",))
    ),
    "special-situation": _set(
        assessment(Grade.not_applicable, FillingPressure.not_estimated,
                   pathway=Pathway.not_applicable,
                   pathway_reason="mitral stenosis: ASE/EACVI 2016 gives no alternative criteria",
                   special_situations=(SpecialSituation.mitral_stenosis,),
                   criteria=(), reasoning=())
    ),
    "borderline": _set(
        assessment(
            Grade.normal, FillingPressure.normal, criteria=criteria_a(13.4, 7.5, 2.9, 30),
            borderline=(BorderlineFlag(
                criterion_id="ase16.a.ee_avg", measure=Measure.e_e_prime_average, value=13.4,
                threshold=14, alternative_grade=Grade.indeterminate,
                alternative_filling_pressure=FillingPressure.indeterminate,
                text="Average E/e′ 13.4 is within 10 % of the cut-off 14; above it the result "
                "would be indeterminate.",
            ),),
            supporting=(SupportingFinding(
                name="Valsalva", text="E/A fell by 55 % with Valsalva",
                supports_elevated_pressure=True, agrees_with_result=False,
            ),),
        )
    ),
    "compared": _set(
        assessment(Grade.grade_1, FillingPressure.normal, criteria=criteria_a(12, 6, 2.5, 33)),
        assessment(Grade.grade_2, FillingPressure.elevated, guideline=Guideline.ase_2025,
                   pathway=Pathway.sinus_general, criteria=criteria_a(12, 6, 2.5, 33)),
        disagreements=("2016: grade 1; 2025: grade 2 — the 2025 e′ cut-off differs.",),
    ),
    # empty strings wherever the model allows them: no empty TEXT item may be written
    "sparse": _set(
        Assessment(
            guideline=Guideline.ase_eacvi_2016, guideline_citation="", rule_set_version="",
            pathway=Pathway.normal_lvef, pathway_reason="", grade=Grade.indeterminate,
            filling_pressure=FillingPressure.indeterminate,
            criteria=(Criterion(
                id="", step="", label="", measure=Measure.lavi, value=None, unit="mL/m2",
                comparison=Comparison.gt, threshold=34, verdict=Verdict.unavailable, source="",
            ),),
            reasoning=("", "Only one criterion."), notes=("",),
            borderline=(BorderlineFlag(
                criterion_id="", measure=Measure.lavi, value=33.0, threshold=34,
                alternative_grade=Grade.grade_2,
                alternative_filling_pressure=FillingPressure.elevated, text="",
            ),),
            supporting=(SupportingFinding(name="", text=""),),
        ),
        Assessment(
            guideline=Guideline.ase_2025, guideline_citation="", rule_set_version="",
            pathway=Pathway.sinus_general, pathway_reason="", grade=Grade.indeterminate,
            filling_pressure=FillingPressure.not_estimated,
        ),
        disagreements=("",),
    ),
    "af": _set(
        assessment(Grade.not_applicable, FillingPressure.elevated, rhythm=Rhythm.af,
                   pathway=Pathway.atrial_fibrillation, criteria=criteria_a(12, 6, 3.1, 40))
    ),
    # two guidelines routed by the same stated rhythm, with a note about the study: the
    # reason and the note are written once
    "af-compared": _set(
        assessment(Grade.not_applicable, FillingPressure.indeterminate, rhythm=Rhythm.af,
                   pathway=Pathway.atrial_fibrillation, criteria=criteria_a(12, 6, 3.1, 40),
                   pathway_reason=AF_REASON, reasoning=("Two criteria support it.",),
                   context_notes=(STUDY_NOTE,)),
        assessment(Grade.not_applicable, FillingPressure.elevated, rhythm=Rhythm.af,
                   guideline=Guideline.ase_2025, pathway=Pathway.atrial_fibrillation,
                   criteria=criteria_a(12, 6, 3.1, 40), pathway_reason=AF_REASON,
                   reasoning=("Three criteria met.",), context_notes=(STUDY_NOTE,)),
        disagreements=("The 2016 criteria are not combined.",),
    ),
}  # fmt: skip

PREDECESSOR = InstanceRef(
    study_instance_uid=derive_uid("test study"),
    series_instance_uid=derive_uid("result series"),
    sop_class_uid=COMPREHENSIVE_SR,
    sop_instance_uid=derive_uid("earlier result"),
)


def build(case: str, *, sources=None, predecessors=(), when: datetime | None = WHEN) -> Dataset:
    sources = sources or [make_source()]
    return build_result_sr(
        sources,
        CASES[case],
        measurements(),
        sop_instance_uid=derive_uid("result", case),
        series_instance_uid=derive_uid("result series"),
        predecessors=predecessors,
        content_datetime=when,
    )


def save(ds: Dataset, path) -> str:
    ds.save_as(path, enforce_file_format=True)
    return str(path)


def walk(item: Dataset, depth: int = 0):
    """(depth, item) for every content item below ``item`` (by-reference items are not content
    items of their own: they are left out; see :func:`targets`)."""
    for child in item.get("ContentSequence", []):
        if "ReferencedContentItemIdentifier" in child:
            continue
        yield depth + 1, child
        yield from walk(child, depth + 1)


def at(ds: Dataset, path) -> Dataset:
    """The content item at a Referenced Content Item Identifier (PS3.3 C.17.3.2.5): 1 is the
    root, then the 1-based position among each level's Content Sequence items."""
    path = [int(n) for n in (path if isinstance(path, list | tuple) else [path])]
    assert path[0] == 1
    item = ds
    for n in path[1:]:
        item = item.ContentSequence[n - 1]
    return item


def targets(ds: Dataset, item: Dataset) -> list[tuple[str, Dataset]]:
    """(relationship, target) of every by-reference child of ``item``."""
    out = []
    for child in item.get("ContentSequence", []):
        if "ReferencedContentItemIdentifier" in child:
            path = child.ReferencedContentItemIdentifier
            out.append((child.RelationshipType, at(ds, path if isinstance(path, list) else [path])))
    return out


def name_of(item: Dataset) -> tuple[str, str]:
    if "ConceptNameCodeSequence" not in item:  # a by-reference item names no concept
        return ("", "")
    c = item.ConceptNameCodeSequence[0]
    return c.CodeValue, c.CodingSchemeDesignator


def find(ds: Dataset, code: C.CodeDef) -> list[Dataset]:
    return [i for _, i in walk(ds) if name_of(i) == (code.value, code.scheme)]


# ---------------------------------------------------------------------------------------------
# Tests
# ---------------------------------------------------------------------------------------------


def _without_references(item: Dataset) -> int:
    """Remove every by-reference item below ``item``; how many were removed."""
    removed = 0
    seq = item.get("ContentSequence")
    if seq is None:
        return 0
    kept = [c for c in seq if "ReferencedContentItemIdentifier" not in c]
    removed += len(seq) - len(kept)
    item.ContentSequence = kept
    for c in kept:
        removed += _without_references(c)
    return removed


@pytest.mark.parametrize("case", sorted(CASES))
def test_highdicom_srread_reads_all_but_the_by_reference_items(case, tmp_path):
    # highdicom 0.28.2 (the newest on PyPI) parses a content item only when it has a Value
    # Type (highdicom.sr.value_types.ContentSequence._check_dataset), so it refuses the
    # by-reference items that Comprehensive SR allows (PS3.3 A.35.3.3.1.2, Table A.35.3-2;
    # Referenced Content Item Identifier, C.17.3.2.5).  DCMTK dsrdump and dciodvfy read the
    # whole document (test_result_validators.py).  Here: highdicom refuses the document as
    # written, and reads everything else of it once the references are taken out.
    ds = build(case, predecessors=[PREDECESSOR])
    path = save(ds, tmp_path / f"{case}.dcm")
    referenced = any(
        "ReferencedContentItemIdentifier" in c
        for _, i in walk(ds)
        for c in i.get("ContentSequence", [])
    )
    assert referenced  # every result names its criteria or its pathway by reference
    with pytest.raises(AttributeError, match=r"not a value SR Content Item|not an SR Content"):
        srread(path)
    plain = dcmread(path)
    assert _without_references(plain) > 0
    doc = srread(save(plain, tmp_path / f"{case}-plain.dcm"))
    assert type(doc).__name__ == "ComprehensiveSR"
    assert doc.SOPClassUID == COMPREHENSIVE_SR


@pytest.mark.parametrize("case", sorted(CASES))
def test_grade_and_pressure_items_carry_the_assessment(case):
    ds = build(case)
    a = CASES[case].primary
    grades = find(ds, C.GRADE)
    assert grades[0].ConceptCodeSequence[0].CodeValue == C.GRADE_VALUES[a.grade].value
    assert grades[0].ConceptCodeSequence[0].CodingSchemeDesignator == "99DSRG"
    pressures = find(ds, C.FILLING_PRESSURE)
    fp = C.FILLING_PRESSURE_VALUES[a.filling_pressure]
    assert pressures[0].ConceptCodeSequence[0].CodeValue == fp.value
    # one grade and one pressure per assessment, primary first
    assert len(grades) == len(pressures) == 1 + len(CASES[case].others)
    # each criterion is written once, in the Criteria container, in order; the grade (unless
    # the guideline gives none here) and the filling pressure refer to each by reference
    # (INFERRED FROM, PS3.3 Table A.35.3-2)
    criteria_items = [i for c in find(ds, C.CRITERIA)[:1] for i in c.ContentSequence]
    assert len(criteria_items) == len(a.criteria)
    assert all(i.RelationshipType == "CONTAINS" for i in criteria_items)
    by_pressure = targets(ds, pressures[0])
    (pathway,) = find(ds, C.PATHWAY)[:1]
    if a.criteria:
        assert [t for _, t in by_pressure] == criteria_items
    else:
        assert [t for _, t in by_pressure] == [pathway]
    by_grade = targets(ds, grades[0])
    if a.grade is Grade.not_applicable or not a.criteria:
        assert [t for _, t in by_grade] == [pathway]
    else:
        assert [t for _, t in by_grade] == criteria_items
    assert {r for r, _ in by_grade + by_pressure} == {"INFERRED FROM"}
    # no criterion is written anywhere else
    assert all(
        i in criteria_items
        for _, i in walk(ds)
        if C.CRITERION_VERDICT.value in [name_of(p)[0] for p in i.get("ContentSequence", [])]
    )
    children = criteria_items
    for c, item in zip(a.criteria, children, strict=True):
        assert name_of(item) == (
            C.MEASURE_CONCEPTS[c.measure].value,
            C.MEASURE_CONCEPTS[c.measure].scheme,
        )
        if c.value is None:
            assert item.ValueType == "TEXT" and item.TextValue == "not available"
        else:
            assert item.ValueType == "NUM"
            mv = item.MeasuredValueSequence[0]
            assert float(mv.NumericValue) == pytest.approx(c.value)
            assert mv.MeasurementUnitsCodeSequence[0].CodeValue == c.unit
            assert mv.MeasurementUnitsCodeSequence[0].CodingSchemeDesignator == "UCUM"
        verdict = [p for p in item.ContentSequence if name_of(p)[0] == C.CRITERION_VERDICT.value]
        expected = {"met": "CRITMET", "not-met": "CRITNOTMET", "unavailable": "CRITUNAVAIL"}
        assert verdict[0].ConceptCodeSequence[0].CodeValue == expected[c.verdict.value]
        assert verdict[0].RelationshipType == "HAS PROPERTIES"
        cutoff = [p for p in item.ContentSequence if name_of(p)[0] == C.CUTOFF.value]
        assert float(cutoff[0].MeasuredValueSequence[0].NumericValue) == c.threshold


def test_reasoning_notes_caution_summary_in_order():
    ds = build("indeterminate")
    a = CASES["indeterminate"].primary
    assert [i.TextValue for i in find(ds, C.REASONING)] == list(a.reasoning)
    # TEXT content items hold UT (PS3.3 C.17.3.2.1, Text Value)
    assert all(i["TextValue"].VR == "UT" for _, i in walk(ds) if i.ValueType == "TEXT")
    assert [i.TextValue for i in find(ds, C.NOTE)] == list(a.notes)
    # the exact caution string, in the Impressions container (19005-8 LN, PS3.16 CID 7001)
    (impressions,) = find(ds, C.IMPRESSIONS)
    texts = {name_of(i): i.TextValue for i in impressions.ContentSequence}
    assert texts[("CAUTION", "99DSRG")] == CAUTION
    assert texts[("121073", "DCM")] == summary_text(CASES["indeterminate"])
    assert "indeterminate" in texts[("121073", "DCM")]


def test_special_situation_carries_reason_and_situation():
    ds = build("special-situation")
    (pathway,) = find(ds, C.PATHWAY)
    assert pathway.ConceptCodeSequence[0].CodeValue == "PW-NOTAPPLICABLE"
    reason = pathway.ContentSequence[0]
    assert reason.RelationshipType == "INFERRED FROM"
    assert "mitral stenosis" in reason.TextValue
    (situation,) = find(ds, C.SPECIAL_SITUATION)
    assert situation.ConceptCodeSequence[0].CodeValue == "SS-MS"
    impression = find(ds, C.IMPRESSION)[0].TextValue
    assert "Grade not applicable in mitral stenosis" in impression
    assert "the standard algorithm does not apply" in impression


def test_borderline_flag_and_supporting_finding():
    ds = build("borderline")
    (flag,) = find(ds, C.BORDERLINE)
    # Yes from PS3.16 CID 230
    assert flag.ConceptCodeSequence[0].CodeValue == "373066001"
    (detail,) = flag.ContentSequence
    assert "13.4" in detail.TextValue
    props = {name_of(p)[0]: p.ConceptCodeSequence[0].CodeValue for p in detail.ContentSequence[1:]}
    assert props == {"ALTGRADE": "DFG-INDET", "ALTFILLPRESSURE": "371934000"}
    (finding,) = find(ds, C.SUPPORTING_FINDING)
    assert finding.TextValue.startswith("Valsalva:")
    impression = find(ds, C.IMPRESSION)[0].TextValue
    # the impression names the measure; the flag's sentence is said once, in its own item
    assert impression.endswith("Borderline: Average E/e′.")
    assert detail.TextValue.startswith("Average E/e′ 13.4 is within 10 %")
    assert detail.TextValue not in impression
    assert "e_e_prime_average" not in impression  # plain words for the reader, no field names
    # a result without flags says No (373067005 SCT, PS3.16 CID 230)
    (no_flag,) = find(build("normal"), C.BORDERLINE)
    assert no_flag.ConceptCodeSequence[0].CodeValue == "373067005"


def test_what_two_assessments_share_is_written_once():
    ds = build("af-compared")
    [note] = find(ds, C.STUDY_NOTE)
    assert note.TextValue == STUDY_NOTE and not find(ds, C.NOTE)
    # the study note is a child of the root, after the Impressions container and before the
    # first assessment
    names = [name_of(i)[0] for i in ds.ContentSequence if "ConceptNameCodeSequence" in i]
    assert names.index("STUDYNOTE") == names.index("19005-8") + 1
    assert names.index("STUDYNOTE") < names.index("ASSESSMENT")
    [reason] = find(ds, C.PATHWAY_REASON)
    assert reason.TextValue == AF_REASON
    _first, second = find(ds, C.PATHWAY)
    assert targets(ds, second) == [("INFERRED FROM", reason)]  # by reference, PS3.3 C.17.3.2.5


def test_compared_guidelines_primary_first_with_disagreement():
    ds = build("compared")
    guidelines = [i.ConceptCodeSequence[0].CodeValue for i in find(ds, C.GUIDELINE)]
    assert guidelines == ["GL-ASEEACVI2016", "GL-ASE2025"]
    roles = [i.ConceptCodeSequence[0].CodeValue for i in find(ds, C.ASSESSMENT_ROLE)]
    assert roles == ["PRIMARY", "COMPARISON"]
    assert [i.TextValue for i in find(ds, C.DISAGREEMENT)] == list(CASES["compared"].disagreements)
    assert "For comparison, ASE 2025: Grade II" in find(ds, C.IMPRESSION)[0].TextValue
    assert not find(build("normal"), C.GUIDELINE_COMPARISON)


def test_measurements_used_with_origin():
    ds = build("grade-2")
    (container,) = find(ds, C.MEASUREMENTS_USED)
    nums = {name_of(i)[0]: i for i in container.ContentSequence if i.ValueType == "NUM"}
    assert set(nums) == {"80070-6", "79911-4", "EEPRIMEAVERAGE", "18043-0", "121033"}
    septal = nums["79911-4"]
    origin = [p.TextValue for p in septal.ContentSequence if name_of(p)[0] == "VALUEORIGIN"]
    assert origin == ["mean of unmarked repeats, computed here, n = 3; mean of 3 unmarked repeats"]
    # Derivation (121401 DCM) = Mean (373098007 SCT) / Calculated (258090004 SCT), PS3.16 CID 3627
    deriv = {
        k: [p.ConceptCodeSequence[0].CodeValue for p in v.ContentSequence if p.ValueType == "CODE"]
        for k, v in nums.items()
    }
    assert deriv["79911-4"] == ["373098007"]
    assert deriv["EEPRIMEAVERAGE"] == ["258090004"]
    assert deriv["80070-6"] == []
    notes = [i.TextValue for i in container.ContentSequence if name_of(i)[0] == "MEASNOTE"]
    assert notes == list(measurements().notes)


def test_same_patient_and_study_new_series_unverified():
    # identity carried over (PS3.3 Patient / General Study modules), new series,
    # Verification UNVERIFIED, Completion COMPLETE, Preliminary PRELIMINARY (PS3.3 C.17.2)
    src = make_source()
    ds = build("grade-2", sources=[src])
    for kw in (
        "PatientName", "PatientID", "IssuerOfPatientID", "PatientBirthDate", "PatientSex",
        "StudyInstanceUID", "AccessionNumber", "StudyID", "StudyDate", "StudyTime",
        "ReferringPhysicianName", "StudyDescription",
    ):  # fmt: skip
        assert ds[kw].value == src[kw].value, kw
    assert ds.SeriesInstanceUID != src.SeriesInstanceUID
    assert ds.SOPInstanceUID == derive_uid("result", "grade-2")
    assert ds.Modality == "SR" and ds.SOPClassUID == COMPREHENSIVE_SR
    assert ds.SeriesDescription == "Automated LV diastolic function assessment"
    # the document title says what the result is (not the scanner's "Echocardiography Report")
    title = ds.ConceptNameCodeSequence[0]
    assert (title.CodeValue, title.CodingSchemeDesignator) == ("DFREPORT", "99DSRG")
    assert title.CodeMeaning == "Automated LV diastolic function assessment"
    assert ds.SeriesNumber == 9901 and ds.InstanceNumber == 1
    assert (ds.VerificationFlag, ds.CompletionFlag, ds.PreliminaryFlag) == (
        "UNVERIFIED", "COMPLETE", "PRELIMINARY",
    )  # fmt: skip
    assert ds.Manufacturer == "diastolic-sr project"
    assert ds.SoftwareVersions == f"diastolic-sr {service.__version__}"
    assert (str(ds.ContentDate), str(ds.ContentTime)) == ("20260314", "092653")
    (scheme,) = ds.CodingSchemeIdentificationSequence
    assert scheme.CodingSchemeDesignator == "99DSRG"
    assert scheme.CodingSchemeName == "diastolic-sr grading concepts"
    assert "PredecessorDocumentsSequence" not in ds


@pytest.mark.parametrize(
    "classes", [[COMPREHENSIVE_SR, ENHANCED_SR, SIMPLIFIED_ECHO_SR, EXTENSIBLE_SR]]
)
def test_every_source_referenced_as_evidence(classes):
    sources = [make_source(i + 1, c) for i, c in enumerate(classes)]
    ds = build("grade-1", sources=sources)
    # Current Requested Procedure Evidence Sequence (PS3.3 C.17.2) lists every source
    refs = {
        (s.ReferencedSOPClassUID, s.ReferencedSOPInstanceUID)
        for study in ds.CurrentRequestedProcedureEvidenceSequence
        for series in study.ReferencedSeriesSequence
        for s in series.ReferencedSOPSequence
    }
    assert refs == {(s.SOPClassUID, s.SOPInstanceUID) for s in sources}
    composites = [
        (i.ReferencedSOPSequence[0].ReferencedSOPClassUID,
         i.ReferencedSOPSequence[0].ReferencedSOPInstanceUID)
        for i in find(ds, C.CURRENT_PROCEDURE_EVIDENCE)
    ]  # fmt: skip
    assert composites == [(s.SOPClassUID, s.SOPInstanceUID) for s in sources]
    assert "PertinentOtherEvidenceSequence" not in ds


def test_predecessors_listed():
    second = PREDECESSOR.model_copy(update={"sop_instance_uid": derive_uid("older result")})
    ds = build("grade-1", predecessors=[PREDECESSOR, second, PREDECESSOR])
    (study,) = ds.PredecessorDocumentsSequence
    assert study.StudyInstanceUID == PREDECESSOR.study_instance_uid
    (series,) = study.ReferencedSeriesSequence
    assert series.SeriesInstanceUID == PREDECESSOR.series_instance_uid
    assert [s.ReferencedSOPInstanceUID for s in series.ReferencedSOPSequence] == [
        PREDECESSOR.sop_instance_uid,
        second.sop_instance_uid,
    ]


def _bytes(ds: Dataset, path) -> bytes:
    save(ds, path)
    return path.read_bytes()


def test_deterministic_output(tmp_path):
    # same inputs and content time -> byte-identical file (common practice for idempotent
    # re-sends: the PACS must not receive a different object under the same UID)
    a = _bytes(build("borderline", predecessors=[PREDECESSOR]), tmp_path / "a.dcm")
    b = _bytes(build("borderline", predecessors=[PREDECESSOR]), tmp_path / "b.dcm")
    assert a == b
    c = _bytes(build("grade-3"), tmp_path / "c.dcm")
    assert c != a
    later = build("borderline", predecessors=[PREDECESSOR], when=datetime(2026, 3, 15, 8, 0))
    assert _bytes(later, tmp_path / "d.dcm") != a


def test_without_content_datetime_uses_now():
    ds = build("normal", when=None)
    assert len(str(ds.ContentDate)) == 8 and str(ds.ContentDate) >= "2026"


def test_saved_file_reads_back_with_utf8_text(tmp_path):
    path = save(build("borderline"), tmp_path / "r.dcm")
    ds = dcmread(path)
    assert ds.SpecificCharacterSet == "ISO_IR 192"
    rules = [i.TextValue for i in find(ds, C.CRITERION_RULE)]
    assert "Average E/e′ > 14" in rules and "LAVI > 34 mL/m²" in rules
    assert ds.PatientName == "Quayle^Marina"


def test_source_missing_optional_identity_still_builds():
    src = make_source()
    for kw in ("AccessionNumber", "StudyID", "ReferringPhysicianName", "PatientSex"):
        delattr(src, kw)
    ds = build("normal", sources=[src])
    assert ds.AccessionNumber == "" and ds.StudyID == ""
    assert "AccessionNumber" not in src  # the caller's dataset is not changed


@pytest.mark.parametrize(
    "kwargs, message",
    [
        ({"sources": []}, "at least one source"),
        ({"sop_instance_uid": "not.a.uid"}, "not a valid DICOM UID"),
        ({"series_instance_uid": "1.02.3"}, "not a valid DICOM UID"),
    ],
)
def test_bad_arguments_give_clear_errors(kwargs, message):
    args = {
        "sources": [make_source()],
        "sop_instance_uid": derive_uid("x"),
        "series_instance_uid": derive_uid("y"),
    }
    args.update(kwargs)
    sources = args.pop("sources")
    with pytest.raises(UserError, match=message):
        build_result_sr(sources, CASES["normal"], measurements(), **args)


def test_source_without_uid_is_a_clear_error():
    src = make_source()
    del src.SOPInstanceUID
    with pytest.raises(UserError, match="no SOPInstanceUID"):
        build("normal", sources=[src])


def test_excluded_observations_listed_with_reason():
    from service.model import Code, Exclusion

    m = measurements().model_copy(
        update={
            "excluded": (
                Exclusion(
                    path="1.3.2",
                    concept=Code(value="80070-6", scheme="LN", meaning="Mitral valve E-wave Vmax"),
                    measure=Measure.mitral_e,
                    value=3000.0,
                    unit="cm/s",
                    reason="physiologically impossible (unit error?)",
                ),
            )
        }
    )
    ds = build_result_sr(
        [make_source()],
        CASES["normal"],
        m,
        sop_instance_uid=derive_uid("x"),
        series_instance_uid=derive_uid("y"),
        content_datetime=WHEN,
    )
    (item,) = find(ds, C.EXCLUDED_OBSERVATION)
    assert item.TextValue == (
        "Mitral valve E-wave Vmax (80070-6, LN) = 3000 cm/s: "
        "physiologically impossible (unit error?)"
    )


def test_timezone_aware_content_time_sets_offset():
    from datetime import timedelta, timezone

    when = datetime(2026, 3, 14, 9, 26, 53, tzinfo=timezone(timedelta(hours=-3, minutes=-30)))
    ds = build("normal", when=when)
    # Timezone Offset From UTC, "&ZZXX" form (PS3.3 C.12.1)
    assert ds.TimezoneOffsetFromUTC == "-0330"
    assert str(ds.ContentTime) == "092653"


def test_source_from_another_study_is_other_evidence():
    # a source outside the study of sources[0] goes to Pertinent Other Evidence (PS3.3 C.17.2)
    first = make_source(1)
    other = make_source(2, study=derive_uid("another study"))
    ds = build("normal", sources=[first, other])
    (current,) = ds.CurrentRequestedProcedureEvidenceSequence
    (pertinent,) = ds.PertinentOtherEvidenceSequence
    assert current.StudyInstanceUID == first.StudyInstanceUID
    assert pertinent.StudyInstanceUID == other.StudyInstanceUID
    assert ds.StudyInstanceUID == first.StudyInstanceUID


def test_no_empty_text_items():
    # Text Value is Type 1 (PS3.3 C.17.3.2.1): empty model strings are left out or replaced
    ds = build("sparse")
    texts = [i.TextValue for _, i in walk(ds) if i.ValueType == "TEXT"]
    assert texts and all(t.strip() for t in texts)
    assert [i.TextValue for i in find(ds, C.REASONING)] == ["Only one criterion."]
    assert find(ds, C.CRITERION_RULE)[0].TextValue == "lavi > 34 mL/m2"
    assert find(ds, C.DISAGREEMENT)[0].TextValue.startswith("The guidelines evaluated agree")

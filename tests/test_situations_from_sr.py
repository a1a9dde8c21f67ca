"""A special situation the source SR states itself, by a coded finding, is graded with the
guideline's alternative criteria, as if it had been configured, and the result says where it
came from.

Outside source: pydicom's bundled PS3.16 dictionary (``pydicom.sr._concepts_dict``,
``pydicom.sr._cid_dict``) for every code read.  Rules: Nagueh SF et al., J Am Soc Echocardiogr
2016;29:277–314, §V.C (mitral stenosis: IVRT < 60 ms, mitral A > 1.5 m/s, no combination rule).
Patients and values are invented (fictional Harbour Vale Cardiac Centre).
"""

from __future__ import annotations

import pytest
from grading_builders import GRADE_2_STUDY
from pydicom.sr._cid_dict import cid_concepts
from pydicom.sr._concepts_dict import concepts

from service.model import Code, Grade, Measure, Outcome, Pathway, SpecialSituation
from service.pipeline import GradeOptions, grade_study
from service.sr.echo_builder import EchoItem, Patient, Study, build_echo_sr
from service.sr.situations import FINDING_CONCEPTS, SITUATION_CODES
from service.wording import STATED_BY_FINDING, headline

MS = Code(value="79619009", scheme="SCT", meaning="Mitral stenosis")
#: a normal-LVEF study that the standard algorithm grades (grade II) when no situation applies
VALUES = GRADE_2_STUDY


def _sr(seed: str, *, findings=(), raw_content=()):
    return build_echo_sr(
        [EchoItem(measure=m, value=v) for m, v in VALUES.items()],
        patient=Patient(name="Ashgrove^Petra", id="HV-S-0001"),
        study=Study(seed=seed),
        findings=findings,
        raw_content=raw_content,
    )


def _in_pydicom(scheme: str, value: str, cid: int) -> tuple[str, str]:
    """(keyword, meaning) of a code in pydicom's PS3.16 dictionary as a member of ``cid`` (a
    code may be listed under several keywords, e.g. with its SNOMED CT full name)."""
    for keyword, codes in concepts[scheme].items():
        if value in codes and cid in codes[value][1] and keyword in cid_concepts[cid][scheme]:
            return keyword, codes[value][0]
    raise AssertionError(f"({value}, {scheme}) is not in CID {cid} of pydicom's dictionary")


def test_every_code_read_is_in_the_standards_dictionary() -> None:
    # concept names: CID 7002 Diagnostic Imaging Report Element
    for scheme, value in FINDING_CONCEPTS:
        _in_pydicom(scheme, value, 7002)
    expected = {
        "79619009": ("Mitral stenosis", SpecialSituation.mitral_stenosis),
        "45227007": ("Hypertrophic", SpecialSituation.hypertrophic_cardiomyopathy),
        "195020003": ("Hypertrophic", SpecialSituation.hypertrophic_cardiomyopathy),
        "90828009": ("Restrictive cardiomyopathy", SpecialSituation.restrictive_cardiomyopathy),
    }
    assert {v for _, v in SITUATION_CODES} == set(expected)
    for (scheme, value), situation in SITUATION_CODES.items():
        # members of PS3.16 CID 3728 "Cath Finding" (mitral stenosis also of CID 12248)
        _, meaning = _in_pydicom(scheme, value, 3728)
        words, expected_situation = expected[value]
        assert meaning.startswith(words) and situation is expected_situation


def test_mitral_stenosis_finding_makes_the_study_a_special_situation() -> None:
    plain = grade_study([_sr("no-finding")], GradeOptions())
    assert plain.assessment.grade is Grade.grade_2  # the standard algorithm applies
    stated = grade_study([_sr("finding", findings=[MS])], GradeOptions())
    a = stated.assessment
    assert a.outcome is Outcome.special_situation and a.grade is Grade.not_applicable
    assert a.pathway is Pathway.special_situation
    assert a.special_situations == (SpecialSituation.mitral_stenosis,)
    assert a.pathway_reason.startswith(f"mitral stenosis ({STATED_BY_FINDING}): ")
    # Nagueh 2016 §V.C: IVRT 52 < 60 ms and mitral A 172 > 150 cm/s, no combination rule
    assert [(c.measure, c.verdict.value) for c in a.criteria] == [
        (Measure.ivrt, "met"),
        (Measure.mitral_a, "met"),
    ]
    assert headline(a) == (
        "Grade not applicable in mitral stenosis; LV filling pressure indeterminate by the "
        "ASE/EACVI 2016 criteria for mitral stenosis."
    )
    # the result says the situation as a coded item too (and the finding's source is listed)
    [assessment] = [
        item
        for item in stated.result.ContentSequence
        if item.ConceptNameCodeSequence[0].CodeMeaning == "LV diastolic function assessment"
    ]
    codes = [
        item.ConceptCodeSequence[0].CodeMeaning
        for item in assessment.ContentSequence
        if "ConceptNameCodeSequence" in item
        and item.ConceptNameCodeSequence[0].CodeMeaning == "Special situation"
    ]
    assert codes == ["Mitral stenosis"]


def test_a_configured_situation_and_a_stated_one_are_both_applied_and_told_apart() -> None:
    from service.model import Context

    options = GradeOptions(
        context=Context(special_situations=frozenset({SpecialSituation.heart_transplant}))
    )
    a = grade_study([_sr("both", findings=[MS])], options).assessment
    assert set(a.special_situations) == {
        SpecialSituation.heart_transplant,
        SpecialSituation.mitral_stenosis,
    }
    assert f"heart transplant, mitral stenosis ({STATED_BY_FINDING})" in a.pathway_reason


@pytest.mark.parametrize(
    ("concept", "read"),
    [
        (("121071", "DCM", "Finding"), True),
        (("121073", "DCM", "Impression"), True),
        (("121077", "DCM", "Conclusion"), True),
        # an indication (PS3.16 CID 7001 / LOINC) says why the study was done, not what it found
        (("18785-6", "LN", "Indications for Procedure"), False),
    ],
)
def test_only_a_statement_of_what_was_found_counts(concept, read) -> None:
    from pydicom.dataset import Dataset
    from pydicom.sequence import Sequence

    def code_seq(value: str, scheme: str, meaning: str) -> Sequence:
        c = Dataset()
        c.CodeValue, c.CodingSchemeDesignator, c.CodeMeaning = value, scheme, meaning
        return Sequence([c])

    item = Dataset()
    item.RelationshipType = "CONTAINS"
    item.ValueType = "CODE"
    item.ConceptNameCodeSequence = code_seq(*concept)
    item.ConceptCodeSequence = code_seq("79619009", "SCT", "Mitral stenosis")
    a = grade_study([_sr(f"concept-{concept[0]}", raw_content=[item])], GradeOptions()).assessment
    assert (a.outcome is Outcome.special_situation) is read
    assert (a.grade is Grade.grade_2) is not read

"""When an algorithm narrows a grade it cannot give, the conclusion says what is known instead
of a bare "indeterminate".

Outside sources (the rules these cases follow):
- Nagueh SF et al., J Am Soc Echocardiogr 2016;29:277–314, Figures 8A and 8B: Algorithm A
  establishes diastolic dysfunction (more than half of the available criteria met), and
  Algorithm B grades it; Algorithm B cannot start without E/A.  The project's reference note on
  the algorithms asks for both results to be reported ("DD present", then the grade).
- Nagueh SF et al., J Am Soc Echocardiogr 2025 (ASE 2025 update), Figure 3: raised LAP with E/A
  not available is grade II or III (reading I-25-8); normal LAP without e′ is normal or grade I
  (reading I-25-7).
Values are invented.
"""

from __future__ import annotations

import pytest
from grading_builders import measurements, sinus

from service.grading import assess
from service.model import (
    Assessment,
    Context,
    FillingPressure,
    Grade,
    GradeRange,
    Guideline,
    Measure,
    Rhythm,
)
from service.pipeline import GradeOptions, grade_study
from service.sr.echo_builder import EchoItem, Patient, Study, build_echo_sr
from service.wording import headline, outcome_phrase

ASE16, ASE25 = Guideline.ase_eacvi_2016, Guideline.ase_2025


def test_ase2016_dysfunction_found_by_algorithm_a_is_said_when_b_cannot_grade() -> None:
    # Figure 8A: e′, TR velocity and LAVI all abnormal (3 of 3): dysfunction present;
    # Figure 8B cannot start without E/A (A wave missing)
    a = assess(
        measurements(
            lvef=60,
            mitral_e=120,
            e_prime_septal=5,
            e_prime_lateral=6,
            tr_peak_velocity=3.1,
            lavi=45,
        ),
        sinus(),
        ASE16,
    )
    assert a.grade is Grade.indeterminate
    assert a.filling_pressure is FillingPressure.indeterminate
    assert a.grade_range is GradeRange.dysfunction_present
    assert headline(a) == (
        "Diastolic dysfunction present, grade indeterminate; LV filling pressure indeterminate."
    )
    assert outcome_phrase(a).startswith("diastolic dysfunction present, grade indeterminate, ")


@pytest.mark.parametrize(
    "values",
    [
        # Figure 8A exactly half (1 of 2): whether there is dysfunction is itself open
        dict(lvef=60, e_prime_septal=5, e_prime_lateral=6, tr_peak_velocity=2.5),
        # reduced LVEF, Figure 8B without E/A: nothing narrowed by this service
        dict(lvef=40, mitral_e=120, tr_peak_velocity=3.1, lavi=45),
    ],
    ids=["algorithm-a-half", "reduced-lvef"],
)
def test_ase2016_indeterminate_without_a_finding_stays_plain(values) -> None:
    a = assess(measurements(**values), sinus(), ASE16)
    assert a.grade is Grade.indeterminate and a.grade_range is None
    assert headline(a).startswith("Diastolic function indeterminate; ")


def test_ase2025_raised_lap_without_e_a_is_grade_2_or_3() -> None:
    a = assess(measurements(lvef=40, mitral_e=120, tr_peak_velocity=3.1, lavi=45), sinus(), ASE25)
    assert a.grade is Grade.indeterminate and a.filling_pressure is FillingPressure.elevated
    assert a.grade_range is GradeRange.grade_2_or_3
    assert headline(a) == "Grade II or III diastolic dysfunction; LV filling pressure elevated."


def test_ase2025_normal_lap_without_e_prime_is_normal_or_grade_1() -> None:
    a = assess(
        measurements(
            lvef=60, mitral_e=80, mitral_a=70, e_e_prime_average=8, tr_peak_velocity=2.2, lavi=25
        ),
        sinus(),
        ASE25,
    )
    assert a.grade is Grade.indeterminate and a.filling_pressure is FillingPressure.normal
    assert a.grade_range is GradeRange.normal_or_grade_1
    assert headline(a) == (
        "Normal diastolic function or grade I diastolic dysfunction; LV filling pressure normal."
    )


def test_a_range_is_only_given_with_an_indeterminate_grade() -> None:
    a = assess(measurements(lvef=40, mitral_e=120, tr_peak_velocity=3.1, lavi=45), sinus(), ASE25)
    with pytest.raises(ValueError):
        Assessment(**(a.model_dump() | {"grade": Grade.grade_2}))


def test_the_result_sr_impression_says_the_range() -> None:
    ds = build_echo_sr(
        [
            EchoItem(measure=m, value=v)
            for m, v in {
                Measure.lvef: 40,
                Measure.mitral_e: 120,
                Measure.tr_peak_velocity: 3.1,
                Measure.lavi: 45,
            }.items()
        ],
        patient=Patient(name="Marrowby^Edith", id="HV-G-0001"),
        study=Study(seed="grade-range"),
    )
    context = Context(rhythm=Rhythm.sinus, rhythm_source="the configured default")
    outcome = grade_study([ds], GradeOptions(guideline=ASE25, context=context))
    impressions = [
        i.TextValue
        for i in outcome.result.ContentSequence
        if "ConceptNameCodeSequence" in i and i.ConceptNameCodeSequence[0].CodeValue == "19005-8"
        for i in i.ContentSequence
        if i.ValueType == "TEXT"
    ]
    assert impressions[0] == (
        "ASE 2025: Grade II or III diastolic dysfunction; LV filling pressure elevated."
    )

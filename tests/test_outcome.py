"""The outcome token of an assessment: atrial fibrillation and special situations are
outcomes of their own, never counted with studies that could not be graded for missing data.
All measurement values are invented."""

from __future__ import annotations

import pytest
from grading_builders import measurements, sinus

from service.grading import assess
from service.model import Context, Guideline, Outcome, Rhythm, SpecialSituation

FULL_NORMAL = dict(
    lvef=60, mitral_e=70, mitral_a=60, e_prime_septal=9, e_prime_lateral=12,
    tr_peak_velocity=2.2, lavi=25,
)  # fmt: skip


@pytest.mark.parametrize("guideline", [Guideline.ase_eacvi_2016, Guideline.ase_2025])
def test_graded_study_outcome_is_its_grade(guideline):
    a = assess(measurements(**FULL_NORMAL), sinus(), guideline)
    assert a.outcome is Outcome.normal
    assert a.outcome.value == a.grade.value


@pytest.mark.parametrize("guideline", [Guideline.ase_eacvi_2016, Guideline.ase_2025])
def test_missing_data_is_not_gradable(guideline):
    a = assess(measurements(lvef=60), sinus(), guideline)
    assert a.outcome is Outcome.not_gradable


@pytest.mark.parametrize("guideline", [Guideline.ase_eacvi_2016, Guideline.ase_2025])
def test_atrial_fibrillation_is_its_own_outcome(guideline):
    # Even with no usable AF criterion, AF is not counted as "not gradable".
    ctx = Context(rhythm=Rhythm.af, borderline_fraction=0.0)
    assert assess(measurements(lvef=60), ctx, guideline).outcome is Outcome.atrial_fibrillation
    full = assess(measurements(**FULL_NORMAL), ctx, guideline)
    assert full.outcome is Outcome.atrial_fibrillation


def test_special_situation_is_its_own_outcome():
    ctx = sinus(special_situations=frozenset({SpecialSituation.heart_transplant}))
    a = assess(measurements(**FULL_NORMAL), ctx, Guideline.ase_eacvi_2016)
    assert a.outcome is Outcome.special_situation

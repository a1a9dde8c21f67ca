"""Guidelines side by side: every implemented rule set on the same measurements, primary first,
with a plain-language sentence where they disagree.

Rules compared: Nagueh 2016 JASE 29:277, Fig 8A/8B (septal e′ < 7, lateral e′ < 10 cm/s; average
E/e′ > 14) and Nagueh 2025 JASE 38(7), doi 10.1016/j.echo.2025.03.011, Fig 3 (average e′ ≤ 6.5 cm/s;
E/e′ ≥ 14; LA reservoir strain ≤ 18 % in step 2).  All measurement values are invented.
"""

from __future__ import annotations

import pytest
from grading_builders import measurements

from service.errors import UserError
from service.grading import IMPLEMENTED_GUIDELINES, assess
from service.grading.compare import assess_all, outcome_words
from service.model import (
    Context,
    FillingPressure,
    Grade,
    Guideline,
    Rhythm,
)

SINUS = Context(rhythm=Rhythm.sinus, borderline_fraction=0.0)

# e′ septal 6.5 / lateral 9 (average 7.75): reduced by 2016 (< 7 / < 10), normal by 2025 (≤ 6.5).
# E/e′ 15 and TR 2.9 raised by both; LAVI 30 normal.  2016: Fig 8A 3 of 4 -> dysfunction, Fig 8B
# step 2 2 of 3 -> grade 2.  2025: discordant step 1, step 2 LAVI normal -> normal function.
E_PRIME_CASE = {
    "lvef": 60,
    "e_prime_septal": 6.5,
    "e_prime_lateral": 9,
    "e_prime_average": 7.75,
    "e_e_prime_average": 15,
    "tr_peak_velocity": 2.9,
    "lavi": 30,
    "e_a_ratio": 1.2,
    "mitral_e": 80,
}


def test_primary_first_and_every_guideline_once():
    for primary in IMPLEMENTED_GUIDELINES:
        s = assess_all(measurements(**E_PRIME_CASE), SINUS, primary)
        assert s.primary.guideline is primary
        assert s.primary == assess(measurements(**E_PRIME_CASE), SINUS, primary)
        guidelines = [s.primary.guideline, *(a.guideline for a in s.others)]
        assert sorted(guidelines) == sorted(IMPLEMENTED_GUIDELINES)
        assert len(set(guidelines)) == len(guidelines)


def test_disagreement_names_the_e_prime_cut_off():
    s = assess_all(measurements(**E_PRIME_CASE), SINUS, Guideline.ase_eacvi_2016)
    assert (s.primary.grade, s.primary.filling_pressure) == (
        Grade.grade_2,
        FillingPressure.elevated,
    )
    [other] = s.others
    assert (other.grade, other.filling_pressure) == (Grade.normal, FillingPressure.normal)
    [sentence] = s.disagreements
    assert sentence.startswith(
        "ASE/EACVI 2016: grade II diastolic dysfunction, LV filling pressure elevated; "
        "ASE 2025: normal diastolic function, LV filling pressure normal — "
    )
    assert (
        "e′ is abnormal by the ASE/EACVI 2016 cut-off (septal e′ 6.5 cm/s against < 7 cm/s; "
        "lateral e′ 9 cm/s against < 10 cm/s) but not by the ASE 2025 cut-off "
        "(average e′ 7.75 cm/s against ≤ 6.5 cm/s)"
    ) in sentence
    assert sentence.endswith(".")


def test_disagreement_from_the_other_primary_reads_the_other_way():
    s = assess_all(measurements(**E_PRIME_CASE), SINUS, Guideline.ase_2025)
    [sentence] = s.disagreements
    assert sentence.startswith(
        "ASE 2025: normal diastolic function, LV filling pressure normal; ASE/EACVI 2016"
    )


def test_inclusive_cut_off_named():
    # average E/e′ exactly 14: met by 2025 (≥ 14), not by 2016 (> 14)
    vals = {
        "lvef": 60,
        "e_prime_average": 5,
        "e_prime_septal": 5,
        "e_e_prime_average": 14.0,
        "tr_peak_velocity": 3.0,
        "lavi": 30,
        "e_a_ratio": 1.2,
        "mitral_e": 70,
    }
    s = assess_all(measurements(**vals), SINUS, Guideline.ase_eacvi_2016)
    [sentence] = s.disagreements
    assert (
        "E/e′ is abnormal by the ASE 2025 cut-off (average E/e′ 14 against ≥ 14) but not by the "
        "ASE/EACVI 2016 cut-off (average E/e′ 14 against > 14)"
    ) in sentence


def test_criterion_used_by_one_rule_set_named():
    # LA reservoir strain decides the 2025 step 2; 2016 has no such criterion
    vals = {
        "lvef": 60,
        "e_prime_septal": 5,
        "e_e_prime_septal": 16,
        "tr_peak_velocity": 2.7,
        "la_reservoir_strain": 15,
        "e_a_ratio": 1.2,
        "mitral_e": 80,
    }
    s = assess_all(measurements(**vals), SINUS, Guideline.ase_eacvi_2016)
    [sentence] = s.disagreements
    assert "ASE 2025: grade II diastolic dysfunction, LV filling pressure elevated" in sentence
    assert "only ASE 2025 uses LA reservoir strain 15 % against ≤ 18 % (abnormal)" in sentence


def test_no_sentence_when_they_agree():
    vals = {
        "lvef": 60,
        "e_prime_average": 9,
        "e_prime_septal": 9,
        "e_prime_lateral": 11,
        "e_e_prime_average": 8,
        "tr_peak_velocity": 2.2,
        "lavi": 25,
    }
    s = assess_all(measurements(**vals), SINUS, Guideline.ase_eacvi_2016)
    assert all(a.grade is Grade.normal for a in (s.primary, *s.others))
    assert s.disagreements == ()


def test_af_comparison_names_the_decision_its_reading_explains():
    ctx = Context(rhythm=Rhythm.af, borderline_fraction=0.0)
    vals = {"mitral_e": 110, "e_e_prime_septal": 12, "deceleration_time": 150, "ivrt": 60}
    s = assess_all(measurements(lvef=40, **vals), ctx, Guideline.ase_2025)
    [sentence] = s.disagreements
    assert sentence.startswith(
        "ASE 2025: no grade (atrial fibrillation), LV filling pressure elevated; "
        "ASE/EACVI 2016: no grade (atrial fibrillation), LV filling pressure indeterminate"
    )
    # the decision that left ASE/EACVI 2016 undecided; why (no rule combining the criteria)
    # is said once, by that assessment's reading I-16-11, not again here
    assert (
        "ASE/EACVI 2016: 3 of 3 available criteria support elevated filling pressure: filling "
        "pressure indeterminate" in sentence
    )
    assert "I-16" not in sentence and "rule combining" not in sentence
    assert "I-16-11" in [r.id for r in s.others[0].readings]


def test_special_situation_comparison_gives_both_reasons():
    # MAC: ASE 2025 has a rule (E/A < 0.8 normal), ASE/EACVI 2016 none (I-16-14)
    ctx = Context(
        rhythm=Rhythm.sinus,
        special_situations=frozenset({"mitral-annular-calcification"}),
        borderline_fraction=0.0,
    )
    s = assess_all(measurements(e_a_ratio=0.7), ctx, Guideline.ase_2025)
    [sentence] = s.disagreements
    assert "ASE 2025: no grade (special situation), LV filling pressure normal" in sentence
    assert "ASE/EACVI 2016: mitral annular calcification: ASE/EACVI 2016 gives no" in sentence


def test_outcome_words():
    s = assess_all(measurements(**E_PRIME_CASE), SINUS, Guideline.ase_eacvi_2016)
    assert (
        outcome_words(s.primary) == "grade II diastolic dysfunction, LV filling pressure elevated"
    )


def test_unimplemented_primary_is_refused():
    with pytest.raises(UserError, match="bse-2024"):
        assess_all(measurements(**E_PRIME_CASE), SINUS, Guideline.bse_2024)

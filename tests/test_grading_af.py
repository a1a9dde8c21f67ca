"""Filling pressure in atrial fibrillation by the AF rules of ASE/EACVI 2016 and ASE 2025.

Sources: Nagueh SF et al., J Am Soc Echocardiogr 2016;29:277-314, §V.E atrial fibrillation
("Nagueh 2016 JASE 29:277"; criteria from memory, septal E/e′ ≥ 11 confirmed in the source study
Sohn DW et al., J Am Soc Echocardiogr 1999;12:927) and Nagueh SF et al., J Am Soc Echocardiogr
2025;38(7), doi 10.1016/j.echo.2025.03.011, AF algorithm ("Nagueh 2025 JASE 38(7)"; derived from
Khan FH et al., Echo Res Pract 2024, doi 10.1186/s44156-024-00048-x).  I-16-11 and I-25-9 /
I-25-11 name the documented readings.  All measurement values are invented.
"""

from __future__ import annotations

import pytest
from grading_builders import measurements

from service.grading import RuleSwitches, assess
from service.grading import atrial_fibrillation as AF
from service.grading import thresholds_ase2016 as T16
from service.grading import thresholds_ase2025 as T25
from service.grading.ase2025 import Ase2025Options
from service.grading.atrial_fibrillation import Ase2016AfOptions, Ase2025AfOptions
from service.model import (
    Comparison,
    Context,
    FillingPressure,
    Grade,
    Guideline,
    Measure,
    Outcome,
    Pathway,
    Rhythm,
    Verdict,
)
from service.wording import headline

ELEVATED = FillingPressure.elevated
NORMAL = FillingPressure.normal
INDET = FillingPressure.indeterminate
UNKNOWN = FillingPressure.not_estimated


def af(**kw: object) -> Context:
    kw.setdefault("rhythm", Rhythm.af)
    kw.setdefault("borderline_fraction", 0.0)
    return Context(**kw)


def run25(ctx: Context | None = None, options: Ase2025AfOptions | None = None, **values):
    switches = RuleSwitches(ase2025=Ase2025Options(af=options)) if options else None
    return assess(measurements(**values), ctx or af(), Guideline.ase_2025, switches)


def run16(ctx: Context | None = None, summary: str | None = None, **values):
    switches = RuleSwitches(ase2016_af=Ase2016AfOptions(summary=summary)) if summary else None
    return assess(measurements(**values), ctx or af(), Guideline.ase_eacvi_2016, switches)


def criterion(a, criterion_id: str):
    matches = [c for c in a.criteria if c.id == criterion_id]
    assert len(matches) == 1, [c.id for c in a.criteria]
    return matches[0]


# ---------------------------------------------------------------------------------------------
# ASE 2025 step 1: E ≥ 100 cm/s, septal E/e′ > 11, TR > 2.8 m/s or PASP > 35 mmHg, DT ≤ 160 ms
# (Nagueh 2025 JASE 38(7), AF algorithm; signs differ from sinus rhythm, I-25-11)
# ---------------------------------------------------------------------------------------------

ALL_MET = {
    "mitral_e": 120,
    "e_e_prime_septal": 14,
    "tr_peak_velocity": 3.1,
    "deceleration_time": 140,
}
NONE_MET = {
    "mitral_e": 70,
    "e_e_prime_septal": 8,
    "tr_peak_velocity": 2.3,
    "deceleration_time": 210,
}
PRIMARY = list(ALL_MET)


@pytest.mark.parametrize(
    ("name", "met", "at", "not_met", "at_is_met"),
    [
        ("mitral_e", 100.01, 100.0, 99.99, True),  # E ≥ 100 (inclusive)
        ("e_e_prime_septal", 11.01, 11.0, 10.99, False),  # septal E/e′ > 11 (strict)
        ("tr_peak_velocity", 2.81, 2.8, 2.79, False),  # TR > 2.8 (strict, unlike sinus ≥ 2.8)
        ("deceleration_time", 159.99, 160.0, 160.01, True),  # DT ≤ 160 (inclusive)
    ],
)
def test_primary_boundaries(name, met, at, not_met, at_is_met):
    # two other primary criteria met, one not: the tested one decides between 3 met (elevated)
    # and exactly 2 met (step 2; no secondary data -> indeterminate)
    others = [k for k in PRIMARY if k != name]
    vals = {others[0]: ALL_MET[others[0]], others[1]: ALL_MET[others[1]]}
    vals[others[2]] = NONE_MET[others[2]]
    assert run25(**vals, **{name: met}).filling_pressure is ELEVATED
    assert run25(**vals, **{name: at}).filling_pressure is (ELEVATED if at_is_met else INDET)
    assert run25(**vals, **{name: not_met}).filling_pressure is INDET


@pytest.mark.parametrize(("pasp", "expected"), [(35.01, ELEVATED), (35.0, INDET), (34.99, INDET)])
def test_pasp_alternative_to_tr(pasp, expected):
    # PASP > 35 mmHg (strict in AF, I-25-11) stands in for TR velocity; either counts
    vals = {"mitral_e": 120, "e_e_prime_septal": 14, "deceleration_time": 210}
    assert run25(**vals, pasp=pasp).filling_pressure is expected
    assert run25(**vals, pasp=pasp, tr_peak_velocity=3.0).filling_pressure is ELEVATED


@pytest.mark.parametrize(
    ("n_met", "expected"),
    [(4, ELEVATED), (3, ELEVATED), (2, INDET), (1, NORMAL), (0, NORMAL)],
)
def test_primary_counting_all_available(n_met, expected):
    # ≥ 3 met -> elevated; ≤ 1 met -> normal; exactly 2 -> step 2 (none available: indeterminate)
    vals = {k: (ALL_MET[k] if i < n_met else NONE_MET[k]) for i, k in enumerate(PRIMARY)}
    a = run25(**vals)
    assert a.filling_pressure is expected
    assert a.grade is Grade.not_applicable
    assert a.pathway is Pathway.atrial_fibrillation


@pytest.mark.parametrize(
    ("available", "guard", "expected"),
    [
        # I-25-9 guard: ≤ 1 met is "normal" only with ≥ 3 primary criteria available
        (3, 3, NORMAL),
        (2, 3, INDET),
        (2, 2, NORMAL),
        (1, 3, INDET),
    ],
)
def test_availability_guard(available, guard, expected):
    vals = {k: NONE_MET[k] for k in PRIMARY[:available]}
    a = run25(options=Ase2025AfOptions(min_primary_for_normal=guard), **vals)
    assert a.filling_pressure is expected


def test_no_primary_criterion_is_unknown():
    a = run25(bmi=35, la_reservoir_strain=10)
    assert a.filling_pressure is UNKNOWN
    assert not any(c.step == "AF step 2" for c in a.criteria)


# ---------------------------------------------------------------------------------------------
# ASE 2025 step 2 (exactly 2 primary met): LARS < 18 %, PV S/D < 1, BMI > 30
# ---------------------------------------------------------------------------------------------

TWO_MET = {
    "mitral_e": 120,
    "e_e_prime_septal": 14,
    "tr_peak_velocity": 2.3,
    "deceleration_time": 210,
}
SEC_POS = {"la_reservoir_strain": 12, "pv_s_d_ratio": 0.7, "bmi": 34}
SEC_NEG = {"la_reservoir_strain": 25, "pv_s_d_ratio": 1.3, "bmi": 24}


@pytest.mark.parametrize(
    ("name", "positive", "at", "negative"),
    [
        ("la_reservoir_strain", 17.99, 18.0, 18.01),  # < 18 % (strict in AF, I-25-11)
        ("pv_s_d_ratio", 0.99, 1.0, 1.01),  # < 1 (strict)
        ("bmi", 30.01, 30.0, 29.99),  # > 30 (strict)
    ],
)
def test_secondary_boundaries(name, positive, at, negative):
    # one other secondary positive, one negative: the tested one decides (≥ 2 positive ->
    # elevated, ≥ 2 negative -> normal)
    others = [k for k in SEC_POS if k != name]
    vals = {**TWO_MET, others[0]: SEC_POS[others[0]], others[1]: SEC_NEG[others[1]]}
    assert run25(**vals, **{name: positive}).filling_pressure is ELEVATED
    assert run25(**vals, **{name: at}).filling_pressure is NORMAL
    assert run25(**vals, **{name: negative}).filling_pressure is NORMAL


@pytest.mark.parametrize(
    ("secondary", "options", "expected"),
    [
        # I-25-9 default: ≥ 2 positive -> elevated; ≥ 2 negative -> normal; else indeterminate
        (SEC_POS, None, ELEVATED),
        (SEC_NEG, None, NORMAL),
        ({"la_reservoir_strain": 12, "bmi": 24}, None, INDET),
        ({"la_reservoir_strain": 12}, None, INDET),
        ({}, None, INDET),
        # I-25-9 alternative: any one positive -> elevated
        (
            {"la_reservoir_strain": 12, "bmi": 24},
            Ase2025AfOptions(secondary_raised="any-one"),
            ELEVATED,
        ),
        # I-25-9: two of three negative -> normal
        ({"la_reservoir_strain": 25, "bmi": 24}, None, NORMAL),
    ],
)
def test_secondary_combination(secondary, options, expected):
    assert run25(options=options, **TWO_MET, **secondary).filling_pressure is expected


def test_secondary_only_after_exactly_two():
    # LARS enters only in step 2, never as a standalone primary criterion (reference §3.6)
    a = run25(**ALL_MET, **SEC_NEG)
    assert a.filling_pressure is ELEVATED
    assert not any(c.step == "AF step 2" for c in a.criteria)


def test_af_result_shape_2025():
    a = run25(af(rhythm_source="coded Cardiac Rhythm item"), **ALL_MET)
    assert a.grade is Grade.not_applicable
    assert a.outcome is Outcome.atrial_fibrillation
    assert a.pathway is Pathway.atrial_fibrillation
    assert "coded Cardiac Rhythm item" in a.pathway_reason
    assert "by the ASE 2025 atrial-fibrillation criteria" in headline(a)
    for c in a.criteria:
        assert c.id.startswith("ase25.af.")
        assert c.source.startswith(T25.PAPER)


def test_sinus_criteria_not_used_in_af():
    # AF always goes to the AF rule set (reference §8)
    a = run25(e_prime_average=5, e_e_prime_average=20, lavi=50, **NONE_MET)
    assert a.filling_pressure is NORMAL
    assert not any(c.id.startswith("ase25.s1") for c in a.criteria)


# ---------------------------------------------------------------------------------------------
# ASE/EACVI 2016 AF criteria (Nagueh 2016 JASE 29:277, §V.E): each reported, no count rule
# ---------------------------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("row", "measure", "comparison", "value"),
    [
        (AF.AF16_E_ACCELERATION, Measure.e_acceleration_rate, Comparison.ge, 1900.0),
        (AF.AF16_IVRT, Measure.ivrt, Comparison.le, 65.0),
        (AF.AF16_E_E_PRIME_SEPTAL, Measure.e_e_prime_septal, Comparison.ge, 11.0),
        (AF.AF16_DECELERATION_TIME, Measure.deceleration_time, Comparison.le, 160.0),
    ],
)
def test_2016_af_table(row, measure, comparison, value):
    assert (row.measure, row.comparison, row.value) == (measure, comparison, value)
    assert row.citation.startswith(T16.PAPER + ", §V.E")
    assert row in AF.TABLE_2016


@pytest.mark.parametrize(
    ("name", "met", "at", "not_met"),
    [
        ("e_acceleration_rate", 1900.01, 1900.0, 1899.99),  # ≥ 1900 cm/s2
        ("ivrt", 64.99, 65.0, 65.01),  # ≤ 65 ms
        ("e_e_prime_septal", 11.01, 11.0, 10.99),  # ≥ 11 (inclusive in 2016, I-25-11)
        ("deceleration_time", 159.99, 160.0, 160.01),  # ≤ 160 ms, reduced LVEF only
    ],
)
def test_2016_af_boundaries(name, met, at, not_met):
    ids = f"ase16.af.af_{name}"
    for value, verdict in ((met, Verdict.met), (at, Verdict.met), (not_met, Verdict.not_met)):
        a = run16(lvef=35, **{name: value})
        assert criterion(a, ids).verdict is verdict
        # I-16-11: no combination rule -> pressure not estimated by default
        assert a.filling_pressure is INDET
        # majority summary switch: one criterion available decides
        b = run16(summary="majority", lvef=35, **{name: value})
        assert b.filling_pressure is (ELEVATED if verdict is Verdict.met else NORMAL)


def test_2016_dt_only_with_reduced_lvef():
    a = run16(lvef=60, deceleration_time=140, ivrt=80)
    assert "ase16.af.af_deceleration_time" not in {c.id for c in a.criteria}
    assert any("only with reduced LVEF" in n for n in a.notes)
    a = run16(lvef=None, deceleration_time=140)
    assert any("LVEF not available" in n for n in a.notes)


@pytest.mark.parametrize(
    ("values", "expected"),
    [
        ({"ivrt": 60, "e_e_prime_septal": 12, "e_acceleration_rate": 1500}, ELEVATED),
        ({"ivrt": 60, "e_e_prime_septal": 9, "e_acceleration_rate": 1500}, NORMAL),
        ({"ivrt": 60, "e_e_prime_septal": 9}, INDET),
        ({}, UNKNOWN),
    ],
)
def test_2016_majority_summary(values, expected):
    # I-16-11 optional summary: > half met elevated, < half normal, = half indeterminate
    assert run16(summary="majority", lvef=60, **values).filling_pressure is expected


def test_2016_flags_only_by_default():
    a = run16(lvef=60, ivrt=60, e_e_prime_septal=12, e_acceleration_rate=2000)
    assert a.filling_pressure is INDET
    assert a.grade is Grade.not_applicable
    assert a.pathway is Pathway.atrial_fibrillation
    assert any("3 of 3 available criteria support elevated" in r for r in a.reasoning)
    # one state, one name: the sentence says indeterminate, as the coded value does
    assert any("filling pressure indeterminate" in r for r in a.reasoning)
    assert not any("not estimated" in r or "I-16" in r for r in a.reasoning)
    assert [r.id for r in a.readings] == ["I-16-11"]
    assert any("E/Vp" in n for n in a.notes)  # criteria the service cannot read are named
    assert run16(lvef=60).filling_pressure is UNKNOWN


@pytest.mark.parametrize("summary", ["flags-only", "majority"])
def test_2016_reasoning_says_the_decision_and_the_reading_says_why(summary: str):
    # Nagueh 2016 JASE 29:277, section V.E lists the AF criteria without a rule combining them;
    # the result says so once, in the reading (I-16-11), not again in the reasoning step
    a = run16(summary=summary, lvef=60, ivrt=60, e_e_prime_septal=12, e_acceleration_rate=1500)
    [step] = a.reasoning
    [reading] = a.readings
    assert reading.id == "I-16-11" and "without a rule combining them" in reading.text
    for idea in ("rule", "combin", "majority", "states no", "ASE/EACVI 2016"):
        assert idea not in step, (idea, step)
    assert step.startswith("2 of 3 available criteria support elevated filling pressure")


# ---------------------------------------------------------------------------------------------
# Missing A wave with unknown rhythm (issue section 2)
# ---------------------------------------------------------------------------------------------


@pytest.mark.parametrize("guideline", [Guideline.ase_eacvi_2016, Guideline.ase_2025])
def test_missing_a_wave_unknown_rhythm_gives_no_grade(guideline):
    ctx = Context(rhythm=Rhythm.unknown, rhythm_source="sender default", borderline_fraction=0)
    a = assess(measurements(mitral_e=90, lavi=40, e_prime_average=5), ctx, guideline)
    assert (a.grade, a.filling_pressure) == (Grade.not_applicable, UNKNOWN)
    assert a.pathway is Pathway.not_applicable
    assert "sender default" in a.pathway_reason
    # said once, in the pathway reason (the conclusion adds "the standard algorithm does not
    # apply"), not again in a note
    assert "A wave is missing" in a.pathway_reason
    assert "atrial fibrillation may be present" in a.pathway_reason
    assert a.notes == ()


@pytest.mark.parametrize("guideline", [Guideline.ase_eacvi_2016, Guideline.ase_2025])
def test_a_wave_present_or_af_stated_is_not_flagged(guideline):
    ctx = Context(rhythm=Rhythm.unknown, borderline_fraction=0)
    a = assess(measurements(mitral_e=90, mitral_a=70, lavi=30), ctx, guideline)
    assert a.pathway is not Pathway.not_applicable
    a = assess(measurements(mitral_e=90, lavi=30), af(), guideline)
    assert a.pathway is Pathway.atrial_fibrillation
    assert not any("A wave is missing" in n for n in a.notes)


# ---------------------------------------------------------------------------------------------
# Borderline in AF (issue section 5)
# ---------------------------------------------------------------------------------------------


def test_af_borderline_flag():
    # E 95 cm/s near ≥ 100: 2 met (indeterminate without secondary data) vs 3 met (elevated)
    vals = {
        "mitral_e": 95,
        "e_e_prime_septal": 14,
        "tr_peak_velocity": 3.1,
        "deceleration_time": 210,
    }
    a = run25(af(borderline_fraction=0.10), **vals)
    assert a.filling_pressure is INDET
    [flag] = [f for f in a.borderline if f.measure is Measure.mitral_e]
    assert flag.alternative_filling_pressure is ELEVATED
    assert flag.alternative_grade is Grade.not_applicable
    assert flag.threshold == 100.0
    assert "Mitral E 95 cm/s is within 10 %" in flag.text

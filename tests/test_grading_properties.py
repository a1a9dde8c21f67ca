"""Property-based checks of the grading engine: any mix of present and missing measures, any
context, yields one of the allowed outcomes with a consistent criteria trace, never an exception.

Allowed outcomes: issue contract (grade in {normal, grade-1..3, indeterminate, not-gradable},
filling pressure in {normal, elevated, indeterminate, unknown}); grade-to-pressure pairing from
Nagueh 2016 JASE 29:277, Fig 8B (grade I normal LAP, grades II/III elevated LAP) and Nagueh 2025
JASE 38(7), Fig 3 (grade 1 normal LAP, grades 2/3 raised LAP; raised LAP without E/A and normal LAP
without e′ leave the grade indeterminate, I-25-7, I-25-8).  Atrial fibrillation and special
situations never give a standard grade (issue contract).  All values are invented.
"""

from __future__ import annotations

import math

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from service.errors import UserError
from service.grading import (
    IMPLEMENTED_GUIDELINES,
    Ase2016AfOptions,
    Ase2025AfOptions,
    Ase2025Options,
    RuleSwitches,
    assess,
)
from service.grading.compare import assess_all
from service.model import (
    CANONICAL_UNITS,
    CAUTION,
    SETTABLE_RHYTHMS,
    Code,
    Context,
    FillingPressure,
    Grade,
    Guideline,
    Measure,
    Measurements,
    MeasureValue,
    Origin,
    Pathway,
    Rhythm,
    SpecialSituation,
    Verdict,
)

SETTINGS = settings(
    max_examples=300,
    deadline=None,
    derandomize=True,
    suppress_health_check=[HealthCheck.too_slow],
)

# plausible ranges near the cut-offs, plus extreme but finite values
RANGES: dict[Measure, tuple[float, float]] = {
    Measure.mitral_e: (20.0, 150.0),
    Measure.mitral_a: (20.0, 120.0),
    Measure.e_a_ratio: (0.3, 3.5),
    Measure.e_prime_septal: (2.0, 15.0),
    Measure.e_prime_lateral: (3.0, 20.0),
    Measure.e_prime_average: (3.0, 18.0),
    Measure.e_e_prime_septal: (4.0, 30.0),
    Measure.e_e_prime_lateral: (3.0, 25.0),
    Measure.e_e_prime_average: (4.0, 28.0),
    Measure.tr_peak_velocity: (1.5, 4.5),
    Measure.lavi: (15.0, 70.0),
    Measure.lvef: (10.0, 80.0),
    Measure.pv_s_d_ratio: (0.3, 2.5),
    Measure.deceleration_time: (100.0, 300.0),
    Measure.age: (18.0, 95.0),
    Measure.pasp: (15.0, 70.0),
    Measure.ivrt: (30.0, 130.0),
    Measure.la_reservoir_strain: (5.0, 50.0),
    Measure.e_acceleration_rate: (500.0, 3000.0),
    Measure.bmi: (16.0, 45.0),
    Measure.heart_rate: (40.0, 150.0),
    Measure.ar_a_duration: (-40.0, 60.0),
    Measure.mitral_e_valsalva: (20.0, 150.0),
    Measure.mitral_a_valsalva: (20.0, 120.0),
    Measure.e_a_ratio_valsalva: (0.3, 3.5),
}
EXTREMES = st.sampled_from([0.0, -1.0, 1e-300, 1e300, -1e300, 1e9, 5e-324])


def value_strategy(measure: Measure) -> st.SearchStrategy[float | None]:
    lo, hi = RANGES[measure]
    return st.one_of(
        st.none(),
        st.floats(min_value=lo, max_value=hi, allow_nan=False, allow_infinity=False),
        st.floats(allow_nan=False, allow_infinity=False),
        EXTREMES,
    )


@st.composite
def measurement_sets(draw) -> Measurements:
    values = {}
    for measure in RANGES:
        v = draw(value_strategy(measure))
        if v is not None:
            values[measure] = MeasureValue(
                measure=measure, value=v, unit=CANONICAL_UNITS[measure], origin=Origin.measured
            )
    return Measurements(values=values)


#: a stated rhythm that is neither sinus rhythm nor AF comes with its code (PS3.16 CID 3415)
FLUTTER = Code(value="10:9456", scheme="MDC", meaning="Atrial flutter")
rhythms = st.one_of(
    st.sampled_from(SETTABLE_RHYTHMS).map(lambda r: {"rhythm": r}),
    st.just({"rhythm": Rhythm.other, "rhythm_code": FLUTTER}),
)
contexts = st.builds(
    lambda rhythm, **kw: Context(**rhythm, **kw),
    rhythm=rhythms,
    myocardial_disease=st.booleans(),
    lvef_reduced_below=st.sampled_from([40.0, 50.0, 52.0]),
    min_criteria_available=st.integers(min_value=0, max_value=5),
    special_situations=st.frozensets(st.sampled_from(list(SpecialSituation)), max_size=2),
    borderline_fraction=st.sampled_from([0.0, 0.05, 0.10, 0.25]),
)

# every documented reading of an ambiguous rule (I-16-11, I-25-x) must give an allowed outcome
switch_sets = st.builds(
    RuleSwitches,
    ase2016_af=st.builds(Ase2016AfOptions, summary=st.sampled_from(["flags-only", "majority"])),
    ase2025=st.builds(
        Ase2025Options,
        e_prime_sites=st.sampled_from(["average-preferred", "any-site"]),
        e_e_prime_sites=st.sampled_from(["average-preferred", "any-site"]),
        tr_or_pasp=st.sampled_from(["either", "tr-preferred"]),
        incomplete_step_1=st.sampled_from(["step-2", "accept-concordant-available"]),
        supplementary=st.sampled_from(["any", "majority", "hierarchy"]),
        af=st.builds(
            Ase2025AfOptions,
            secondary_raised=st.sampled_from(["two-of-three", "any-one"]),
            min_primary_for_normal=st.integers(min_value=0, max_value=4),
        ),
    ),
)

# Nagueh 2016 JASE 29:277, Fig 8A/8B: which filling pressure goes with which grade
PRESSURE_FOR_GRADE = {
    Grade.normal: {FillingPressure.normal},
    Grade.grade_1: {FillingPressure.normal},
    Grade.grade_2: {FillingPressure.elevated},
    Grade.grade_3: {FillingPressure.elevated},
    Grade.indeterminate: {FillingPressure.indeterminate},
    Grade.not_gradable: {FillingPressure.not_estimated},
}
# Nagueh 2025 JASE 38(7), Fig 3: as above, plus "normal LAP, grade not assignable" (I-25-7) and
# "raised LAP, grade 2 or 3" (I-25-8) shown as an indeterminate grade with a known pressure
PRESSURE_FOR_GRADE_2025 = {
    **PRESSURE_FOR_GRADE,
    Grade.indeterminate: {
        FillingPressure.indeterminate,
        FillingPressure.normal,
        FillingPressure.elevated,
    },
}
SINUS_PATHWAYS = {
    Guideline.ase_eacvi_2016: {Pathway.normal_lvef, Pathway.reduced_lvef_or_myocardial_disease},
    Guideline.ase_2025: {Pathway.sinus_general},
}
NO_STANDARD_GRADE = {Pathway.atrial_fibrillation, Pathway.special_situation, Pathway.not_applicable}


def a_wave_missing(m: Measurements) -> bool:
    usable = {k for k, v in m.values.items() if math.isfinite(v.value)}
    return (
        Measure.mitral_e in usable
        and Measure.mitral_a not in usable
        and Measure.e_a_ratio not in usable
    )


@SETTINGS
@given(m=measurement_sets(), ctx=contexts, switches=switch_sets)
def test_any_input_gives_a_consistent_assessment(
    m: Measurements, ctx: Context, switches: RuleSwitches
):
    for guideline in IMPLEMENTED_GUIDELINES:
        a = assess(m, ctx, guideline, switches)
        assert a.guideline is guideline
        assert a.grade in set(Grade)
        assert a.caution == CAUTION
        assert a.pathway_reason
        assert a.reasoning
        if ctx.rhythm is Rhythm.other:
            # a stated rhythm the algorithms do not cover: no grade and no estimate, whatever
            # else applies (shared reference §1.1)
            assert a.pathway is Pathway.not_applicable
            assert a.filling_pressure is FillingPressure.not_estimated
        elif ctx.special_situations:
            # issue contract: alternative criteria or a stated "not applicable", never a grade
            assert a.pathway in {Pathway.special_situation, Pathway.not_applicable}
        elif ctx.rhythm is Rhythm.af:
            # AF: filling pressure only (Nagueh 2016 §V.E; Nagueh 2025 AF algorithm)
            assert a.pathway is Pathway.atrial_fibrillation
        elif ctx.rhythm is Rhythm.unknown and a_wave_missing(m):
            # issue contract: A wave missing and nothing says AF -> no standard grade
            assert a.pathway is Pathway.not_applicable
        else:
            assert a.pathway in SINUS_PATHWAYS[guideline]
        if a.pathway in NO_STANDARD_GRADE:
            assert a.grade is Grade.not_applicable
        elif guideline is Guideline.ase_2025:
            assert a.filling_pressure in PRESSURE_FOR_GRADE_2025[a.grade]
        else:
            assert a.filling_pressure in PRESSURE_FOR_GRADE[a.grade]
        for c in a.criteria:
            # unavailable iff no value; otherwise the verdict is the comparison as published
            assert (c.verdict is Verdict.unavailable) == (c.value is None)
            if c.value is not None:
                assert c.value == m.get(c.measure)
                assert (c.verdict is Verdict.met) == c.comparison.holds(c.value, c.threshold)
        ids = {c.id for c in a.criteria}
        for flag in a.borderline:
            assert flag.criterion_id in ids
            assert abs(flag.value - flag.threshold) <= ctx.borderline_fraction * abs(flag.threshold)
            assert (flag.alternative_grade, flag.alternative_filling_pressure) != (
                a.grade,
                a.filling_pressure,
            )
        if ctx.borderline_fraction == 0:
            assert not a.borderline
        for finding in a.supporting:
            # supporting evidence only: it never changes the result (issue contract)
            assert finding.text
            if finding.agrees_with_result is not None:
                assert finding.supports_elevated_pressure is not None
    with pytest.raises(UserError):
        assess(m, ctx, Guideline.bse_2024)


@SETTINGS
@given(m=measurement_sets(), ctx=contexts)
def test_comparison_is_consistent(m: Measurements, ctx: Context):
    for primary in IMPLEMENTED_GUIDELINES:
        result = assess_all(m, ctx, primary)
        assert result.primary == assess(m, ctx, primary)
        assert {a.guideline for a in result.others} | {primary} == set(IMPLEMENTED_GUIDELINES)
        differing = [
            o
            for o in result.others
            if (o.grade, o.filling_pressure)
            != (result.primary.grade, result.primary.filling_pressure)
        ]
        assert len(result.disagreements) == len(differing)


@SETTINGS
@given(m=measurement_sets(), ctx=contexts)
def test_assessment_is_deterministic(m: Measurements, ctx: Context):
    # pure function: the same input gives the same output (common practice)
    for guideline in IMPLEMENTED_GUIDELINES:
        assert assess(m, ctx, guideline) == assess(m, ctx, guideline)

"""Property-based checks of the grading engine: any mix of present and missing measures, any
context, yields one of the allowed outcomes with a consistent criteria trace, never an exception.

Allowed outcomes: issue contract (grade in {normal, grade-1..3, indeterminate, not-gradable},
filling pressure in {normal, elevated, indeterminate, unknown}); grade-to-pressure pairing from
Nagueh 2016 JASE 29:277, Fig 8B (grade I normal LAP, grades II/III elevated LAP).
All values are invented.
"""

from __future__ import annotations

from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from service.grading import IMPLEMENTED_GUIDELINES, assess
from service.model import (
    CANONICAL_UNITS,
    CAUTION,
    Context,
    FillingPressure,
    Grade,
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


contexts = st.builds(
    Context,
    rhythm=st.sampled_from(list(Rhythm)),
    myocardial_disease=st.booleans(),
    lvef_reduced_below=st.sampled_from([40.0, 50.0, 52.0]),
    min_criteria_available=st.integers(min_value=0, max_value=5),
    special_situations=st.frozensets(st.sampled_from(list(SpecialSituation)), max_size=2),
    borderline_fraction=st.sampled_from([0.0, 0.05, 0.10, 0.25]),
)

# Nagueh 2016 JASE 29:277, Fig 8A/8B: which filling pressure goes with which grade
PRESSURE_FOR_GRADE = {
    Grade.normal: {FillingPressure.normal},
    Grade.grade_1: {FillingPressure.normal},
    Grade.grade_2: {FillingPressure.elevated},
    Grade.grade_3: {FillingPressure.elevated},
    Grade.indeterminate: {FillingPressure.indeterminate},
    Grade.not_gradable: {FillingPressure.unknown},
}


@SETTINGS
@given(m=measurement_sets(), ctx=contexts)
def test_any_input_gives_a_consistent_assessment(m: Measurements, ctx: Context):
    for guideline in IMPLEMENTED_GUIDELINES:
        a = assess(m, ctx, guideline)
        assert a.grade in set(Grade)
        assert a.filling_pressure in PRESSURE_FOR_GRADE[a.grade]
        assert a.caution == CAUTION
        assert a.pathway_reason
        assert a.reasoning
        if ctx.rhythm is Rhythm.af or ctx.special_situations:
            assert a.pathway is Pathway.not_applicable
            assert a.grade is Grade.not_gradable
        else:
            assert a.pathway in {Pathway.normal_lvef, Pathway.reduced_lvef_or_myocardial_disease}
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


@SETTINGS
@given(m=measurement_sets(), ctx=contexts)
def test_assessment_is_deterministic(m: Measurements, ctx: Context):
    # pure function: the same input gives the same output (common practice)
    assert assess(m, ctx) == assess(m, ctx)

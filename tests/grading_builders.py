"""Builders shared by the grading tests: Measurements and Contexts from plain values."""

from __future__ import annotations

from service.model import (
    CANONICAL_UNITS,
    Context,
    Measure,
    Measurements,
    MeasureValue,
    Origin,
    Rhythm,
)


def measurements(**values: float | None) -> Measurements:
    """Measurements from canonical names, each measured once; None = absent."""
    out = {}
    for name, value in values.items():
        if value is None:
            continue
        measure = Measure(name)
        out[measure] = MeasureValue(
            measure=measure, value=value, unit=CANONICAL_UNITS[measure], origin=Origin.measured
        )
    return Measurements(values=out)


def sinus(**kw: object) -> Context:
    """Sinus-rhythm context; borderline check off unless a test asks for it."""
    kw.setdefault("rhythm", Rhythm.sinus)
    kw.setdefault("borderline_fraction", 0.0)
    return Context(**kw)


#: a normal-LVEF study that the sinus-rhythm algorithm grades (grade II) when neither a special
#: situation nor another rhythm applies (invented values)
GRADE_2_STUDY: dict[Measure, float] = {
    Measure.lvef: 60,
    Measure.mitral_e: 146,
    Measure.mitral_a: 172,
    Measure.ivrt: 52,
    Measure.e_prime_septal: 6.4,
    Measure.e_prime_lateral: 8.1,
    Measure.tr_peak_velocity: 2.9,
    Measure.lavi: 52,
}

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

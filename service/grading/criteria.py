"""Shared helpers for guideline rule sets: threshold rows, tri-state criteria, tallies and
the borderline check.

A criterion is tri-state: met (the value is on the abnormal side of the cut-off), not met, or
unavailable (no usable value).  Nothing here knows a particular guideline; each guideline keeps
its cut-offs in one cited table of :class:`Threshold` rows and uses these helpers to evaluate them.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Iterable
from dataclasses import dataclass

from service.model import (
    CANONICAL_UNITS,
    Assessment,
    BorderlineFlag,
    Comparison,
    Context,
    Criterion,
    FillingPressure,
    Measure,
    Measurements,
    Verdict,
)
from service.wording import measure_name, outcome_phrase

#: how comparisons read in plain text
SYMBOLS: dict[Comparison, str] = {
    Comparison.gt: ">",
    Comparison.ge: "≥",
    Comparison.lt: "<",
    Comparison.le: "≤",
}


@dataclass(frozen=True)
class Threshold:
    """One row of a guideline's threshold table: ``measure comparison value`` is abnormal."""

    key: str  # stable short name inside the table, e.g. "e_e_prime_average"
    name: str  # plain words for the measure, e.g. "Average E/e′"
    measure: Measure
    comparison: Comparison
    value: float
    unit: str  # unit as shown to readers ("" for ratios)
    citation: str  # e.g. "Nagueh 2016 JASE 29:277, Fig 8A"
    #: evidence behind the row as the project's reference note on the algorithms tags it: "R"
    #: recalled from the primary paper, "V" confirmed in a retrieved source, "R+V" both, "I" an
    #: interpretation (see ``reading``).  The project's own check against stored copies,
    #: docs/guideline-verification.md, did not find every "V" row (A16-SL, A16-B1, A16-B2,
    #: A25-5, A25-AF1 to AF3 there are NOT FOUND): there the tag is the reference's, not ours.
    evidence: str
    #: identifier of the project's reading of an ambiguity that the row depends on
    #: (:mod:`service.grading.readings`), "" when the row is as published
    reading: str = ""

    def label(self, threshold: float | None = None) -> str:
        """Plain words, e.g. "Average E/e′ > 14"."""
        t = self.value if threshold is None else threshold
        unit = f" {self.unit}" if self.unit else ""
        return f"{self.name} {SYMBOLS[self.comparison]} {fmt(t)}{unit}"


def fmt(value: float) -> str:
    """Short human form of a number: 14.0 -> "14", 2.85 -> "2.85"."""
    return f"{value:.6g}"


def usable(value: float | None) -> float | None:
    """The value when it can be compared (finite), else None."""
    if value is None or not math.isfinite(value):
        return None
    return value


def value_of(measurements: Measurements, measure: Measure) -> float | None:
    """The usable value of one measure, or None when missing or not finite."""
    return usable(measurements.get(measure))


def evaluate(
    row: Threshold,
    value: float | None,
    *,
    criterion_id: str,
    step: str,
    threshold: float | None = None,
) -> Criterion:
    """Evaluate one threshold row on a value (None = unavailable) into a Criterion.

    ``threshold`` overrides the table's cut-off where a guideline leaves the number to
    configuration (e.g. the LVEF that counts as reduced)."""
    t = row.value if threshold is None else threshold
    v = usable(value)
    if v is None:
        verdict = Verdict.unavailable
    else:
        verdict = Verdict.met if row.comparison.holds(v, t) else Verdict.not_met
    return Criterion(
        id=criterion_id,
        step=step,
        label=row.label(t),
        measure=row.measure,
        value=v,
        unit=CANONICAL_UNITS[row.measure],
        comparison=row.comparison,
        threshold=t,
        verdict=verdict,
        source=row.citation,
    )


def any_of(verdicts: Iterable[Verdict]) -> Verdict:
    """OR of tri-state verdicts: met if any is met, not met if some are known and none met,
    unavailable when none is known."""
    known = [v for v in verdicts if v is not Verdict.unavailable]
    if not known:
        return Verdict.unavailable
    return Verdict.met if Verdict.met in known else Verdict.not_met


@dataclass(frozen=True)
class Tally:
    available: int
    met: int

    @property
    def not_met(self) -> int:
        return self.available - self.met

    def majority(self) -> tuple[FillingPressure, str]:
        """The filling pressure by the majority of the available criteria, and its words:
        more than half met elevated, less than half normal, exactly half indeterminate."""
        if 2 * self.met > self.available:
            return FillingPressure.elevated, "more than half: elevated"
        if 2 * self.met < self.available:
            return FillingPressure.normal, "less than half: normal"
        return FillingPressure.indeterminate, "exactly half: indeterminate"


def tally(verdicts: Iterable[Verdict]) -> Tally:
    """Count available and met votes."""
    vs = list(verdicts)
    return Tally(
        available=sum(v is not Verdict.unavailable for v in vs),
        met=sum(v is Verdict.met for v in vs),
    )


# ---------------------------------------------------------------------------------------------
# Borderline check
# ---------------------------------------------------------------------------------------------


def near_cutoff(value: float, threshold: float, fraction: float) -> bool:
    """True when ``value`` lies within ``fraction`` of the cut-off: |v - t| <= fraction * |t|."""
    return fraction > 0 and abs(value - threshold) <= fraction * abs(threshold)


def value_across(value: float, comparison: Comparison, threshold: float) -> float:
    """The value moved just to the other side of the cut-off (the nearest value whose verdict
    differs from that of ``value``)."""
    met = comparison.holds(value, threshold)
    match comparison:
        case Comparison.gt:  # met above t; t itself is not met
            return threshold if met else math.nextafter(threshold, math.inf)
        case Comparison.ge:  # met at or above t
            return math.nextafter(threshold, -math.inf) if met else threshold
        case Comparison.lt:  # met below t; t itself is not met
            return threshold if met else math.nextafter(threshold, -math.inf)
        case Comparison.le:  # met at or below t
            return math.nextafter(threshold, math.inf) if met else threshold
    raise AssertionError(comparison)  # pragma: no cover


def with_value(measurements: Measurements, measure: Measure, value: float) -> Measurements:
    """A copy of the measurements with one measure's value replaced."""
    values = dict(measurements.values)
    values[measure] = values[measure].model_copy(update={"value": value})
    return measurements.model_copy(update={"values": values})


def borderline_flags(
    assessment: Assessment,
    measurements: Measurements,
    context: Context,
    regrade: Callable[[Measurements, Context], Assessment],
    names: dict[Measure, tuple[str, str]],
) -> tuple[BorderlineFlag, ...]:
    """Flags for every criterion near its cut-off whose flip changes grade or filling pressure.

    ``regrade`` is called with the borderline check disabled, so it never recurses.
    ``names`` gives each measure's plain name and display unit for the flag text."""
    fraction = context.borderline_fraction
    if not fraction > 0:
        return ()
    quiet = context.model_copy(update={"borderline_fraction": 0.0})
    flags: list[BorderlineFlag] = []
    seen: set[tuple[Measure, float]] = set()
    for c in assessment.criteria:
        if c.value is None or (c.measure, c.threshold) in seen:
            continue
        if c.measure not in measurements.values:
            continue
        if not near_cutoff(c.value, c.threshold, fraction):
            continue
        seen.add((c.measure, c.threshold))
        other = regrade(
            with_value(measurements, c.measure, value_across(c.value, c.comparison, c.threshold)),
            quiet,
        )
        if (other.grade, other.filling_pressure) == (
            assessment.grade,
            assessment.filling_pressure,
        ):
            continue
        name, unit = names.get(c.measure, (measure_name(c.measure), ""))
        u = f" {unit}" if unit else ""
        text = (
            f"{name} {fmt(c.value)}{u} is within {fmt(fraction * 100)} % of the cut-off "
            f"{SYMBOLS[c.comparison]} {fmt(c.threshold)}{u}; on the other side of it the result "
            f"would be {outcome_phrase(other)}, instead of {outcome_phrase(assessment)}."
        )
        flags.append(
            BorderlineFlag(
                criterion_id=c.id,
                measure=c.measure,
                value=c.value,
                threshold=c.threshold,
                alternative_grade=other.grade,
                alternative_filling_pressure=other.filling_pressure,
                text=text,
            )
        )
    return tuple(flags)

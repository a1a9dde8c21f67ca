"""Which missing measure kept a study from being decided (pure: no I/O).

The rule
--------
For a study whose outcome is *indeterminate* or *not gradable*, every measure the rule set uses
that the study lacks is tried on its own: the study is graded again, by the same guideline and
context, with that one measure added at every value that matters, and nothing else changed.

* The values that matter are the measure's cut-offs in the guideline's threshold table, and the
  cut-offs of the ratios and averages derived from it (E/A, average e′, E/e′), each taken just
  below and just above the point where its verdict flips, plus the two ends of the measure's
  plausible range.  Between two such points no criterion changes its verdict, so these values
  stand for every value the measure could have had.
* Derived values are recomputed as the code mapper computes them (same formulas, rounded half
  up to 2 decimals); a value the source reported itself is kept.
* The measure *would have decided* the study when every tried value gives a decided outcome
  (normal function or grade I, II or III); it *could have decided* it when at least one does.

Only one measure is added at a time; a study that lacked two criteria and needed both is
counted for neither.  The borderline check is off while trying values (it never changes the
outcome).  See docs/audit.md.
"""

from __future__ import annotations

import functools
import math
from collections.abc import Callable, Iterable

from pydantic import BaseModel, ConfigDict

from service.grading import RuleSwitches, assess
from service.grading import thresholds_ase2016 as T16
from service.grading import thresholds_ase2025 as T25
from service.grading.criteria import Threshold
from service.model import (
    CANONICAL_UNITS,
    Comparison,
    Context,
    Guideline,
    Measure,
    Measurements,
    MeasureValue,
    Origin,
    Outcome,
)
from service.vocabulary.mapper import DERIVATIONS, round2
from service.vocabulary.measures import SPECS

M = Measure

#: outcomes that leave the question open: the ones this analysis explains
UNDECIDED: frozenset[Outcome] = frozenset({Outcome.indeterminate, Outcome.not_gradable})
#: outcomes that answer it
DECIDED: frozenset[Outcome] = frozenset(
    {Outcome.normal, Outcome.grade_1, Outcome.grade_2, Outcome.grade_3}
)

#: measures a sonographer acquires (not computed from others), in the order a report lists
#: them: the candidates for "the missing measure"
ACQUIRED: tuple[Measure, ...] = (
    M.mitral_e,
    M.mitral_a,
    M.deceleration_time,
    M.e_prime_septal,
    M.e_prime_lateral,
    M.tr_peak_velocity,
    M.pasp,
    M.lavi,
    M.lvef,
    M.ivrt,
    M.pv_s_d_ratio,
    M.la_reservoir_strain,
    M.ar_a_duration,
    M.e_acceleration_rate,
)

#: the cut-offs of each rule set's standard algorithm for sinus rhythm, from its cited table:
#: the only algorithms whose outcome can be indeterminate or not gradable (atrial fibrillation
#: and special situations have outcomes of their own)
ROWS: dict[Guideline, tuple[Threshold, ...]] = {
    Guideline.ase_eacvi_2016: T16.TABLE,
    Guideline.ase_2025: (
        T25.E_PRIME_AVERAGE,
        T25.E_PRIME_SEPTAL,
        T25.E_PRIME_LATERAL,
        T25.E_E_PRIME_AVERAGE,
        T25.E_E_PRIME_SEPTAL,
        T25.E_E_PRIME_LATERAL,
        T25.TR_VELOCITY,
        T25.PASP,
        T25.LA_RESERVOIR_STRAIN,
        T25.PV_S_D,
        T25.LAVI,
        T25.IVRT,
        T25.E_A_HIGH,
        T25.E_A_LOW,
    ),
}

#: derivations between canonical measures (the code mapper's formulas), in its order
_DERIVED = tuple(
    d
    for d in DERIVATIONS
    if isinstance(d.target, Measure) and all(isinstance(q, Measure) for q in d.inputs)
)


class MissingEffect(BaseModel):
    """What adding one missing measure would have done to an undecided study."""

    model_config = ConfigDict(frozen=True, extra="forbid")

    measure: Measure
    #: every value of the measure gives a decided outcome
    always: bool
    #: at least one value does (True whenever ``always`` is)
    sometimes: bool


@functools.cache
def derived_from(measure: Measure) -> frozenset[Measure]:
    """The measure and every canonical measure derived from it, directly or not."""
    out = {measure}
    for d in _DERIVED:
        if any(q in out for q in d.inputs):
            out.add(d.target)  # type: ignore[arg-type]
    return frozenset(out)


def _plain_values(measurements: Measurements) -> dict[Measure, tuple[float, bool]]:
    """measure -> (value, derived here)."""
    return {
        k: (v.value, v.origin is Origin.derived)
        for k, v in measurements.values.items()
        if math.isfinite(v.value)
    }


def values_with(
    base: dict[Measure, tuple[float, bool]], measure: Measure, value: float
) -> dict[Measure, tuple[float, bool]]:
    """``base`` with ``measure`` set to ``value`` and the derived measures recomputed (a value
    the source reported itself is kept; one outside its plausible range is dropped, as the
    mapper does)."""
    out = dict(base)
    out[measure] = (value, False)
    affected = derived_from(measure)
    for d in _DERIVED:
        target = d.target
        if target not in affected:
            continue
        if target in out and not out[target][1]:
            continue  # reported by the source
        try:
            inputs = [out[q][0] for q in d.inputs]  # type: ignore[index]
        except KeyError:
            continue
        try:
            computed = round2(d.fn(*inputs))
        except (ZeroDivisionError, ArithmeticError):
            out.pop(target, None)  # type: ignore[arg-type]
            continue
        spec = SPECS[target]
        if spec.low <= computed <= spec.high:
            out[target] = (computed, True)  # type: ignore[index]
        else:
            out.pop(target, None)  # type: ignore[arg-type]
    return out


#: points at which each criterion is first evaluated across a measure's plausible range, before
#: the places where its verdict changes are narrowed down by bisection
GRID_POINTS = 65


def _transitions(
    state: Callable[[float], object], low: float, high: float
) -> list[tuple[float, float]]:
    """Adjacent values (a, b) around every place in [low, high] where ``state`` changes (a
    criterion's verdict, or whether it can be evaluated at all).  ``state`` is sampled at
    :data:`GRID_POINTS` evenly spaced values, then each change is narrowed down by bisection;
    for a monotone derived value (the formulas here are) every change is found unless two lie
    within one grid step and cancel out."""
    step = (high - low) / (GRID_POINTS - 1)
    grid = [low + i * step for i in range(GRID_POINTS - 1)] + [high]
    states = [state(v) for v in grid]
    out: list[tuple[float, float]] = []
    for a, b, sa, sb in zip(grid, grid[1:], states, states[1:], strict=False):
        if sa != sb:
            out += _bisect(state, a, b, sa, sb)
    return out


def _bisect(
    state: Callable[[float], object], a: float, b: float, sa: object, sb: object
) -> list[tuple[float, float]]:
    """The change(s) of ``state`` between a (state ``sa``) and b (state ``sb`` != ``sa``)."""
    while b - a > 1e-9 * max(1.0, abs(b)):
        mid = (a + b) / 2
        if mid in (a, b):
            break
        sm = state(mid)
        if sm == sa:
            a = mid
        elif sm == sb:
            b = mid
        else:  # a third state in between: two changes in this interval
            return _bisect(state, a, mid, sa, sm) + _bisect(state, mid, b, sm, sb)
    return [(a, b)]


def probe_values(
    base: dict[Measure, tuple[float, bool]],
    measure: Measure,
    rows: Iterable[Threshold],
    extra_cutoffs: Iterable[tuple[Measure, Comparison, float]] = (),
) -> tuple[float, ...]:
    """The values of ``measure`` that stand for every value it could take: the ends of its
    plausible range and the two sides of every point where a criterion on it (or on a measure
    derived from it) changes its verdict."""
    spec = SPECS[measure]
    low, high = float(spec.low), float(spec.high)
    affected = derived_from(measure)
    cutoffs = {(r.measure, r.comparison, r.value) for r in rows if r.measure in affected}
    cutoffs |= {c for c in extra_cutoffs if c[0] in affected}
    points = {low, high}
    for target, comparison, threshold in sorted(cutoffs, key=lambda c: (c[0].value, c[2])):
        if target is measure:  # the verdict flips at the cut-off itself
            around = (math.nextafter(threshold, -math.inf), threshold)
            around += (math.nextafter(threshold, math.inf),)
            points.update(v for v in around if low <= v <= high)
            continue

        def met(v: float, target=target, comparison=comparison, threshold=threshold):
            value = values_with(base, measure, v).get(target)
            return None if value is None else comparison.holds(value[0], threshold)

        for flip in _transitions(met, low, high):
            points.update(flip)
    return tuple(sorted(points))


def _with_value(measurements: Measurements, measure: Measure, value: float) -> Measurements:
    base = _plain_values(measurements)
    values = values_with(base, measure, value)
    out: dict[Measure, MeasureValue] = {}
    for k, (v, derived) in values.items():
        original = measurements.values.get(k)
        if original is not None and original.value == v:
            out[k] = original
            continue
        out[k] = MeasureValue(
            measure=k,
            value=v,
            unit=CANONICAL_UNITS[k],
            origin=Origin.derived if derived else Origin.measured,
            detail="value tried by the audit",
        )
    return measurements.model_copy(update={"values": out})


def missing_effects(
    measurements: Measurements,
    context: Context,
    guideline: Guideline,
    switches: RuleSwitches | None = None,
    *,
    outcome: Outcome | None = None,
) -> tuple[MissingEffect, ...]:
    """For an undecided study, each missing acquired measure that would or could have decided
    it (see the module's rule); empty for a decided study or an unknown guideline."""
    rows = ROWS.get(Guideline(guideline))
    if rows is None:
        return ()
    quiet = context.model_copy(update={"borderline_fraction": 0.0})
    if outcome is None:
        outcome = assess(measurements, quiet, guideline, switches).outcome
    if outcome not in UNDECIDED:
        return ()
    base = _plain_values(measurements)
    used = {r.measure for r in rows}
    lvef_cut = ((M.lvef, Comparison.lt, context.lvef_reduced_below),)
    effects = []
    for measure in ACQUIRED:
        if measure in base or not (derived_from(measure) & used):
            continue
        probes = probe_values(base, measure, rows, lvef_cut)
        decided = [
            assess(_with_value(measurements, measure, v), quiet, guideline, switches).outcome
            in DECIDED
            for v in probes
        ]
        if any(decided):
            effects.append(MissingEffect(measure=measure, always=all(decided), sometimes=True))
    return tuple(effects)

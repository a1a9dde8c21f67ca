"""Numbers on the summary page: how values are printed, and the drawing range of each
measure's track in the criteria chart."""

from __future__ import annotations

import math

from service.model import Criterion, Measure
from service.wording import unit_words

#: Display range of each measure's track in the criteria chart, in its canonical unit.  These
#: are drawing ranges that hold most adult values (common practice), not reference ranges; a
#: value or cut-off outside the range widens that row's track so nothing is drawn off-scale.
SCALES: dict[Measure, tuple[float, float]] = {
    Measure.mitral_e: (0, 150),
    Measure.mitral_a: (0, 150),
    Measure.e_a_ratio: (0, 4),
    Measure.deceleration_time: (50, 350),
    Measure.e_prime_septal: (0, 20),
    Measure.e_prime_lateral: (0, 20),
    Measure.e_prime_average: (0, 20),
    Measure.e_e_prime_septal: (0, 30),
    Measure.e_e_prime_lateral: (0, 30),
    Measure.e_e_prime_average: (0, 30),
    Measure.tr_peak_velocity: (1, 5),
    Measure.pasp: (10, 80),
    Measure.lavi: (10, 80),
    Measure.lvef: (10, 80),
    Measure.ivrt: (30, 150),
    Measure.pv_s_d_ratio: (0, 3),
    Measure.la_reservoir_strain: (0, 60),
    Measure.age: (0, 100),
    Measure.e_acceleration_rate: (0, 4000),
    Measure.bmi: (15, 50),
    Measure.heart_rate: (40, 160),
    Measure.ar_a_duration: (-60, 80),
    Measure.mitral_e_valsalva: (0, 150),
    Measure.mitral_a_valsalva: (0, 150),
    Measure.e_a_ratio_valsalva: (0, 4),
}


def unit_display(unit: str) -> str:
    return unit_words(unit)


#: fewest decimals shown per unit (velocities in m/s read as "3.0", common practice)
_MIN_DECIMALS = {"m/s": 1}


def format_number(value: float, min_decimals: int = 0) -> str:
    """Two decimals at most (one from 100 up), trailing zeros dropped down to ``min_decimals``:
    14.0 → "14", 0.80 → "0.8", 14.96 → "14.96", 182.44 → "182.4"; 3.0 with one decimal → "3.0".
    Values are not rounded further, so a value just beside a cut-off never prints as the
    cut-off itself (at instrument precision)."""
    if not math.isfinite(value):
        return "—"
    decimals = 1 if abs(value) >= 100 else 2
    decimals = max(decimals, min_decimals)
    text = f"{value:.{decimals}f}"
    if "." in text:
        whole, frac = text.split(".")
        frac = frac.rstrip("0").ljust(min_decimals, "0")
        text = f"{whole}.{frac}" if frac else whole
    return "0" if text.strip("-0.") == "" else text


def format_value(value: float, unit: str) -> str:
    return format_number(value, _MIN_DECIMALS.get(unit, 0))


def with_unit(value: float, unit: str) -> str:
    shown = unit_display(unit)
    return f"{format_value(value, unit)} {shown}".strip()


def scale_for(criterion: Criterion) -> tuple[float, float]:
    """Track range of a criterion row: the measure's physiological range, widened to hold the
    cut-off and the value when either falls outside it."""
    lo, hi = SCALES.get(criterion.measure, (0.0, 0.0))
    points = [
        p for p in (criterion.threshold, criterion.value) if p is not None and math.isfinite(p)
    ]
    if hi <= lo:  # unknown measure: from 0 to twice the cut-off
        cut = criterion.threshold if math.isfinite(criterion.threshold) else 1.0
        lo, hi = min(0.0, cut), max(cut * 2, 1.0)
    if not points:
        return float(lo), float(hi)
    span = hi - lo
    if min(points) < lo:
        lo = min(points) - 0.05 * span
    if max(points) > hi:
        hi = max(points) + 0.05 * span
    return float(lo), float(hi)

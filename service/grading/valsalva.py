"""Mitral inflow during the Valsalva manoeuvre, reported beside the algorithm's result.

ASE/EACVI 2016 (Nagueh SF et al., J Am Soc Echocardiogr 2016;29:277-314, mitral inflow and
Valsalva): a fall in E/A of 50 % or more during Valsalva, without a fall of A, supports raised
filling pressure (pseudonormal filling unmasked); in normal filling both E and A fall
proportionally.  The finding is supporting evidence only: it is never a vote inside a rule set,
and the text says whether it agrees or conflicts with the result's filling pressure.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from service.grading import thresholds_ase2016 as T16
from service.grading.criteria import value_of
from service.model import Assessment, FillingPressure, Measure, Measurements, SupportingFinding
from service.wording import pressure_phrase

NAME = "Valsalva manoeuvre"
#: a fall in E/A of at least this fraction supports raised filling pressure (ASE/EACVI 2016 row
#: :data:`service.grading.thresholds_ase2016.VALSALVA_E_A_FALL`)
E_A_FALL = T16.VALSALVA_E_A_FALL.value
_FALL = f"{E_A_FALL * 100:.0f} %"  # the cut-off in words, "50 %"
SOURCE = T16.VALSALVA_E_A_FALL.citation


@dataclass(frozen=True)
class Change:
    """Rest and Valsalva values of one quantity."""

    rest: float
    strain: float

    @property
    def fraction(self) -> float:
        return (self.strain - self.rest) / self.rest

    def words(self, name: str, unit: str = "") -> str:
        u = f" {unit}" if unit else ""
        return f"{name} {_short(self.rest)} → {_short(self.strain)}{u} ({_pct(self.fraction)})"


def _short(value: float) -> str:
    return f"{value:.3g}"


def _pct(fraction: float) -> str:
    return f"{'+' if fraction >= 0 else '−'}{abs(fraction) * 100:.0f} %"


def _positive(v: float | None) -> float | None:
    """The value when it is finite and above zero (a velocity or ratio that can be compared)."""
    return v if v is not None and math.isfinite(v) and v > 0 else None


def _ratio(m: Measurements, ratio: Measure, e: Measure, a: Measure) -> float | None:
    r = _positive(value_of(m, ratio))
    if r is not None:
        return r
    ev, av = _positive(value_of(m, e)), _positive(value_of(m, a))
    if ev is not None and av is not None:
        return _positive(ev / av)
    return None


def _change(m: Measurements, rest: Measure, strain: Measure) -> Change | None:
    r, s = _positive(value_of(m, rest)), _positive(value_of(m, strain))
    return None if r is None or s is None else Change(r, s)


def finding(measurements: Measurements) -> SupportingFinding | None:
    """The Valsalva finding, or None when the source carries no Valsalva inflow."""
    m = measurements
    valsalva_measures = (
        Measure.mitral_e_valsalva,
        Measure.mitral_a_valsalva,
        Measure.e_a_ratio_valsalva,
    )
    if all(value_of(m, x) is None for x in valsalva_measures):
        return None
    e = _change(m, Measure.mitral_e, Measure.mitral_e_valsalva)
    a = _change(m, Measure.mitral_a, Measure.mitral_a_valsalva)
    if e is not None and a is not None:
        # all four waves known: both ratios from the waves, so rest and strain are alike
        rest, strain = _positive(e.rest / a.rest), _positive(e.strain / a.strain)
    else:
        rest = _ratio(m, Measure.e_a_ratio, Measure.mitral_e, Measure.mitral_a)
        strain = _ratio(
            m, Measure.e_a_ratio_valsalva, Measure.mitral_e_valsalva, Measure.mitral_a_valsalva
        )
    if rest is None or strain is None:
        return SupportingFinding(
            name=NAME,
            text=(
                "Mitral inflow during Valsalva was reported, but E/A at rest or during the "
                "manoeuvre could not be formed; no conclusion."
            ),
        )
    ratio = Change(rest, strain)
    parts = [ratio.words("E/A")]
    if e is not None:
        parts.append(e.words("E", "cm/s"))
    if a is not None:
        parts.append(a.words("A", "cm/s"))
    observed = "Valsalva: " + ", ".join(parts)
    fall = -ratio.fraction
    supports: bool | None
    if fall >= E_A_FALL:
        if a is None:
            supports = True
            meaning = (
                f"E/A fell by {_FALL} or more, which supports raised filling pressure "
                f"(pseudonormal filling; {SOURCE}); the change in A could not be checked"
            )
        elif a.strain >= a.rest:
            supports = True
            meaning = (
                f"E/A fell by {_FALL} or more with A not falling, which supports raised filling "
                f"pressure (pseudonormal filling; {SOURCE})"
            )
        else:
            supports = None
            meaning = (
                f"E/A fell by {_FALL} or more but A fell too, which is not the pseudonormal "
                "pattern; no conclusion"
            )
    elif e is not None and a is not None and e.strain < e.rest and a.strain < a.rest:
        supports = False
        meaning = (
            f"E and A both fell and E/A did not fall by {_FALL} or more: the normal response, "
            f"which does not support raised filling pressure ({SOURCE})"
        )
    else:
        supports = None
        meaning = (
            f"E/A fell by less than {_FALL} without a proportional fall of both waves; "
            "no conclusion"
        )
    return SupportingFinding(
        name=NAME, text=f"{observed}: {meaning}.", supports_elevated_pressure=supports
    )


def agreement(supports: bool | None, pressure: FillingPressure) -> bool | None:
    """Whether the finding agrees with the result's filling pressure (None: cannot say)."""
    if supports is None or pressure not in (FillingPressure.normal, FillingPressure.elevated):
        return None
    return supports == (pressure is FillingPressure.elevated)


def attach(assessment: Assessment, measurements: Measurements) -> Assessment:
    """The assessment with the Valsalva finding added beside it (no change to grade or pressure)."""
    f = finding(measurements)
    if f is None:
        return assessment
    agrees = agreement(f.supports_elevated_pressure, assessment.filling_pressure)
    pressure = pressure_phrase(assessment.filling_pressure)
    if agrees is True:
        tail = f" It agrees with the result ({pressure})."
    elif agrees is False:
        tail = f" It conflicts with the result ({pressure}); review the study."
    elif f.supports_elevated_pressure is None:
        tail = ""
    else:
        tail = f" The result gives no filling pressure to compare with ({pressure})."
    f = f.model_copy(update={"text": f.text + tail, "agrees_with_result": agrees})
    return assessment.model_copy(update={"supporting": (*assessment.supporting, f)})

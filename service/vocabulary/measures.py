"""What the vocabulary knows about each quantity it can recognise: dimension, canonical unit
and physiological plausibility range.

Quantities are the canonical :class:`~service.model.Measure` values plus a few *components*
that are only used to derive a canonical measure (pulmonary-vein S and D velocities, Ar and A
durations).  Plausibility ranges are deliberately wide: they catch unit errors and garbage
(e.g. an E velocity of 30 m/s), not abnormal physiology.  Source of every range: common
practice (adult echocardiography; values far outside any published normal or disease range).
"""

from __future__ import annotations

from enum import StrEnum

from pydantic import BaseModel, ConfigDict

from service.model import CANONICAL_UNITS, Measure
from service.vocabulary.units import Dimension


class Component(StrEnum):
    """Quantities recognised only to derive a canonical measure."""

    pv_s_velocity = "pv_s_velocity"  # pulmonary-vein systolic peak velocity -> pv_s_d_ratio
    pv_d_velocity = "pv_d_velocity"  # pulmonary-vein diastolic peak velocity -> pv_s_d_ratio
    pv_ar_duration = "pv_ar_duration"  # pulmonary-vein Ar duration -> ar_a_duration
    mitral_a_duration = "mitral_a_duration"  # mitral A duration -> ar_a_duration


Quantity = Measure | Component


class QuantitySpec(BaseModel):
    model_config = ConfigDict(frozen=True)

    dimension: Dimension
    unit: str  # canonical unit
    low: float  # plausible range, inclusive, canonical unit
    high: float
    magnitude: bool = False  # negative values are read as their magnitude (sign = direction)
    label: str = ""


_V, _T, _R = Dimension.velocity, Dimension.time, Dimension.ratio

#: source of every range: common practice (wide physiological limits for adults)
SPECS: dict[Quantity, QuantitySpec] = {
    Measure.mitral_e: QuantitySpec(dimension=_V, unit="cm/s", low=5, high=300, label="mitral E"),
    Measure.mitral_a: QuantitySpec(dimension=_V, unit="cm/s", low=5, high=300, label="mitral A"),
    Measure.e_a_ratio: QuantitySpec(dimension=_R, unit="{ratio}", low=0.1, high=10, label="E/A"),
    Measure.deceleration_time: QuantitySpec(
        dimension=_T, unit="ms", low=30, high=800, label="E deceleration time"
    ),
    Measure.e_prime_septal: QuantitySpec(
        dimension=_V, unit="cm/s", low=1, high=35, label="septal e'"
    ),
    Measure.e_prime_lateral: QuantitySpec(
        dimension=_V, unit="cm/s", low=1, high=35, label="lateral e'"
    ),
    Measure.e_prime_average: QuantitySpec(
        dimension=_V, unit="cm/s", low=1, high=35, label="average e'"
    ),
    Measure.e_e_prime_septal: QuantitySpec(
        dimension=_R, unit="{ratio}", low=1, high=80, label="septal E/e'"
    ),
    Measure.e_e_prime_lateral: QuantitySpec(
        dimension=_R, unit="{ratio}", low=1, high=80, label="lateral E/e'"
    ),
    Measure.e_e_prime_average: QuantitySpec(
        dimension=_R, unit="{ratio}", low=1, high=80, label="average E/e'"
    ),
    # TR velocity: the sign only says the jet points away from the probe (common practice)
    Measure.tr_peak_velocity: QuantitySpec(
        dimension=_V, unit="m/s", low=0.3, high=7, magnitude=True, label="TR peak velocity"
    ),
    Measure.pasp: QuantitySpec(
        dimension=Dimension.pressure, unit="mm[Hg]", low=5, high=160, label="PASP"
    ),
    Measure.lavi: QuantitySpec(
        dimension=Dimension.volume_indexed, unit="mL/m2", low=5, high=250, label="LAVI"
    ),
    Measure.lvef: QuantitySpec(dimension=Dimension.percent, unit="%", low=3, high=95, label="LVEF"),
    Measure.ivrt: QuantitySpec(dimension=_T, unit="ms", low=10, high=300, label="IVRT"),
    Measure.pv_s_d_ratio: QuantitySpec(
        dimension=_R, unit="{ratio}", low=0.05, high=10, label="PV S/D"
    ),
    Measure.la_reservoir_strain: QuantitySpec(
        dimension=Dimension.percent, unit="%", low=0, high=100, label="LA reservoir strain"
    ),
    Measure.age: QuantitySpec(dimension=Dimension.age, unit="a", low=0, high=130, label="age"),
    Measure.e_acceleration_rate: QuantitySpec(
        dimension=Dimension.acceleration, unit="cm/s2", low=10, high=20000, label="E acceleration"
    ),
    Measure.bmi: QuantitySpec(dimension=Dimension.bmi, unit="kg/m2", low=8, high=100, label="BMI"),
    Measure.heart_rate: QuantitySpec(
        dimension=Dimension.rate, unit="/min", low=15, high=300, label="heart rate"
    ),
    Measure.ar_a_duration: QuantitySpec(
        dimension=_T, unit="ms", low=-300, high=300, label="Ar-A duration"
    ),
    Measure.mitral_e_valsalva: QuantitySpec(
        dimension=_V, unit="cm/s", low=5, high=300, label="mitral E (Valsalva)"
    ),
    Measure.mitral_a_valsalva: QuantitySpec(
        dimension=_V, unit="cm/s", low=5, high=300, label="mitral A (Valsalva)"
    ),
    Measure.e_a_ratio_valsalva: QuantitySpec(
        dimension=_R, unit="{ratio}", low=0.1, high=10, label="E/A (Valsalva)"
    ),
    Component.pv_s_velocity: QuantitySpec(
        dimension=_V, unit="cm/s", low=5, high=250, label="pulmonary-vein S velocity"
    ),
    Component.pv_d_velocity: QuantitySpec(
        dimension=_V, unit="cm/s", low=5, high=250, label="pulmonary-vein D velocity"
    ),
    Component.pv_ar_duration: QuantitySpec(
        dimension=_T, unit="ms", low=10, high=500, label="pulmonary-vein Ar duration"
    ),
    Component.mitral_a_duration: QuantitySpec(
        dimension=_T, unit="ms", low=10, high=500, label="mitral A duration"
    ),
}

# the canonical units of the shared model are the single source of truth for measures
for _m, _unit in CANONICAL_UNITS.items():  # pragma: no branch
    if SPECS[_m].unit != _unit:  # pragma: no cover - guarded by a test as well
        raise AssertionError(f"unit of {_m} differs from CANONICAL_UNITS")

#: resting measure -> its Valsalva counterpart (Stage = Valsalva maneuver, 261039008 SCT)
VALSALVA_VARIANT: dict[Quantity, Measure] = {
    Measure.mitral_e: Measure.mitral_e_valsalva,
    Measure.mitral_a: Measure.mitral_a_valsalva,
    Measure.e_a_ratio: Measure.e_a_ratio_valsalva,
}


def parse_quantity(name: str) -> Quantity:
    """Measure or component by its name; raises ValueError."""
    try:
        return Measure(name)
    except ValueError:
        return Component(name)


def quantity_names() -> list[str]:
    return [q.value for q in SPECS]

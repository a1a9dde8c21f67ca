"""UCUM unit conversion to the canonical unit of each measure.

Factors are exact definitions of the units (UCUM; PS3.16 CID 7181 uses UCUM for DICOM units).
Non-UCUM spellings seen in practice ("mmHg", "bpm", "msec", "cm/sec") are accepted through an
alias table and reported, never used silently (common practice).
"""

from __future__ import annotations

from enum import StrEnum


class Dimension(StrEnum):
    velocity = "velocity"
    time = "time"
    ratio = "ratio"
    percent = "percent"
    volume = "volume"
    volume_indexed = "volume-indexed"
    pressure = "pressure"
    acceleration = "acceleration"
    age = "age"
    bmi = "bmi"
    rate = "rate"


#: factor that turns a value in the unit into the dimension's base unit (first entry)
FACTORS: dict[Dimension, dict[str, float]] = {
    Dimension.velocity: {"cm/s": 1.0, "m/s": 100.0, "mm/s": 0.1},
    Dimension.time: {"ms": 1.0, "s": 1000.0},
    Dimension.ratio: {"{ratio}": 1.0, "1": 1.0},
    Dimension.percent: {"%": 1.0},
    Dimension.volume: {"mL": 1.0, "ml": 1.0, "cm3": 1.0, "l": 1000.0, "L": 1000.0},
    Dimension.volume_indexed: {"mL/m2": 1.0, "ml/m2": 1.0, "cm3/m2": 1.0},
    Dimension.pressure: {"mm[Hg]": 1.0, "kPa": 7.50062, "cm[H2O]": 0.73556},
    Dimension.acceleration: {"cm/s2": 1.0, "m/s2": 100.0, "mm/s2": 0.1},
    Dimension.age: {"a": 1.0, "mo": 1.0 / 12.0, "wk": 7.0 / 365.25, "d": 1.0 / 365.25},
    Dimension.bmi: {"kg/m2": 1.0},
    Dimension.rate: {"/min": 1.0, "1/min": 1.0, "{H.B.}/min": 1.0, "{beats}/min": 1.0},
}

#: dimensionless quantities may arrive without a unit
UNITLESS_OK = frozenset({Dimension.ratio})

#: non-UCUM spellings accepted with a note (common practice)
ALIASES: dict[str, str] = {
    "mmHg": "mm[Hg]",
    "mm Hg": "mm[Hg]",
    "bpm": "/min",
    "msec": "ms",
    "sec": "s",
    "cm/sec": "cm/s",
    "m/sec": "m/s",
    "ml/m²": "ml/m2",
    "mL/m²": "mL/m2",
    "ratio": "{ratio}",
    "no units": "1",
}


class UnitError(ValueError):
    """The unit cannot be used for the quantity; the message is the exclusion reason."""


def ucum(unit: str) -> tuple[str, bool]:
    """Return (UCUM spelling, was_alias) for a unit string as found in the SR."""
    u = unit.strip()
    if u in ALIASES:
        return ALIASES[u], True
    return u, False


def convert(value: float, unit: str | None, dimension: Dimension, target: str) -> float:
    """Convert ``value`` given in ``unit`` to ``target`` (both of ``dimension``).

    Raises :class:`UnitError` with a plain-words reason for a missing unit on a dimensioned
    quantity, an unknown unit, or a unit of another dimension."""
    table = FACTORS[dimension]
    if target not in table:  # pragma: no cover - programming error in the tables
        raise AssertionError(f"{target} is not a {dimension} unit")
    if unit is None or not unit.strip():
        if dimension in UNITLESS_OK:
            return value
        raise UnitError(f"no unit given for a {dimension} value")
    u, _ = ucum(unit)
    if u not in table:
        other = next((d for d, t in FACTORS.items() if u in t), None)
        if other is not None:
            raise UnitError(f"unit '{unit}' is a {other} unit, expected a {dimension} unit")
        allowed = ", ".join(table)
        raise UnitError(f"unknown unit '{unit}' for a {dimension} value (accepted: {allowed})")
    return value * table[u] / table[target]

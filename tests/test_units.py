"""Unit conversion (UCUM unit definitions: 1 m = 100 cm, 1 s = 1000 ms, 1 kPa = 7.50062 mmHg)."""

import pytest

from service.model import CANONICAL_UNITS
from service.vocabulary.measures import SPECS
from service.vocabulary.units import Dimension, UnitError, convert, ucum


@pytest.mark.parametrize(
    ("value", "unit", "dimension", "target", "expected"),
    [
        (0.82, "m/s", Dimension.velocity, "cm/s", 82.0),  # UCUM: m = 100 cm
        (820, "mm/s", Dimension.velocity, "cm/s", 82.0),
        (282, "cm/s", Dimension.velocity, "m/s", 2.82),
        (0.2, "s", Dimension.time, "ms", 200.0),  # UCUM: s = 1000 ms
        (1.2, "1", Dimension.ratio, "{ratio}", 1.2),
        (1.2, None, Dimension.ratio, "{ratio}", 1.2),  # dimensionless: no unit is fine
        (38, "ml/m2", Dimension.volume_indexed, "mL/m2", 38.0),
        (4, "kPa", Dimension.pressure, "mm[Hg]", 30.00248),  # 1 kPa = 7.50062 mmHg (UCUM)
        (9.81, "m/s2", Dimension.acceleration, "cm/s2", 981.0),
        (18, "mo", Dimension.age, "a", 1.5),
    ],
)
def test_convert(value, unit, dimension, target, expected):
    assert convert(value, unit, dimension, target) == pytest.approx(expected, rel=1e-9)


def test_missing_unit_on_dimensioned_value_is_an_error():
    with pytest.raises(UnitError, match="no unit"):
        convert(80, None, Dimension.velocity, "cm/s")


def test_unknown_unit_names_the_unit_and_accepted_ones():
    with pytest.raises(UnitError, match=r"unknown unit 'furlong/s'.*cm/s"):
        convert(80, "furlong/s", Dimension.velocity, "cm/s")


def test_unit_of_another_dimension():
    with pytest.raises(UnitError, match="is a time unit"):
        convert(80, "ms", Dimension.velocity, "cm/s")


def test_percent_does_not_accept_a_bare_fraction():
    # a fraction in "1" for an ejection fraction is ambiguous: refuse (common practice)
    with pytest.raises(UnitError):
        convert(0.6, "1", Dimension.percent, "%")


def test_aliases_are_reported():
    assert ucum("mmHg") == ("mm[Hg]", True)
    assert ucum("cm/s") == ("cm/s", False)


def test_specs_use_the_shared_canonical_units():
    for measure, unit in CANONICAL_UNITS.items():
        assert SPECS[measure].unit == unit
        assert SPECS[measure].low < SPECS[measure].high

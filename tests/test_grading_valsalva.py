"""Valsalva manoeuvre: supporting evidence beside the result, never a vote.

Source: Nagueh SF et al., J Am Soc Echocardiogr 2016;29:277-314 ("Nagueh 2016 JASE 29:277"),
mitral inflow with Valsalva (from memory, as in the project's reference §5): a fall in E/A of
50 % or more supports raised filling pressure (pseudonormal filling); in normal filling E and A
fall proportionally.  All measurement values are invented.
"""

from __future__ import annotations

import pytest
from grading_builders import measurements

from service.grading import assess
from service.grading import valsalva as V
from service.model import (
    Context,
    FillingPressure,
    Grade,
    Guideline,
    Rhythm,
)

SINUS = Context(rhythm=Rhythm.sinus, borderline_fraction=0.0)


@pytest.mark.parametrize(
    ("rest", "strain", "supports"),
    [
        # E/A 1.5 -> 0.75 is exactly a 50 % fall with A rising: supports raised pressure
        (
            {"mitral_e": 90, "mitral_a": 60},
            {"mitral_e_valsalva": 60, "mitral_a_valsalva": 80},
            True,
        ),
        # E/A 1.5 -> 0.76 (fall just under 50 %), both waves fall: normal response
        (
            {"mitral_e": 90, "mitral_a": 60},
            {"mitral_e_valsalva": 38, "mitral_a_valsalva": 50},
            False,
        ),
        # E/A 1.5 -> 0.6 with A unchanged: supports raised pressure
        (
            {"mitral_e": 90, "mitral_a": 60},
            {"mitral_e_valsalva": 36, "mitral_a_valsalva": 60},
            True,
        ),
        # E/A falls 50 % but A falls too: not the pseudonormal pattern
        (
            {"mitral_e": 90, "mitral_a": 60},
            {"mitral_e_valsalva": 20, "mitral_a_valsalva": 30},
            None,
        ),
        # E/A falls less than 50 % with A rising: no conclusion
        (
            {"mitral_e": 90, "mitral_a": 60},
            {"mitral_e_valsalva": 80, "mitral_a_valsalva": 65},
            None,
        ),
        # ratios only: a 50 % fall supports raised pressure, A change not checkable
        ({"e_a_ratio": 1.6}, {"e_a_ratio_valsalva": 0.8}, True),
        ({"e_a_ratio": 1.6}, {"e_a_ratio_valsalva": 0.81}, None),
    ],
)
def test_valsalva_rule(rest, strain, supports):
    f = V.finding(measurements(**rest, **strain))
    assert f is not None
    assert f.supports_elevated_pressure is supports
    assert f.text.startswith("Valsalva: E/A ")


def test_no_valsalva_no_finding():
    assert V.finding(measurements(mitral_e=90, mitral_a=60)) is None
    a = assess(measurements(lvef=60, lavi=30, mitral_e=90, mitral_a=60, e_a_ratio=1.5), SINUS)
    assert a.supporting == ()


def test_valsalva_without_rest_ratio_says_so():
    f = V.finding(measurements(mitral_e_valsalva=50, mitral_a_valsalva=60))
    assert f is not None
    assert f.supports_elevated_pressure is None
    assert "could not be formed" in f.text


PSEUDONORMAL = {"mitral_e_valsalva": 45, "mitral_a_valsalva": 75}
NORMAL_RESPONSE = {"mitral_e_valsalva": 70, "mitral_a_valsalva": 50}


@pytest.mark.parametrize("guideline", [Guideline.ase_eacvi_2016, Guideline.ase_2025])
def test_beside_the_result_agreement_and_conflict(guideline):
    # grade 2 (elevated) by both rule sets; a pseudonormal Valsalva agrees, a normal one conflicts
    base = {
        "lvef": 60,
        "mitral_e": 90,
        "mitral_a": 60,
        "e_a_ratio": 1.5,
        "e_e_prime_average": 16,
        "e_prime_average": 5,
        "e_prime_septal": 5,
        "tr_peak_velocity": 3.1,
        "lavi": 40,
    }
    plain = assess(measurements(**base), SINUS, guideline)
    agree = assess(measurements(**base, **PSEUDONORMAL), SINUS, guideline)
    conflict = assess(measurements(**base, **NORMAL_RESPONSE), SINUS, guideline)
    # never a vote: grade and pressure unchanged
    for a in (agree, conflict):
        assert (a.grade, a.filling_pressure) == (plain.grade, plain.filling_pressure)
        assert a.criteria == plain.criteria
    assert plain.filling_pressure is FillingPressure.elevated
    [f] = agree.supporting
    assert f.name == "Valsalva manoeuvre"
    assert (f.supports_elevated_pressure, f.agrees_with_result) == (True, True)
    assert "agrees with the result" in f.text
    [f] = conflict.supporting
    assert (f.supports_elevated_pressure, f.agrees_with_result) == (False, False)
    assert "conflicts with the result" in f.text


def test_no_pressure_to_compare():
    # indeterminate result: agreement cannot be said
    m = measurements(lvef=60, e_e_prime_average=16, lavi=30, mitral_e=90, mitral_a=60)
    a = assess(measurements(**{k: v.value for k, v in m.values.items()}, **PSEUDONORMAL), SINUS)
    assert a.grade is Grade.indeterminate
    [f] = a.supporting
    assert f.agrees_with_result is None
    assert "no filling pressure to compare" in f.text


@pytest.mark.parametrize(
    ("supports", "pressure", "agrees"),
    [
        (True, FillingPressure.elevated, True),
        (True, FillingPressure.normal, False),
        (False, FillingPressure.normal, True),
        (False, FillingPressure.elevated, False),
        (True, FillingPressure.indeterminate, None),
        (None, FillingPressure.elevated, None),
    ],
)
def test_agreement_table(supports, pressure, agrees):
    assert V.agreement(supports, pressure) is agrees

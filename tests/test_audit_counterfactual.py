"""Which missing measure would or could have decided an undecided study (docs/audit.md, "Missing
measures").  Expected outcomes are worked out by hand from the published algorithms:
Nagueh SF et al., J Am Soc Echocardiogr 2016;29:277-314, Figure 8A (normal LVEF: more than half
of the available criteria abnormal = dysfunction, exactly half = indeterminate, less than half =
normal) and Figure 8B (E/A <= 0.8 with E <= 50 cm/s = grade I; step 2 needs two of E/e′, TR
velocity and LAVI)."""

from __future__ import annotations

from grading_builders import measurements, sinus

from service.audit.counterfactual import (
    ROWS,
    missing_effects,
    probe_values,
    values_with,
)
from service.grading import assess
from service.model import Guideline, Measure, Outcome
from service.vocabulary.mapper import round2

M = Measure
G16 = Guideline.ase_eacvi_2016
G25 = Guideline.ase_2025


def _effects(m, guideline=G16):
    return {e.measure: (e.always, e.sometimes) for e in missing_effects(m, sinus(), guideline)}


def test_a_missing_criterion_that_decides_whatever_its_value():
    # Figure 8A, normal LVEF: E/e′ average 7.14 (not > 14), septal e′ 6 (< 7: met); TR and LAVI
    # missing: 1 of 2 available criteria met = exactly half = indeterminate.
    m = measurements(
        mitral_e=50, mitral_a=70, e_a_ratio=0.71, e_prime_septal=6, e_prime_lateral=8,
        e_prime_average=7, e_e_prime_average=7.14, lvef=60,
    )  # fmt: skip
    assert assess(m, sinus(), G16).outcome is Outcome.indeterminate
    # TR > 2.8 m/s: 2 of 3 met, dysfunction; Figure 8B: E/A 0.71 <= 0.8 and E 50 <= 50 cm/s
    # -> grade I.  TR <= 2.8: 1 of 3 met -> normal.  Decided either way; LAVI > 34 the same.
    effects = _effects(m)
    assert effects == {M.tr_peak_velocity: (True, True), M.lavi: (True, True)}


def test_missing_measures_that_decide_only_for_some_values():
    # Inflow only (E 84, A 58, E/A 1.45, LVEF 60): none of the 4 criteria of Figure 8A, not
    # gradable.  TR alone: > 2.8 -> 1 of 1 met, dysfunction; Figure 8B: E/A between the
    # branches, step 2 with only 1 of 3 criteria -> indeterminate; <= 2.8 -> normal.  So TR
    # decides for some values only; the same holds for LAVI and for each e′ site (septal e′ also
    # gives septal E/e′ = 84 / e′, met below 5.6 cm/s).
    m = measurements(mitral_e=84, mitral_a=58, e_a_ratio=1.45, deceleration_time=172, lvef=60)
    assert assess(m, sinus(), G16).outcome is Outcome.not_gradable
    effects = _effects(m)
    assert effects == {
        M.e_prime_septal: (False, True),
        M.e_prime_lateral: (False, True),
        M.tr_peak_velocity: (False, True),
        M.lavi: (False, True),
    }


def test_only_the_guidelines_own_measures_are_tried():
    # LA reservoir strain is an ASE 2025 criterion (Nagueh 2025) and no ASE/EACVI 2016 one
    m = measurements(mitral_e=84, mitral_a=58, e_a_ratio=1.45, lvef=60)
    assert M.la_reservoir_strain not in _effects(m, G16)
    assert M.la_reservoir_strain in _effects(m, G25)


def test_a_decided_study_has_no_missing_measure():
    m = measurements(mitral_e=80, mitral_a=60, e_prime_septal=10, e_prime_lateral=14, lvef=60)
    assert assess(m, sinus(), G16).outcome is Outcome.normal
    assert missing_effects(m, sinus(), G16) == ()


def test_probe_values_straddle_the_cut_offs_of_derived_ratios():
    # septal e′ with E = 84 cm/s: its own cut-off (< 7 cm/s, Figure 8A) and the septal E/e′
    # cut-off (> 15, Figure 8A single-site) which E / e′ crosses near 84 / 15 = 5.6 cm/s,
    # after rounding half up to 2 decimals as the mapper rounds derived ratios
    base = {M.mitral_e: (84.0, False), M.lvef: (60.0, False)}
    probes = probe_values(base, M.e_prime_septal, ROWS[G16])
    # (a ratio above its plausible range is dropped, as the mapper drops it)
    ratios = [values_with(base, M.e_prime_septal, v).get(M.e_e_prime_septal) for v in probes]
    probes = tuple(v for v, r in zip(probes, ratios, strict=True) if r is not None)
    met = [r[0] > 15 for r in ratios if r is not None]
    assert True in met and False in met
    flip = next(i for i in range(len(met) - 1) if met[i] != met[i + 1])
    below, above = probes[flip], probes[flip + 1]
    assert above - below < 1e-6
    assert round2(84 / below) > 15 >= round2(84 / above)
    # and both sides of its own cut-off, 7 cm/s (strict <: 7 itself is not met)
    assert 7.0 in probes and any(6.99 < v < 7 for v in probes)


def test_derived_values_follow_the_mapper_and_keep_reported_ones():
    base = {M.mitral_e: (90.0, False), M.e_prime_lateral: (10.0, False)}
    out = values_with(base, M.e_prime_septal, 6.0)
    assert out[M.e_prime_average] == (8.0, True)  # (6 + 10) / 2
    assert out[M.e_e_prime_average] == (11.25, True)  # 90 / 8
    assert out[M.e_e_prime_septal] == (15.0, True)
    reported = {**base, M.e_e_prime_average: (12.0, False)}
    assert values_with(reported, M.e_prime_septal, 6.0)[M.e_e_prime_average] == (12.0, False)

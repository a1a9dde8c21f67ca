"""Special situations: each gives the guideline's alternative output or a stated "not applicable",
never a standard grade.

Sources: Nagueh SF et al., J Am Soc Echocardiogr 2016;29:277-314, §V specific diseases
("Nagueh 2016 JASE 29:277"; the cut-offs are from memory as given in the project's reference
§2.5, the mitral-stenosis A velocity > 1.5 m/s also in the 2009 predecessor text) and Nagueh SF et
al., J Am Soc Echocardiogr 2025;38(7), doi 10.1016/j.echo.2025.03.011, special populations
("Nagueh 2025 JASE 38(7)"; MAC rule after Abudiab MM et al., JACC Cardiovasc Imaging
2017;10:1411, from memory).  I-16-12, I-16-13 and I-16-14 name documented readings.
All measurement values are invented.
"""

from __future__ import annotations

import pytest
from grading_builders import measurements

from service.grading import assess
from service.grading import special_situations as SS
from service.grading import thresholds_ase2025 as T25
from service.model import (
    Comparison,
    Context,
    FillingPressure,
    Grade,
    Guideline,
    Measure,
    Outcome,
    Pathway,
    Rhythm,
    SpecialSituation,
    Verdict,
)
from service.wording import headline, situation_name

S = SpecialSituation
ELEVATED = FillingPressure.elevated
NORMAL = FillingPressure.normal
INDET = FillingPressure.indeterminate
UNKNOWN = FillingPressure.not_estimated
# a study that the standard algorithms would call abnormal (so a standard grade would show)
ABNORMAL = {
    "lvef": 60,
    "e_e_prime_average": 17,
    "e_prime_average": 5,
    "e_prime_septal": 5,
    "tr_peak_velocity": 3.2,
    "lavi": 42,
    "e_a_ratio": 1.4,
    "mitral_e": 95,
    "mitral_a": 68,
}


def ctx(*situations: SpecialSituation, **kw: object) -> Context:
    kw.setdefault("rhythm", Rhythm.sinus)
    kw.setdefault("borderline_fraction", 0.0)
    return Context(special_situations=frozenset(situations), **kw)


def run(guideline: Guideline, *situations: SpecialSituation, context=None, **values):
    return assess(measurements(**values), context or ctx(*situations), guideline)


def criterion(a, criterion_id: str):
    matches = [c for c in a.criteria if c.id == criterion_id]
    assert len(matches) == 1, [c.id for c in a.criteria]
    return matches[0]


# ---------------------------------------------------------------------------------------------
# Every situation under every guideline: alternative output or stated "not applicable"
# ---------------------------------------------------------------------------------------------

WITH_CRITERIA = {
    Guideline.ase_eacvi_2016: {
        S.sinus_tachycardia,
        S.mitral_regurgitation,
        S.mitral_stenosis,
        S.hypertrophic_cardiomyopathy,
        S.restrictive_cardiomyopathy,
        S.pulmonary_hypertension_non_cardiac,
    },
    Guideline.ase_2025: {S.mitral_annular_calcification, S.pulmonary_hypertension_non_cardiac},
}


@pytest.mark.parametrize("guideline", [Guideline.ase_eacvi_2016, Guideline.ase_2025])
@pytest.mark.parametrize("situation", list(SpecialSituation))
def test_every_situation_has_an_explicit_outcome(guideline, situation):
    a = run(guideline, situation, **ABNORMAL)
    assert a.grade is Grade.not_applicable  # never a standard grade
    assert a.outcome is Outcome.special_situation  # never counted as "not gradable"
    assert a.special_situations == (situation,)
    words = situation_name(situation)  # clinical spelling ("LBBB or ventricular pacing")
    assert words in a.pathway_reason
    if a.pathway is Pathway.not_applicable:  # said once, in the conclusion
        assert "the standard algorithm does not apply" in headline(a)
        assert "does not apply" not in " ".join((a.pathway_reason, *a.reasoning, *a.notes))
    if situation in WITH_CRITERIA[guideline]:
        assert a.pathway is Pathway.special_situation
        assert a.criteria  # each alternative criterion reported
        assert all(c.step == f"special situation: {words}" for c in a.criteria)
    else:
        assert a.pathway is Pathway.not_applicable
        assert a.filling_pressure is UNKNOWN
        assert not a.criteria
        reason = SS.not_applicable_reason(situation, guideline)
        assert reason and reason in " ".join(a.reasoning)


def test_not_applicable_reasons_cover_the_rest():
    for guideline, with_criteria in WITH_CRITERIA.items():
        for s in SpecialSituation:
            assert (SS.not_applicable_reason(s, guideline) is None) == (s in with_criteria)


def test_i_16_14_transplant_and_mac_not_graded_under_2016():
    # I-16-14: no numeric rule for heart transplant or MAC under ASE/EACVI 2016
    for s in (S.heart_transplant, S.mitral_annular_calcification):
        a = run(Guideline.ase_eacvi_2016, s, **ABNORMAL)
        assert a.pathway is Pathway.not_applicable
        assert [r.id for r in a.readings] == ["I-16-14"]
        assert "I-16-14" not in " ".join((a.pathway_reason, *a.reasoning))


def test_criteria_without_a_combining_rule_name_their_reading():
    # mitral stenosis under ASE/EACVI 2016: its criteria are listed without a rule combining
    # them; the result says so in a sentence and names the reading as an identifier item only
    a = run(Guideline.ase_eacvi_2016, S.mitral_stenosis, **ABNORMAL)
    assert a.pathway is Pathway.special_situation
    assert a.filling_pressure is INDET
    assert any("without a rule combining them" in s for s in a.reasoning)
    assert "I-16-15" in [r.id for r in a.readings]
    assert "I-16-15" not in " ".join((a.pathway_reason, *a.reasoning, *a.notes))


# ---------------------------------------------------------------------------------------------
# ASE/EACVI 2016 alternative criteria (flags, no combination rule)
# ---------------------------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("situation", "cid", "name", "met", "at", "not_met", "at_is_met"),
    [
        # sinus tachycardia: IVRT ≤ 70 ms, lateral E/e′ > 10
        (S.sinus_tachycardia, "ase16.tachycardia.tachy_ivrt", "ivrt", 69.9, 70.0, 70.1, True),
        (
            S.sinus_tachycardia,
            "ase16.tachycardia.tachy_e_e_prime_lateral",
            "e_e_prime_lateral",
            10.1,
            10.0,
            9.9,
            False,
        ),
        # mitral regurgitation: Ar-A ≥ 30 ms, IVRT < 60 ms
        (
            S.mitral_regurgitation,
            "ase16.mr.mr_ar_a_duration",
            "ar_a_duration",
            30.1,
            30.0,
            29.9,
            True,
        ),
        (S.mitral_regurgitation, "ase16.mr.mr_ivrt", "ivrt", 59.9, 60.0, 60.1, False),
        # mitral stenosis: IVRT < 60 ms, mitral A > 1.5 m/s
        (S.mitral_stenosis, "ase16.ms.ms_ivrt", "ivrt", 59.9, 60.0, 60.1, False),
        (S.mitral_stenosis, "ase16.ms.ms_mitral_a", "mitral_a", 150.1, 150.0, 149.9, False),
        # restrictive CM: DT < 140 ms, E/A > 2.5, IVRT < 50 ms, average E/e′ > 14
        (
            S.restrictive_cardiomyopathy,
            "ase16.rcm.rcm_deceleration_time",
            "deceleration_time",
            139.9,
            140.0,
            140.1,
            False,
        ),
        (
            S.restrictive_cardiomyopathy,
            "ase16.rcm.rcm_e_a_ratio",
            "e_a_ratio",
            2.51,
            2.5,
            2.49,
            False,
        ),
        (S.restrictive_cardiomyopathy, "ase16.rcm.rcm_ivrt", "ivrt", 49.9, 50.0, 50.1, False),
        (
            S.restrictive_cardiomyopathy,
            "ase16.rcm.rcm_e_e_prime_average",
            "e_e_prime_average",
            14.1,
            14.0,
            13.9,
            False,
        ),
    ],
)
def test_2016_flag_boundaries(situation, cid, name, met, at, not_met, at_is_met):
    for value, verdict in (
        (met, Verdict.met),
        (at, Verdict.met if at_is_met else Verdict.not_met),
        (not_met, Verdict.not_met),
    ):
        a = run(Guideline.ase_eacvi_2016, situation, lvef=60, **{name: value})
        assert criterion(a, cid).verdict is verdict
        # no combination rule stated: criteria reported, pressure not estimated
        assert a.filling_pressure is INDET
        assert a.pathway is Pathway.special_situation


def test_2016_flags_without_values_are_unknown():
    a = run(Guideline.ase_eacvi_2016, S.mitral_stenosis)
    assert a.filling_pressure is UNKNOWN
    assert all(c.verdict is Verdict.unavailable for c in a.criteria)
    assert any("IVRT/T(E-e′) < 4.2" in n for n in a.notes)  # criterion the service cannot read


def test_2016_mr_e_e_prime_only_with_depressed_lvef():
    a = run(Guideline.ase_eacvi_2016, S.mitral_regurgitation, lvef=35, e_e_prime_average=16)
    assert criterion(a, "ase16.mr.mr_e_e_prime_average").verdict is Verdict.met
    a = run(Guideline.ase_eacvi_2016, S.mitral_regurgitation, lvef=60, e_e_prime_average=16)
    assert "ase16.mr.mr_e_e_prime_average" not in {c.id for c in a.criteria}
    assert any("only with depressed" in n for n in a.notes)


HCM_TWO_MET = {"e_e_prime_average": 15, "ar_a_duration": 35}


@pytest.mark.parametrize(
    ("values", "expected"),
    [
        # I-16-12: majority of available criteria (E/e′ > 14, Ar-A ≥ 30, TR > 2.8, LAVI > 34)
        (
            {"e_e_prime_average": 15, "ar_a_duration": 35, "tr_peak_velocity": 2.5, "lavi": 30},
            INDET,
        ),
        (
            {"e_e_prime_average": 15, "ar_a_duration": 35, "tr_peak_velocity": 3.0, "lavi": 30},
            ELEVATED,
        ),
        (
            {"e_e_prime_average": 15, "ar_a_duration": 20, "tr_peak_velocity": 2.5, "lavi": 30},
            NORMAL,
        ),
        ({"e_e_prime_average": 14.0, "ar_a_duration": 30.0}, INDET),  # > 14 strict, ≥ 30 inclusive
        ({"tr_peak_velocity": 2.8, "lavi": 34.0}, NORMAL),  # both strict: not met at the cut-off
        ({"tr_peak_velocity": 2.81}, ELEVATED),
        ({}, UNKNOWN),
    ],
)
def test_2016_hcm_majority(values, expected):
    a = run(Guideline.ase_eacvi_2016, S.hypertrophic_cardiomyopathy, **values)
    assert a.filling_pressure is expected
    assert a.grade is Grade.not_applicable


@pytest.mark.parametrize(
    ("lateral", "expected"),
    [
        # lateral E/e′ > 13 cardiac cause (raised LAP); < 8 non-cardiac; 8-13 indeterminate
        # (I-16-13)
        (13.01, ELEVATED),
        (13.0, INDET),
        (8.0, INDET),
        (7.99, NORMAL),
        (None, UNKNOWN),
    ],
)
@pytest.mark.parametrize("guideline", [Guideline.ase_eacvi_2016, Guideline.ase_2025])
def test_pulmonary_hypertension_lateral_e_e_prime(guideline, lateral, expected):
    a = run(guideline, S.pulmonary_hypertension_non_cardiac, e_e_prime_lateral=lateral)
    assert a.filling_pressure is expected
    assert a.pathway is Pathway.special_situation


# ---------------------------------------------------------------------------------------------
# ASE 2025 MAC rule (Nagueh 2025 JASE 38(7), special populations; Abudiab 2017)
# ---------------------------------------------------------------------------------------------


def test_2025_mac_rows():
    assert (T25.MAC_E_A_LOW.comparison, T25.MAC_E_A_LOW.value) == (Comparison.lt, 0.8)
    assert (T25.MAC_E_A_HIGH.comparison, T25.MAC_E_A_HIGH.value) == (Comparison.gt, 1.8)
    assert (T25.MAC_IVRT.comparison, T25.MAC_IVRT.value) == (Comparison.lt, 80.0)
    for row in (T25.MAC_E_A_LOW, T25.MAC_E_A_HIGH, T25.MAC_IVRT):
        assert "Abudiab" in row.citation


@pytest.mark.parametrize(
    ("e_a", "ivrt", "expected"),
    [
        # E/A < 0.8 -> normal LAP; E/A > 1.8 -> elevated; 0.8-1.8 -> IVRT < 80 elevated
        (0.79, 60.0, NORMAL),
        (0.8, 90.0, NORMAL),
        (0.8, 79.9, ELEVATED),
        (1.8, 80.0, NORMAL),
        (1.8, 79.9, ELEVATED),
        (1.81, 90.0, ELEVATED),
        (1.2, None, INDET),
        (None, 60.0, INDET),
    ],
)
def test_2025_mac_rule(e_a, ivrt, expected):
    a = run(Guideline.ase_2025, S.mitral_annular_calcification, e_a_ratio=e_a, ivrt=ivrt)
    assert a.filling_pressure is expected
    assert a.grade is Grade.not_applicable
    assert a.pathway is Pathway.special_situation


# ---------------------------------------------------------------------------------------------
# Combinations
# ---------------------------------------------------------------------------------------------


def test_any_situation_without_criteria_makes_the_whole_result_not_applicable():
    a = run(
        Guideline.ase_eacvi_2016,
        S.mitral_stenosis,
        S.heart_transplant,
        **ABNORMAL,
    )
    assert a.pathway is Pathway.not_applicable
    assert "heart transplant" in a.pathway_reason and "mitral stenosis" in a.pathway_reason


def test_two_situations_with_rules_disagreeing_is_indeterminate():
    a = run(
        Guideline.ase_eacvi_2016,
        S.hypertrophic_cardiomyopathy,
        S.pulmonary_hypertension_non_cardiac,
        e_e_prime_average=16,
        ar_a_duration=40,
        e_e_prime_lateral=7,
    )
    assert a.filling_pressure is INDET
    assert any("disagree" in r for r in a.reasoning)
    b = run(
        Guideline.ase_eacvi_2016,
        S.hypertrophic_cardiomyopathy,
        S.pulmonary_hypertension_non_cardiac,
        e_e_prime_average=16,
        ar_a_duration=40,
        e_e_prime_lateral=15,
    )
    assert b.filling_pressure is ELEVATED


def test_a_situation_rule_without_data_neither_decides_nor_disagrees():
    # hypertrophic cardiomyopathy with none of its criteria, pulmonary hypertension with
    # lateral E/e′ > 13 (Nagueh 2016 §V, from memory: a left-heart cause, raised pressure):
    # the second rule decides alone
    a = run(
        Guideline.ase_eacvi_2016,
        S.hypertrophic_cardiomyopathy,
        S.pulmonary_hypertension_non_cardiac,
        e_e_prime_lateral=15,
    )
    assert a.filling_pressure is ELEVATED
    assert not any("disagree" in r for r in a.reasoning)
    # hypertrophic cardiomyopathy without data, mitral regurgitation with its criteria (listed
    # without a combining rule): indeterminate by reading I-16-15, not "not estimated"
    b = run(
        Guideline.ase_eacvi_2016,
        S.hypertrophic_cardiomyopathy,
        S.mitral_regurgitation,
        ivrt=50,
        lvef=60,
    )
    assert b.filling_pressure is INDET
    assert "I-16-15" in {r.id for r in b.readings}


def test_special_situation_takes_precedence_over_af():
    # reference §1.4: special-population routing first; AF is noted
    c = ctx(S.pulmonary_hypertension_non_cardiac, rhythm=Rhythm.af, rhythm_source="run setting")
    a = run(Guideline.ase_2025, context=c, e_e_prime_lateral=15)
    assert a.pathway is Pathway.special_situation
    assert any("Atrial fibrillation is also present (run setting)" in r for r in a.reasoning)


def test_special_situation_borderline():
    # lateral E/e′ 12.5 is within 10 % of > 13: the flip changes the filling pressure
    c = ctx(S.pulmonary_hypertension_non_cardiac, borderline_fraction=0.10)
    a = run(Guideline.ase_eacvi_2016, context=c, e_e_prime_lateral=12.5)
    assert a.filling_pressure is INDET
    [flag] = a.borderline
    assert flag.measure is Measure.e_e_prime_lateral
    assert flag.alternative_filling_pressure is ELEVATED

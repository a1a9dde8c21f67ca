"""ASE 2025 general sinus-rhythm algorithm against the published rule.

Source of every rule: Nagueh SF et al., J Am Soc Echocardiogr 2025;38(7),
doi 10.1016/j.echo.2025.03.011 ("Nagueh 2025 JASE 38(7)"), Figure 3.  The cut-offs come from the
project's reference notes (secondary sources and the project brief; none was read in the paper
itself, see docs/guideline-verification.md section 3).  I-25-x names a documented reading where
the published rule is ambiguous.  All measurement values are invented.
"""

from __future__ import annotations

import pytest
from grading_builders import measurements, sinus

from service.errors import UserError
from service.grading import IMPLEMENTED_GUIDELINES, RuleSwitches, assess
from service.grading import thresholds_ase2025 as T
from service.grading.ase2025 import Ase2025Options
from service.model import (
    CANONICAL_UNITS,
    CAUTION,
    Comparison,
    Context,
    FillingPressure,
    Grade,
    Guideline,
    Measure,
    Pathway,
    Verdict,
)


def run(ctx: Context | None = None, options: Ase2025Options | None = None, **values):
    switches = RuleSwitches(ase2025=options) if options else None
    return assess(measurements(**values), ctx or sinus(), Guideline.ase_2025, switches)


def result(ctx: Context | None = None, options: Ase2025Options | None = None, **values):
    a = run(ctx, options, **values)
    return a.grade, a.filling_pressure


def criterion(a, criterion_id: str):
    matches = [c for c in a.criteria if c.id == criterion_id]
    assert len(matches) == 1, [c.id for c in a.criteria]
    return matches[0]


NORMAL = (Grade.normal, FillingPressure.normal)
G1 = (Grade.grade_1, FillingPressure.normal)
G2 = (Grade.grade_2, FillingPressure.elevated)
G3 = (Grade.grade_3, FillingPressure.elevated)
INDET = (Grade.indeterminate, FillingPressure.indeterminate)
NOT_GRADABLE = (Grade.not_gradable, FillingPressure.not_estimated)
# I-25-7 / I-25-8: LAP known, grade not assignable
NORMAL_LAP_NO_GRADE = (Grade.indeterminate, FillingPressure.normal)
RAISED_LAP_2_OR_3 = (Grade.indeterminate, FillingPressure.elevated)

# Step-1 index values clearly on one side (Fig 3)
E_NORMAL = {"e_prime_average": 9.0}
E_REDUCED = {"e_prime_average": 5.0}
R_NORMAL = {"e_e_prime_average": 9.0}
R_RAISED = {"e_e_prime_average": 17.0}
T_NORMAL = {"tr_peak_velocity": 2.3}
T_RAISED = {"tr_peak_velocity": 3.2}
MID_E_A = {"e_a_ratio": 1.2}
HIGH_E_A = {"e_a_ratio": 2.4}
LOW_E_A = {"e_a_ratio": 0.7}


# ---------------------------------------------------------------------------------------------
# The threshold table
# ---------------------------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("row", "measure", "comparison", "value"),
    [
        # Nagueh 2025 JASE 38(7), Fig 3: e′ septal ≤ 6, lateral ≤ 7, average ≤ 6.5 cm/s
        (T.E_PRIME_SEPTAL, Measure.e_prime_septal, Comparison.le, 6.0),
        (T.E_PRIME_LATERAL, Measure.e_prime_lateral, Comparison.le, 7.0),
        (T.E_PRIME_AVERAGE, Measure.e_prime_average, Comparison.le, 6.5),
        # Fig 3: E/e′ average ≥ 14, septal ≥ 15, lateral ≥ 13 (inclusive, unlike 2016)
        (T.E_E_PRIME_AVERAGE, Measure.e_e_prime_average, Comparison.ge, 14.0),
        (T.E_E_PRIME_SEPTAL, Measure.e_e_prime_septal, Comparison.ge, 15.0),
        (T.E_E_PRIME_LATERAL, Measure.e_e_prime_lateral, Comparison.ge, 13.0),
        # Fig 3: TR ≥ 2.8 m/s or PASP ≥ 35 mmHg
        (T.TR_VELOCITY, Measure.tr_peak_velocity, Comparison.ge, 2.8),
        (T.PASP, Measure.pasp, Comparison.ge, 35.0),
        # Fig 3 step 2: LARS ≤ 18 %, PV S/D ≤ 0.67, LAVI > 34 mL/m2, IVRT ≤ 70 ms
        (T.LA_RESERVOIR_STRAIN, Measure.la_reservoir_strain, Comparison.le, 18.0),
        (T.PV_S_D, Measure.pv_s_d_ratio, Comparison.le, 0.67),
        (T.LAVI, Measure.lavi, Comparison.gt, 34.0),
        (T.IVRT, Measure.ivrt, Comparison.le, 70.0),
        # Fig 3 grading: raised LAP with E/A ≥ 2 is grade 3
        (T.E_A_HIGH, Measure.e_a_ratio, Comparison.ge, 2.0),
        # AF algorithm (I-25-11 signs): E ≥ 100, septal E/e′ > 11, TR > 2.8 or PASP > 35,
        # DT ≤ 160; step 2 LARS < 18 %, PV S/D < 1, BMI > 30
        (T.AF_MITRAL_E, Measure.mitral_e, Comparison.ge, 100.0),
        (T.AF_E_E_PRIME_SEPTAL, Measure.e_e_prime_septal, Comparison.gt, 11.0),
        (T.AF_TR_VELOCITY, Measure.tr_peak_velocity, Comparison.gt, 2.8),
        (T.AF_PASP, Measure.pasp, Comparison.gt, 35.0),
        (T.AF_DECELERATION_TIME, Measure.deceleration_time, Comparison.le, 160.0),
        (T.AF_LA_RESERVOIR_STRAIN, Measure.la_reservoir_strain, Comparison.lt, 18.0),
        (T.AF_PV_S_D, Measure.pv_s_d_ratio, Comparison.lt, 1.0),
        (T.AF_BMI, Measure.bmi, Comparison.gt, 30.0),
    ],
)
def test_threshold_table_rows(row, measure, comparison, value):
    assert (row.measure, row.comparison, row.value) == (measure, comparison, value)
    assert row.citation.startswith(T.PAPER + ", ")  # author, journal, year, issue, doi
    assert "I-25" not in row.citation  # readings are identified apart, never in prose
    assert row.evidence in {"R", "V", "brief+V", "brief+R"}
    assert row in T.TABLE


def test_threshold_table_has_no_duplicate_keys():
    keys = [row.key for row in T.TABLE]
    assert len(keys) == len(set(keys))


# ---------------------------------------------------------------------------------------------
# Step 1 boundaries.  Each index is tested with the other two fixed so that the tested one
# decides between two concordant patterns (Fig 3).
# ---------------------------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("name", "abnormal", "at", "normal"),
    [
        # Fig 3: average e′ ≤ 6.5 cm/s (inclusive)
        ("e_prime_average", 6.49, 6.5, 6.51),
        # single site when the average is unavailable (I-25-1): septal ≤ 6, lateral ≤ 7
        ("e_prime_septal", 5.99, 6.0, 6.01),
        ("e_prime_lateral", 6.99, 7.0, 7.01),
    ],
)
def test_e_prime_boundaries(name, abnormal, at, normal):
    # E/e′ and TR normal: reduced e′ -> grade 1 (normal LAP), normal e′ -> normal function
    base = {**R_NORMAL, **T_NORMAL, **MID_E_A}
    assert result(**base, **{name: abnormal}) == G1
    assert result(**base, **{name: at}) == G1
    assert result(**base, **{name: normal}) == NORMAL
    a = run(**base, **{name: at})
    assert criterion(a, f"ase25.s1.{name}").verdict is Verdict.met


@pytest.mark.parametrize(
    ("name", "normal", "at", "raised"),
    [
        # Fig 3: average E/e′ ≥ 14 (inclusive; 2016 had > 14)
        ("e_e_prime_average", 13.99, 14.0, 14.01),
        # single site when the average is unavailable (I-25-2): septal ≥ 15, lateral ≥ 13
        ("e_e_prime_septal", 14.99, 15.0, 15.01),
        ("e_e_prime_lateral", 12.99, 13.0, 13.01),
        # Fig 3: TR ≥ 2.8 m/s, PASP ≥ 35 mmHg (inclusive)
        ("tr_peak_velocity", 2.79, 2.8, 2.81),
        ("pasp", 34.99, 35.0, 35.01),
    ],
)
def test_pressure_index_boundaries(name, normal, at, raised):
    # e′ reduced and the other pressure index raised: this index decides between
    # "all three abnormal" (raised LAP, grade 2 with E/A 1.2) and a discordant pattern that
    # step 2 resolves as normal LAP (LAVI 25) -> grade 1
    other = T_RAISED if name.startswith("e_e_prime") else R_RAISED
    base = {**E_REDUCED, **other, **MID_E_A, "lavi": 25.0}
    assert result(**base, **{name: normal}) == G1
    assert result(**base, **{name: at}) == G2
    assert result(**base, **{name: raised}) == G2


def test_average_preferred_over_sites_by_default():
    # I-25-1: with the average present, the site values are not used (average 7 is normal even
    # though septal 5.5 would be reduced)
    a = run(e_prime_average=7.0, e_prime_septal=5.5, e_prime_lateral=8.5, **R_NORMAL, **T_NORMAL)
    assert (a.grade, a.filling_pressure) == NORMAL
    ids = {c.id for c in a.criteria}
    assert "ase25.s1.e_prime_average" in ids and "ase25.s1.e_prime_septal" not in ids


def test_any_site_switch():
    # I-25-1 alternative reading: any of average / septal / lateral reduced counts
    opts = Ase2025Options(e_prime_sites="any-site", e_e_prime_sites="any-site")
    vals = {"e_prime_average": 7.0, "e_prime_septal": 5.5, **R_NORMAL, **T_NORMAL}
    assert result(options=opts, **vals) == G1
    # I-25-2 alternative: septal E/e′ 15 raised although the average 13 is not
    vals = {**E_REDUCED, "e_e_prime_average": 13.0, "e_e_prime_septal": 15.0, **T_RAISED}
    assert result(**vals, **MID_E_A, lavi=25) == G1  # default: average decides -> discordant
    assert result(options=opts, **vals, **MID_E_A) == G2  # any site: all three abnormal


def test_both_sites_without_average_either_counts():
    # I-25-1 fallback: septal 6.5 (normal) and lateral 6.8 (reduced) -> reduced
    a = run(e_prime_septal=6.5, e_prime_lateral=6.8, **R_NORMAL, **T_NORMAL)
    assert (a.grade, a.filling_pressure) == G1
    assert any("either site counts" in n for n in a.notes)
    assert "I-25-1" in [r.id for r in a.readings]


@pytest.mark.parametrize(
    ("tr", "pasp", "rule", "verdict"),
    [
        # I-25-3: TR and PASP disagree -> either abnormal counts (default)
        (2.5, 40.0, "either", Verdict.met),
        (3.0, 30.0, "either", Verdict.met),
        (2.5, 30.0, "either", Verdict.not_met),
        (None, 35.0, "either", Verdict.met),
        # I-25-3 alternative: TR preferred when present
        (2.5, 40.0, "tr-preferred", Verdict.not_met),
        (None, 40.0, "tr-preferred", Verdict.met),
    ],
)
def test_tr_or_pasp(tr, pasp, rule, verdict):
    opts = Ase2025Options(tr_or_pasp=rule)
    a = run(
        options=opts, **E_REDUCED, **R_RAISED, tr_peak_velocity=tr, pasp=pasp, lavi=25, **MID_E_A
    )
    expected = G2 if verdict is Verdict.met else G1  # all abnormal vs discordant -> step 2
    assert (a.grade, a.filling_pressure) == expected


# ---------------------------------------------------------------------------------------------
# Step 1 patterns (Fig 3; I-25-4)
# ---------------------------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("e", "r", "t", "step2", "expected"),
    [
        # concordant: all normal -> normal LAP, normal e′ -> normal function
        (E_NORMAL, R_NORMAL, T_NORMAL, {"lavi": 40}, NORMAL),
        # concordant: reduced e′, E/e′ and TR normal -> normal LAP, grade 1
        (E_REDUCED, R_NORMAL, T_NORMAL, {"lavi": 40}, G1),
        # concordant: all abnormal -> raised LAP (E/A 1.2: grade 2)
        (E_REDUCED, R_RAISED, T_RAISED, {"lavi": 25}, G2),
        # discordant patterns -> step 2 (I-25-4), here LAVI decides
        (E_REDUCED, R_RAISED, T_NORMAL, {"lavi": 40}, G2),
        (E_REDUCED, R_RAISED, T_NORMAL, {"lavi": 25}, G1),
        (E_NORMAL, R_RAISED, T_RAISED, {"lavi": 40}, G2),
        (E_NORMAL, R_RAISED, T_RAISED, {"lavi": 25}, NORMAL),
        (E_NORMAL, R_RAISED, T_NORMAL, {"lavi": 25}, NORMAL),
        (E_NORMAL, R_NORMAL, T_RAISED, {"lavi": 40}, G2),
        (E_REDUCED, R_NORMAL, T_RAISED, {"lavi": 40}, G2),
    ],
)
def test_step_1_patterns(e, r, t, step2, expected):
    assert result(**e, **r, **t, **step2, **MID_E_A) == expected


def test_concordant_step_1_ignores_step_2():
    # Fig 3: concordant step 1 decides; supplementary markers are not consulted
    a = run(**E_NORMAL, **R_NORMAL, **T_NORMAL, lavi=50, la_reservoir_strain=10)
    assert (a.grade, a.filling_pressure) == NORMAL
    assert not any(c.step == "step 2" for c in a.criteria)


def test_incomplete_step_1_goes_to_step_2():
    # I-25-6: TR and PASP missing -> step 2 even when e′ and E/e′ agree
    a = run(**E_NORMAL, **R_NORMAL, lavi=40, **MID_E_A)
    assert (a.grade, a.filling_pressure) == G2
    assert any("incomplete" in r for r in a.reasoning)
    assert "I-25-6" in [r.id for r in a.readings]
    assert any("TR velocity/PASP" in n for n in a.notes)


def test_incomplete_step_1_switch_accepts_concordant_available():
    # I-25-6 alternative: two concordant available indices decide
    opts = Ase2025Options(incomplete_step_1="accept-concordant-available")
    assert result(options=opts, **E_NORMAL, **R_NORMAL, lavi=40, **MID_E_A) == NORMAL
    assert result(options=opts, **E_REDUCED, **R_NORMAL, lavi=40, **MID_E_A) == G1
    assert result(options=opts, **E_REDUCED, **T_RAISED, lavi=25, **MID_E_A) == G2
    # discordant available indices still go to step 2
    assert result(options=opts, **E_NORMAL, **T_RAISED, lavi=25, **MID_E_A) == NORMAL
    # only one available index: step 2
    assert result(options=opts, **E_NORMAL, lavi=40, **MID_E_A) == G2


@pytest.mark.parametrize("e_a", [0.8, 0.81, None])
def test_reduced_e_prime_alone_is_grade_1_whatever_e_a(e_a):
    # reference I-25-4: reduced e′ with normal E/e′ and TR -> normal LAP, grade 1; step 2 is
    # not consulted (LAVI 40 would count as raised there)
    vals = {**E_REDUCED, **R_NORMAL, **T_NORMAL, "lavi": 40, "e_a_ratio": e_a}
    assert result(**vals) == G1


# ---------------------------------------------------------------------------------------------
# Step 2 (Fig 3; I-25-5)
# ---------------------------------------------------------------------------------------------

DISCORDANT = {**E_NORMAL, **R_RAISED, **T_NORMAL, **MID_E_A}


@pytest.mark.parametrize(
    ("name", "abnormal", "at", "normal", "at_is_abnormal"),
    [
        # Fig 3 step 2: LARS ≤ 18 %, PV S/D ≤ 0.67, IVRT ≤ 70 ms (inclusive); LAVI > 34 (strict)
        ("la_reservoir_strain", 17.99, 18.0, 18.01, True),
        ("pv_s_d_ratio", 0.66, 0.67, 0.68, True),
        ("lavi", 34.01, 34.0, 33.99, False),
        ("ivrt", 69.99, 70.0, 70.01, True),
    ],
)
def test_step_2_boundaries(name, abnormal, at, normal, at_is_abnormal):
    # one marker alone decides (any one abnormal -> raised LAP; none -> normal LAP)
    assert result(**DISCORDANT, **{name: abnormal}) == G2
    assert result(**DISCORDANT, **{name: at}) == (G2 if at_is_abnormal else NORMAL)
    assert result(**DISCORDANT, **{name: normal}) == NORMAL


@pytest.mark.parametrize(
    ("markers", "rule", "expected"),
    [
        # I-25-5 default: any available marker abnormal -> raised; all normal -> normal
        ({"la_reservoir_strain": 15, "lavi": 25, "pv_s_d_ratio": 1.2}, "any", G2),
        ({"la_reservoir_strain": 30, "lavi": 25, "pv_s_d_ratio": 1.2}, "any", NORMAL),
        # I-25-5 alternative: majority of available markers
        ({"la_reservoir_strain": 15, "lavi": 25, "pv_s_d_ratio": 1.2}, "majority", NORMAL),
        ({"la_reservoir_strain": 15, "lavi": 40, "pv_s_d_ratio": 1.2}, "majority", G2),
        ({"la_reservoir_strain": 15, "lavi": 25}, "majority", INDET),
        # I-25-5 alternative: hierarchy LARS, PV S/D, LAVI, IVRT (first available decides)
        ({"la_reservoir_strain": 30, "lavi": 40}, "hierarchy", NORMAL),
        ({"pv_s_d_ratio": 0.5, "lavi": 25}, "hierarchy", G2),
        ({"ivrt": 60}, "hierarchy", G2),
    ],
)
def test_step_2_combination_switch(markers, rule, expected):
    opts = Ase2025Options(supplementary=rule)
    assert result(options=opts, **DISCORDANT, **markers) == expected


def test_ivrt_is_an_equal_supplementary_marker():
    # reference §3.2 / I-25-5: IVRT ≤ 70 ms counts like LA strain, PV S/D and LAVI
    assert result(**DISCORDANT, ivrt=60, lavi=25) == G2
    assert result(**DISCORDANT, ivrt=60) == G2


def test_step_2_without_markers_is_indeterminate():
    # reference §3.1 item 7: indeterminate still exists when supplementary markers are missing
    a = run(**DISCORDANT)
    assert (a.grade, a.filling_pressure) == INDET
    assert any("exercise" in n for n in a.notes)


def test_nothing_available_is_not_gradable():
    assert result(**MID_E_A) == NOT_GRADABLE
    assert result() == NOT_GRADABLE


# ---------------------------------------------------------------------------------------------
# Grading (Fig 3): raised LAP -> grade 3 with E/A ≥ 2, else grade 2; I-25-7, I-25-8
# ---------------------------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("e_a", "expected"),
    [(1.99, G2), (2.0, G3), (2.01, G3), (None, RAISED_LAP_2_OR_3)],
)
def test_raised_lap_grade_by_e_a(e_a, expected):
    a = run(**E_REDUCED, **R_RAISED, **T_RAISED, e_a_ratio=e_a)
    assert (a.grade, a.filling_pressure) == expected
    if e_a is None:
        assert any("grade II or III" in r for r in a.reasoning)
        assert "I-25-8" in [r.id for r in a.readings]


def test_normal_lap_without_e_prime_has_no_grade():
    # I-25-7: normal LAP with e′ unknown -> grade not assignable (step 2 normal here)
    a = run(**R_NORMAL, **T_NORMAL, lavi=25)
    assert (a.grade, a.filling_pressure) == NORMAL_LAP_NO_GRADE
    assert "I-25-7" in [r.id for r in a.readings]
    assert not any("I-25" in r for r in a.reasoning)


def test_raised_lap_with_normal_e_prime_warns():
    # I-25-7: raised LAP with normal e′ -> E/A-based grade plus a warning
    a = run(**E_NORMAL, **R_RAISED, **T_RAISED, lavi=40, **MID_E_A)
    assert (a.grade, a.filling_pressure) == G2
    assert any("constriction" in n for n in a.notes)


def test_differs_from_2016_at_inclusive_cut_offs():
    # Nagueh 2025 Fig 3 uses E/e′ ≥ 14 and TR ≥ 2.8 where Nagueh 2016 Fig 8A used > 14 / > 2.8
    vals = {**E_REDUCED, "e_e_prime_average": 14.0, "tr_peak_velocity": 2.8, **MID_E_A}
    assert result(**vals) == G2
    a16 = assess(measurements(lvef=60, e_prime_septal=5, **vals), sinus())
    assert criterion(a16, "ase16.a.e_e_prime_average").verdict is Verdict.not_met


# ---------------------------------------------------------------------------------------------
# Routing, result shape, dispatch
# ---------------------------------------------------------------------------------------------


def test_any_lvef_uses_the_general_algorithm():
    # Fig 3 applies at any LVEF: LVEF is not a criterion
    for lvef in (25.0, 60.0, None):
        a = run(lvef=lvef, **E_REDUCED, **R_NORMAL, **T_NORMAL)
        assert a.pathway is Pathway.sinus_general
        assert (a.grade, a.filling_pressure) == G1
        assert all(c.measure is not Measure.lvef for c in a.criteria)


def test_unknown_rhythm_with_a_wave_present_is_graded_with_note():
    a = run(Context(borderline_fraction=0.0), **E_NORMAL, **R_NORMAL, **T_NORMAL, mitral_e=70)
    assert a.pathway is Pathway.not_applicable  # E without A, rhythm unknown: issue contract
    a = run(
        Context(borderline_fraction=0.0),
        **E_NORMAL,
        **R_NORMAL,
        **T_NORMAL,
        mitral_e=70,
        mitral_a=60,
    )
    assert a.pathway is Pathway.sinus_general
    assert any("sinus rhythm was assumed" in n for n in a.context_notes)


def test_missing_a_wave_in_stated_sinus_rhythm_is_graded():
    a = run(**E_REDUCED, **R_RAISED, **T_RAISED, mitral_e=90)
    assert (a.grade, a.filling_pressure) == RAISED_LAP_2_OR_3
    assert any("A wave is missing" in n for n in a.notes)


def test_assessment_fields_and_trace():
    a = run(**E_REDUCED, **R_RAISED, **T_RAISED, **MID_E_A)
    assert a.guideline is Guideline.ase_2025
    assert "J Am Soc Echocardiogr 2025;38(7)" in a.guideline_citation
    assert "10.1016/j.echo.2025.03.011" in a.guideline_citation
    assert a.rule_set_version == "ase-2025/1"
    assert a.caution == CAUTION
    for c in a.criteria:
        assert c.id.startswith("ase25.")
        assert c.source.startswith(T.PAPER)
        assert c.unit == CANONICAL_UNITS[c.measure]


def test_dispatch():
    assert Guideline.ase_2025 in IMPLEMENTED_GUIDELINES
    assert assess(measurements(**E_NORMAL), sinus(), "ase-2025").guideline is Guideline.ase_2025


def test_bse_2024_refused_with_reason():
    # docs/guideline-verification.md: no BSE 2024 decision rule could be verified in the
    # published text, so the rule set must not be selectable
    assert Guideline.bse_2024 not in IMPLEMENTED_GUIDELINES
    for g in (Guideline.bse_2024, "bse-2024"):
        with pytest.raises(UserError, match="could not be checked against the published figures"):
            assess(measurements(**E_NORMAL), sinus(), g)


def test_options_reject_unknown_values():
    with pytest.raises(ValueError):
        Ase2025Options(supplementary="vote")
    with pytest.raises(ValueError):
        Ase2025Options(no_such_switch=True)


# ---------------------------------------------------------------------------------------------
# Borderline (issue section 5): same check as 2016
# ---------------------------------------------------------------------------------------------


def test_borderline_flag_on_inclusive_cut_off():
    # average E/e′ 13.5 (not ≥ 14) with reduced e′ and raised TR: discordant, step 2 normal ->
    # grade 1; at 14 all three abnormal -> grade 2
    a = run(
        sinus(borderline_fraction=0.10),
        **E_REDUCED,
        e_e_prime_average=13.5,
        **T_RAISED,
        lavi=25,
        **MID_E_A,
    )
    assert (a.grade, a.filling_pressure) == G1
    flagged = {f.measure: f for f in a.borderline}
    assert flagged[Measure.e_e_prime_average].alternative_grade is Grade.grade_2
    assert flagged[Measure.e_e_prime_average].threshold == 14.0
    assert "within 10 %" in flagged[Measure.e_e_prime_average].text


def test_no_borderline_when_flip_changes_nothing_or_disabled():
    vals = {**E_NORMAL, **R_NORMAL, "tr_peak_velocity": 2.7, "lavi": 25, **MID_E_A}
    # TR 2.7 near 2.8: at 2.8 the pattern is discordant, step 2 LAVI 25 -> still normal
    assert not run(sinus(borderline_fraction=0.10), **vals).is_borderline
    vals["lavi"] = 40
    assert run(sinus(borderline_fraction=0.10), **vals).is_borderline
    assert not run(sinus(borderline_fraction=0.0), **vals).is_borderline

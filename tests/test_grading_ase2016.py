"""ASE/EACVI 2016 grading engine against the paper's rules.

Source of every rule: Nagueh SF et al., J Am Soc Echocardiogr 2016;29:277-314 ("Nagueh 2016 JASE
29:277"), Figure 8A (normal LVEF) and Figure 8B (reduced LVEF or myocardial disease).  The
cut-offs are recalled from the paper ("from memory") and confirmed by secondary sources listed in
the project's reference notes; I-16-x names a documented interpretation where the paper is silent.
All measurement values are invented.
"""

from __future__ import annotations

import math
import subprocess
import sys

import pytest
from grading_builders import measurements, sinus

from service.errors import UserError
from service.grading import IMPLEMENTED_GUIDELINES, assess
from service.grading import thresholds_ase2016 as T
from service.grading.criteria import value_across
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
    Rhythm,
    SpecialSituation,
    Verdict,
)
from service.wording import headline


def grade_of(ctx: Context | None = None, **values: float | None) -> tuple[Grade, FillingPressure]:
    a = assess(measurements(**values), ctx or sinus())
    return a.grade, a.filling_pressure


def criterion(assessment, criterion_id: str):
    matches = [c for c in assessment.criteria if c.id == criterion_id]
    assert len(matches) == 1, [c.id for c in assessment.criteria]
    return matches[0]


G1 = (Grade.grade_1, FillingPressure.normal)
G2 = (Grade.grade_2, FillingPressure.elevated)
G3 = (Grade.grade_3, FillingPressure.elevated)
NORMAL = (Grade.normal, FillingPressure.normal)
INDET = (Grade.indeterminate, FillingPressure.indeterminate)
NOT_APPLICABLE = (Grade.not_applicable, FillingPressure.not_estimated)
NOT_GRADABLE = (Grade.not_gradable, FillingPressure.not_estimated)

# Mitral inflow that gives grade I in Fig 8B step 1 (E/A <= 0.8 and E <= 50), so a dysfunction
# found by Fig 8A shows as grade-1 and "no dysfunction" as normal.
GRADE_1_INFLOW = {"e_a_ratio": 0.7, "mitral_e": 40.0}
# Mitral inflow that goes to Fig 8B step 2 (0.8 < E/A < 2).
MID_INFLOW = {"e_a_ratio": 1.2, "mitral_e": 80.0}


# ---------------------------------------------------------------------------------------------
# The threshold table
# ---------------------------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("row", "measure", "comparison", "value"),
    [
        # Nagueh 2016 JASE 29:277, Fig 8A: average E/e' > 14
        (T.E_E_PRIME_AVERAGE, Measure.e_e_prime_average, Comparison.gt, 14.0),
        # Nagueh 2016 JASE 29:277, single-site E/e': septal > 15, lateral > 13 (I-16-3)
        (T.E_E_PRIME_SEPTAL, Measure.e_e_prime_septal, Comparison.gt, 15.0),
        (T.E_E_PRIME_LATERAL, Measure.e_e_prime_lateral, Comparison.gt, 13.0),
        # Nagueh 2016 JASE 29:277, Fig 8A: septal e' < 7 or lateral e' < 10 cm/s
        (T.E_PRIME_SEPTAL, Measure.e_prime_septal, Comparison.lt, 7.0),
        (T.E_PRIME_LATERAL, Measure.e_prime_lateral, Comparison.lt, 10.0),
        # Nagueh 2016 JASE 29:277, Fig 8A/8B: TR velocity > 2.8 m/s, LAVI > 34 mL/m2
        (T.TR_VELOCITY, Measure.tr_peak_velocity, Comparison.gt, 2.8),
        (T.LAVI, Measure.lavi, Comparison.gt, 34.0),
        # Nagueh 2016 JASE 29:277, Fig 8B: E/A <= 0.8 and E <= 50 cm/s; E/A >= 2
        (T.E_A_LOW, Measure.e_a_ratio, Comparison.le, 0.8),
        (T.E_LOW, Measure.mitral_e, Comparison.le, 50.0),
        (T.E_A_HIGH, Measure.e_a_ratio, Comparison.ge, 2.0),
        # Nagueh 2016 JASE 29:277, Fig 8B: PV S/D < 1 with depressed LVEF (I-16-6)
        (T.PV_S_D, Measure.pv_s_d_ratio, Comparison.lt, 1.0),
        # Operational LVEF cut-off, not stated in the paper (I-16-10); common practice
        (T.LVEF_REDUCED, Measure.lvef, Comparison.lt, 50.0),
    ],
)
def test_threshold_table_rows(row, measure, comparison, value):
    assert (row.measure, row.comparison, row.value) == (measure, comparison, value)
    assert row.citation.startswith(T.PAPER + ", ")  # author, journal, year, pages
    assert "I-16" not in row.citation  # readings are identified apart, never in prose
    assert row.evidence in {"R", "V", "R+V", "I"}
    assert row in T.TABLE


def test_threshold_table_has_no_duplicate_keys():
    keys = [row.key for row in T.TABLE]
    assert len(keys) == len(set(keys))


def test_af_special_and_valsalva_rows_are_rows_of_the_one_2016_table():
    # One cited table per guideline (common practice): the AF (§V.E), special-situation (§V)
    # and Valsalva rows of Nagueh 2016 JASE 29:277 live in thresholds_ase2016 and the rule
    # modules use those very rows.
    from service.grading import atrial_fibrillation as AF
    from service.grading import special_situations as SS
    from service.grading import valsalva as V

    assert AF.TABLE_2016 == T.AF_TABLE and AF.AF16_IVRT is T.AF16_IVRT
    assert SS.TABLE_2016 == T.SPECIAL_TABLE and SS.HCM_LAVI is T.HCM_LAVI
    # Nagueh 2016 JASE 29:277, mitral inflow with Valsalva: E/A fall >= 50 % (from memory)
    assert T.VALSALVA_E_A_FALL.value == V.E_A_FALL
    assert T.VALSALVA_E_A_FALL.citation == V.SOURCE
    assert (T.VALSALVA_E_A_FALL.comparison, T.VALSALVA_E_A_FALL.value) == (Comparison.ge, 0.5)
    rows = T.ALL_ROWS
    assert len(rows) == len(T.TABLE) + len(T.AF_TABLE) + len(T.SPECIAL_TABLE) + 1
    for row in (*T.AF_TABLE, *T.SPECIAL_TABLE, T.VALSALVA_E_A_FALL):
        assert row.citation.startswith(T.PAPER + ", ")
        # the reference's §2.5 marks every §V cut-off [R] (recalled): the tag must say so
        assert "R" in row.evidence.split("+"), row.key
    for table in (T.AF_TABLE, T.SPECIAL_TABLE):
        keys = [row.key for row in table]
        assert len(keys) == len(set(keys))


# ---------------------------------------------------------------------------------------------
# Algorithm A boundaries: each criterion alone (1 of 1 met = more than half -> dysfunction,
# graded I by the inflow; 0 of 1 -> normal).  Nagueh 2016 JASE 29:277, Fig 8A.
# ---------------------------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("name", "value", "expected"),
    [
        # Fig 8A: average E/e' > 14 (strict)
        ("e_e_prime_average", 13.99, NORMAL),
        ("e_e_prime_average", 14.0, NORMAL),
        ("e_e_prime_average", 14.01, G1),
        # Fig 8A: septal e' < 7 cm/s (strict)
        ("e_prime_septal", 6.99, G1),
        ("e_prime_septal", 7.0, NORMAL),
        ("e_prime_septal", 7.01, NORMAL),
        # Fig 8A: lateral e' < 10 cm/s (strict)
        ("e_prime_lateral", 9.99, G1),
        ("e_prime_lateral", 10.0, NORMAL),
        ("e_prime_lateral", 10.01, NORMAL),
        # Fig 8A: TR velocity > 2.8 m/s (strict)
        ("tr_peak_velocity", 2.79, NORMAL),
        ("tr_peak_velocity", 2.8, NORMAL),
        ("tr_peak_velocity", 2.81, G1),
        # Fig 8A: LAVI > 34 mL/m2 (strict)
        ("lavi", 33.99, NORMAL),
        ("lavi", 34.0, NORMAL),
        ("lavi", 34.01, G1),
        # single-site E/e' when only one e' site: septal > 15, lateral > 13 (I-16-3)
        ("e_e_prime_septal", 14.99, NORMAL),
        ("e_e_prime_septal", 15.0, NORMAL),
        ("e_e_prime_septal", 15.01, G1),
        ("e_e_prime_lateral", 12.99, NORMAL),
        ("e_e_prime_lateral", 13.0, NORMAL),
        ("e_e_prime_lateral", 13.01, G1),
    ],
)
def test_algorithm_a_boundaries(name, value, expected):
    a = assess(measurements(lvef=60, **GRADE_1_INFLOW, **{name: value}), sinus())
    assert a.pathway is Pathway.normal_lvef
    assert (a.grade, a.filling_pressure) == expected
    c = criterion(a, f"ase16.a.{name}")
    assert c.value == value
    assert c.verdict is (Verdict.met if expected == G1 else Verdict.not_met)


# ---------------------------------------------------------------------------------------------
# Algorithm A branch outcomes.  Nagueh 2016 JASE 29:277, Fig 8A: > 50 % of available criteria
# positive = dysfunction; 50 % = indeterminate; < 50 % = normal.
# ---------------------------------------------------------------------------------------------

ALL_ABNORMAL_A = {"e_e_prime_average": 16, "e_prime_septal": 5, "tr_peak_velocity": 3.1, "lavi": 40}
ALL_NORMAL_A = {"e_e_prime_average": 8, "e_prime_septal": 9, "tr_peak_velocity": 2.2, "lavi": 25}
KEYS_A = list(ALL_ABNORMAL_A)


@pytest.mark.parametrize(
    ("n_met", "n_available", "expected"),
    [
        (0, 4, NORMAL),
        (1, 4, NORMAL),
        (2, 4, INDET),  # exactly half -> indeterminate
        (3, 4, G1),  # more than half -> dysfunction, graded by Fig 8B (inflow grade I)
        (4, 4, G1),
        (1, 3, NORMAL),
        (2, 3, G1),
        (3, 3, G1),
        (1, 2, INDET),
        (2, 2, G1),
        (0, 2, NORMAL),
        (1, 1, G1),
        (0, 1, NORMAL),
    ],
)
def test_algorithm_a_counting(n_met, n_available, expected):
    values: dict[str, float] = {}
    for i, key in enumerate(KEYS_A[:n_available]):
        values[key] = ALL_ABNORMAL_A[key] if i < n_met else ALL_NORMAL_A[key]
    a = assess(measurements(lvef=60, **GRADE_1_INFLOW, **values), sinus())
    assert (a.grade, a.filling_pressure) == expected


def test_algorithm_a_no_criterion_is_not_gradable():
    # Fig 8A counts available criteria; none available -> no decision (I-16-1)
    a = assess(measurements(lvef=60, **GRADE_1_INFLOW), sinus())
    assert (a.grade, a.filling_pressure) == NOT_GRADABLE
    assert any("none of the 4 criteria" in r for r in a.reasoning)


def test_algorithm_a_minimum_available_from_context():
    # I-16-1: literal rule by default (1 criterion suffices); a configured minimum is honoured
    values = {"lvef": 60, "lavi": 40, "tr_peak_velocity": 3.0, **GRADE_1_INFLOW}
    assert grade_of(sinus(), **values) == G1
    assert grade_of(sinus(min_criteria_available=2), **values) == G1
    a = assess(measurements(**values), sinus(min_criteria_available=3))
    assert (a.grade, a.filling_pressure) == NOT_GRADABLE
    assert any("at least 3 required" in r for r in a.reasoning)


@pytest.mark.parametrize(
    ("septal", "lateral", "verdict_met"),
    [
        # Fig 8A: "septal e' < 7 OR lateral e' < 10" (I-16-2: either available site)
        (6.0, 12.0, True),
        (8.0, 9.0, True),
        (8.0, 11.0, False),
        (None, 9.0, True),
        (None, 10.0, False),
        (6.5, None, True),
        (7.0, None, False),
    ],
)
def test_e_prime_either_site(septal, lateral, verdict_met):
    a = assess(
        measurements(lvef=60, e_prime_septal=septal, e_prime_lateral=lateral, **GRADE_1_INFLOW),
        sinus(),
    )
    assert (a.grade, a.filling_pressure) == (G1 if verdict_met else NORMAL)
    # both sites always appear in the trace, the missing one as unavailable
    assert criterion(a, "ase16.a.e_prime_septal").verdict is (
        Verdict.unavailable if septal is None else Verdict.met if septal < 7 else Verdict.not_met
    )


def test_average_e_e_prime_preferred_over_single_site():
    # Fig 8A uses average E/e'; single-site cut-offs only when the average is missing (I-16-3)
    a = assess(
        measurements(lvef=60, e_e_prime_average=13, e_e_prime_septal=16, **GRADE_1_INFLOW),
        sinus(),
    )
    assert (a.grade, a.filling_pressure) == NORMAL
    ids = [c.id for c in a.criteria]
    assert "ase16.a.e_e_prime_average" in ids
    assert "ase16.a.e_e_prime_septal" not in ids


def test_both_single_site_ratios_without_average():
    # engine decision: either site over its own cut-off counts, as for e' (I-16-2, I-16-3)
    vals = {"lvef": 60, **GRADE_1_INFLOW}
    assert grade_of(sinus(), e_e_prime_septal=12, e_e_prime_lateral=13.5, **vals) == G1
    assert grade_of(sinus(), e_e_prime_septal=15, e_e_prime_lateral=13, **vals) == NORMAL


def test_chaining_a_to_b_reports_both():
    # Fig 8A: dysfunction with normal LVEF -> grade and LAP by Fig 8B
    a = assess(
        measurements(
            lvef=62,
            e_e_prime_average=15,
            e_prime_septal=6,
            tr_peak_velocity=3.0,
            lavi=30,
            **MID_INFLOW,
        ),
        sinus(),
    )
    assert a.pathway is Pathway.normal_lvef
    assert (a.grade, a.filling_pressure) == G2  # Fig 8B step 2: 2 of 3 met
    assert any(
        r.endswith("diastolic dysfunction present; Algorithm B (Figure 8B) grades it.")
        for r in a.reasoning
    )
    steps = [c.step for c in a.criteria]
    assert steps.index("algorithm A") < steps.index("algorithm B step 1")
    # the criteria Figure 8B step 2 shares with Figure 8A are evaluated once, both steps named
    shared = [c for c in a.criteria if c.step == "algorithm A and algorithm B step 2"]
    assert {c.measure for c in shared} == {
        Measure.e_e_prime_average,
        Measure.tr_peak_velocity,
        Measure.lavi,
    }
    labels = [c.label for c in a.criteria]
    assert len(labels) == len(set(labels))  # each criterion once


def test_chaining_a_to_b_with_e_a_missing_is_indeterminate():
    # Fig 8A dysfunction, Fig 8B cannot start without E/A (I-16-9)
    a = assess(
        measurements(lvef=62, e_e_prime_average=15, e_prime_septal=6, lavi=40, mitral_e=90),
        sinus(),
    )
    assert (a.grade, a.filling_pressure) == INDET
    assert any("diastolic dysfunction present" in r for r in a.reasoning)
    assert any("A wave is missing" in n for n in a.notes)


def test_algorithm_a_indeterminate_suggests_stress_test():
    # Fig 8A: 50 % -> indeterminate; I-16-8: no grade
    a = assess(measurements(lvef=60, e_e_prime_average=16, lavi=30), sinus())
    assert (a.grade, a.filling_pressure) == INDET
    assert any("stress test" in n for n in a.notes)


# ---------------------------------------------------------------------------------------------
# Algorithm B step 1 boundaries.  Nagueh 2016 JASE 29:277, Fig 8B.
# Step-2 criteria are set so that step 2 would give the opposite answer.
# ---------------------------------------------------------------------------------------------

STEP2_ALL_MET = {"e_e_prime_average": 16, "tr_peak_velocity": 3.2, "lavi": 40}
STEP2_NONE_MET = {"e_e_prime_average": 8, "tr_peak_velocity": 2.2, "lavi": 25}


@pytest.mark.parametrize(
    ("e_a", "e", "step2", "expected"),
    [
        # Fig 8B: E/A <= 0.8 and E <= 50 -> grade I (I-16-4: 0.8 itself is grade I)
        (0.8, 50.0, STEP2_ALL_MET, G1),
        (0.79, 49.99, STEP2_ALL_MET, G1),
        (0.81, 50.0, STEP2_ALL_MET, G2),
        (0.8, 50.01, STEP2_ALL_MET, G2),
        # Fig 8B: E/A >= 2 -> grade III (I-16-5: 2.0 itself is grade III)
        (2.0, 100.0, STEP2_NONE_MET, G3),
        (2.01, 100.0, STEP2_NONE_MET, G3),
        (1.99, 100.0, STEP2_NONE_MET, G1),
        (1.99, 100.0, STEP2_ALL_MET, G2),
        # Fig 8B: E/A >= 2 needs no E value
        (2.5, None, STEP2_NONE_MET, G3),
    ],
)
def test_algorithm_b_step_1(e_a, e, step2, expected):
    assert grade_of(sinus(), lvef=35, e_a_ratio=e_a, mitral_e=e, **step2) == expected


@pytest.mark.parametrize(
    ("name", "below", "at", "above"),
    [
        # Fig 8B step 2: average E/e' > 14, TR > 2.8 m/s, LAVI > 34 mL/m2 (all strict)
        ("e_e_prime_average", 13.99, 14.0, 14.01),
        ("tr_peak_velocity", 2.79, 2.8, 2.81),
        ("lavi", 33.99, 34.0, 34.01),
        # single-site fallback (I-16-3)
        ("e_e_prime_septal", 14.99, 15.0, 15.01),
        ("e_e_prime_lateral", 12.99, 13.0, 13.01),
    ],
)
def test_algorithm_b_step_2_boundaries(name, below, at, above):
    # Fig 8B step 2, 3 available: >= 2 positive -> grade II, else grade I.  One other criterion
    # is met and one not met, so the tested one decides.
    others = {"e_e_prime_average": 16, "tr_peak_velocity": 2.0, "lavi": 40}
    e_e_prime = name.startswith("e_e_prime")
    if e_e_prime:
        others.pop("e_e_prime_average")
        others["tr_peak_velocity"] = 3.2
        others["lavi"] = 25
    elif name == "tr_peak_velocity":
        others.pop("tr_peak_velocity")
        others["lavi"] = 25
    else:
        others.pop("lavi")
    base = {"lvef": 35, **MID_INFLOW, **others}
    assert grade_of(sinus(), **base, **{name: below}) == G1
    assert grade_of(sinus(), **base, **{name: at}) == G1
    assert grade_of(sinus(), **base, **{name: above}) == G2


@pytest.mark.parametrize(
    ("values", "expected"),
    [
        # Fig 8B step 2, 3 available
        ({"e_e_prime_average": 16, "tr_peak_velocity": 3.2, "lavi": 40}, G2),
        ({"e_e_prime_average": 16, "tr_peak_velocity": 3.2, "lavi": 30}, G2),
        ({"e_e_prime_average": 12, "tr_peak_velocity": 3.2, "lavi": 30}, G1),
        ({"e_e_prime_average": 12, "tr_peak_velocity": 2.2, "lavi": 30}, G1),
        # 2 available: both positive -> II; both negative -> I
        ({"tr_peak_velocity": 3.2, "lavi": 40}, G2),
        ({"tr_peak_velocity": 2.2, "lavi": 30}, G1),
        # 2 available, split, no PV S/D -> LAP cannot be determined
        ({"tr_peak_velocity": 3.2, "lavi": 30}, INDET),
        # 1 or 0 available -> indeterminate (figure footnote; I-16-7)
        ({"lavi": 40}, INDET),
        ({"lavi": 40, "pv_s_d_ratio": 0.5}, INDET),
        ({"mitral_a": 70.0}, INDET),
    ],
)
def test_algorithm_b_step_2_counting(values, expected):
    assert grade_of(sinus(), lvef=35, **MID_INFLOW, **values) == expected


@pytest.mark.parametrize(
    ("lvef", "myocardial_disease", "pv", "expected"),
    [
        # Fig 8B: PV S/D < 1 as the third criterion when LVEF is depressed (I-16-6)
        (35.0, False, 0.9, G2),
        (35.0, False, 0.99, G2),
        (35.0, False, 1.0, G1),  # S/D >= 1 counts as negative (I-16-6)
        (35.0, False, 1.2, G1),
        # normal LVEF (myocardial disease pathway): S/D not used -> indeterminate
        (60.0, True, 0.9, INDET),
        (35.0, False, None, INDET),
    ],
)
def test_algorithm_b_split_with_pv_s_d(lvef, myocardial_disease, pv, expected):
    ctx = sinus(myocardial_disease=myocardial_disease)
    a = assess(
        measurements(lvef=lvef, tr_peak_velocity=3.2, lavi=30, pv_s_d_ratio=pv, **MID_INFLOW), ctx
    )
    assert (a.grade, a.filling_pressure) == expected
    ids = [c.id for c in a.criteria]
    assert ("ase16.b2.pv_s_d_ratio" in ids) == (lvef < 50 and pv is not None)
    if lvef >= 50 and pv is not None:
        assert any("substitutes only when LVEF is reduced" in n for n in a.notes)


def test_algorithm_b_e_a_missing_is_indeterminate():
    # I-16-9: E/A unavailable (A absent, E-A fusion) -> Fig 8B cannot start
    a = assess(measurements(lvef=35, mitral_e=90, **STEP2_ALL_MET), sinus())
    assert (a.grade, a.filling_pressure) == INDET
    assert any("E/A is not available" in r for r in a.reasoning)
    assert "I-16-9" in [r.id for r in a.readings]
    assert not any("I-16" in r for r in a.reasoning)
    assert criterion(a, "ase16.b1.e_a_ratio_low").verdict is Verdict.unavailable


def test_algorithm_b_low_e_a_without_e():
    # Fig 8B: E/A <= 0.8 gives grade I when E <= 50 and step 2 otherwise; without E the engine
    # decides only when both readings agree (engine decision, documented in the reasoning)
    assert grade_of(sinus(), lvef=35, e_a_ratio=0.7, **STEP2_NONE_MET) == G1
    assert grade_of(sinus(), lvef=35, e_a_ratio=0.7, **STEP2_ALL_MET) == INDET


def test_algorithm_b_without_any_input_is_not_gradable():
    a = assess(measurements(lvef=30), sinus())
    assert (a.grade, a.filling_pressure) == NOT_GRADABLE
    assert a.pathway is Pathway.reduced_lvef_or_myocardial_disease


# ---------------------------------------------------------------------------------------------
# Routing (Fig 8A vs 8B), rhythm, special situations
# ---------------------------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("lvef", "cut", "pathway"),
    [
        # I-16-10: "reduced" = LVEF < 50 % by default (number not stated in the paper)
        (49.9, 50.0, Pathway.reduced_lvef_or_myocardial_disease),
        (50.0, 50.0, Pathway.normal_lvef),
        (50.1, 50.0, Pathway.normal_lvef),
        (52.0, 55.0, Pathway.reduced_lvef_or_myocardial_disease),  # configured cut-off
        (55.0, 55.0, Pathway.normal_lvef),
    ],
)
def test_routing_by_lvef(lvef, cut, pathway):
    a = assess(
        measurements(lvef=lvef, **MID_INFLOW, **STEP2_ALL_MET), sinus(lvef_reduced_below=cut)
    )
    assert a.pathway is pathway
    c = criterion(a, "ase16.routing.lvef")
    assert c.threshold == cut
    assert c.verdict is (Verdict.met if lvef < cut else Verdict.not_met)
    assert "Figure 8B" in a.pathway_reason if lvef < cut else "Figure 8A" in a.pathway_reason


def test_routing_myocardial_disease_with_normal_lvef():
    # Nagueh 2016 JASE 29:277, Fig 8B applies to normal LVEF with myocardial disease
    vals = {"lvef": 65, **GRADE_1_INFLOW, **STEP2_ALL_MET}
    assert assess(measurements(**vals), sinus()).pathway is Pathway.normal_lvef
    a = assess(measurements(**vals), sinus(myocardial_disease=True))
    assert a.pathway is Pathway.reduced_lvef_or_myocardial_disease
    assert "Myocardial disease" in a.pathway_reason
    assert (a.grade, a.filling_pressure) == G1  # Fig 8B step 1, no Fig 8A count
    assert not any(c.step == "algorithm A" for c in a.criteria)


def test_routing_unknown_lvef_assumes_normal():
    a = assess(measurements(**GRADE_1_INFLOW, lavi=30), sinus())
    assert a.pathway is Pathway.normal_lvef
    assert "LVEF was not available" in a.pathway_reason
    assert "normal LVEF was assumed" in a.pathway_reason
    assert criterion(a, "ase16.routing.lvef").verdict is Verdict.unavailable


def test_atrial_fibrillation_not_graded_by_sinus_algorithm():
    # Nagueh 2016 JASE 29:277, §V.E: AF has its own criteria (filling pressure, no grade); the
    # sinus criteria of Fig 8A are not used.  None of the AF criteria is present here.
    a = assess(measurements(lvef=60, **ALL_ABNORMAL_A), Context(rhythm=Rhythm.af))
    assert (a.grade, a.filling_pressure) == NOT_APPLICABLE
    assert a.pathway is Pathway.atrial_fibrillation
    assert a.pathway_reason.startswith("atrial fibrillation")
    assert (
        headline(a)
        == "Grade not applicable in atrial fibrillation; LV filling pressure not estimated."
    )
    assert not any(c.step == "algorithm A" for c in a.criteria)
    assert a.rhythm is Rhythm.af


def test_special_situations_named():
    ctx = sinus(
        special_situations=frozenset(
            {SpecialSituation.mitral_stenosis, SpecialSituation.heart_transplant}
        )
    )
    a = assess(measurements(lvef=60, **ALL_ABNORMAL_A), ctx)
    assert (a.grade, a.filling_pressure) == NOT_APPLICABLE
    assert a.pathway is Pathway.not_applicable
    assert "mitral stenosis" in a.pathway_reason
    assert "heart transplant" in a.pathway_reason
    assert set(a.special_situations) == set(ctx.special_situations)


def test_missing_a_wave_note():
    note = "A wave is missing"
    a = assess(measurements(lvef=60, mitral_e=90, lavi=30), sinus())
    assert any(note in n for n in a.notes)
    a = assess(measurements(lvef=60, mitral_e=90, mitral_a=60, e_a_ratio=1.5, lavi=30), sinus())
    assert not any(note in n for n in a.notes)
    a = assess(measurements(lvef=60, mitral_e=90, lavi=30), Context(rhythm=Rhythm.af))
    assert not any(note in n for n in a.notes)


def test_unknown_rhythm_is_noted():
    a = assess(measurements(lvef=60, lavi=30), Context(rhythm=Rhythm.unknown))
    assert any("sinus rhythm was assumed" in n for n in a.context_notes)
    assert a.grade is Grade.normal


# ---------------------------------------------------------------------------------------------
# Result shape
# ---------------------------------------------------------------------------------------------


def test_assessment_fields_and_criteria_trace():
    a = assess(measurements(lvef=60, **ALL_ABNORMAL_A, **MID_INFLOW), sinus())
    assert a.guideline is Guideline.ase_eacvi_2016
    assert "J Am Soc Echocardiogr 2016;29:277-314" in a.guideline_citation
    assert a.rule_set_version == "ase-eacvi-2016/1"
    assert a.caution == CAUTION
    assert a.reasoning and a.criteria
    for c in a.criteria:
        assert c.id.startswith("ase16.")
        assert c.source.startswith(T.PAPER)
        assert c.unit == CANONICAL_UNITS[c.measure]
        assert c.label
        if c.value is None:
            assert c.verdict is Verdict.unavailable
        else:
            assert (c.verdict is Verdict.met) == c.comparison.holds(c.value, c.threshold)


def test_non_finite_values_are_unavailable():
    a = assess(measurements(lvef=60, lavi=math.nan, tr_peak_velocity=math.inf), sinus())
    assert (a.grade, a.filling_pressure) == NOT_GRADABLE
    assert criterion(a, "ase16.a.lavi").value is None


def test_dispatch_and_unimplemented_guidelines():
    assert Guideline.ase_eacvi_2016 in IMPLEMENTED_GUIDELINES
    m = measurements(lvef=60, lavi=30)
    assert assess(m, sinus()).guideline is Guideline.ase_eacvi_2016  # the default
    assert assess(m, sinus(), Guideline.ase_eacvi_2016).grade is Grade.normal
    assert assess(m, sinus(), "ase-eacvi-2016").grade is Grade.normal
    missing = [g for g in Guideline if g not in IMPLEMENTED_GUIDELINES]
    for g in [*missing, "no-such-guideline"]:
        with pytest.raises(UserError, match="is not implemented"):
            assess(m, sinus(), g)


def test_grading_imports_no_dicom_library():
    # design rule: the grading engine is pure (common practice)
    code = (
        "import sys, service.grading; "
        "bad = [m for m in sys.modules if m.split('.')[0] in "
        "('pydicom', 'highdicom', 'pynetdicom')]; print(bad)"
    )
    out = subprocess.run(
        [sys.executable, "-c", code], capture_output=True, text=True, check=True, timeout=60
    )
    assert out.stdout.strip() == "[]"


# ---------------------------------------------------------------------------------------------
# Borderline check (value within a fraction of a cut-off whose flip changes the result)
# ---------------------------------------------------------------------------------------------


def flags_of(ctx_fraction: float = 0.10, **values: float | None):
    return assess(measurements(**values), sinus(borderline_fraction=ctx_fraction))


def test_borderline_flag_when_flip_changes_grade():
    # Fig 8B step 2: E/e' 13.4 (not met) + TR met + LAVI not met -> grade I; over 14 -> grade II
    a = flags_of(lvef=35, e_e_prime_average=13.4, tr_peak_velocity=3.2, lavi=30, **MID_INFLOW)
    assert (a.grade, a.filling_pressure) == G1
    assert a.is_borderline
    [flag] = [f for f in a.borderline if f.measure is Measure.e_e_prime_average]
    assert (flag.alternative_grade, flag.alternative_filling_pressure) == G2
    assert flag.threshold == 14.0
    assert flag.text.startswith("Average E/e′ 13.4 is within 10 % of the cut-off > 14;")
    # the other side in the guideline's own words, never a machine token
    assert "grade II diastolic dysfunction" in flag.text and "grade-2" not in flag.text


def test_no_borderline_flag_when_flip_changes_nothing():
    # E/e' 13.4 over 14 would make 1 of 3 met (TR and LAVI normal): still grade I
    a = flags_of(lvef=35, e_e_prime_average=13.4, tr_peak_velocity=2.2, lavi=25, **MID_INFLOW)
    assert (a.grade, a.filling_pressure) == G1
    assert not a.is_borderline


def test_no_borderline_flag_outside_fraction_or_when_disabled():
    vals = {"lvef": 35, "tr_peak_velocity": 3.2, "lavi": 30, **MID_INFLOW}
    assert not flags_of(e_e_prime_average=12.5, **vals).is_borderline  # |12.5-14| > 1.4
    assert flags_of(e_e_prime_average=12.7, **vals).is_borderline  # |12.7-14| <= 1.4
    assert not flags_of(0.0, e_e_prime_average=13.9, **vals).is_borderline


def test_borderline_exactly_at_cut_off():
    # E/e' exactly 14 is not met (strict > 14); just above it the grade changes
    a = flags_of(lvef=35, e_e_prime_average=14.0, tr_peak_velocity=3.2, lavi=30, **MID_INFLOW)
    assert (a.grade, a.filling_pressure) == G1
    assert [f.measure for f in a.borderline] == [Measure.e_e_prime_average]


def test_borderline_on_inflow_branches():
    # Fig 8B: E/A 1.9 is near >= 2 (grade III)
    a = flags_of(lvef=35, e_a_ratio=1.9, mitral_e=90, **STEP2_NONE_MET)
    assert (a.grade, a.filling_pressure) == G1
    assert {(f.measure, f.alternative_grade) for f in a.borderline} == {
        (Measure.e_a_ratio, Grade.grade_3)
    }
    # Fig 8B: E 52 with E/A 0.7 goes to step 2 (grade II here); E <= 50 would be grade I
    a = flags_of(lvef=35, e_a_ratio=0.7, mitral_e=52, **STEP2_ALL_MET)
    assert (a.grade, a.filling_pressure) == G2
    flagged = {f.measure: f for f in a.borderline}
    assert flagged[Measure.mitral_e].alternative_grade is Grade.grade_1
    # E/A 0.7 is not within 10 % of 0.8, step-2 values are far from their cut-offs
    assert set(flagged) == {Measure.mitral_e}


def test_borderline_on_lvef_routing():
    # LVEF 51 %: Fig 8A says normal; below 50 % Fig 8B would give grade III (E/A >= 2)
    a = flags_of(lvef=51, e_a_ratio=2.4, mitral_e=100, **STEP2_NONE_MET)
    assert a.grade is Grade.normal
    [flag] = a.borderline
    assert flag.measure is Measure.lvef
    assert flag.alternative_grade is Grade.grade_3


@pytest.mark.parametrize(
    ("value", "comparison", "threshold"),
    [
        (14.0, Comparison.gt, 14.0),
        (14.5, Comparison.gt, 14.0),
        (2.0, Comparison.ge, 2.0),
        (1.9, Comparison.ge, 2.0),
        (7.0, Comparison.lt, 7.0),
        (6.5, Comparison.lt, 7.0),
        (0.8, Comparison.le, 0.8),
        (0.9, Comparison.le, 0.8),
    ],
)
def test_value_across_flips_the_verdict(value, comparison, threshold):
    other = value_across(value, comparison, threshold)
    assert comparison.holds(other, threshold) != comparison.holds(value, threshold)
    assert abs(other - threshold) < 1e-9

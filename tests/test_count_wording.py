"""Count sentences agree in number: "1 of 1 available criterion", "2 of 3 available criteria",
"1 of 3 available criteria supports", "0 of 3 available criteria support".

Source of the rule: English grammar (common practice): the noun after "of N" agrees with N,
and the verb agrees with the count that is its subject (one: singular; zero or more than one:
plural).  Every rule set's count sentence is driven through the real rule set with a table of
counts 0, 1, 2, 3 of 1, 2, 3 available; the cut-offs that decide each count are the cited rows
of service/grading/thresholds_ase2016.py and thresholds_ase2025.py (Nagueh 2016 JASE
29:277-314; Nagueh 2025 JASE 38(7)).
"""

from __future__ import annotations

import pytest
from grading_builders import measurements, sinus

from service.grading import assess
from service.model import Context, Guideline, Rhythm, SpecialSituation
from service.wording import count_of, supporting_count, verb_for

G16, G25 = Guideline.ase_eacvi_2016, Guideline.ase_2025
AF = Context(rhythm=Rhythm.af, borderline_fraction=0.0)


@pytest.mark.parametrize(
    ("count", "total", "words"),
    [
        (0, 1, "0 of 1 available criterion"),
        (1, 1, "1 of 1 available criterion"),
        (0, 2, "0 of 2 available criteria"),
        (1, 2, "1 of 2 available criteria"),
        (2, 2, "2 of 2 available criteria"),
        (1, 3, "1 of 3 available criteria"),
        (3, 4, "3 of 4 available criteria"),
    ],
)
def test_the_noun_agrees_with_the_number_available(count: int, total: int, words: str):
    assert count_of(count, total, "criterion", "criteria") == words


@pytest.mark.parametrize(("count", "total"), [(0, 0), (2, 1), (-1, 2)])
def test_a_count_of_nothing_or_more_than_all_is_refused(count: int, total: int):
    with pytest.raises(ValueError):
        count_of(count, total, "criterion", "criteria")


@pytest.mark.parametrize(
    ("met", "available", "words"),
    [
        (0, 1, "0 of 1 available criterion support elevated filling pressure"),
        (1, 1, "1 of 1 available criterion supports elevated filling pressure"),
        (0, 3, "0 of 3 available criteria support elevated filling pressure"),
        (1, 3, "1 of 3 available criteria supports elevated filling pressure"),
        (2, 3, "2 of 3 available criteria support elevated filling pressure"),
    ],
)
def test_the_verb_agrees_with_the_count(met: int, available: int, words: str):
    assert supporting_count(met, available) == words
    assert verb_for(met, "is", "are") == ("is" if met == 1 else "are")


def _reasoning(guideline: Guideline, context: Context, **values: float) -> tuple[str, ...]:
    return assess(measurements(**values), context, guideline).reasoning


# (guideline, context, values, the sentence the reasoning must hold)
SENTENCES = [
    # ASE/EACVI 2016 Figure 8A: E/e′ > 14, septal e′ < 7 or lateral e′ < 10, TR > 2.8, LAVI > 34
    (G16, sinus(), {"lvef": 60, "lavi": 30}, "Algorithm A: 0 of 1 available criterion met"),
    (G16, sinus(), {"lvef": 60, "lavi": 40}, "Algorithm A: 1 of 1 available criterion met"),
    (
        G16,
        sinus(),
        {"lvef": 60, "lavi": 30, "tr_peak_velocity": 3.0},
        "Algorithm A: 1 of 2 available criteria met",
    ),
    (
        G16,
        sinus(),
        {"lvef": 60, "lavi": 40, "tr_peak_velocity": 3.0, "e_e_prime_average": 15},
        "Algorithm A: 3 of 3 available criteria met",
    ),
    # ASE/EACVI 2016 Figure 8B step 2 (reduced LVEF, E/A between the branches)
    (
        G16,
        sinus(),
        {"lvef": 40, "e_a_ratio": 1.2, "mitral_e": 80},
        "Step 2: none of the 3 criteria available",
    ),
    (
        G16,
        sinus(),
        {"lvef": 40, "e_a_ratio": 1.2, "mitral_e": 80, "lavi": 40},
        "Step 2: only 1 of 3 criteria available",
    ),
    (
        G16,
        sinus(),
        {"lvef": 40, "e_a_ratio": 1.2, "mitral_e": 80, "lavi": 40, "tr_peak_velocity": 3.0},
        "Step 2: 2 of 2 available criteria met",
    ),
    (
        G16,
        sinus(),
        {
            "lvef": 40,
            "e_a_ratio": 1.2,
            "mitral_e": 80,
            "lavi": 30,
            "tr_peak_velocity": 2.5,
            "e_e_prime_average": 15,
        },
        "Step 2: 1 of 3 available criteria met",
    ),
    # ASE/EACVI 2016 section V.E (atrial fibrillation): septal E/e′ ≥ 11, IVRT ≤ 65 ms
    (G16, AF, {"lvef": 60, "e_e_prime_septal": 9}, "0 of 1 available criterion support "),
    (G16, AF, {"lvef": 60, "e_e_prime_septal": 12}, "1 of 1 available criterion supports "),
    (
        G16,
        AF,
        {"lvef": 60, "e_e_prime_septal": 12, "ivrt": 80},
        "1 of 2 available criteria supports ",
    ),
    (
        G16,
        AF,
        {"lvef": 60, "e_e_prime_septal": 12, "ivrt": 60},
        "2 of 2 available criteria support ",
    ),
    # ASE/EACVI 2016 section V.C, mitral stenosis: IVRT < 60 ms, mitral A > 1.5 m/s
    (
        G16,
        sinus(special_situations=frozenset({SpecialSituation.mitral_stenosis})),
        {"ivrt": 70},
        "Mitral stenosis: 0 of 1 available criterion support elevated filling pressure.",
    ),
    (
        G16,
        sinus(special_situations=frozenset({SpecialSituation.mitral_stenosis})),
        {"ivrt": 50},
        "Mitral stenosis: 1 of 1 available criterion supports elevated filling pressure.",
    ),
    (
        G16,
        sinus(special_situations=frozenset({SpecialSituation.mitral_stenosis})),
        {"ivrt": 50, "mitral_a": 160},
        "Mitral stenosis: 2 of 2 available criteria support elevated filling pressure.",
    ),
    (
        G16,
        sinus(special_situations=frozenset({SpecialSituation.mitral_stenosis})),
        {"lvef": 60},
        "Mitral stenosis: none of its criteria is available.",
    ),
    # ASE/EACVI 2016 section V.C, hypertrophic cardiomyopathy (majority: reading I-16-12)
    (
        G16,
        sinus(special_situations=frozenset({SpecialSituation.hypertrophic_cardiomyopathy})),
        {"lavi": 30},
        "Hypertrophic cardiomyopathy: 0 of 1 available criterion met",
    ),
    (
        G16,
        sinus(special_situations=frozenset({SpecialSituation.hypertrophic_cardiomyopathy})),
        {"lavi": 40},
        "Hypertrophic cardiomyopathy: 1 of 1 available criterion met",
    ),
    (
        G16,
        sinus(special_situations=frozenset({SpecialSituation.hypertrophic_cardiomyopathy})),
        {"lavi": 40, "tr_peak_velocity": 2.5},
        "Hypertrophic cardiomyopathy: 1 of 2 available criteria met",
    ),
    # ASE 2025 Figure 3 step 2: LAVI > 34 mL/m², IVRT ≤ 70 ms
    (G25, sinus(), {"lavi": 30}, "Step 2: 0 of 1 available supplementary marker abnormal"),
    (G25, sinus(), {"lavi": 40}, "Step 2: 1 of 1 available supplementary marker abnormal"),
    (
        G25,
        sinus(),
        {"lavi": 40, "ivrt": 90},
        "Step 2: 1 of 2 available supplementary markers abnormal",
    ),
    # ASE 2025 atrial-fibrillation algorithm step 1: E ≥ 100 cm/s, septal E/e′ > 11, DT ≤ 160
    (G25, AF, {"mitral_e": 90}, "AF step 1: 0 of 1 available primary criterion met"),
    (G25, AF, {"mitral_e": 110}, "AF step 1: 1 of 1 available primary criterion met"),
    (
        G25,
        AF,
        {"mitral_e": 110, "deceleration_time": 150, "e_e_prime_septal": 12},
        "AF step 1: 3 of 3 available primary criteria met",
    ),
]


@pytest.mark.parametrize(("guideline", "context", "values", "sentence"), SENTENCES)
def test_every_count_sentence_of_every_rule_set_agrees_in_number(
    guideline: Guideline, context: Context, values: dict[str, float], sentence: str
):
    reasoning = _reasoning(guideline, context, **values)
    assert any(step.startswith(sentence) for step in reasoning), reasoning

"""Words a reader sees in the audit for the machine tokens it counts (outcomes, pathways,
measures, guidelines): the project's one clinical vocabulary (:mod:`service.wording`,
docs/vocabulary.md), with the short forms a chart's axis and legend need."""

from __future__ import annotations

from service.model import Guideline, Measure, Outcome, Pathway
from service.wording import GUIDELINE_NAMES, MEASURE_NAMES, OUTCOME_WORDS, PATHWAY_WORDS

#: the outcome as a count's label: the vocabulary's words ("Grade II diastolic dysfunction");
#: the vocabulary names the situation after "Grade not applicable in", the audit counts every
#: situation together
OUTCOME_LABELS: dict[Outcome, str] = {
    **OUTCOME_WORDS,
    Outcome.special_situation: f"{OUTCOME_WORDS[Outcome.special_situation]} in a special situation",
}

#: short forms for chart legends and table headings
OUTCOME_SHORT: dict[Outcome, str] = {
    Outcome.normal: "Normal",
    Outcome.grade_1: "Grade I",
    Outcome.grade_2: "Grade II",
    Outcome.grade_3: "Grade III",
    Outcome.indeterminate: "Indeterminate",
    Outcome.not_gradable: "Not gradable",
    Outcome.atrial_fibrillation: "AF (pressure only)",
    Outcome.special_situation: "Special situation",
}

#: the pathway with its guideline, as a heading ("Normal LVEF (Figure 8A, then 8B)")
PATHWAY_LABELS: dict[Pathway, str] = {p: w[0].upper() + w[1:] for p, w in PATHWAY_WORDS.items()}

PATHWAY_SHORT: dict[Pathway, str] = {
    Pathway.normal_lvef: "Normal LVEF",
    Pathway.reduced_lvef_or_myocardial_disease: "Reduced LVEF / myocardial disease",
    Pathway.sinus_general: "Any LVEF (ASE 2025)",
    Pathway.atrial_fibrillation: "Atrial fibrillation",
    Pathway.special_situation: "Special situation",
    Pathway.not_applicable: "Not applicable",
}

GUIDELINE_LABELS: dict[Guideline, str] = dict(GUIDELINE_NAMES)
MEASURE_LABELS: dict[Measure, str] = dict(MEASURE_NAMES)


def outcome_label(token: str, *, short: bool = False) -> str:
    try:
        o = Outcome(token)
    except ValueError:
        return token
    return (OUTCOME_SHORT if short else OUTCOME_LABELS)[o]


def pathway_label(token: str, *, short: bool = False) -> str:
    try:
        p = Pathway(token)
    except ValueError:
        return token
    return (PATHWAY_SHORT if short else PATHWAY_LABELS)[p]


def measure_label(token: str) -> str:
    try:
        return MEASURE_LABELS[Measure(token)]
    except (ValueError, KeyError):
        return token


def guideline_label(token: str) -> str:
    try:
        return GUIDELINE_LABELS[Guideline(token)]
    except (ValueError, KeyError):
        return token

"""Words a reader sees in the audit for the machine tokens it counts (outcomes, pathways,
measures).  One small table, kept here until the project's single clinical vocabulary takes
its place."""

from __future__ import annotations

from service.model import Guideline, Measure, Outcome, Pathway

OUTCOME_LABELS: dict[Outcome, str] = {
    Outcome.normal: "Normal diastolic function",
    Outcome.grade_1: "Grade I diastolic dysfunction",
    Outcome.grade_2: "Grade II diastolic dysfunction",
    Outcome.grade_3: "Grade III diastolic dysfunction",
    Outcome.indeterminate: "Indeterminate",
    Outcome.not_gradable: "Not gradable (missing data)",
    Outcome.atrial_fibrillation: "Atrial fibrillation (filling pressure only)",
    Outcome.special_situation: "Special situation",
}

#: short forms for chart axes and legends
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

PATHWAY_LABELS: dict[Pathway, str] = {
    Pathway.normal_lvef: "Normal LVEF (ASE/EACVI 2016, Figure 8A)",
    Pathway.reduced_lvef_or_myocardial_disease: (
        "Reduced LVEF or myocardial disease (ASE/EACVI 2016, Figure 8B)"
    ),
    Pathway.sinus_general: "Sinus rhythm, any LVEF (ASE 2025)",
    Pathway.atrial_fibrillation: "Atrial fibrillation",
    Pathway.special_situation: "Special situation (alternative criteria)",
    Pathway.not_applicable: "Standard algorithm not applicable",
}

PATHWAY_SHORT: dict[Pathway, str] = {
    Pathway.normal_lvef: "Normal LVEF",
    Pathway.reduced_lvef_or_myocardial_disease: "Reduced LVEF / myocardial disease",
    Pathway.sinus_general: "Any LVEF (ASE 2025)",
    Pathway.atrial_fibrillation: "Atrial fibrillation",
    Pathway.special_situation: "Special situation",
    Pathway.not_applicable: "Not applicable",
}

GUIDELINE_LABELS: dict[Guideline, str] = {
    Guideline.ase_eacvi_2016: "ASE/EACVI 2016",
    Guideline.ase_2025: "ASE 2025",
    Guideline.bse_2024: "BSE 2024",
}

MEASURE_LABELS: dict[Measure, str] = {
    Measure.mitral_e: "Mitral E velocity",
    Measure.mitral_a: "Mitral A velocity",
    Measure.e_a_ratio: "E/A ratio",
    Measure.deceleration_time: "E deceleration time",
    Measure.e_prime_septal: "Septal e′",
    Measure.e_prime_lateral: "Lateral e′",
    Measure.e_prime_average: "Average e′",
    Measure.e_e_prime_septal: "Septal E/e′",
    Measure.e_e_prime_lateral: "Lateral E/e′",
    Measure.e_e_prime_average: "Average E/e′",
    Measure.tr_peak_velocity: "TR peak velocity",
    Measure.pasp: "PA systolic pressure",
    Measure.lavi: "LA volume index",
    Measure.lvef: "LVEF",
    Measure.ivrt: "IVRT",
    Measure.pv_s_d_ratio: "Pulmonary vein S/D",
    Measure.la_reservoir_strain: "LA reservoir strain",
    Measure.age: "Age",
    Measure.e_acceleration_rate: "Mitral E acceleration rate",
    Measure.bmi: "BMI",
    Measure.heart_rate: "Heart rate",
    Measure.ar_a_duration: "Ar–A duration",
    Measure.mitral_e_valsalva: "Mitral E, Valsalva",
    Measure.mitral_a_valsalva: "Mitral A, Valsalva",
    Measure.e_a_ratio_valsalva: "E/A, Valsalva",
}


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
    except ValueError:
        return token


def guideline_label(token: str) -> str:
    try:
        return GUIDELINE_LABELS[Guideline(token)]
    except ValueError:
        return token

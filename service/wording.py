"""The one clinical vocabulary: how outcomes, grades, filling-pressure states, measures and
guidelines are said to a person.

Every sentence a reader meets (result SR, summary PDF, command-line table, JSON ``conclusion``)
is made from these words, so the four say the same thing the same way.  Machine tokens
(:class:`service.model.Outcome`, ``Grade``, ``FillingPressure``) stay in JSON fields and code;
prose uses the guideline's own spelling of grades (grade I, II, III, as ASE/EACVI 2016 writes
them).  docs/vocabulary.md lists every token with its words.

Pure: no DICOM, no I/O (the grading rules use it for their sentences too).
"""

from __future__ import annotations

from collections.abc import Iterable

from service.model import (
    Assessment,
    Code,
    FillingPressure,
    Grade,
    GradeRange,
    Guideline,
    Measure,
    Outcome,
    Pathway,
    Rhythm,
    SpecialSituation,
)

#: short names of the guidelines, as prose names them
GUIDELINE_NAMES: dict[Guideline, str] = {
    Guideline.ase_eacvi_2016: "ASE/EACVI 2016",
    Guideline.ase_2025: "ASE 2025",
    Guideline.bse_2024: "BSE 2024",
}

#: the short citation of each guideline: first author, journal, year and pages (never cut)
SHORT_CITATIONS: dict[Guideline, str] = {
    Guideline.ase_eacvi_2016: "Nagueh SF et al. J Am Soc Echocardiogr 2016;29:277–314",
    Guideline.ase_2025: "Nagueh SF et al. J Am Soc Echocardiogr 2025;38(7)",
    Guideline.bse_2024: "Robinson S et al. Echo Res Pract 2024;11:16",
}

#: the outcome as the conclusion states it (sentence case)
OUTCOME_WORDS: dict[Outcome, str] = {
    Outcome.normal: "Normal diastolic function",
    Outcome.grade_1: "Grade I diastolic dysfunction",
    Outcome.grade_2: "Grade II diastolic dysfunction",
    Outcome.grade_3: "Grade III diastolic dysfunction",
    Outcome.indeterminate: "Diastolic function indeterminate",
    Outcome.not_gradable: "Diastolic function not gradable (measurements missing)",
    Outcome.atrial_fibrillation: "Grade not applicable in atrial fibrillation",
    Outcome.special_situation: "Grade not applicable",
}

#: a grade inside a sentence (lower case)
GRADE_WORDS: dict[Grade, str] = {
    Grade.normal: "normal diastolic function",
    Grade.grade_1: "grade I diastolic dysfunction",
    Grade.grade_2: "grade II diastolic dysfunction",
    Grade.grade_3: "grade III diastolic dysfunction",
    Grade.indeterminate: "diastolic function indeterminate",
    Grade.not_gradable: "diastolic function not gradable",
    Grade.not_applicable: "no grade",
}

#: an indeterminate grade narrowed by the algorithm, inside a sentence (lower case)
GRADE_RANGE_WORDS: dict[GradeRange, str] = {
    GradeRange.dysfunction_present: "diastolic dysfunction present, grade indeterminate",
    GradeRange.grade_2_or_3: "grade II or III diastolic dysfunction",
    GradeRange.normal_or_grade_1: "normal diastolic function or grade I diastolic dysfunction",
}

#: a grade as a short name ("grade II"), for criteria and reasoning
GRADE_SHORT: dict[Grade, str] = {
    Grade.normal: "normal",
    Grade.grade_1: "grade I",
    Grade.grade_2: "grade II",
    Grade.grade_3: "grade III",
    Grade.indeterminate: "indeterminate",
    Grade.not_gradable: "not gradable",
    Grade.not_applicable: "no grade",
}

#: the filling-pressure state after "LV filling pressure"
PRESSURE_WORDS: dict[FillingPressure, str] = {
    FillingPressure.normal: "normal",
    FillingPressure.elevated: "elevated",
    FillingPressure.indeterminate: "indeterminate",
    FillingPressure.not_estimated: "not estimated",
}

PATHWAY_WORDS: dict[Pathway, str] = {
    Pathway.normal_lvef: "normal LVEF (Figure 8A, then 8B)",
    Pathway.reduced_lvef_or_myocardial_disease: "reduced LVEF or myocardial disease (Figure 8B)",
    Pathway.sinus_general: "sinus rhythm, any LVEF (two-step algorithm)",
    Pathway.atrial_fibrillation: "atrial fibrillation criteria",
    Pathway.special_situation: "special situation, alternative criteria",
    Pathway.not_applicable: "standard algorithm not applicable",
}

#: clinical names of the measures (never the canonical key)
MEASURE_NAMES: dict[Measure, str] = {
    Measure.mitral_e: "Mitral E",
    Measure.mitral_a: "Mitral A",
    Measure.e_a_ratio: "E/A",
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
    Measure.ar_a_duration: "Ar − A duration",
    Measure.mitral_e_valsalva: "Mitral E (Valsalva)",
    Measure.mitral_a_valsalva: "Mitral A (Valsalva)",
    Measure.e_a_ratio_valsalva: "E/A (Valsalva)",
}

_UNITS = {
    "{ratio}": "",
    "mm[Hg]": "mmHg",
    "mL/m2": "mL/m²",
    "cm/s2": "cm/s²",
    "kg/m2": "kg/m²",
    "a": "years",
}

#: how a reading of an ambiguous rule is introduced wherever a person reads it
READING_PREFIX = "This service's reading of an ambiguity in the guideline: "

#: the two e′ rows of ASE/EACVI 2016 are one criterion (Figure 8A joins them with "or")
ONE_E_PRIME_CRITERION = "septal or lateral e′: one criterion"


#: special situations as a clinician names them (abbreviations keep their capitals)
SITUATION_NAMES: dict[SpecialSituation, str] = {
    SpecialSituation.sinus_tachycardia: "sinus tachycardia",
    SpecialSituation.mitral_regurgitation: "mitral regurgitation",
    SpecialSituation.mitral_stenosis: "mitral stenosis",
    SpecialSituation.mitral_annular_calcification: "mitral annular calcification",
    SpecialSituation.prosthetic_mitral_valve: "prosthetic mitral valve",
    SpecialSituation.heart_transplant: "heart transplant",
    SpecialSituation.hypertrophic_cardiomyopathy: "hypertrophic cardiomyopathy",
    SpecialSituation.restrictive_cardiomyopathy: "restrictive cardiomyopathy",
    SpecialSituation.pulmonary_hypertension_non_cardiac: (
        "pulmonary hypertension of non-cardiac cause"
    ),
    SpecialSituation.lbbb_or_ventricular_pacing: "LBBB or ventricular pacing",
}

#: how the result says that the source SR stated a special situation itself
STATED_BY_FINDING = "stated by a coded finding in the source SR"

#: first words whose spelling is clinical although they look like an ordinary capitalised word
_KEEP_SPELLING = frozenset({"Ar", "Ar-A"})


def _first_word(text: str) -> str:
    return text.split(" ", 1)[0].rstrip(":,;.")


def in_sentence(text: str) -> str:
    """A name (or a sentence) as it reads after other words: only an ordinary capitalised first
    word is lowered ("Septal e′" → "septal e′", "Mitral E" → "mitral E"); a measure symbol or
    abbreviation keeps its clinical spelling ("LAVI", "TR peak velocity", "E/A", "LVEF",
    "Ar-A duration", "e′").  Never lower a first letter by hand: "LAVI" would become "lAVI"."""
    word = _first_word(text)
    rest = word[1:]
    ordinary = (
        word[:1].isupper()
        and len(rest) > 0
        and all(ch.islower() or ch == "-" for ch in rest)
        and word not in _KEEP_SPELLING
    )
    return text[:1].lower() + text[1:] if ordinary else text


def sentence_start(text: str) -> str:
    """``text`` as the start of a sentence: an ordinary lower-case first word gets its capital
    ("mitral stenosis: …" → "Mitral stenosis: …"); a measure symbol keeps its spelling ("e′ is
    reduced …" stays: E′ would be another measure)."""
    word = _first_word(text)
    ordinary = len(word) > 0 and all(ch.islower() or ch == "-" for ch in word)
    return text[:1].upper() + text[1:] if ordinary else text


def rhythm_name(code: Code | None) -> str:
    """A stated rhythm as it reads inside a sentence, from its code meaning: each ordinary
    capitalised word lowered ("Ventricular Demand Mode Pacing" → "ventricular demand mode
    pacing"), abbreviations and names kept ("AV junctional (nodal) rhythm")."""
    meaning = " ".join((code.meaning if code is not None else "").split())
    if not meaning:
        return "a rhythm other than sinus rhythm or atrial fibrillation"
    return " ".join(in_sentence(word) for word in meaning.split(" "))


def situation_name(situation: SpecialSituation) -> str:
    """ "mitral stenosis", "LBBB or ventricular pacing" (inside a sentence)."""
    return SITUATION_NAMES.get(situation, situation.value.replace("-", " "))


def unit_words(unit: str) -> str:
    """A canonical UCUM unit as a reader writes it ("" for ratios)."""
    return _UNITS.get(unit, unit)


def measure_name(measure: Measure) -> str:
    return MEASURE_NAMES.get(measure, measure.value.replace("_", " "))


def situations(items: Iterable[SpecialSituation]) -> str:
    """ "heart transplant, mitral stenosis" (in the order of their tokens, clinical words)."""
    return ", ".join(situation_name(s) for s in sorted(items))


def pressure_phrase(pressure: FillingPressure) -> str:
    """ "LV filling pressure elevated"."""
    return f"LV filling pressure {PRESSURE_WORDS[pressure]}"


def outcome_phrase(a: Assessment) -> str:
    """A result inside a sentence: "grade I diastolic dysfunction, LV filling pressure normal";
    "no grade (atrial fibrillation), LV filling pressure elevated"."""
    outcome = a.outcome
    if outcome is Outcome.atrial_fibrillation:
        head = "no grade (atrial fibrillation)"
    elif outcome is Outcome.special_situation:
        head = "no grade (special situation)"
    elif a.grade_range is not None:
        head = GRADE_RANGE_WORDS[a.grade_range]
    else:
        head = GRADE_WORDS[a.grade]
    return f"{head}, {pressure_phrase(a.filling_pressure)}"


def headline(a: Assessment) -> str:
    """The conclusion in one sentence, the same in the result SR's impression, the summary's
    headline, the command-line table and the JSON ``conclusion``."""
    outcome = a.outcome
    guideline = GUIDELINE_NAMES.get(a.guideline, a.guideline.value)
    pressure = pressure_phrase(a.filling_pressure)
    estimated = a.filling_pressure is not FillingPressure.not_estimated
    if outcome is Outcome.atrial_fibrillation:
        by = f" by the {guideline} atrial-fibrillation criteria" if estimated else ""
        return f"{OUTCOME_WORDS[outcome]}; {pressure}{by}."
    if outcome is Outcome.special_situation:
        named = situations(a.special_situations)
        if a.pathway is Pathway.special_situation:
            by = f" by the {guideline} criteria for {named}" if estimated else ""
            return f"{OUTCOME_WORDS[outcome]} in {named}; {pressure}{by}."
        if a.rhythm is Rhythm.other:
            why = f"in {rhythm_name(a.rhythm_code)}"
        else:
            why = f"in {named}" if named else "(atrial fibrillation not excluded)"
        return f"{OUTCOME_WORDS[outcome]} {why}: the standard algorithm does not apply; {pressure}."
    if a.grade_range is not None:
        return f"{sentence_start(GRADE_RANGE_WORDS[a.grade_range])}; {pressure}."
    return f"{OUTCOME_WORDS[outcome]}; {pressure}."


def count_of(count: int, total: int, singular: str, plural: str) -> str:
    """How many of the available criteria, the noun agreeing with the number available (English
    grammar): "1 of 1 available criterion", "0 of 1 available criterion", "2 of 3 available
    criteria".  A count is never said of nothing: a caller says "none … is available" itself."""
    if total < 1 or not 0 <= count <= total:
        raise ValueError(f"a count of {count} of {total} is not a count of available criteria")
    return f"{count} of {total} available {singular if total == 1 else plural}"


def verb_for(count: int, singular: str, plural: str) -> str:
    """The verb agreeing with a count as its subject: "1 of 3 … supports", "0 of 3 … support",
    "2 of 3 … support"."""
    return singular if count == 1 else plural


def supporting_count(met: int, available: int) -> str:
    """ "1 of 3 available criteria supports elevated filling pressure": criteria a guideline
    lists one by one, each supporting elevated filling pressure when met (ASE/EACVI 2016
    atrial fibrillation, section V.E, and its special situations)."""
    criteria = count_of(met, available, "criterion", "criteria")
    return f"{criteria} {verb_for(met, 'supports', 'support')} elevated filling pressure"


def borderline_words(measures: Iterable[Measure]) -> str:
    """ "Borderline: Average E/e′." (each measure once, by its clinical name), or "" when the
    result is not borderline.  The impression and the table say this much; the sentence saying
    how near the cut-off the value is and what the result would be on its other side is said
    once, in the result's borderline item (the summary's headline panel, the JSON's
    ``borderline``)."""
    names = list(dict.fromkeys(measure_name(m) for m in measures))
    return f"Borderline: {', '.join(names)}." if names else ""


def reading_sentence(text: str) -> str:
    """A reading of an ambiguous rule, as a reader meets it."""
    return READING_PREFIX + text

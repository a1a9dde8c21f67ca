"""Special situations in which the standard sinus-rhythm algorithm does not apply as is.

Where a guideline gives alternative criteria for a situation they are applied and each is
reported; where it gives none the result says the standard algorithm does not apply and why.
A special situation never yields a standard grade (grade "not-gradable").

ASE/EACVI 2016 (Nagueh SF et al., J Am Soc Echocardiogr 2016;29:277-314, section V, specific
diseases) lists parameters with cut-offs for most situations but, except where noted, no rule to
combine them; such situations report each criterion and leave the filling pressure indeterminate
(as I-16-11 does for atrial fibrillation).  The ASE 2025 rows live in
:mod:`service.grading.thresholds_ase2025`; the ASE/EACVI 2016 rows of this module are its own
cited table (special populations only, the sinus algorithm's table is
:mod:`service.grading.thresholds_ase2016`).
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

from service.grading import thresholds_ase2025 as T25
from service.grading.criteria import Threshold, tally, value_of
from service.grading.trace import Trace, base_fields, situation_words
from service.model import (
    Assessment,
    Comparison,
    Context,
    FillingPressure,
    Grade,
    Guideline,
    Measure,
    Measurements,
    Pathway,
    Rhythm,
    SpecialSituation,
    Verdict,
)

S = SpecialSituation
PAPER_2016 = "Nagueh 2016 JASE 29:277"


def _row16(
    key: str,
    name: str,
    measure: Measure,
    comparison: Comparison,
    value: float,
    unit: str,
    where: str,
    evidence: str = "R",
) -> Threshold:
    return Threshold(
        key=key,
        name=name,
        measure=measure,
        comparison=comparison,
        value=value,
        unit=unit,
        citation=f"{PAPER_2016}, {where}",
        evidence=evidence,
    )


_TACHY = "§V specific diseases, sinus tachycardia"
_MR = "§V.C valvular disease (p290), mitral regurgitation"
_MS = "§V.C valvular disease (p290), mitral stenosis"
_HCM = "§V.A hypertrophic cardiomyopathy (p289)"
_RCM = "§V.B restrictive cardiomyopathy (p289)"
_PH = "§V specific diseases, pulmonary hypertension of non-cardiac cause"

# --- ASE/EACVI 2016 special-population table ----------------------------------------------------

TACHY_IVRT = _row16("tachy_ivrt", "IVRT", Measure.ivrt, Comparison.le, 70.0, "ms", _TACHY)
TACHY_E_E_PRIME_LATERAL = _row16(
    "tachy_e_e_prime_lateral",
    "Lateral E/e′",
    Measure.e_e_prime_lateral,
    Comparison.gt,
    10.0,
    "",
    f"{_TACHY} (a ratio > 12 is the most specific)",
)
MR_AR_A = _row16(
    "mr_ar_a_duration", "Ar-A duration", Measure.ar_a_duration, Comparison.ge, 30.0, "ms", _MR
)
MR_IVRT = _row16("mr_ivrt", "IVRT", Measure.ivrt, Comparison.lt, 60.0, "ms", _MR)
MR_E_E_PRIME_AVERAGE = _row16(
    "mr_e_e_prime_average",
    "Average E/e′",
    Measure.e_e_prime_average,
    Comparison.gt,
    14.0,
    "",
    f"{_MR} (usable only with depressed LVEF)",
)
MS_IVRT = _row16("ms_ivrt", "IVRT", Measure.ivrt, Comparison.lt, 60.0, "ms", _MS)
MS_MITRAL_A = _row16(
    "ms_mitral_a",
    "Mitral A",
    Measure.mitral_a,
    Comparison.gt,
    150.0,
    "cm/s",
    f"{_MS} (mitral A velocity > 1.5 m/s)",
    evidence="R+V",
)
HCM_E_E_PRIME_AVERAGE = _row16(
    "hcm_e_e_prime_average",
    "Average E/e′",
    Measure.e_e_prime_average,
    Comparison.gt,
    14.0,
    "",
    f"{_HCM} (majority of available criteria, I-16-12)",
)
HCM_AR_A = _row16(
    "hcm_ar_a_duration",
    "Ar-A duration",
    Measure.ar_a_duration,
    Comparison.ge,
    30.0,
    "ms",
    f"{_HCM} (majority of available criteria, I-16-12)",
)
HCM_TR = _row16(
    "hcm_tr_peak_velocity",
    "TR peak velocity",
    Measure.tr_peak_velocity,
    Comparison.gt,
    2.8,
    "m/s",
    f"{_HCM} (majority of available criteria, I-16-12)",
)
HCM_LAVI = _row16(
    "hcm_lavi",
    "LAVI",
    Measure.lavi,
    Comparison.gt,
    34.0,
    "mL/m²",
    f"{_HCM} (majority of available criteria, I-16-12)",
)
RCM_DT = _row16(
    "rcm_deceleration_time",
    "Mitral E deceleration time",
    Measure.deceleration_time,
    Comparison.lt,
    140.0,
    "ms",
    _RCM,
)
RCM_E_A = _row16("rcm_e_a_ratio", "E/A", Measure.e_a_ratio, Comparison.gt, 2.5, "", _RCM)
RCM_IVRT = _row16("rcm_ivrt", "IVRT", Measure.ivrt, Comparison.lt, 50.0, "ms", _RCM)
RCM_E_E_PRIME_AVERAGE = _row16(
    "rcm_e_e_prime_average",
    "Average E/e′",
    Measure.e_e_prime_average,
    Comparison.gt,
    14.0,
    "",
    _RCM,
)
PH_E_E_PRIME_LATERAL_HIGH = _row16(
    "ph_e_e_prime_lateral_high",
    "Lateral E/e′",
    Measure.e_e_prime_lateral,
    Comparison.gt,
    13.0,
    "",
    f"{_PH}: > 13 → cardiac cause with raised LAP",
)
PH_E_E_PRIME_LATERAL_LOW = _row16(
    "ph_e_e_prime_lateral_low",
    "Lateral E/e′",
    Measure.e_e_prime_lateral,
    Comparison.lt,
    8.0,
    "",
    f"{_PH}: < 8 → non-cardiac cause (8-13 indeterminate, I-16-13)",
)

TABLE_2016: tuple[Threshold, ...] = (
    TACHY_IVRT,
    TACHY_E_E_PRIME_LATERAL,
    MR_AR_A,
    MR_IVRT,
    MR_E_E_PRIME_AVERAGE,
    MS_IVRT,
    MS_MITRAL_A,
    HCM_E_E_PRIME_AVERAGE,
    HCM_AR_A,
    HCM_TR,
    HCM_LAVI,
    RCM_DT,
    RCM_E_A,
    RCM_IVRT,
    RCM_E_E_PRIME_AVERAGE,
    PH_E_E_PRIME_LATERAL_HIGH,
    PH_E_E_PRIME_LATERAL_LOW,
)

#: plain name and display unit of every measure used here (for borderline flag text)
NAMES: dict[Measure, tuple[str, str]] = {row.measure: (row.name, row.unit) for row in TABLE_2016}

# --- Which situations have alternative criteria, per guideline --------------------------------

#: criteria the paper lists that no canonical measure carries; named so the result says so
UNREAD_2016: dict[SpecialSituation, tuple[str, ...]] = {
    S.sinus_tachycardia: (
        "pulmonary-vein systolic filling fraction ≤ 40 %",
        "predominant early filling with LVEF < 50 %",
    ),
    S.mitral_regurgitation: ("IVRT/T(E-e′) < 5.6 (normal LVEF)",),
    S.mitral_stenosis: ("IVRT/T(E-e′) < 4.2",),
}

NOT_APPLICABLE_2016: dict[SpecialSituation, str] = {
    S.mitral_annular_calcification: (
        "annular e′ and E/e′ are unreliable with mitral annular calcification and ASE/EACVI 2016 "
        "gives no validated alternative rule (I-16-14)"
    ),
    S.prosthetic_mitral_valve: (
        "e′, E/e′ and mitral inflow do not reflect LV filling with a prosthetic mitral valve and "
        "ASE/EACVI 2016 gives no alternative rule"
    ),
    S.heart_transplant: (
        "transplant physiology (donor heart, denervation, atrial anastomosis) alters inflow and LA "
        "size and ASE/EACVI 2016 gives no validated numeric rule (I-16-14)"
    ),
    S.lbbb_or_ventricular_pacing: (
        "the project's reference gives no ASE/EACVI 2016 criteria for LBBB or ventricular pacing; "
        "individual interpretation is needed"
    ),
}

NOT_APPLICABLE_2025: dict[SpecialSituation, str] = {
    S.sinus_tachycardia: (
        "no ASE 2025 alternative criteria for sinus tachycardia or E-A fusion are available to "
        "this service"
    ),
    S.mitral_regurgitation: (
        "no ASE 2025 alternative criteria for significant mitral regurgitation are available to "
        "this service"
    ),
    S.mitral_stenosis: (
        "no ASE 2025 alternative criteria for mitral stenosis are available to this service"
    ),
    S.prosthetic_mitral_valve: (
        "e′, E/e′ and mitral inflow do not reflect LV filling with a prosthetic mitral valve; no "
        "ASE 2025 alternative rule is available to this service"
    ),
    S.heart_transplant: (
        "ASE 2025 has a heart-transplant section but its numeric rules could not be verified; "
        "special-population review is needed"
    ),
    S.hypertrophic_cardiomyopathy: (
        "ASE 2025 carries the HCM parameters over with LA strain added, but its cut-offs and "
        "counting rule could not be verified; special-population review is needed"
    ),
    S.restrictive_cardiomyopathy: (
        "ASE 2025 has a restrictive-cardiomyopathy section but its numeric rules could not be "
        "verified; special-population review is needed"
    ),
    S.lbbb_or_ventricular_pacing: (
        "ASE 2025 has an LBBB and pacing section but its numeric rules could not be verified; "
        "special-population review is needed"
    ),
}

_LABEL = {
    Guideline.ase_eacvi_2016: "ASE/EACVI 2016",
    Guideline.ase_2025: "ASE 2025",
}


@dataclass(frozen=True)
class _Outcome:
    """One situation's result: a filling pressure when the guideline states a rule, else None
    (criteria reported one by one)."""

    situation: SpecialSituation
    pressure: FillingPressure | None
    summary: str


def not_applicable_reason(situation: SpecialSituation, guideline: Guideline) -> str | None:
    """Why the guideline has no alternative criteria for the situation, or None when it has."""
    table = NOT_APPLICABLE_2016 if guideline is Guideline.ase_eacvi_2016 else NOT_APPLICABLE_2025
    return table.get(situation)


def assess(
    measurements: Measurements,
    context: Context,
    guideline: Guideline,
    citation: str,
    version: str,
) -> Assessment:
    """The result for a context with one or more special situations (never a standard grade)."""
    base = base_fields(guideline, citation, version, context)
    situations = sorted(context.special_situations)
    words = situation_words(context.special_situations)
    label = _LABEL.get(guideline, guideline.value)
    blocked = [(s, r) for s in situations if (r := not_applicable_reason(s, guideline))]
    rhythm = _rhythm_sentence(context)
    if blocked:
        why = "; ".join(f"{s.value.replace('-', ' ')}: {r}" for s, r in blocked)
        reason = (
            f"special situation present ({words}): the standard algorithm does not apply and "
            f"{label} gives no alternative criteria that this service can apply"
        )
        reasoning = [f"Not graded: {reason}.", f"Why: {why}."]
        if rhythm:
            reasoning.append(rhythm)
        return Assessment(
            **base,
            pathway=Pathway.not_applicable,
            pathway_reason=reason,
            grade=Grade.not_gradable,
            filling_pressure=FillingPressure.unknown,
            reasoning=tuple(reasoning),
            notes=(f"The standard {label} algorithm does not apply ({words}); no grade is given.",),
        )

    trace = Trace(measurements)
    reason = (
        f"special situation present ({words}): the standard algorithm does not apply; "
        f"{label} alternative criteria are applied and reported one by one"
    )
    trace.say(f"{reason[0].upper()}{reason[1:]}.")
    if rhythm:
        trace.say(rhythm)
    rules = _RULES_2016 if guideline is Guideline.ase_eacvi_2016 else _RULES_2025
    outcomes = [rules[s](trace, context) for s in situations]
    pressure = _combine(trace, outcomes)
    trace.note(f"No standard grade is given with {words}.")
    return Assessment(
        **base,
        pathway=Pathway.special_situation,
        pathway_reason=reason,
        grade=Grade.not_gradable,
        filling_pressure=pressure,
        criteria=tuple(trace.criteria),
        reasoning=tuple(trace.reasoning),
        notes=tuple(trace.notes),
    )


def _rhythm_sentence(context: Context) -> str:
    if context.rhythm is Rhythm.af:
        src = f" ({context.rhythm_source})" if context.rhythm_source else ""
        return (
            f"Atrial fibrillation is also present{src}; the special-situation criteria take "
            "precedence and those that need an A wave are unavailable."
        )
    return ""


def _combine(trace: Trace, outcomes: list[_Outcome]) -> FillingPressure:
    stated = [o for o in outcomes if o.pressure is not None]
    for o in outcomes:
        trace.say(o.summary)
    if not stated:
        if not any(c.verdict is not Verdict.unavailable for c in trace.criteria):
            trace.say("No criterion is available: filling pressure unknown.")
            return FillingPressure.unknown
        trace.say(
            "The guideline lists these criteria without a rule combining them: filling pressure "
            "is not estimated; each criterion met supports elevated filling pressure."
        )
        return FillingPressure.indeterminate
    pressures = {o.pressure for o in stated}
    if len(pressures) == 1:
        return stated[0].pressure  # type: ignore[return-value]
    trace.say("The special-situation rules disagree: filling pressure indeterminate.")
    return FillingPressure.indeterminate


# ---------------------------------------------------------------------------------------------
# ASE/EACVI 2016 rules
# ---------------------------------------------------------------------------------------------


def _flags(
    trace: Trace,
    situation: SpecialSituation,
    rows: tuple[Threshold, ...],
    prefix: str,
) -> _Outcome:
    step = f"special situation: {situation.value.replace('-', ' ')}"
    verdicts = [trace.check(row, f"{prefix}.{row.key}", step).verdict for row in rows]
    for text in UNREAD_2016.get(situation, ()):
        trace.note(
            f"{situation.value.replace('-', ' ').capitalize()}: the criterion {text} is not "
            "read by this service."
        )
    t = tally(verdicts)
    return _Outcome(
        situation,
        None,
        f"{situation.value.replace('-', ' ').capitalize()}: {t.met} of {t.available} available "
        "criteria support elevated filling pressure (no combination rule stated).",
    )


def _tachy16(trace: Trace, context: Context) -> _Outcome:
    trace.note(
        "Sinus tachycardia: with E-A fusion (E velocity at A onset > 20 cm/s) the A velocity and "
        "E/A are distorted."
    )
    return _flags(
        trace, S.sinus_tachycardia, (TACHY_IVRT, TACHY_E_E_PRIME_LATERAL), "ase16.tachycardia"
    )


def _mr16(trace: Trace, context: Context) -> _Outcome:
    rows: tuple[Threshold, ...] = (MR_AR_A, MR_IVRT)
    lvef = value_of(trace.measurements, Measure.lvef)
    if lvef is not None and lvef < context.lvef_reduced_below:
        rows = (*rows, MR_E_E_PRIME_AVERAGE)
    else:
        trace.note(
            "Mitral regurgitation: average E/e′ was not used; it applies only with depressed LVEF."
        )
    return _flags(trace, S.mitral_regurgitation, rows, "ase16.mr")


def _ms16(trace: Trace, context: Context) -> _Outcome:
    return _flags(trace, S.mitral_stenosis, (MS_IVRT, MS_MITRAL_A), "ase16.ms")


def _rcm16(trace: Trace, context: Context) -> _Outcome:
    outcome = _flags(
        trace,
        S.restrictive_cardiomyopathy,
        (RCM_DT, RCM_E_A, RCM_IVRT, RCM_E_E_PRIME_AVERAGE),
        "ase16.rcm",
    )
    trace.note(
        "Restrictive cardiomyopathy: each criterion is highly specific for raised filling "
        "pressure; restrictive filling is consistent with advanced (grade III) dysfunction."
    )
    return outcome


def _hcm16(trace: Trace, context: Context) -> _Outcome:
    step = "special situation: hypertrophic cardiomyopathy"
    rows = (HCM_E_E_PRIME_AVERAGE, HCM_AR_A, HCM_TR, HCM_LAVI)
    t = tally(trace.check(row, f"ase16.hcm.{row.key}", step).verdict for row in rows)
    counted = f"{t.met} of {t.available} available criteria met"
    if t.available == 0:
        return _Outcome(
            S.hypertrophic_cardiomyopathy,
            FillingPressure.unknown,
            "Hypertrophic cardiomyopathy: none of the criteria is available; filling pressure "
            "unknown.",
        )
    if 2 * t.met > t.available:
        pressure, words = FillingPressure.elevated, "more than half: elevated"
    elif 2 * t.met < t.available:
        pressure, words = FillingPressure.normal, "less than half: normal"
    else:
        pressure, words = FillingPressure.indeterminate, "exactly half: indeterminate"
    return _Outcome(
        S.hypertrophic_cardiomyopathy,
        pressure,
        f"Hypertrophic cardiomyopathy: {counted} ({words} filling pressure, I-16-12).",
    )


def _lateral_ph(
    trace: Trace, high: Threshold, low: Threshold, prefix: str, ambiguity: str
) -> _Outcome:
    step = "special situation: pulmonary hypertension non cardiac"
    hi = trace.check(high, f"{prefix}.{high.key}", step)
    lo = trace.check(low, f"{prefix}.{low.key}", step)
    name = "Pulmonary hypertension"
    if hi.verdict is Verdict.unavailable:
        return _Outcome(
            S.pulmonary_hypertension_non_cardiac,
            FillingPressure.unknown,
            f"{name}: lateral E/e′ is not available; the cause cannot be judged.",
        )
    if hi.verdict is Verdict.met:
        return _Outcome(
            S.pulmonary_hypertension_non_cardiac,
            FillingPressure.elevated,
            f"{name}: lateral E/e′ > 13 points to a cardiac cause with raised filling pressure.",
        )
    if lo.verdict is Verdict.met:
        return _Outcome(
            S.pulmonary_hypertension_non_cardiac,
            FillingPressure.normal,
            f"{name}: lateral E/e′ < 8 points to a non-cardiac cause (normal filling pressure).",
        )
    return _Outcome(
        S.pulmonary_hypertension_non_cardiac,
        FillingPressure.indeterminate,
        f"{name}: lateral E/e′ between 8 and 13: cause and filling pressure indeterminate "
        f"({ambiguity}).",
    )


def _ph16(trace: Trace, context: Context) -> _Outcome:
    return _lateral_ph(
        trace, PH_E_E_PRIME_LATERAL_HIGH, PH_E_E_PRIME_LATERAL_LOW, "ase16.ph", "I-16-13"
    )


_Rule = Callable[[Trace, Context], _Outcome]

_RULES_2016: dict[SpecialSituation, _Rule] = {
    S.sinus_tachycardia: _tachy16,
    S.mitral_regurgitation: _mr16,
    S.mitral_stenosis: _ms16,
    S.hypertrophic_cardiomyopathy: _hcm16,
    S.restrictive_cardiomyopathy: _rcm16,
    S.pulmonary_hypertension_non_cardiac: _ph16,
}

# ---------------------------------------------------------------------------------------------
# ASE 2025 rules
# ---------------------------------------------------------------------------------------------


def _mac25(trace: Trace, context: Context) -> _Outcome:
    step = "special situation: mitral annular calcification"
    p = "ase25.mac"
    low = trace.check(T25.MAC_E_A_LOW, f"{p}.{T25.MAC_E_A_LOW.key}", step)
    high = trace.check(T25.MAC_E_A_HIGH, f"{p}.{T25.MAC_E_A_HIGH.key}", step)
    name = "Mitral annular calcification"
    if low.verdict is Verdict.unavailable:
        return _Outcome(
            S.mitral_annular_calcification,
            FillingPressure.indeterminate,
            f"{name}: E/A is not available; filling pressure indeterminate.",
        )
    if low.verdict is Verdict.met:
        return _Outcome(
            S.mitral_annular_calcification,
            FillingPressure.normal,
            f"{name}: E/A < 0.8: normal filling pressure.",
        )
    if high.verdict is Verdict.met:
        return _Outcome(
            S.mitral_annular_calcification,
            FillingPressure.elevated,
            f"{name}: E/A > 1.8: elevated filling pressure.",
        )
    ivrt = trace.check(T25.MAC_IVRT, f"{p}.{T25.MAC_IVRT.key}", step)
    if ivrt.verdict is Verdict.unavailable:
        return _Outcome(
            S.mitral_annular_calcification,
            FillingPressure.indeterminate,
            f"{name}: E/A between 0.8 and 1.8 and IVRT not available: filling pressure "
            "indeterminate.",
        )
    if ivrt.verdict is Verdict.met:
        return _Outcome(
            S.mitral_annular_calcification,
            FillingPressure.elevated,
            f"{name}: E/A between 0.8 and 1.8 with IVRT < 80 ms: elevated filling pressure.",
        )
    return _Outcome(
        S.mitral_annular_calcification,
        FillingPressure.normal,
        f"{name}: E/A between 0.8 and 1.8 with IVRT ≥ 80 ms: normal filling pressure.",
    )


def _ph25(trace: Trace, context: Context) -> _Outcome:
    return _lateral_ph(
        trace,
        T25.PH_E_E_PRIME_LATERAL_HIGH,
        T25.PH_E_E_PRIME_LATERAL_LOW,
        "ase25.ph",
        "the ASE 2025 reading of 8-13 was not verified",
    )


_RULES_2025: dict[SpecialSituation, _Rule] = {
    S.mitral_annular_calcification: _mac25,
    S.pulmonary_hypertension_non_cardiac: _ph25,
}


# ---------------------------------------------------------------------------------------------
# Missing A wave with unknown rhythm
# ---------------------------------------------------------------------------------------------

A_WAVE_MISSING = (
    "The mitral A wave is missing although E was measured and nothing states atrial "
    "fibrillation: atrial fibrillation may be present, so the standard grade could not be given."
)


def a_wave_missing(measurements: Measurements) -> bool:
    """E measured, neither A nor E/A available."""
    return (
        value_of(measurements, Measure.mitral_e) is not None
        and value_of(measurements, Measure.mitral_a) is None
        and value_of(measurements, Measure.e_a_ratio) is None
    )


def possible_af(
    measurements: Measurements,
    context: Context,
    guideline: Guideline,
    citation: str,
    version: str,
) -> Assessment:
    """Rhythm not stated and the A wave missing: no standard grade (atrial fibrillation may be
    present and the sinus algorithm would then be invalid)."""
    src = f" ({context.rhythm_source})" if context.rhythm_source else ""
    reason = (
        f"cardiac rhythm not stated{src} and the mitral A wave is missing: atrial fibrillation "
        "may be present and the sinus-rhythm algorithm cannot be relied on"
    )
    return Assessment(
        **base_fields(guideline, citation, version, context),
        pathway=Pathway.not_applicable,
        pathway_reason=reason,
        grade=Grade.not_gradable,
        filling_pressure=FillingPressure.unknown,
        reasoning=(
            f"Not graded: {reason}.",
            "State the rhythm (coded Cardiac Rhythm item, sender or run setting) to grade by the "
            "sinus-rhythm or the atrial-fibrillation rules.",
        ),
        notes=(A_WAVE_MISSING,),
    )

"""Special situations in which the standard sinus-rhythm algorithm does not apply as is.

Where a guideline gives alternative criteria for a situation they are applied and each is
reported; where it gives none the result says the standard algorithm does not apply and why.
A special situation never yields a standard grade (grade "not-applicable", outcome
"special-situation").

ASE/EACVI 2016 (Nagueh SF et al., J Am Soc Echocardiogr 2016;29:277-314, section V, specific
diseases) lists parameters with cut-offs for most situations but, except where noted, no rule to
combine them; such situations report each criterion and leave the filling pressure indeterminate
(as reading I-16-11 does for atrial fibrillation).  The ASE/EACVI 2016 rows are
in :mod:`service.grading.thresholds_ase2016` and the ASE 2025 rows in
:mod:`service.grading.thresholds_ase2025` (one cited table per guideline).
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

from service.grading import readings as R
from service.grading import thresholds_ase2016 as T16
from service.grading import thresholds_ase2025 as T25
from service.grading.criteria import Threshold, fmt, tally, value_of
from service.grading.thresholds_ase2016 import (
    HCM_AR_A,
    HCM_E_E_PRIME_AVERAGE,
    HCM_LAVI,
    HCM_TR,
    MR_AR_A,
    MR_E_E_PRIME_AVERAGE,
    MR_IVRT,
    MS_IVRT,
    MS_MITRAL_A,
    PH_E_E_PRIME_LATERAL_HIGH,
    PH_E_E_PRIME_LATERAL_LOW,
    RCM_DT,
    RCM_E_A,
    RCM_E_E_PRIME_AVERAGE,
    RCM_IVRT,
    TACHY_E_E_PRIME_LATERAL,
    TACHY_IVRT,
)
from service.grading.trace import Trace, base_fields
from service.model import (
    Assessment,
    Context,
    FillingPressure,
    Grade,
    Guideline,
    Measure,
    Measurements,
    Pathway,
    Reading,
    Rhythm,
    SpecialSituation,
    Verdict,
)
from service.wording import (
    STATED_BY_FINDING,
    count_of,
    rhythm_name,
    sentence_start,
    situation_name,
    supporting_count,
)

S = SpecialSituation


# --- ASE/EACVI 2016 special-situation rows (in :mod:`service.grading.thresholds_ase2016`) ------

TABLE_2016: tuple[Threshold, ...] = T16.SPECIAL_TABLE

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
        "gives no validated alternative rule"
    ),
    S.prosthetic_mitral_valve: (
        "e′, E/e′ and mitral inflow do not reflect LV filling with a prosthetic mitral valve and "
        "ASE/EACVI 2016 gives no alternative rule"
    ),
    S.heart_transplant: (
        "transplant physiology (donor heart, denervation, atrial anastomosis) alters inflow and LA "
        "size and ASE/EACVI 2016 gives no validated numeric rule"
    ),
    S.lbbb_or_ventricular_pacing: (
        "no ASE/EACVI 2016 criteria for LBBB or ventricular pacing are available to this "
        "service; individual interpretation is needed"
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
    words = _named_with_source(context)
    label = _LABEL.get(guideline, guideline.value)
    blocked = [(s, r) for s in situations if (r := not_applicable_reason(s, guideline))]
    rhythm = _rhythm_sentence(context)
    if blocked:
        why = "; ".join(f"{situation_name(s)}: {r}" for s, r in blocked)
        # the conclusion says "the standard algorithm does not apply"; the reason says why,
        # once, and no other sentence repeats it
        reason = f"{words}: {label} gives no alternative criteria that this service can apply"
        reasoning = [f"{sentence_start(why)}."]
        if rhythm:
            reasoning.append(rhythm)
        readings: tuple[Reading, ...] = ()
        unruled = (S.mitral_annular_calcification, S.heart_transplant)
        if guideline is Guideline.ase_eacvi_2016 and any(s in unruled for s, _ in blocked):
            readings = (Reading(id="I-16-14", text=R.words("I-16-14")),)
        return _no_standard_grade(base, reason, *reasoning, readings=readings)

    trace = Trace(measurements)
    reason = f"{words}: the {label} alternative criteria apply, each reported"
    if rhythm:
        trace.say(rhythm)
    rules = _RULES_2016 if guideline is Guideline.ase_eacvi_2016 else _RULES_2025
    outcomes = [rules[s](trace, context) for s in situations]
    pressure = _combine(trace, outcomes)
    return Assessment(
        **base,
        pathway=Pathway.special_situation,
        pathway_reason=reason,
        grade=Grade.not_applicable,
        filling_pressure=pressure,
        criteria=tuple(trace.criteria),
        reasoning=tuple(trace.reasoning),
        notes=tuple(trace.notes),
        context_notes=tuple(trace.context_notes),
        readings=tuple(trace.readings),
    )


def _no_standard_grade(
    base: dict[str, Any], reason: str, *reasoning: str, readings: tuple[Reading, ...] = ()
) -> Assessment:
    """The standard algorithm does not apply, for ``reason``: no grade and no estimate."""
    return Assessment(
        **base,
        pathway=Pathway.not_applicable,
        pathway_reason=reason,
        grade=Grade.not_applicable,
        filling_pressure=FillingPressure.not_estimated,
        reasoning=reasoning,
        readings=readings,
    )


def _named_with_source(context: Context) -> str:
    """ "mitral stenosis (stated by a coded finding in the source SR)": each situation, and
    where the source SR stated it itself (the others were configured or given by the user)."""
    return ", ".join(
        situation_name(s) + (f" ({STATED_BY_FINDING})" if s in context.situations_stated else "")
        for s in sorted(context.special_situations)
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
    # a rule that had no data ("not estimated") states nothing: it neither decides nor
    # disagrees with a rule that had data
    stated = [o for o in outcomes if o.pressure not in (None, FillingPressure.not_estimated)]
    for o in outcomes:
        trace.say(o.summary)
    if not stated:
        if not any(c.verdict is not Verdict.unavailable for c in trace.criteria):
            trace.say("No criterion is available: filling pressure not estimated.")
            return FillingPressure.not_estimated
        trace.say(
            "The guideline lists these criteria without a rule combining them, so the filling "
            "pressure is indeterminate."
        )
        trace.reading("I-16-15")
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
    name = situation_name(situation)
    step = f"special situation: {name}"
    verdicts = [trace.check(row, f"{prefix}.{row.key}", step).verdict for row in rows]
    for text in UNREAD_2016.get(situation, ()):
        trace.note(f"{sentence_start(name)}: the criterion {text} is not read by this service.")
    t = tally(verdicts)
    if t.available == 0:
        return _Outcome(
            situation, None, f"{sentence_start(name)}: none of its criteria is available."
        )
    return _Outcome(
        situation, None, f"{sentence_start(name)}: {supporting_count(t.met, t.available)}."
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
    step = f"special situation: {situation_name(S.hypertrophic_cardiomyopathy)}"
    rows = (HCM_E_E_PRIME_AVERAGE, HCM_AR_A, HCM_TR, HCM_LAVI)
    t = tally(trace.check(row, f"ase16.hcm.{row.key}", step).verdict for row in rows)
    if t.available == 0:
        return _Outcome(
            S.hypertrophic_cardiomyopathy,
            FillingPressure.not_estimated,
            "Hypertrophic cardiomyopathy: none of the criteria is available; filling pressure "
            "not estimated.",
        )
    counted = f"{count_of(t.met, t.available, 'criterion', 'criteria')} met"
    pressure, words = t.majority()
    return _Outcome(
        S.hypertrophic_cardiomyopathy,
        pressure,
        f"Hypertrophic cardiomyopathy: {counted} ({words} filling pressure).",
    )


def _lateral_ph(
    trace: Trace, high: Threshold, low: Threshold, prefix: str, unresolved: str
) -> _Outcome:
    step = f"special situation: {situation_name(S.pulmonary_hypertension_non_cardiac)}"
    hi = trace.check(high, f"{prefix}.{high.key}", step)
    lo = trace.check(low, f"{prefix}.{low.key}", step)
    name = "Pulmonary hypertension"
    lo_v, hi_v = fmt(low.value), fmt(high.value)
    if hi.verdict is Verdict.unavailable:
        return _Outcome(
            S.pulmonary_hypertension_non_cardiac,
            FillingPressure.not_estimated,
            f"{name}: lateral E/e′ is not available; the cause cannot be judged.",
        )
    if hi.verdict is Verdict.met:
        return _Outcome(
            S.pulmonary_hypertension_non_cardiac,
            FillingPressure.elevated,
            f"{name}: lateral E/e′ > {hi_v} points to a cardiac cause with raised filling "
            "pressure.",
        )
    if lo.verdict is Verdict.met:
        return _Outcome(
            S.pulmonary_hypertension_non_cardiac,
            FillingPressure.normal,
            f"{name}: lateral E/e′ < {lo_v} points to a non-cardiac cause (normal filling "
            "pressure).",
        )
    return _Outcome(
        S.pulmonary_hypertension_non_cardiac,
        FillingPressure.indeterminate,
        f"{name}: lateral E/e′ between {lo_v} and {hi_v}: cause and filling pressure "
        f"indeterminate{unresolved}.",
    )


def _ph16(trace: Trace, context: Context) -> _Outcome:
    return _lateral_ph(trace, PH_E_E_PRIME_LATERAL_HIGH, PH_E_E_PRIME_LATERAL_LOW, "ase16.ph", "")


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
    step = f"special situation: {situation_name(S.mitral_annular_calcification)}"
    p = "ase25.mac"
    low = trace.check(T25.MAC_E_A_LOW, f"{p}.{T25.MAC_E_A_LOW.key}", step)
    high = trace.check(T25.MAC_E_A_HIGH, f"{p}.{T25.MAC_E_A_HIGH.key}", step)
    name = "Mitral annular calcification"
    ea_lo, ea_hi = fmt(T25.MAC_E_A_LOW.value), fmt(T25.MAC_E_A_HIGH.value)
    iv = fmt(T25.MAC_IVRT.value)
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
            f"{name}: E/A < {ea_lo}: normal filling pressure.",
        )
    if high.verdict is Verdict.met:
        return _Outcome(
            S.mitral_annular_calcification,
            FillingPressure.elevated,
            f"{name}: E/A > {ea_hi}: elevated filling pressure.",
        )
    ivrt = trace.check(T25.MAC_IVRT, f"{p}.{T25.MAC_IVRT.key}", step)
    if ivrt.verdict is Verdict.unavailable:
        return _Outcome(
            S.mitral_annular_calcification,
            FillingPressure.indeterminate,
            f"{name}: E/A between {ea_lo} and {ea_hi} and IVRT not available: filling pressure "
            "indeterminate.",
        )
    if ivrt.verdict is Verdict.met:
        return _Outcome(
            S.mitral_annular_calcification,
            FillingPressure.elevated,
            f"{name}: E/A between {ea_lo} and {ea_hi} with IVRT < {iv} ms: elevated filling "
            "pressure.",
        )
    return _Outcome(
        S.mitral_annular_calcification,
        FillingPressure.normal,
        f"{name}: E/A between {ea_lo} and {ea_hi} with IVRT ≥ {iv} ms: normal filling pressure.",
    )


def _ph25(trace: Trace, context: Context) -> _Outcome:
    return _lateral_ph(
        trace,
        T25.PH_E_E_PRIME_LATERAL_HIGH,
        T25.PH_E_E_PRIME_LATERAL_LOW,
        "ase25.ph",
        " (the ASE 2025 reading of 8 to 13 could not be verified)",
    )


_RULES_2025: dict[SpecialSituation, _Rule] = {
    S.mitral_annular_calcification: _mac25,
    S.pulmonary_hypertension_non_cardiac: _ph25,
}


# ---------------------------------------------------------------------------------------------
# Missing A wave with unknown rhythm
# ---------------------------------------------------------------------------------------------


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
    return _no_standard_grade(
        base_fields(guideline, citation, version, context),
        reason,
        "State the rhythm (coded Cardiac Rhythm item, sender or run setting) to grade by the "
        "sinus-rhythm or the atrial-fibrillation rules.",
    )


def rhythm_not_covered(
    measurements: Measurements,
    context: Context,
    guideline: Guideline,
    citation: str,
    version: str,
) -> Assessment:
    """The source states a rhythm that is neither sinus rhythm nor atrial fibrillation (atrial
    flutter, a paced rhythm, sinus tachycardia, ...): the guideline's algorithms are for sinus
    rhythm, with criteria of their own for atrial fibrillation, so no grade and no estimate
    (shared reference §1.1: other rhythms "go to special handling"; ASE/EACVI 2016, mitral
    inflow table: in atrial flutter E, E/A and DT are not usable)."""
    label = _LABEL.get(guideline, guideline.value)
    stated = rhythm_name(context.rhythm_code)
    src = f" ({context.rhythm_source})" if context.rhythm_source else ""
    reason = (
        f"{stated}{src}: the {label} algorithms are for sinus rhythm, with criteria of their "
        "own for atrial fibrillation, and neither applies to this rhythm"
    )
    return _no_standard_grade(
        base_fields(guideline, citation, version, context),
        reason,
        "Mitral inflow, e′ and E/e′ are read against sinus-rhythm or atrial-fibrillation "
        "criteria only; a qualified reader assesses diastolic function in this rhythm.",
    )

"""ASE/EACVI 2016 grading of LV diastolic function in sinus rhythm (Figures 8A and 8B).

Nagueh SF et al., J Am Soc Echocardiogr 2016;29:277-314.  Pure functions: Measurements and
Context in, Assessment out.  Cut-offs come from :mod:`service.grading.thresholds_ase2016`.

Decisions where the paper is silent or ambiguous are recorded as readings
(:mod:`service.grading.readings`, identifiers I-16-x), never inside a sentence.
"""

from __future__ import annotations

from service.grading import atrial_fibrillation, special_situations, valsalva
from service.grading import thresholds_ase2016 as T
from service.grading.criteria import (
    any_of,
    borderline_flags,
    fmt,
    tally,
    value_of,
)
from service.grading.trace import Trace
from service.model import (
    CAUTION,
    Assessment,
    Context,
    FillingPressure,
    Grade,
    GradeRange,
    Guideline,
    Measure,
    Measurements,
    Pathway,
    Rhythm,
    Verdict,
)
from service.wording import ONE_E_PRIME_CRITERION, count_of, in_sentence

RULE_SET_VERSION = "ase-eacvi-2016/1"
CITATION = (
    "Nagueh SF, Smiseth OA, Appleton CP, et al. Recommendations for the Evaluation of Left "
    "Ventricular Diastolic Function by Echocardiography: An Update from the American Society of "
    "Echocardiography and the European Association of Cardiovascular Imaging. "
    "J Am Soc Echocardiogr 2016;29:277-314."
)

STEP_ROUTING = "routing"
STEP_A = "algorithm A"
STEP_B1 = "algorithm B step 1"
STEP_B2 = "algorithm B step 2"

#: outcome of Algorithm B: grade and filling pressure
_Result = tuple[Grade, FillingPressure]
_INDETERMINATE: _Result = (Grade.indeterminate, FillingPressure.indeterminate)
_GRADE_1: _Result = (Grade.grade_1, FillingPressure.normal)
_GRADE_2: _Result = (Grade.grade_2, FillingPressure.elevated)
_GRADE_3: _Result = (Grade.grade_3, FillingPressure.elevated)


def assess(
    measurements: Measurements,
    context: Context,
    af_options: atrial_fibrillation.Ase2016AfOptions | None = None,
) -> Assessment:
    """Grade by ASE/EACVI 2016, with the borderline check of every near-cut-off criterion and
    the Valsalva finding beside the result."""

    def regrade(m: Measurements, ctx: Context) -> Assessment:
        return _assess(m, ctx, af_options)

    result = _assess(measurements, context, af_options)
    flags = borderline_flags(result, measurements, context, regrade, NAMES)
    if flags:
        result = result.model_copy(update={"borderline": flags})
    return valsalva.attach(result, measurements)


#: plain names of every measure a criterion of this rule set may use (sinus, AF, special)
NAMES = {**special_situations.NAMES, **atrial_fibrillation.NAMES, **T.NAMES}


# ---------------------------------------------------------------------------------------------
# Top level: special situations, rhythm, routing
# ---------------------------------------------------------------------------------------------


def _assess(
    measurements: Measurements,
    context: Context,
    af_options: atrial_fibrillation.Ase2016AfOptions | None = None,
) -> Assessment:
    trace = Trace(measurements)
    base = {
        "guideline": Guideline.ase_eacvi_2016,
        "guideline_citation": CITATION,
        "rule_set_version": RULE_SET_VERSION,
        "rhythm": context.rhythm,
        "rhythm_code": context.rhythm_code,
        "special_situations": tuple(sorted(context.special_situations)),
        "caution": CAUTION,
    }

    # a stated rhythm the algorithms do not cover (atrial flutter, pacing, ...): no grade,
    # whatever else applies (shared reference §1.1)
    if context.rhythm is Rhythm.other:
        return special_situations.rhythm_not_covered(
            measurements, context, Guideline.ase_eacvi_2016, CITATION, RULE_SET_VERSION
        )
    # special populations take precedence over the rhythm (shared reference §1.4)
    if context.special_situations:
        return special_situations.assess(
            measurements, context, Guideline.ase_eacvi_2016, CITATION, RULE_SET_VERSION
        )
    if context.rhythm is Rhythm.af:
        return atrial_fibrillation.assess_2016(
            measurements, context, CITATION, RULE_SET_VERSION, af_options
        )
    if special_situations.a_wave_missing(measurements):
        if context.rhythm is Rhythm.unknown:
            return special_situations.possible_af(
                measurements, context, Guideline.ase_eacvi_2016, CITATION, RULE_SET_VERSION
            )
        trace.note(
            "The mitral A wave is missing although E was measured: atrial fibrillation "
            "(or E-A fusion) may be present; check the rhythm."
        )
    trace.note_unstated_rhythm(context)

    lvef = value_of(measurements, Measure.lvef)
    lvef_row = trace.check(
        T.LVEF_REDUCED,
        "ase16.routing.lvef",
        STEP_ROUTING,
        threshold=context.lvef_reduced_below,
    )
    cut = f"{fmt(context.lvef_reduced_below)} %"
    lvef_depressed = lvef_row.verdict is Verdict.met

    if lvef_depressed or context.myocardial_disease:
        pathway = Pathway.reduced_lvef_or_myocardial_disease
        if lvef_depressed:
            reason = (
                f"LVEF {fmt(lvef)} % is below {cut}: Algorithm B (Figure 8B) for reduced LVEF "
                "applies."
            )
            if context.myocardial_disease:
                reason = reason[:-1] + "; myocardial disease is also flagged."
        else:
            shown = "not available" if lvef is None else f"{fmt(lvef)} %"
            reason = (
                f"Myocardial disease is flagged (LVEF {shown}): Algorithm B (Figure 8B) applies."
            )
        trace.reasoning.append(reason)
        if not _has_any_b_input(measurements):
            trace.reasoning.append("No measurement used by Algorithm B is available.")
            grade, pressure = Grade.not_gradable, FillingPressure.not_estimated
            trace.note("E/A, mitral E, E/e′, TR velocity and LAVI are all missing.")
        else:
            grade, pressure = _algorithm_b(trace, lvef_depressed)
    else:
        pathway = Pathway.normal_lvef
        if lvef is None:
            reason = (
                "LVEF was not available and no myocardial disease is flagged: normal LVEF was "
                "assumed and Algorithm A (Figure 8A) applies."
            )
            trace.note("LVEF was not available; normal LVEF was assumed.")
        else:
            reason = (
                f"LVEF {fmt(lvef)} % is not below {cut} and no myocardial disease is flagged: "
                "Algorithm A (Figure 8A) for normal LVEF applies."
            )
        trace.reasoning.append(reason)
        grade, pressure = _algorithm_a(trace, context, lvef_depressed)

    return Assessment(
        **base,
        pathway=pathway,
        pathway_reason=reason,
        grade=grade,
        filling_pressure=pressure,
        criteria=tuple(trace.criteria),
        reasoning=tuple(trace.reasoning),
        notes=tuple(trace.notes),
        context_notes=tuple(trace.context_notes),
        readings=tuple(trace.readings),
        grade_range=trace.grade_range,
    )


def _has_any_b_input(m: Measurements) -> bool:
    return any(
        value_of(m, x) is not None
        for x in (
            Measure.e_a_ratio,
            Measure.mitral_e,
            Measure.e_e_prime_average,
            Measure.e_e_prime_septal,
            Measure.e_e_prime_lateral,
            Measure.tr_peak_velocity,
            Measure.lavi,
        )
    )


# ---------------------------------------------------------------------------------------------
# Shared criteria
# ---------------------------------------------------------------------------------------------


def _e_over_e_prime(trace: Trace, prefix: str, step: str) -> Verdict:
    """Average E/e′ > 14; when the average is unavailable, the single-site cut-offs
    septal > 15 / lateral > 13 (reading I-16-3).  Both single-site ratios without an average:
    either site met counts (OR, as for e′, reading I-16-2)."""
    m = trace.measurements
    if value_of(m, Measure.e_e_prime_average) is not None:
        return trace.check(T.E_E_PRIME_AVERAGE, f"{prefix}.e_e_prime_average", step).verdict
    singles = [
        row
        for row in (T.E_E_PRIME_SEPTAL, T.E_E_PRIME_LATERAL)
        if value_of(m, row.measure) is not None
    ]
    if not singles:
        return trace.check(T.E_E_PRIME_AVERAGE, f"{prefix}.e_e_prime_average", step).verdict
    names = " and ".join(in_sentence(row.name) for row in singles)
    trace.note(
        f"Average E/e′ was not available; {names} used with the single-site cut-off "
        "(septal > 15, lateral > 13)."
    )
    group = "septal or lateral E/e′: one criterion" if len(singles) == 2 else ""
    return any_of(
        trace.check(row, f"{prefix}.{row.key}", step, group=group).verdict for row in singles
    )


# ---------------------------------------------------------------------------------------------
# Algorithm A (Figure 8A)
# ---------------------------------------------------------------------------------------------


def _algorithm_a(
    trace: Trace, context: Context, lvef_depressed: bool
) -> tuple[Grade, FillingPressure]:
    p = "ase16.a"
    one = ONE_E_PRIME_CRITERION
    e_prime = any_of(
        (
            trace.check(T.E_PRIME_SEPTAL, f"{p}.e_prime_septal", STEP_A, group=one).verdict,
            trace.check(T.E_PRIME_LATERAL, f"{p}.e_prime_lateral", STEP_A, group=one).verdict,
        )
    )
    known = [c.verdict for c in trace.criteria[-2:] if c.verdict is not Verdict.unavailable]
    if len(known) == 1 or len(set(known)) > 1:  # one site, or the sites differ: "or" decides
        trace.reading("I-16-2")
    votes = [
        _e_over_e_prime(trace, p, STEP_A),
        e_prime,
        trace.check(T.TR_VELOCITY, f"{p}.tr_peak_velocity", STEP_A).verdict,
        trace.check(T.LAVI, f"{p}.lavi", STEP_A).verdict,
    ]
    labels = ("E/e′", "e′ (septal or lateral)", "TR velocity", "LAVI")
    missing = [label for label, v in zip(labels, votes, strict=True) if v is Verdict.unavailable]
    if missing:
        trace.note(f"Algorithm A criteria not available: {', '.join(missing)}.")
    t = tally(votes)
    if 0 < t.available < 4:
        trace.reading("I-16-1")
    if t.available == 0:
        trace.reasoning.append("Algorithm A: none of the 4 criteria is available; not gradable.")
        return Grade.not_gradable, FillingPressure.not_estimated
    need = max(1, context.min_criteria_available)
    if t.available < need:
        trace.reasoning.append(
            f"Algorithm A: only {t.available} of 4 criteria available, at least {need} "
            "required; not gradable."
        )
        return Grade.not_gradable, FillingPressure.not_estimated
    counted = f"{count_of(t.met, t.available, 'criterion', 'criteria')} met"
    if 2 * t.met > t.available:
        trace.reasoning.append(
            f"Algorithm A: {counted} (more than half): diastolic dysfunction present; "
            "Algorithm B (Figure 8B) grades it."
        )
        result = _algorithm_b(trace, lvef_depressed)
        if result[0] is Grade.indeterminate:  # the dysfunction stands; only its grade is open
            trace.grade_range = GradeRange.dysfunction_present
        return result
    if 2 * t.met == t.available:
        trace.reasoning.append(
            f"Algorithm A: {counted} (exactly half): diastolic function indeterminate."
        )
        trace.note(
            "Indeterminate by Algorithm A: ASE/EACVI 2016 suggests a diastolic stress test "
            "in symptomatic patients."
        )
        trace.reading("I-16-8")
        return _INDETERMINATE
    trace.reasoning.append(f"Algorithm A: {counted} (less than half): normal diastolic function.")
    return Grade.normal, FillingPressure.normal


# ---------------------------------------------------------------------------------------------
# Algorithm B (Figure 8B)
# ---------------------------------------------------------------------------------------------


def _algorithm_b(trace: Trace, lvef_depressed: bool) -> _Result:
    p = "ase16.b1"
    ea_low = trace.check(T.E_A_LOW, f"{p}.e_a_ratio_low", STEP_B1)
    e_low = trace.check(T.E_LOW, f"{p}.mitral_e_low", STEP_B1)
    ea_high = trace.check(T.E_A_HIGH, f"{p}.e_a_ratio_high", STEP_B1)
    # E/A exactly on a branch of Figure 8B: the figure, not the paper's table, decides
    if ea_low.value == T.E_A_LOW.value:
        trace.reading("I-16-4")
    if ea_high.value == T.E_A_HIGH.value:
        trace.reading("I-16-5")

    if ea_low.verdict is Verdict.unavailable:
        trace.reasoning.append(
            "Algorithm B: E/A is not available, so the algorithm cannot start; grade and "
            "filling pressure indeterminate."
        )
        trace.reading("I-16-9")
        trace.note("E/A not available (A wave missing or E-A fusion): grade indeterminate.")
        return _INDETERMINATE
    if ea_high.verdict is Verdict.met:
        trace.reasoning.append("Algorithm B: E/A ≥ 2: grade III, elevated filling pressure.")
        return _GRADE_3
    if ea_low.verdict is Verdict.met and e_low.verdict is Verdict.met:
        trace.reasoning.append(
            "Algorithm B: E/A ≤ 0.8 and E ≤ 50 cm/s: grade I, normal filling pressure."
        )
        return _GRADE_1
    if ea_low.verdict is Verdict.met and e_low.verdict is Verdict.unavailable:
        # E/A <= 0.8 with E unknown: grade 1 directly if E <= 50, else step 2.  Decide only when
        # both readings agree.
        trace.reasoning.append(
            "Algorithm B: E/A ≤ 0.8 but mitral E is not available; step 2 decides whether "
            "the result is the same either way."
        )
        result = _step_2(trace, lvef_depressed)
        if result == _GRADE_1:
            trace.reasoning.append(
                "Grade I, normal filling pressure, whether E is above or below 50 cm/s."
            )
            return _GRADE_1
        trace.reasoning.append(
            "Without mitral E the two readings of step 1 disagree; grade and filling pressure "
            "indeterminate."
        )
        trace.note("Mitral E not available: needed to decide between grade I and step 2.")
        return _INDETERMINATE
    trace.reasoning.append("Algorithm B: E/A between the branches; step 2 applies.")
    return _step_2(trace, lvef_depressed)


def _step_2(trace: Trace, lvef_depressed: bool) -> _Result:
    p = "ase16.b2"
    votes = [
        _e_over_e_prime(trace, p, STEP_B2),
        trace.check(T.TR_VELOCITY, f"{p}.tr_peak_velocity", STEP_B2).verdict,
        trace.check(T.LAVI, f"{p}.lavi", STEP_B2).verdict,
    ]
    labels = ("E/e′", "TR velocity", "LAVI")
    missing = [label for label, v in zip(labels, votes, strict=True) if v is Verdict.unavailable]
    if missing:
        trace.note(f"Algorithm B step 2 criteria not available: {', '.join(missing)}.")
    t = tally(votes)
    counted = f"{count_of(t.met, t.available, 'criterion', 'criteria')} met" if t.available else ""
    if t.available == 3:
        if t.met >= 2:
            trace.reasoning.append(f"Step 2: {counted}: grade II, elevated filling pressure.")
            return _GRADE_2
        trace.reasoning.append(f"Step 2: {counted}: grade I, normal filling pressure.")
        return _GRADE_1
    if t.available == 2:
        if t.met == 2:
            trace.reasoning.append(f"Step 2: {counted}: grade II, elevated filling pressure.")
            return _GRADE_2
        if t.met == 0:
            trace.reasoning.append(f"Step 2: {counted}: grade I, normal filling pressure.")
            return _GRADE_1
        pv = value_of(trace.measurements, Measure.pv_s_d_ratio)
        if lvef_depressed and pv is not None:
            trace.reasoning.append(
                f"Step 2: {counted} (split); with reduced LVEF, pulmonary-vein S/D is the "
                "third criterion."
            )
            trace.reading("I-16-6")
            c = trace.check(T.PV_S_D, f"{p}.pv_s_d_ratio", STEP_B2)
            if c.verdict is Verdict.met:
                trace.reasoning.append("Step 2: grade II, elevated filling pressure.")
                return _GRADE_2
            trace.reasoning.append("Step 2: grade I, normal filling pressure.")
            return _GRADE_1
        if pv is not None:
            trace.note("Pulmonary-vein S/D was not used: it substitutes only when LVEF is reduced.")
            trace.reading("I-16-6")
        trace.reasoning.append(
            f"Step 2: {counted} (split) and no third criterion: grade and filling pressure "
            "indeterminate."
        )
        return _INDETERMINATE
    available = f"only {t.available} of 3 criteria" if t.available else "none of the 3 criteria"
    trace.reasoning.append(
        f"Step 2: {available} available: grade and filling pressure indeterminate."
    )
    trace.reading("I-16-7")
    trace.note("Algorithm B step 2 needs at least 2 of E/e′, TR velocity and LAVI.")
    return _INDETERMINATE

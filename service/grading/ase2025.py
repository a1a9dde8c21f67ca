"""ASE 2025 grading of LV diastolic function: the general sinus-rhythm algorithm (Figure 3), with
the AF rule and the special populations of the same update.

Nagueh SF, Sanborn DY, Oh JK, et al., J Am Soc Echocardiogr 2025;38(7),
doi 10.1016/j.echo.2025.03.011.  Pure functions: Measurements and Context in, Assessment out.
Cut-offs come from :mod:`service.grading.thresholds_ase2025`.

Step 1 classifies left atrial pressure (LAP) from three core indices (e′, E/e′, TR velocity or
PASP) when they are concordant; step 2 adjudicates discordant or incomplete cases with the
supplementary markers (LA reservoir strain, PV S/D, LAVI, IVRT).  Raised LAP is grade III with
E/A ≥ 2, else grade II; normal LAP with reduced e′ is grade I.  Every point where the published
rule is ambiguous is recorded as a reading (identifier I-25-x, :mod:`service.grading.readings`)
and, where the project's reference offers an alternative reading, is a switch in
:class:`Ase2025Options` (defaults = the reference's reading).
"""

from __future__ import annotations

from typing import Literal

from pydantic import BaseModel, ConfigDict, Field

from service.grading import atrial_fibrillation, special_situations, valsalva
from service.grading import thresholds_ase2025 as T
from service.grading.criteria import Threshold, any_of, borderline_flags, tally, value_of
from service.grading.trace import Trace, base_fields
from service.model import (
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
from service.wording import count_of, in_sentence, sentence_start

RULE_SET_VERSION = "ase-2025/1"
CITATION = (
    "Nagueh SF, Sanborn DY, Oh JK, et al. Recommendations for the Evaluation of Left Ventricular "
    "Diastolic Function by Echocardiography and for Heart Failure With Preserved Ejection "
    "Fraction Diagnosis: An Update From the American Society of Echocardiography. "
    "J Am Soc Echocardiogr 2025;38(7). doi:10.1016/j.echo.2025.03.011."
)

STEP_1 = "step 1"
STEP_2 = "step 2"
STEP_GRADE = "grading"

SitesRule = Literal["average-preferred", "any-site"]


class Ase2025Options(BaseModel):
    """Readings of the ambiguous points of ASE 2025; defaults are the project reference's."""

    model_config = ConfigDict(frozen=True, extra="forbid")

    #: I-25-1: e′ with both sites: "average-preferred" (average ≤ 6.5; site cut-offs only as a
    #: fallback) or "any-site" (any of average ≤ 6.5, septal ≤ 6, lateral ≤ 7)
    e_prime_sites: SitesRule = "average-preferred"
    #: I-25-2: E/e′, same choice (average ≥ 14 preferred; septal ≥ 15 / lateral ≥ 13 fallback)
    e_e_prime_sites: SitesRule = "average-preferred"
    #: I-25-3: TR velocity and PASP both present: "either" abnormal counts, or "tr-preferred"
    tr_or_pasp: Literal["either", "tr-preferred"] = "either"
    #: I-25-6: an incomplete step 1 goes to step 2 ("step-2", reference) or is decided when at
    #: least two available indices are concordant ("accept-concordant-available")
    incomplete_step_1: Literal["step-2", "accept-concordant-available"] = "step-2"
    #: I-25-5: supplementary markers: "any" abnormal → raised (reference), "majority", or
    #: "hierarchy" (first available of LA strain, PV S/D, LAVI, IVRT decides)
    supplementary: Literal["any", "majority", "hierarchy"] = "any"
    #: the AF algorithm's switches (I-25-9)
    af: atrial_fibrillation.Ase2025AfOptions = Field(
        default_factory=atrial_fibrillation.Ase2025AfOptions
    )


#: the options used when none are passed
DEFAULT_OPTIONS = Ase2025Options()

NAMES: dict[Measure, tuple[str, str]] = {
    **special_situations.NAMES,
    **atrial_fibrillation.NAMES,
    **T.NAMES,
}

_Result = tuple[Grade, FillingPressure]


def assess(
    measurements: Measurements, context: Context, options: Ase2025Options | None = None
) -> Assessment:
    """Grade by ASE 2025, with the borderline check and the Valsalva finding."""
    opts = options or DEFAULT_OPTIONS

    def regrade(m: Measurements, ctx: Context) -> Assessment:
        return _assess(m, ctx, opts)

    result = _assess(measurements, context, opts)
    flags = borderline_flags(result, measurements, context, regrade, NAMES)
    if flags:
        result = result.model_copy(update={"borderline": flags})
    return valsalva.attach(result, measurements)


def _assess(measurements: Measurements, context: Context, opts: Ase2025Options) -> Assessment:
    # a stated rhythm the algorithms do not cover (atrial flutter, pacing, ...): no grade,
    # whatever else applies (shared reference §1.1)
    if context.rhythm is Rhythm.other:
        return special_situations.rhythm_not_covered(
            measurements, context, Guideline.ase_2025, CITATION, RULE_SET_VERSION
        )
    if context.special_situations:
        return special_situations.assess(
            measurements, context, Guideline.ase_2025, CITATION, RULE_SET_VERSION
        )
    if context.rhythm is Rhythm.af:
        return atrial_fibrillation.assess_2025(
            measurements, context, CITATION, RULE_SET_VERSION, opts.af
        )
    if context.rhythm is Rhythm.unknown and special_situations.a_wave_missing(measurements):
        return special_situations.possible_af(
            measurements, context, Guideline.ase_2025, CITATION, RULE_SET_VERSION
        )

    trace = Trace(measurements)
    if special_situations.a_wave_missing(measurements):
        trace.note(
            "The mitral A wave is missing although E was measured in sinus rhythm (E-A fusion?): "
            "E/A is unavailable for the grade."
        )
    trace.note_unstated_rhythm(context)
    if context.rhythm is Rhythm.sinus:
        rhythm = "sinus rhythm" + (f" ({context.rhythm_source})" if context.rhythm_source else "")
        reason = (
            f"{rhythm}, no special situation: the ASE 2025 general algorithm (Figure 3) "
            "applies at any LVEF"
        )
    else:  # the rhythm assumed: the study note says so once
        reason = (
            "no special situation: the ASE 2025 general algorithm for sinus rhythm (Figure 3) "
            "applies at any LVEF"
        )
    trace.say(f"{sentence_start(reason)}.")
    grade, pressure = _general(trace, opts)
    return Assessment(
        **base_fields(Guideline.ase_2025, CITATION, RULE_SET_VERSION, context),
        pathway=Pathway.sinus_general,
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


# ---------------------------------------------------------------------------------------------
# Step 1 indices
# ---------------------------------------------------------------------------------------------


def _sites(
    trace: Trace,
    average: Threshold,
    septal: Threshold,
    lateral: Threshold,
    rule: SitesRule,
    prefix: str,
    group: str,
) -> Verdict:
    """Average preferred (site cut-offs as fallback, either site counting) or any site."""
    m = trace.measurements
    rows = (average, septal, lateral)
    if rule == "any-site":
        present = [row for row in rows if value_of(m, row.measure) is not None] or [average]
        g = group if len(present) > 1 else ""
        return any_of(
            trace.check(row, f"{prefix}.{row.key}", STEP_1, group=g).verdict for row in present
        )
    if value_of(m, average.measure) is not None:
        return trace.check(average, f"{prefix}.{average.key}", STEP_1).verdict
    singles = [row for row in (septal, lateral) if value_of(m, row.measure) is not None]
    if not singles:
        return trace.check(average, f"{prefix}.{average.key}", STEP_1).verdict
    names = " and ".join(in_sentence(row.name) for row in singles)
    trace.note(
        f"{average.name} was not available; {names} used with the site cut-off"
        f"{' (either site counts)' if len(singles) == 2 else ''}."
    )
    g = group if len(singles) == 2 else ""
    return any_of(
        trace.check(row, f"{prefix}.{row.key}", STEP_1, group=g).verdict for row in singles
    )


def _tr_or_pasp(trace: Trace, rule: str, prefix: str) -> Verdict:
    m = trace.measurements
    if rule == "tr-preferred" and value_of(m, Measure.tr_peak_velocity) is not None:
        return trace.check(T.TR_VELOCITY, f"{prefix}.tr_peak_velocity", STEP_1).verdict
    one = "TR velocity or PASP: one criterion"
    return any_of(
        (
            trace.check(T.TR_VELOCITY, f"{prefix}.tr_peak_velocity", STEP_1, group=one).verdict,
            trace.check(T.PASP, f"{prefix}.pasp", STEP_1, group=one).verdict,
        )
    )


# ---------------------------------------------------------------------------------------------
# General algorithm
# ---------------------------------------------------------------------------------------------


def _general(trace: Trace, opts: Ase2025Options) -> _Result:
    p = "ase25.s1"
    # the switch settings in force decide the words of these readings
    trace.reading("I-25-1", opts.e_prime_sites)
    trace.reading("I-25-2", opts.e_e_prime_sites)
    trace.reading("I-25-3", opts.tr_or_pasp)
    e = _sites(
        trace,
        T.E_PRIME_AVERAGE,
        T.E_PRIME_SEPTAL,
        T.E_PRIME_LATERAL,
        opts.e_prime_sites,
        p,
        "e′ (average, septal or lateral): one criterion",
    )
    r = _sites(
        trace,
        T.E_E_PRIME_AVERAGE,
        T.E_E_PRIME_SEPTAL,
        T.E_E_PRIME_LATERAL,
        opts.e_e_prime_sites,
        p,
        "E/e′ (average, septal or lateral): one criterion",
    )
    t = _tr_or_pasp(trace, opts.tr_or_pasp, p)
    lap = _step_1(trace, opts, e, r, t)
    if lap is None:
        lap = _step_2(trace, opts)
        if lap is None:
            return Grade.not_gradable, FillingPressure.not_estimated
    return _grade(trace, lap, e)


def _words(v: Verdict, abnormal: str, normal: str) -> str:
    return {Verdict.met: abnormal, Verdict.not_met: normal, Verdict.unavailable: "not available"}[v]


def _step_1(
    trace: Trace, opts: Ase2025Options, e: Verdict, r: Verdict, t: Verdict
) -> FillingPressure | None:
    """LAP from concordant step-1 indices, or None when step 2 must decide (readings I-25-4,
    I-25-6)."""
    pattern = (
        f"e′ {_words(e, 'reduced', 'normal')}, E/e′ {_words(r, 'raised', 'normal')}, "
        f"TR velocity/PASP {_words(t, 'raised', 'normal')}"
    )
    known = [v for v in (e, r, t) if v is not Verdict.unavailable]
    if len(known) == 3:
        if (e, r, t) == (Verdict.not_met,) * 3:
            trace.say(f"Step 1: {pattern}: concordant, normal LAP.")
            return FillingPressure.normal
        if (e, r, t) == (Verdict.met,) * 3:
            trace.say(f"Step 1: {pattern}: concordant, raised LAP.")
            return FillingPressure.elevated
        if (e, r, t) == (Verdict.met, Verdict.not_met, Verdict.not_met):
            return _reduced_e_prime_alone(trace, opts, pattern)
        trace.say(f"Step 1: {pattern}: discordant; step 2 decides.")
        trace.reading("I-25-4")
        return None
    if opts.incomplete_step_1 == "accept-concordant-available" and len(known) >= 2:
        pressure_markers = [v for v in (r, t) if v is not Verdict.unavailable]
        if pressure_markers and all(v is Verdict.not_met for v in pressure_markers):
            if e is Verdict.met:
                return _reduced_e_prime_alone(trace, opts, pattern)
            trace.say(
                f"Step 1: {pattern}: incomplete but the available indices are concordant: "
                "normal LAP."
            )
            trace.reading("I-25-6", opts.incomplete_step_1)
            return FillingPressure.normal
        if pressure_markers and all(v is Verdict.met for v in known):
            trace.say(
                f"Step 1: {pattern}: incomplete but the available indices are concordant: "
                "raised LAP."
            )
            trace.reading("I-25-6", opts.incomplete_step_1)
            return FillingPressure.elevated
    trace.say(f"Step 1: {pattern}: incomplete; step 2 decides.")
    trace.reading("I-25-6", opts.incomplete_step_1)
    missing = [
        name
        for name, v in zip(("e′", "E/e′", "TR velocity/PASP"), (e, r, t), strict=True)
        if v is Verdict.unavailable
    ]
    trace.note(f"Step 1 indices not available: {', '.join(missing)}.")
    return None


def _reduced_e_prime_alone(
    trace: Trace, opts: Ase2025Options, pattern: str
) -> FillingPressure | None:
    # reading I-25-4: reduced e′ with normal E/e′ and TR is normal LAP, grade I
    trace.say(f"Step 1: {pattern}: impaired relaxation with normal LAP markers, normal LAP.")
    trace.reading("I-25-4")
    return FillingPressure.normal


def _step_2(trace: Trace, opts: Ase2025Options) -> FillingPressure | None:
    """Supplementary markers (reading I-25-5).  None when no index of either step is
    available."""
    p = "ase25.s2"
    trace.reading("I-25-5", opts.supplementary)
    rows = [T.LA_RESERVOIR_STRAIN, T.PV_S_D, T.LAVI, T.IVRT]  # IVRT an equal marker (reference)
    checked = [(row, trace.check(row, f"{p}.{row.key}", STEP_2)) for row in rows]
    votes = [c.verdict for _, c in checked]
    t = tally(votes)
    if t.available == 0:
        if not any(c.verdict is not Verdict.unavailable for c in trace.criteria):
            trace.say("No index of step 1 or step 2 is available: not gradable.")
            trace.note("Not gradable: e′, E/e′, TR velocity, PASP and all step-2 markers missing.")
            return None
        trace.say("Step 2: no supplementary marker is available: LAP indeterminate.")
        trace.note(
            "Step 2 needs LA reservoir strain, PV S/D, LAVI or IVRT; ASE 2025 suggests exercise "
            "echocardiography or other tests in symptomatic patients."
        )
        return FillingPressure.indeterminate
    markers = count_of(t.met, t.available, "supplementary marker", "supplementary markers")
    counted = f"{markers} abnormal"
    if opts.supplementary == "hierarchy":
        row, first = next((row, c) for row, c in checked if c.verdict is not Verdict.unavailable)
        lap = FillingPressure.elevated if first.verdict is Verdict.met else FillingPressure.normal
        trace.say(
            f"Step 2: {in_sentence(row.name)} is the first available marker and decides: "
            f"{'raised' if lap is FillingPressure.elevated else 'normal'} LAP."
        )
        return lap
    if opts.supplementary == "majority":
        if 2 * t.met > t.available:
            trace.say(f"Step 2: {counted} (more than half): raised LAP.")
            return FillingPressure.elevated
        if 2 * t.met < t.available:
            trace.say(f"Step 2: {counted} (less than half): normal LAP.")
            return FillingPressure.normal
        trace.say(f"Step 2: {counted} (exactly half): LAP indeterminate.")
        return FillingPressure.indeterminate
    if t.met >= 1:
        trace.say(f"Step 2: {counted} (any one suffices): raised LAP.")
        return FillingPressure.elevated
    trace.say(f"Step 2: {counted}: normal LAP.")
    return FillingPressure.normal


def _grade(trace: Trace, lap: FillingPressure, e: Verdict) -> _Result:
    if lap is FillingPressure.indeterminate:
        trace.say("LAP indeterminate: no grade.")
        return Grade.indeterminate, FillingPressure.indeterminate
    if lap is FillingPressure.normal:
        if e is Verdict.met:
            trace.say("Normal LAP with reduced e′: grade I (impaired relaxation).")
            return Grade.grade_1, FillingPressure.normal
        if e is Verdict.not_met:
            trace.say("Normal LAP with normal e′: normal diastolic function.")
            return Grade.normal, FillingPressure.normal
        trace.say("Normal LAP but e′ is not available: the grade cannot be assigned.")
        trace.note("Normal LAP; grade not assignable without e′ (normal or grade I).")
        trace.reading("I-25-7")
        trace.grade_range = GradeRange.normal_or_grade_1
        return Grade.indeterminate, FillingPressure.normal
    c = trace.check(T.E_A_HIGH, "ase25.grade.e_a_ratio_high", STEP_GRADE)
    if e is Verdict.not_met:
        trace.note(
            "Raised LAP with normal e′: consider constriction, mitral regurgitation or a "
            "high-output state."
        )
        trace.reading("I-25-7")
    if c.verdict is Verdict.unavailable:
        trace.say("Raised LAP but E/A is not available: grade II or III.")
        trace.reading("I-25-8")
        trace.note("Raised LAP; E/A needed to tell grade II from grade III.")
        trace.grade_range = GradeRange.grade_2_or_3
        return Grade.indeterminate, FillingPressure.elevated
    if c.verdict is Verdict.met:
        trace.say("Raised LAP with E/A ≥ 2: grade III.")
        return Grade.grade_3, FillingPressure.elevated
    trace.say("Raised LAP with E/A < 2: grade II.")
    return Grade.grade_2, FillingPressure.elevated

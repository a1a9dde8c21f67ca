"""Filling pressure in atrial fibrillation: the AF rules of ASE/EACVI 2016 and of ASE 2025.

In atrial fibrillation neither guideline grades diastolic function; they estimate LV filling
pressure only.  The result therefore carries pathway "atrial-fibrillation", grade
"not-applicable" (outcome "atrial-fibrillation", never counted as "not gradable") and the
filling-pressure estimate: elevated, normal or indeterminate by the AF criteria, or not
estimated when none of them is available.

* ASE/EACVI 2016 (Nagueh SF et al., J Am Soc Echocardiogr 2016;29:277-314, §V.E, p295) lists
  criteria that each support elevated filling pressure but states no rule to combine them
  (reading I-16-11).  By default every criterion is reported and the filling pressure is left
  indeterminate; a switch enables the majority summary the project's reference offers.
* ASE 2025 (Nagueh SF et al., J Am Soc Echocardiogr 2025;38(7), doi 10.1016/j.echo.2025.03.011,
  AF algorithm) is a two-step rule: four primary criteria, then LA reservoir strain, PV S/D and
  BMI when exactly two primary criteria are met (reading I-25-9).

The ASE/EACVI 2016 AF rows are in :mod:`service.grading.thresholds_ase2016` and the ASE 2025
rows in :mod:`service.grading.thresholds_ase2025` (one cited table per guideline).
"""

from __future__ import annotations

from typing import Literal

from pydantic import BaseModel, ConfigDict, Field

from service.grading import thresholds_ase2016 as T16
from service.grading import thresholds_ase2025 as T25
from service.grading.criteria import Threshold, any_of, tally, value_of
from service.grading.thresholds_ase2016 import (
    AF16_DECELERATION_TIME,
    AF16_E_ACCELERATION,
    AF16_E_E_PRIME_SEPTAL,
    AF16_IVRT,
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
    Verdict,
)
from service.wording import count_of, supporting_count


class Ase2016AfOptions(BaseModel):
    """Switches for the ASE/EACVI 2016 AF criteria."""

    model_config = ConfigDict(frozen=True, extra="forbid")

    #: reading I-16-11: ASE/EACVI 2016 states no rule combining the AF criteria.  "flags-only"
    #: (default) reports each criterion and leaves the filling pressure indeterminate;
    #: "majority" adds the reference's optional summary (more than half of the available
    #: criteria met: elevated, less than half: normal, exactly half: indeterminate).
    summary: Literal["flags-only", "majority"] = "flags-only"


class Ase2025AfOptions(BaseModel):
    """Switches for the ASE 2025 AF algorithm (reading I-25-9)."""

    model_config = ConfigDict(frozen=True, extra="forbid")

    #: step 2 "raised" rule: "two-of-three" (default, reference) or "any-one" positive
    secondary_raised: Literal["two-of-three", "any-one"] = "two-of-three"
    #: availability guard: at most one primary criterion met gives "normal" only when at least
    #: this many primary criteria are available (default 3, reading I-25-9)
    min_primary_for_normal: int = Field(default=3, ge=0, le=4)


# --- ASE/EACVI 2016 AF rows (in :mod:`service.grading.thresholds_ase2016`) ---------------------

TABLE_2016: tuple[Threshold, ...] = T16.AF_TABLE

#: ASE/EACVI 2016 AF criteria that no canonical measure carries
UNREAD_2016 = (
    "deceleration time of the pulmonary-vein diastolic velocity ≤ 220 ms",
    "E/Vp ≥ 1.4",
)

NAMES: dict[Measure, tuple[str, str]] = {
    row.measure: (row.name, row.unit)
    for row in (
        *TABLE_2016,
        T25.AF_MITRAL_E,
        T25.AF_E_E_PRIME_SEPTAL,
        T25.AF_TR_VELOCITY,
        T25.AF_PASP,
        T25.AF_DECELERATION_TIME,
        T25.AF_LA_RESERVOIR_STRAIN,
        T25.AF_PV_S_D,
        T25.AF_BMI,
    )
}


def _rhythm_words(context: Context) -> str:
    return f" ({context.rhythm_source})" if context.rhythm_source else ""


def _result(
    trace: Trace,
    context: Context,
    guideline: Guideline,
    citation: str,
    version: str,
    rules: str,
    pressure: FillingPressure,
) -> Assessment:
    # the rules applied are named by the conclusion ("... by the ... atrial-fibrillation
    # criteria"); the reason says where the rhythm came from
    reason = "atrial fibrillation" + (f", {context.rhythm_source}" if context.rhythm_source else "")
    return Assessment(
        **base_fields(guideline, citation, version, context),
        pathway=Pathway.atrial_fibrillation,
        pathway_reason=reason,
        grade=Grade.not_applicable,
        filling_pressure=pressure,
        criteria=tuple(trace.criteria),
        reasoning=tuple(trace.reasoning),
        notes=tuple(trace.notes),
        context_notes=tuple(trace.context_notes),
        readings=tuple(trace.readings),
    )


# ---------------------------------------------------------------------------------------------
# ASE/EACVI 2016
# ---------------------------------------------------------------------------------------------


def assess_2016(
    measurements: Measurements,
    context: Context,
    citation: str,
    version: str,
    options: Ase2016AfOptions | None = None,
) -> Assessment:
    """ASE/EACVI 2016 AF criteria: each reported; summary only when the switch asks for it."""
    opts = options or Ase2016AfOptions()
    trace = Trace(measurements)
    step = "atrial fibrillation"
    p = "ase16.af"
    rows: list[Threshold] = [AF16_E_ACCELERATION, AF16_IVRT, AF16_E_E_PRIME_SEPTAL]
    lvef = value_of(measurements, Measure.lvef)
    if lvef is not None and lvef < context.lvef_reduced_below:
        rows.append(AF16_DECELERATION_TIME)
    else:
        trace.note(
            "Atrial fibrillation: mitral DT ≤ 160 ms was not used; ASE/EACVI 2016 applies it "
            "only with reduced LVEF" + (" (LVEF not available)." if lvef is None else ".")
        )
    votes = [trace.check(row, f"{p}.{row.key}", step).verdict for row in rows]
    trace.note(
        "Atrial fibrillation criteria not read by this service: " + "; ".join(UNREAD_2016) + "."
    )
    t = tally(votes)
    if t.available == 0:
        trace.say(
            "None of the atrial-fibrillation criteria is available: filling pressure not estimated."
        )
        pressure = FillingPressure.not_estimated
    else:
        # the decision only: why the criteria are combined this way (the guideline states no
        # rule) is said once, by the reading I-16-11 the result carries
        counted = supporting_count(t.met, t.available)
        if opts.summary == "majority":
            pressure, words = t.majority()
            trace.say(f"{counted} ({words} filling pressure).")
        else:
            pressure = FillingPressure.indeterminate
            trace.say(f"{counted}: filling pressure indeterminate.")
        trace.reading("I-16-11", opts.summary)
    return _result(
        trace,
        context,
        Guideline.ase_eacvi_2016,
        citation,
        version,
        "ASE/EACVI 2016 atrial-fibrillation criteria",
        pressure,
    )


# ---------------------------------------------------------------------------------------------
# ASE 2025
# ---------------------------------------------------------------------------------------------


def assess_2025(
    measurements: Measurements,
    context: Context,
    citation: str,
    version: str,
    options: Ase2025AfOptions | None = None,
) -> Assessment:
    """ASE 2025 two-step AF rule (filling pressure only)."""
    opts = options or Ase2025AfOptions()
    trace = Trace(measurements)
    pressure = _two_step(trace, opts)
    return _result(
        trace,
        context,
        Guideline.ase_2025,
        citation,
        version,
        "ASE 2025 two-step atrial-fibrillation algorithm",
        pressure,
    )


def _two_step(trace: Trace, opts: Ase2025AfOptions) -> FillingPressure:
    s1, s2 = "AF step 1", "AF step 2"
    p = "ase25.af"
    e = trace.check(T25.AF_MITRAL_E, f"{p}.mitral_e", s1).verdict
    r = trace.check(T25.AF_E_E_PRIME_SEPTAL, f"{p}.e_e_prime_septal", s1).verdict
    one = "TR velocity or PASP: one criterion"
    t = any_of(
        (
            trace.check(T25.AF_TR_VELOCITY, f"{p}.tr_peak_velocity", s1, group=one).verdict,
            trace.check(T25.AF_PASP, f"{p}.pasp", s1, group=one).verdict,
        )
    )
    dt = trace.check(T25.AF_DECELERATION_TIME, f"{p}.deceleration_time", s1).verdict
    primary = tally((e, r, t, dt))
    if primary.available == 0:
        trace.say(
            "AF step 1: none of the 4 primary criteria is available; filling pressure not "
            "estimated."
        )
        return FillingPressure.not_estimated
    criteria = count_of(primary.met, primary.available, "primary criterion", "primary criteria")
    counted = f"{criteria} met"
    if primary.met >= 3:
        trace.say(f"AF step 1: {counted} (3 or more): elevated filling pressure.")
        return FillingPressure.elevated
    if primary.met <= 1:
        if primary.available >= opts.min_primary_for_normal:
            trace.say(f"AF step 1: {counted} (at most 1): normal filling pressure.")
            return FillingPressure.normal
        trace.say(
            f"AF step 1: {counted}, but at least {opts.min_primary_for_normal} must be available "
            "before normal can be called: filling pressure indeterminate."
        )
        trace.reading("I-25-9")
        trace.note("AF step 1: too few primary criteria available to call filling pressure normal.")
        return FillingPressure.indeterminate
    trace.say(f"AF step 1: {counted} (exactly 2): step 2 decides.")
    secondary = [
        trace.check(T25.AF_LA_RESERVOIR_STRAIN, f"{p}.la_reservoir_strain", s2).verdict,
        trace.check(T25.AF_PV_S_D, f"{p}.pv_s_d_ratio", s2).verdict,
        trace.check(T25.AF_BMI, f"{p}.bmi", s2).verdict,
    ]
    st = tally(secondary)
    positive, negative = st.met, st.not_met
    summary = f"{positive} positive and {negative} negative of 3 secondary criteria"
    need_raised = 2 if opts.secondary_raised == "two-of-three" else 1
    need_normal = 2  # two of three negative: normal (reading I-25-9)
    trace.reading("I-25-9")
    if positive >= need_raised:
        trace.say(f"AF step 2: {summary}: elevated filling pressure.")
        return FillingPressure.elevated
    if negative >= need_normal:
        trace.say(f"AF step 2: {summary}: normal filling pressure.")
        return FillingPressure.normal
    trace.say(f"AF step 2: {summary}: filling pressure indeterminate.")
    if st.available < 3:
        missing = [
            name
            for name, v in zip(("LA reservoir strain", "PV S/D", "BMI"), secondary, strict=True)
            if v is Verdict.unavailable
        ]
        trace.note(f"AF step 2 criteria not available: {', '.join(missing)}.")
    return FillingPressure.indeterminate

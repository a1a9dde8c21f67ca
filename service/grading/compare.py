"""Every implemented guideline on the same measurements, side by side.

``assess_all`` runs each implemented rule set, the primary first, and writes one plain-language
sentence for every other guideline whose grade or filling pressure differs from the primary's,
naming the criterion that makes the difference where one does (e.g. "ASE/EACVI 2016: grade I
diastolic dysfunction, LV filling pressure normal; ASE 2025: normal diastolic function, LV
filling pressure normal — e′ is abnormal by the ASE/EACVI 2016 cut-off (septal e′ 6.5 cm/s
against < 7 cm/s) but not by the ASE 2025 cut-off (septal e′ 6.5 cm/s against ≤ 6 cm/s).").
"""

from __future__ import annotations

from service.grading import IMPLEMENTED_GUIDELINES, RuleSwitches, assess
from service.grading.criteria import SYMBOLS, fmt
from service.model import (
    Assessment,
    AssessmentSet,
    Comparison,
    Context,
    Criterion,
    FillingPressure,
    Guideline,
    Measure,
    Measurements,
    Pathway,
    Verdict,
)
from service.wording import in_sentence, outcome_phrase

LABELS: dict[Guideline, str] = {
    Guideline.ase_eacvi_2016: "ASE/EACVI 2016",
    Guideline.ase_2025: "ASE 2025",
    Guideline.bse_2024: "BSE 2024",
}

_HIGH = {Comparison.gt, Comparison.ge}
_OUTSIDE_STANDARD = {Pathway.atrial_fibrillation, Pathway.special_situation, Pathway.not_applicable}
_MAX_REASONS = 3


def assess_all(
    measurements: Measurements,
    context: Context,
    primary: Guideline,
    switches: RuleSwitches | None = None,
) -> AssessmentSet:
    """Evaluate every implemented guideline; the primary first (UserError if it is not
    implemented), then the others in their declared order."""
    first = assess(measurements, context, primary, switches)
    others = tuple(
        assess(measurements, context, g, switches)
        for g in IMPLEMENTED_GUIDELINES
        if g != first.guideline
    )
    disagreements = tuple(
        s for other in others if (s := disagreement(first, other, measurements)) is not None
    )
    return AssessmentSet(primary=first, others=others, disagreements=disagreements)


def outcome_words(a: Assessment) -> str:
    """E.g. "grade II diastolic dysfunction, LV filling pressure elevated"."""
    return outcome_phrase(a)


def disagreement(primary: Assessment, other: Assessment, measurements: Measurements) -> str | None:
    """One sentence when grade or filling pressure differ, else None."""
    if (primary.grade, primary.filling_pressure) == (other.grade, other.filling_pressure):
        return None
    p, o = LABELS[primary.guideline], LABELS[other.guideline]
    head = f"{p}: {outcome_words(primary)}; {o}: {outcome_words(other)}"
    return f"{head} — {_because(primary, other)}."


def _because(primary: Assessment, other: Assessment) -> str:
    p, o = LABELS[primary.guideline], LABELS[other.guideline]
    if primary.pathway != other.pathway and (
        primary.pathway in _OUTSIDE_STANDARD or other.pathway in _OUTSIDE_STANDARD
    ):
        return f"{p}: {primary.pathway_reason}; {o}: {other.pathway_reason}"
    # a finding the two cut-offs judge differently explains the difference; failing that, the
    # reasoning that left a result undecided (e.g. no rule combining the criteria), then the
    # findings only one of them uses
    reasons = _differing_groups(primary, other)
    if not reasons:
        reasons = [r for a in (primary, other) if (r := _why_undecided(a))]
    if len(reasons) < _MAX_REASONS:
        only = _used_by_one(primary, other) + _used_by_one(other, primary)
        only.sort(key=lambda pair: not pair[0])  # abnormal findings first
        reasons += [text for _, text in only]
    if reasons:
        return "; ".join(reasons[:_MAX_REASONS])
    return (
        f"the two rule sets combine the same findings differently ({p}: {primary.pathway_reason})"
    )


#: measures that play the same part in every rule set, compared as one finding
GROUPS: dict[Measure, str] = {
    Measure.e_prime_septal: "e′",
    Measure.e_prime_lateral: "e′",
    Measure.e_prime_average: "e′",
    Measure.e_e_prime_septal: "E/e′",
    Measure.e_e_prime_lateral: "E/e′",
    Measure.e_e_prime_average: "E/e′",
    Measure.tr_peak_velocity: "TR velocity or PASP",
    Measure.pasp: "TR velocity or PASP",
}


def _why_undecided(a: Assessment) -> str | None:
    """The reasoning sentence that left an indeterminate result undecided, if any."""
    if a.filling_pressure not in (FillingPressure.indeterminate, FillingPressure.not_estimated):
        return None
    for sentence in reversed(a.reasoning):
        low = sentence.lower()
        if any(k in low for k in ("indeterminate", "not estimated", "not gradable")):
            text = sentence.rstrip(".")
            return f"{LABELS[a.guideline]}: {in_sentence(text)}"
    return None


def _side(c: Criterion) -> bool:
    return c.comparison in _HIGH


def _cut(c: Criterion, unit: str) -> str:
    u = f" {unit}" if unit else ""
    return f"{SYMBOLS[c.comparison]} {fmt(c.threshold)}{u}"


def _name_and_unit(c: Criterion) -> tuple[str, str]:
    """Split a label such as "Septal e′ ≤ 6 cm/s" into ("septal e′", "cm/s")."""
    for symbol in SYMBOLS.values():
        marker = f" {symbol} "
        if marker in c.label:
            name, rest = c.label.split(marker, 1)
            unit = rest.split(" ", 1)[1] if " " in rest else ""
            return in_sentence(name), unit
    return c.measure.value, ""  # pragma: no cover - labels always carry a symbol


def _finding(c: Criterion) -> str:
    """E.g. "septal e′ 6.5 cm/s against < 7 cm/s"."""
    name, unit = _name_and_unit(c)
    u = f" {unit}" if unit else ""
    return f"{name} {fmt(c.value or 0.0)}{u} against {_cut(c, unit)}"


def _grouped(a: Assessment) -> dict[tuple[str, bool], list[Criterion]]:
    out: dict[tuple[str, bool], list[Criterion]] = {}
    for c in a.criteria:
        if c.value is None or c.step == "routing":
            continue
        key = (GROUPS.get(c.measure, c.measure.value), _side(c))
        out.setdefault(key, []).append(c)
    return out


def _differing_groups(primary: Assessment, other: Assessment) -> list[str]:
    """Findings (e′, E/e′, TR/PASP, or one measure) that one rule set counts as abnormal and the
    other, with a value available, does not."""
    gp, go = _grouped(primary), _grouped(other)
    out: list[str] = []
    for key, cps in gp.items():
        cos = go.get(key)
        if not cos:
            continue
        met_p = any(c.verdict is Verdict.met for c in cps)
        met_o = any(c.verdict is Verdict.met for c in cos)
        if met_p == met_o:
            continue
        (yes, yes_c), (no, no_c) = (
            ((primary, cps), (other, cos)) if met_p else ((other, cos), (primary, cps))
        )
        shown_yes = "; ".join(_finding(c) for c in yes_c if c.verdict is Verdict.met)
        shown_no = "; ".join(_finding(c) for c in no_c)
        group = GROUPS.get(cps[0].measure) or _name_and_unit(cps[0])[0]
        out.append(
            f"{group} is abnormal by the {LABELS[yes.guideline]} cut-off ({shown_yes}) but not "
            f"by the {LABELS[no.guideline]} cut-off ({shown_no})"
        )
    return out


def _used_by_one(a: Assessment, b: Assessment) -> list[tuple[bool, str]]:
    """Available criteria of ``a`` on findings that ``b`` did not evaluate with a value, each
    with whether it is abnormal."""
    used_by_b = {key[0] for key in _grouped(b)}
    out: list[tuple[bool, str]] = []
    seen: set[str] = set()
    for (group, _), cs in _grouped(a).items():
        if group in used_by_b or group in seen:
            continue
        seen.add(group)
        c = next((x for x in cs if x.verdict is Verdict.met), cs[0])
        abnormal = c.verdict is Verdict.met
        out.append(
            (
                abnormal,
                f"only {LABELS[a.guideline]} uses {_finding(c)} "
                f"({'abnormal' if abnormal else 'normal'})",
            )
        )
    return out

"""Every implemented guideline on the same measurements, side by side.

``assess_all`` runs each implemented rule set, the primary first, and writes one plain-language
sentence for every other guideline whose grade or filling pressure differs from the primary's,
naming the criterion that makes the difference where one does (e.g. "ASE/EACVI 2016: grade 1
(normal filling pressure); ASE 2025: normal function (normal filling pressure) — septal e′ 6.5
cm/s meets the ASE/EACVI 2016 cut-off (< 7 cm/s) but not the ASE 2025 cut-off (≤ 6 cm/s).").
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
    Grade,
    Guideline,
    Measurements,
    Pathway,
    Verdict,
)

LABELS: dict[Guideline, str] = {
    Guideline.ase_eacvi_2016: "ASE/EACVI 2016",
    Guideline.ase_2025: "ASE 2025",
    Guideline.bse_2024: "BSE 2024",
}

_GRADE_WORDS: dict[Grade, str] = {
    Grade.normal: "normal function",
    Grade.grade_1: "grade 1",
    Grade.grade_2: "grade 2",
    Grade.grade_3: "grade 3",
    Grade.indeterminate: "grade indeterminate",
    Grade.not_gradable: "no grade",
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
    """E.g. "grade 2 (elevated filling pressure)"."""
    pressure = {
        FillingPressure.normal: "normal filling pressure",
        FillingPressure.elevated: "elevated filling pressure",
        FillingPressure.indeterminate: "filling pressure indeterminate",
        FillingPressure.unknown: "filling pressure unknown",
    }[a.filling_pressure]
    return f"{_GRADE_WORDS[a.grade]} ({pressure})"


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
    reasons = _differing_cut_offs(primary, other)
    if reasons:
        return "; ".join(reasons[:_MAX_REASONS])
    only = _used_by_one(primary, other) + _used_by_one(other, primary)
    if only:
        return "; ".join(only[:_MAX_REASONS])
    return (
        f"the two rule sets combine the same findings differently ({p}: {primary.pathway_reason})"
    )


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
            if name[1:2].islower():
                name = name[:1].lower() + name[1:]
            return name, unit
    return c.measure.value, ""  # pragma: no cover - labels always carry a symbol


def _differing_cut_offs(primary: Assessment, other: Assessment) -> list[str]:
    """Criteria on the same measure, same direction, same value, with different verdicts."""
    p, o = LABELS[primary.guideline], LABELS[other.guideline]
    out: list[str] = []
    seen: set[str] = set()
    for cp in primary.criteria:
        if cp.value is None or cp.measure.value in seen:
            continue
        for co in other.criteria:
            if co.measure != cp.measure or co.value is None or _side(co) != _side(cp):
                continue
            if co.verdict == cp.verdict:
                break
            seen.add(cp.measure.value)
            name, unit = _name_and_unit(co)
            u = f" {unit}" if unit else ""
            met, not_met = (cp, co) if cp.verdict is Verdict.met else (co, cp)
            met_by, not_by = (p, o) if met is cp else (o, p)
            out.append(
                f"{name} {fmt(cp.value)}{u} meets the {met_by} cut-off ({_cut(met, unit)}) "
                f"but not the {not_by} cut-off ({_cut(not_met, unit)})"
            )
            break
    return out


def _used_by_one(a: Assessment, b: Assessment) -> list[str]:
    """Available criteria of ``a`` on measures that ``b`` did not evaluate with a value."""
    used_by_b = {c.measure for c in b.criteria if c.value is not None}
    out: list[str] = []
    seen: set[str] = set()
    for c in a.criteria:
        if c.value is None or c.measure in used_by_b or c.measure.value in seen:
            continue
        seen.add(c.measure.value)
        name, unit = _name_and_unit(c)
        u = f" {unit}" if unit else ""
        verdict = "abnormal" if c.verdict is Verdict.met else "normal"
        out.append(
            f"only {LABELS[a.guideline]} uses {name} ({fmt(c.value)}{u}, {verdict} against "
            f"{_cut(c, unit)})"
        )
    return out

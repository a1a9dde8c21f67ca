"""The running record of one rule set's evaluation: criteria, reasoning and notes, in order.

Shared by the ASE 2025 rule set, the atrial-fibrillation rules and the special situations so each
of them records criteria the same way (pure data; no I/O).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

from service.grading.criteria import Threshold, describe, evaluate, value_of
from service.model import (
    CAUTION,
    Context,
    Criterion,
    Guideline,
    Measurements,
    Rhythm,
    SpecialSituation,
)


@dataclass
class Trace:
    measurements: Measurements
    criteria: list[Criterion] = field(default_factory=list)
    reasoning: list[str] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)

    def check(
        self, row: Threshold, criterion_id: str, step: str, threshold: float | None = None
    ) -> Criterion:
        """Evaluate a row on its measure, record the criterion and a reasoning sentence."""
        c = evaluate(
            row,
            value_of(self.measurements, row.measure),
            criterion_id=criterion_id,
            step=step,
            threshold=threshold,
        )
        self.criteria.append(c)
        self.reasoning.append(describe(c, row.name, row.unit))
        return c

    def note(self, text: str) -> None:
        if text not in self.notes:
            self.notes.append(text)

    def say(self, text: str) -> None:
        self.reasoning.append(text)

    def note_unstated_rhythm(self, context: Context) -> None:
        """Say so when the rhythm is unknown: the sinus-rhythm algorithm is applied to it."""
        if context.rhythm is Rhythm.unknown:
            self.note(
                "Cardiac rhythm was not stated; sinus rhythm was assumed for the algorithm"
                + (f" ({context.rhythm_source})." if context.rhythm_source else ".")
            )


def base_fields(
    guideline: Guideline, citation: str, version: str, context: Context
) -> dict[str, Any]:
    """The Assessment fields that depend only on the rule set and the context."""
    return {
        "guideline": guideline,
        "guideline_citation": citation,
        "rule_set_version": version,
        "rhythm": context.rhythm,
        "special_situations": tuple(sorted(context.special_situations)),
        "caution": CAUTION,
    }


def situation_words(situations: frozenset[SpecialSituation] | tuple[SpecialSituation, ...]) -> str:
    """ "mitral stenosis, heart transplant" (sorted, plain words)."""
    return ", ".join(sorted(s.value.replace("-", " ") for s in situations))

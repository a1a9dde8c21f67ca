"""The running record of one rule set's evaluation: criteria, reasoning and notes, in order.

Shared by the ASE 2025 rule set, the atrial-fibrillation rules and the special situations so each
of them records criteria the same way (pure data; no I/O).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

from service.grading import readings as R
from service.grading.criteria import Threshold, evaluate, value_of
from service.model import (
    CAUTION,
    Context,
    Criterion,
    GradeRange,
    Guideline,
    Measurements,
    Reading,
    Rhythm,
)

#: the note of a study whose rhythm was not stated, graded by a sinus-rhythm algorithm
UNSTATED_RHYTHM = "Cardiac rhythm was not stated; sinus rhythm was assumed for the algorithm."


@dataclass
class Trace:
    measurements: Measurements
    criteria: list[Criterion] = field(default_factory=list)
    reasoning: list[str] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)
    #: notes about the study that hold whichever guideline is applied (said once per result)
    context_notes: list[str] = field(default_factory=list)
    readings: list[Reading] = field(default_factory=list)
    #: what an indeterminate grade was narrowed to, when the algorithm got that far
    grade_range: GradeRange | None = None

    def check(
        self,
        row: Threshold,
        criterion_id: str,
        step: str,
        threshold: float | None = None,
        *,
        group: str = "",
    ) -> Criterion:
        """Evaluate a row on its measure and record the criterion: written once, with its
        value, rule, cut-off, verdict and source, wherever the result is shown.  The reasoning
        holds only the decisions made from the criteria (:meth:`say`), never a sentence per
        criterion.  ``group``: words for rows that count together as one criterion (e.g.
        "septal or lateral e′: one criterion").  A criterion already evaluated by an earlier
        step (same measure and cut-off, e.g. average E/e′ > 14 in Figure 8A and in Figure 8B
        step 2) is recorded once, with both steps named."""
        t = row.value if threshold is None else threshold
        for i, seen in enumerate(self.criteria):
            if (seen.measure, seen.comparison, seen.threshold) == (row.measure, row.comparison, t):
                if step and step not in seen.step.split(" and "):
                    seen = seen.model_copy(update={"step": f"{seen.step} and {step}"})
                    self.criteria[i] = seen
                return seen
        c = evaluate(
            row,
            value_of(self.measurements, row.measure),
            criterion_id=criterion_id,
            step=step,
            threshold=threshold,
        )
        if group:
            c = c.model_copy(update={"group": group})
        self.criteria.append(c)
        if row.reading:
            self.reading(row.reading)
        return c

    def reading(self, identifier: str, setting: str = "") -> None:
        """Record that the result relies on a reading of an ambiguous rule (said in words in
        the result, identified for software; never an identifier inside a sentence)."""
        if all(r.id != identifier for r in self.readings):
            self.readings.append(Reading(id=identifier, text=R.words(identifier, setting)))

    def note(self, text: str) -> None:
        if text not in self.notes:
            self.notes.append(text)

    def say(self, text: str) -> None:
        """Record a decision step: routing, a count and what it decided, a branch taken."""
        self.reasoning.append(text)

    def context_note(self, text: str) -> None:
        """A note about the study rather than about this rule set: every guideline applied to
        the study would say the same, so the result says it once."""
        if text not in self.context_notes:
            self.context_notes.append(text)

    def note_unstated_rhythm(self, context: Context) -> None:
        """Say so when the rhythm is unknown: the sinus-rhythm algorithm is applied to it."""
        if context.rhythm is Rhythm.unknown:
            self.context_note(UNSTATED_RHYTHM)


def base_fields(
    guideline: Guideline, citation: str, version: str, context: Context
) -> dict[str, Any]:
    """The Assessment fields that depend only on the rule set and the context."""
    return {
        "guideline": guideline,
        "guideline_citation": citation,
        "rule_set_version": version,
        "rhythm": context.rhythm,
        "rhythm_code": context.rhythm_code,
        "special_situations": tuple(sorted(context.special_situations)),
        "caution": CAUTION,
    }

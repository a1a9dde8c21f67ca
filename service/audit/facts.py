"""What the node records about a study when it grades it, for the audit: the outcome and
pathway, the measures present, the cut-offs a value sat on, whether the implemented guidelines
agree, which missing measure would or could have decided an undecided study, and the sending
device as the source SR's header states it.

Built in the grading process from the pipeline's outcome (:func:`study_facts`); nothing here
names the patient unless the caller asks for it (``audit.include_patient_identifiers``).
"""

from __future__ import annotations

import logging
from collections.abc import Sequence
from typing import Any

from pydantic import Field

from service.audit.counterfactual import MissingEffect, missing_effects
from service.model import (
    Assessment,
    Comparison,
    Context,
    Frozen,
    Guideline,
    Measure,
    Measurements,
    Outcome,
    Pathway,
)

log = logging.getLogger("diastolic_sr.audit")

#: version of what a facts record holds (stored with it)
FACTS_VERSION = 1
#: longest header text kept (Station Name is SH, 16; Manufacturer LO, 64)
_MAX_TEXT = 64


class Device(Frozen):
    """The sending device as the association and the source SR's header state it."""

    calling_ae: str = ""
    station_name: str = ""  # (0008,1010)
    manufacturer: str = ""  # (0008,0070)
    model: str = ""  # (0008,1090) Manufacturer's Model Name

    @property
    def key(self) -> str:
        """The calling AE title where the study came over the network, else the Station Name,
        else the manufacturer and model."""
        return (
            self.calling_ae
            or self.station_name
            or " ".join(p for p in (self.manufacturer, self.model) if p)
            or "unknown device"
        )


class BorderlineCut(Frozen):
    """A cut-off a value sat on (within measurement variability), and the criterion's words."""

    measure: Measure
    comparison: Comparison
    threshold: float
    label: str  # e.g. "Average E/e′ > 14"


class StudyFacts(Frozen):
    """One study's audit record (no patient identity unless configured)."""

    version: int = FACTS_VERSION
    #: the pipeline's status: graded, not-gradable, rejected
    status: str
    reason: str = ""
    outcome: Outcome | None = None
    pathway: Pathway | None = None
    guideline: Guideline | None = None
    #: canonical measures present (names as in the grade JSON)
    measures: tuple[Measure, ...] = ()
    borderline: tuple[BorderlineCut, ...] = ()
    #: guidelines evaluated on the same measurements (the primary first); empty when the
    #: comparison could not be made
    compared: tuple[Guideline, ...] = ()
    #: whether grade or filling pressure differ between them (None: not compared)
    disagreement: bool | None = None
    #: the outcome each other guideline gave, when they disagree
    other_outcomes: dict[Guideline, Outcome] = Field(default_factory=dict)
    missing: tuple[MissingEffect, ...] = ()
    device: Device = Field(default_factory=Device)
    patient_name: str = ""
    patient_id: str = ""


def _text(ds: Any, keyword: str) -> str:
    try:
        value = ds.get(keyword, "")
    except Exception:  # a value pydicom cannot decode: not worth failing the study for
        return ""
    text = " ".join(str(value or "").split())
    return "".join(ch for ch in text if ch.isprintable())[:_MAX_TEXT]


def device_of(datasets: Sequence[Any], calling_ae: str = "") -> Device:
    """The device: the calling AE, and the first Station Name, Manufacturer and model stated
    by a source."""
    found = {"station_name": "", "manufacturer": "", "model": ""}
    keywords = {
        "station_name": "StationName",
        "manufacturer": "Manufacturer",
        "model": "ManufacturerModelName",
    }
    for ds in datasets:
        for field, keyword in keywords.items():
            if not found[field]:
                found[field] = _text(ds, keyword)
    return Device(calling_ae=calling_ae.strip(), **found)


def _compared(
    assessments: Any, measurements: Measurements, context: Context, switches: Any
) -> tuple[tuple[Guideline, ...], bool | None, dict[Guideline, Outcome]]:
    """The guidelines compared and whether they disagree: the result's own comparison when
    grading made one, else every implemented guideline evaluated here (the audit's figure
    does not depend on ``grading.compare``)."""
    from service.grading import IMPLEMENTED_GUIDELINES, assess
    from service.grading.compare import disagreement

    primary: Assessment = assessments.primary
    others = tuple(assessments.others)
    if not others:
        quiet = context.model_copy(update={"borderline_fraction": 0.0})
        others = tuple(
            assess(measurements, quiet, g, switches)
            for g in IMPLEMENTED_GUIDELINES
            if g != primary.guideline
        )
    if not others:
        return (), None, {}
    differing = [o for o in others if disagreement(primary, o, measurements) is not None]
    guidelines = (primary.guideline, *(o.guideline for o in others))
    return guidelines, bool(differing), {o.guideline: o.outcome for o in differing}


def study_facts(
    outcome: Any,
    datasets: Sequence[Any],
    options: Any,
    *,
    calling_ae: str = "",
    patient_identity: bool = False,
) -> StudyFacts:
    """The audit record of one graded study (``outcome``: the pipeline's StudyOutcome;
    ``options``: its GradeOptions)."""
    status = str(getattr(outcome.status, "value", outcome.status))
    identity: dict[str, str] = {}
    if patient_identity and datasets:
        identity = {
            "patient_name": _text(datasets[0], "PatientName"),
            "patient_id": _text(datasets[0], "PatientID"),
        }
    base = {
        "status": status,
        "reason": outcome.reason or "",
        "device": device_of(datasets, calling_ae),
        **identity,
    }
    measurements: Measurements | None = getattr(outcome, "measurements", None)
    if measurements is not None:
        base["measures"] = tuple(m for m in Measure if m in measurements.values)
    assessments = getattr(outcome, "assessments", None)
    if assessments is None or measurements is None:
        return StudyFacts(**base)
    primary: Assessment = assessments.primary
    from service.pipeline import effective_context

    context = effective_context(list(outcome.documents), options.context)
    criteria = {c.id: c for c in primary.criteria}
    cuts = []
    for flag in primary.borderline:
        c = criteria.get(flag.criterion_id)
        if c is not None:
            cuts.append(
                BorderlineCut(
                    measure=flag.measure,
                    comparison=c.comparison,
                    threshold=flag.threshold,
                    label=c.label,
                )
            )
    compared, differs, other_outcomes = _compared(
        assessments, measurements, context, options.switches
    )
    missing = missing_effects(
        measurements, context, primary.guideline, options.switches, outcome=primary.outcome
    )
    return StudyFacts(
        **base,
        outcome=primary.outcome,
        pathway=primary.pathway,
        guideline=primary.guideline,
        borderline=tuple(cuts),
        compared=compared,
        disagreement=differs,
        other_outcomes=other_outcomes,
        missing=missing,
    )


def safe_study_facts(
    outcome: Any,
    datasets: Sequence[Any],
    options: Any,
    *,
    calling_ae: str = "",
    patient_identity: bool = False,
) -> StudyFacts | None:
    """:func:`study_facts`, or None (logged) when it fails: the audit never stops a result."""
    try:
        return study_facts(
            outcome,
            datasets,
            options,
            calling_ae=calling_ae,
            patient_identity=patient_identity,
        )
    except Exception:
        log.exception("audit facts of a study could not be built; the result goes out regardless")
        return None

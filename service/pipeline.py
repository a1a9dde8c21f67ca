"""One study in, one result SR out: the glue shared by the ``grade`` command and the service.

read (``sr.read``) -> map (``vocabulary.mapper``) -> grade (``grading``) -> write (``sr.write``).
Nothing here talks to the network or the journal; callers decide where results go.
"""

from __future__ import annotations

import functools
from collections.abc import Sequence
from datetime import datetime
from enum import StrEnum
from pathlib import Path

from pydantic import ConfigDict, Field
from pydicom import Dataset

from service import SOFTWARE_NAME, __version__
from service.errors import RejectedInput, UserError
from service.grading import RuleSwitches
from service.model import (
    Assessment,
    AssessmentSet,
    Code,
    CodedItem,
    Context,
    Frozen,
    Guideline,
    InstanceRef,
    Measurements,
    Outcome,
    Rhythm,
    SourceDocument,
)


class GradeOptions(Frozen):
    """Everything that decides the result besides the sources (part of the result's identity)."""

    guideline: Guideline = Guideline.ase_eacvi_2016
    context: Context = Field(default_factory=Context)
    compare: bool = False  # evaluate every implemented guideline, primary first
    #: documented readings of ambiguous published rules (defaults: the reference's readings)
    switches: RuleSwitches = Field(default_factory=RuleSwitches)
    uid_root: str | None = None  # None: 2.25 UUID-derived UIDs


class GradeStatus(StrEnum):
    graded = "graded"
    not_gradable = "not-gradable"
    rejected = "rejected"
    skipped = "skipped"  # deliberately not graded (e.g. a result this software wrote)


class StudyOutcome(Frozen):
    model_config = ConfigDict(frozen=True, extra="forbid", arbitrary_types_allowed=True)

    status: GradeStatus
    reason: str = ""
    study_instance_uid: str = ""
    documents: tuple[SourceDocument, ...] = ()
    measurements: Measurements | None = None
    assessments: AssessmentSet | None = None
    result: Dataset | None = None  # the result SR, ready to store or send
    #: sources the reader could not use, as (SOP Instance UID, reason); the study is graded
    #: from the others (rejected only when none is usable)
    set_aside: tuple[tuple[str, str], ...] = ()

    @property
    def assessment(self) -> Assessment | None:
        return None if self.assessments is None else self.assessments.primary

    @property
    def result_uid(self) -> str | None:
        return None if self.result is None else str(self.result.SOPInstanceUID)


# Rhythm values that the reader may find in a coded Cardiac Rhythm item (8884-9 LN).
CARDIAC_RHYTHM = ("LN", "8884-9")
#: atrial fibrillation: SNOMED CT (PS3.16 CID 3230, 3700) and the ECG code (CID 3415)
AF_VALUES = {("SCT", "49436004"), ("MDC", "10:9472")}
#: sinus rhythm in the forms that leave mitral inflow usable: normal sinus rhythm (SCT, CID
#: 3826); 106067008 SCT "Sinus rhythm" (from memory: not in pydicom's PS3.16 dictionary); and
#: from CID 3415 "Cardiac Rhythm": sinus rhythm, normal sinus rhythm, sinus bradycardia and
#: the sinus arrhythmias (respiratory and non-respiratory).  Sinus tachycardia is not among
#: them: with it E and A may fuse and the guidelines treat it apart.
SINUS_VALUES = {
    ("SCT", "64730000"),
    ("SCT", "106067008"),
    ("MDC", "10:9216"),
    ("MDC", "10:9232"),
    ("MDC", "10:9248"),
    ("MDC", "10:9280"),
    ("MDC", "10:9296"),
    ("MDC", "10:9312"),
}
#: values that say the rhythm is not known: read as no statement at all (SCT "Undetermined",
#: CID 230; SCT "Unknown", CID 3703)
UNSTATED_VALUES = {("SCT", "373068000"), ("SCT", "261665006")}
#: where a coded rhythm came from, in words (the source's UID is in the result's evidence list)
SOURCE_RHYTHM = "stated by a coded Cardiac Rhythm item in the source SR"


def rhythm_from_documents(
    documents: Sequence[SourceDocument],
) -> tuple[Rhythm, str, Code | None] | None:
    """The rhythm stated by a coded Cardiac Rhythm item, newest document first: sinus rhythm,
    atrial fibrillation, or any other stated rhythm (atrial flutter, a paced rhythm, sinus
    tachycardia, a code this service does not know) as ``Rhythm.other`` with its code, so that
    a configured default never stands in for a rhythm the source states."""
    for doc in sorted(documents, key=lambda d: d.created, reverse=True):
        item: CodedItem
        for item in doc.coded_items:
            if item.concept.key != CARDIAC_RHYTHM or item.value.key in UNSTATED_VALUES:
                continue
            if item.value.key in AF_VALUES:
                return Rhythm.af, SOURCE_RHYTHM, None
            if item.value.key in SINUS_VALUES:
                return Rhythm.sinus, SOURCE_RHYTHM, None
            return Rhythm.other, SOURCE_RHYTHM, item.value
    return None


def effective_context(documents: Sequence[SourceDocument], context: Context) -> Context:
    """A coded rhythm in the SR beats the configured default; special situations the SR states
    by a coded finding are added to the configured ones."""
    from service.sr.situations import situations_from_documents

    stated = situations_from_documents(documents)
    if stated:
        context = context.model_copy(
            update={
                "special_situations": context.special_situations | stated,
                "situations_stated": stated,
            }
        )
    found = rhythm_from_documents(documents)
    if found is None:
        if context.rhythm_source or context.rhythm is Rhythm.unknown:
            return context  # an unstated rhythm is said once, by the assessment's note
        return context.model_copy(update={"rhythm_source": "the configured default"})
    rhythm, source, code = found
    return context.model_copy(
        update={"rhythm": rhythm, "rhythm_source": source, "rhythm_code": code}
    )


def study_order(datasets: Sequence[Dataset]) -> list[Dataset]:
    """A study's sources in one order, whatever order they arrived in or were given in: by
    when each was made (Content Date and Time, else Instance Creation Date and Time;
    :func:`service.sr.read.created_at`), then by SOP Instance UID; a source that states
    neither comes last.  The node and ``grade`` both grade and summarise a study in this
    order (:func:`grade_study`, :func:`build_summary`), so a study gives the same result
    offline and on the node: the same evidence list, the same source whose patient and study
    modules the result copies, the same measurements where two sources overlap."""
    from service.sr.read import created_at

    def key(ds: Dataset) -> tuple[bool, str, str]:
        try:
            when = created_at(ds)
        except Exception:  # an undecodable date is no date
            when = ""
        return (not when, when, _instance_uid(ds))

    return sorted(datasets, key=key)


@functools.lru_cache(maxsize=64)
def _settings_digest(options: GradeOptions, table_digest: str) -> str:
    """Digest of the options and the mapping table (the same for every study graded under
    them: computed once; options are frozen and hashable)."""
    from service.sr.identity import config_digest

    return config_digest({"options": options.model_dump(mode="json"), "mapping": table_digest})


def result_identity(
    documents: Sequence[SourceDocument],
    options: GradeOptions,
    table_digest: str,
    rule_set_version: str,
) -> tuple[str, str]:
    """(SOP Instance UID, Series Instance UID) of the result: deterministic, so a re-sent study
    under the same rules, configuration and document layout yields the same instance (no
    duplicate in the PACS)."""
    from service.sr.identity import derive_uid
    from service.sr.write import DOCUMENT_LAYOUT

    sources = sorted(d.sop_instance_uid for d in documents)
    digest = _settings_digest(options, table_digest)
    study = documents[0].study_instance_uid
    instance = derive_uid(
        SOFTWARE_NAME,
        "result",
        *sources,
        rule_set_version,
        digest,
        DOCUMENT_LAYOUT,
        root=options.uid_root,
    )
    series = derive_uid(SOFTWARE_NAME, "series", study, root=options.uid_root)
    return instance, series


def grade_study(
    datasets: Sequence[Dataset],
    options: GradeOptions,
    *,
    table: object | None = None,
    site_mapping_files: Sequence[Path] = (),
    predecessors: Sequence[InstanceRef] = (),
    content_datetime: datetime | None = None,
) -> StudyOutcome:
    """Grade the SRs of one study together, in :func:`study_order` (the order they are given
    in does not matter).  Never raises for bad input: returns a ``rejected`` outcome with the
    reason instead.

    A source the reader refuses (not an echo measurement SR, damaged, ...) is set aside and
    named in ``set_aside``; the study is graded from the others and rejected only when no
    source is usable (with the reader's reason when there was a single source)."""
    from service.grading import assess
    from service.grading.compare import assess_all
    from service.sr.read import read_document
    from service.sr.write import build_result_sr
    from service.vocabulary.mapper import build_measurements, load_mapping_table

    if not datasets:
        return StudyOutcome(status=GradeStatus.rejected, reason="no source objects")
    datasets = study_order(datasets)
    documents: list[SourceDocument] = []
    usable: list[Dataset] = []
    set_aside: list[tuple[str, str]] = []
    for ds in datasets:
        try:
            documents.append(read_document(ds))
        except RejectedInput as exc:
            set_aside.append((_instance_uid(ds), str(exc)))
        else:
            usable.append(ds)
    if not documents:
        reason = set_aside[0][1]
        if len(set_aside) > 1:
            reason = "no usable source: " + "; ".join(why for _, why in set_aside)
        return StudyOutcome(status=GradeStatus.rejected, reason=reason, set_aside=tuple(set_aside))
    studies = {d.study_instance_uid for d in documents}
    if len(studies) != 1:
        return StudyOutcome(
            status=GradeStatus.rejected,
            reason=f"sources belong to {len(studies)} different studies; grading is per study",
            set_aside=tuple(set_aside),
        )
    if table is None:
        table = load_mapping_table(site_mapping_files)
    measurements = build_measurements(documents, table)
    if not measurements.values or set(measurements.values) <= {"age"}:
        why = "no echo measurement recognised"
        if measurements.excluded:
            why += (
                f" ({len(measurements.excluded)} excluded, e.g. {measurements.excluded[0].reason})"
            )
        return StudyOutcome(
            status=GradeStatus.rejected,
            reason=why,
            study_instance_uid=documents[0].study_instance_uid,
            documents=tuple(documents),
            measurements=measurements,
            set_aside=tuple(set_aside),
        )
    context = effective_context(documents, options.context)
    if options.compare:
        assessments = assess_all(measurements, context, options.guideline, options.switches)
    else:
        assessments = AssessmentSet(
            primary=assess(measurements, context, options.guideline, options.switches)
        )
    primary = assessments.primary
    instance_uid, series_uid = result_identity(
        documents, options, table.digest, primary.rule_set_version
    )
    try:
        result = build_result_sr(
            usable,
            assessments,
            measurements,
            sop_instance_uid=instance_uid,
            series_instance_uid=series_uid,
            predecessors=[p for p in predecessors if p.sop_instance_uid != instance_uid],
            content_datetime=content_datetime,
            software_version=__version__,
        )
    except UserError as exc:  # the sources cannot make a valid document: say why
        return StudyOutcome(
            status=GradeStatus.rejected,
            reason=str(exc),
            study_instance_uid=documents[0].study_instance_uid,
            documents=tuple(documents),
            measurements=measurements,
            assessments=assessments,
            set_aside=tuple(set_aside),
        )
    # only missing data makes a study "not gradable": atrial fibrillation and special situations
    # are results of their own (Outcome)
    status = (
        GradeStatus.not_gradable if primary.outcome is Outcome.not_gradable else GradeStatus.graded
    )
    return StudyOutcome(
        status=status,
        reason="; ".join(primary.reasoning[-1:]) if status is GradeStatus.not_gradable else "",
        study_instance_uid=documents[0].study_instance_uid,
        documents=tuple(documents),
        measurements=measurements,
        assessments=assessments,
        result=result,
        set_aside=tuple(set_aside),
    )


def _instance_uid(ds: Dataset) -> str:
    """The SOP Instance UID of a source, "" when it has none or it cannot be decoded."""
    try:
        return str(ds.get("SOPInstanceUID", "") or "")
    except Exception:
        return ""


def build_summary(
    outcome: StudyOutcome,
    datasets: Sequence[Dataset],
    *,
    page_size: str = "A4",
    uid_root: str | None = None,
) -> Dataset | None:
    """The one-page summary of a graded study as a DICOM Encapsulated PDF in the same study,
    referencing the result SR; None when there is no result to summarise."""
    if outcome.result is None or outcome.assessments is None or outcome.measurements is None:
        return None
    from service.report.summary_pdf import identity_from_dataset, render_summary_pdf
    from service.sr.encapsulated_pdf import (
        DOCUMENT_TITLE,
        build_encapsulated_pdf,
        summary_uids,
    )

    result = outcome.result
    datasets = study_order(datasets)  # the order the result was made in
    identity = identity_from_dataset(*datasets)
    pdf = render_summary_pdf(
        outcome.assessments,
        outcome.measurements,
        identity,
        page_size=page_size,  # type: ignore[arg-type]
        result_sr_uid=str(result.SOPInstanceUID),
    )
    instance_uid, series_uid = summary_uids(
        str(result.SOPInstanceUID), str(result.StudyInstanceUID), root=uid_root
    )
    created = datetime.strptime(
        f"{result.ContentDate}{str(result.ContentTime).split('.')[0]:0<6}", "%Y%m%d%H%M%S"
    )
    return build_encapsulated_pdf(
        pdf,
        datasets[0],
        result_sr=result,
        sop_instance_uid=instance_uid,
        series_instance_uid=series_uid,
        document_title=DOCUMENT_TITLE,
        content_datetime=created,
    )

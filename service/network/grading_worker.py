"""The per-study work of the node: decode the stored objects of a study, grade them together,
encode the result SR (and the summary PDF when wanted) as Part 10 bytes.  Nothing here writes
a file or touches the journal: the grader (:mod:`service.network.grader`) does that with the
:class:`GradeRecord` this returns, so durability and the journal stay in one place.

A :class:`GradeJob` in, a :class:`GradeRecord` out (the result's bytes, the fields the
journal records, the notes on objects set aside); the grading function is the real pipeline
or, in tests, a stand-in.
"""

from __future__ import annotations

import io
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from service.sr.encode import file_bytes


@dataclass(frozen=True)
class GradeJob:
    """One claimed study, as the grading process needs it."""

    study_uid: str
    object_uids: tuple[str, ...]
    #: per object, its stored Part 10 bytes, or why they could not be read
    objects: tuple[bytes | str, ...]
    options: Any  # service.pipeline.GradeOptions
    mapping_paths: tuple[Path, ...]
    predecessors: tuple[Any, ...] = ()  # service.model.InstanceRef, oldest first
    #: result UIDs the journal holds already for this study: not encoded again
    spooled: frozenset[str] = frozenset()
    #: build the summary PDF (page size), or None
    summary_page_size: str | None = None
    uid_root: str | None = None
    #: calling AE title of the association the study came on (the audit's sending device)
    calling_ae: str = ""
    #: record patient name and ID with the study's audit facts
    audit_patient_identity: bool = False


@dataclass(frozen=True)
class EncodedObject:
    """A result object ready to spool: its identity and (unless already spooled) its bytes."""

    uid: str
    series_uid: str
    sop_class_uid: str
    data: bytes | None


@dataclass(frozen=True)
class GradeRecord:
    """What the node needs to record the outcome of a :class:`GradeJob`."""

    status: str
    reason: str = ""
    #: per object UID, why it was set aside ("set aside: ..."), in the claim's order
    notes: dict[str, str] = field(default_factory=dict)
    #: object UIDs the result was graded from
    sources: tuple[str, ...] = ()
    result: EncodedObject | None = None
    guideline: str | None = None
    grade: str | None = None
    filling_pressure: str | None = None
    #: what the primary assessment concluded (a service.model.Outcome token)
    outcome: str | None = None
    summary: EncodedObject | None = None
    #: why the summary PDF was not built ("" when it was, or was not wanted)
    summary_error: str = ""
    #: what the audit records about the study (service.audit.facts.StudyFacts), or None
    facts: Any = None

    @property
    def no_usable_source(self) -> bool:
        return not self.sources and bool(self.notes)


def _stamp(path: Path) -> tuple[int, int]:
    """(modification time, size) of a file; (0, -1) when it cannot be read (the loader then
    reports the problem)."""
    try:
        st = path.stat()
    except OSError:
        return (0, -1)
    return (st.st_mtime_ns, st.st_size)


class TableCache:
    """The standard and site mapping table in force: parsed once, again only when the
    configured files or their contents change (e.g. after a SIGHUP)."""

    def __init__(self) -> None:
        self._table: Any = None
        self._key: tuple = ()

    def get(self, paths: Sequence[Path]) -> Any:
        from service.vocabulary.mapper import load_mapping_table

        key = tuple((str(p), *_stamp(Path(p))) for p in paths)
        if self._table is None or key != self._key:
            self._table = load_mapping_table(tuple(paths))
            self._key = key
        return self._table


def run_job(job: GradeJob, grade_fn: Callable[..., Any], table: Any) -> GradeRecord:
    """Grade one study.  Exceptions of the grading function propagate (the node records an
    internal error); stored objects that cannot be read or decoded and sources the reader
    refuses are set aside with a note."""
    import pydicom

    notes: dict[str, str] = {}
    usable: list[tuple[str, Any]] = []
    for uid, data in zip(job.object_uids, job.objects, strict=True):
        if isinstance(data, str):
            notes[uid] = f"set aside: stored object unreadable ({data})"
            continue
        try:
            ds = pydicom.dcmread(io.BytesIO(data))
        except Exception as exc:  # stored object unreadable: say so, do not guess
            notes[uid] = f"set aside: stored object unreadable ({type(exc).__name__}: {exc})"
        else:
            usable.append((uid, ds))
    outcome = None
    if usable:
        outcome = grade_fn(
            [ds for _, ds in usable],
            job.options,
            table=table,
            predecessors=list(job.predecessors),
        )
        # the reader's refusals, named by the data set's own SOP Instance UID
        claim_uid = {_uid_of(ds): uid for uid, ds in usable}
        for ds_uid, why in getattr(outcome, "set_aside", ()) or ():
            notes[claim_uid.get(ds_uid, ds_uid)] = f"set aside: {why}"
    notes = {uid: notes[uid] for uid in job.object_uids if uid in notes} | notes
    sources = tuple(uid for uid, _ in usable if uid not in notes)
    facts = None
    if outcome is not None:
        from service.audit.facts import safe_study_facts

        facts = safe_study_facts(
            outcome,
            [ds for uid, ds in usable if uid not in notes] or [ds for _, ds in usable],
            job.options,
            calling_ae=job.calling_ae,
            patient_identity=job.audit_patient_identity,
        )
    if outcome is None or not sources:
        return GradeRecord(status="rejected", reason="no usable source", notes=notes, facts=facts)
    status = str(getattr(outcome.status, "value", outcome.status))
    if outcome.result is None:
        return GradeRecord(
            status=status,
            reason=outcome.reason or status,
            notes=notes,
            sources=sources,
            facts=facts,
        )
    ds = outcome.result
    result_uid = str(ds.SOPInstanceUID)
    result = EncodedObject(
        uid=result_uid,
        series_uid=str(ds.SeriesInstanceUID),
        sop_class_uid=str(ds.SOPClassUID),
        data=None if result_uid in job.spooled else file_bytes(ds),
    )
    assessment = getattr(outcome, "assessment", None)
    summary, summary_error = None, ""
    if job.summary_page_size is not None:
        used = [ds for uid, ds in usable if uid not in notes]
        summary, summary_error = _summary(job, outcome, used)
    return GradeRecord(
        status=status,
        notes=notes,
        sources=sources,
        result=result,
        guideline=None if assessment is None else str(assessment.guideline.value),
        grade=None if assessment is None else str(assessment.grade.value),
        filling_pressure=None if assessment is None else str(assessment.filling_pressure.value),
        outcome=None if assessment is None else str(assessment.outcome.value),
        summary=summary,
        summary_error=summary_error,
        facts=facts,
    )


def _summary(job: GradeJob, outcome: Any, datasets: list[Any]) -> tuple[EncodedObject | None, str]:
    """The summary PDF of a graded study; a summary that cannot be built is reported, never
    raised (the result SR goes out regardless)."""
    from service.pipeline import build_summary

    try:
        pdf = build_summary(
            outcome, datasets, page_size=job.summary_page_size or "A4", uid_root=job.uid_root
        )
        if pdf is None:
            return None, ""
        uid = str(pdf.SOPInstanceUID)
        data = None if uid in job.spooled else file_bytes(pdf)
    except Exception as exc:
        return None, f"{type(exc).__name__}: {exc}"
    return EncodedObject(uid, str(pdf.SeriesInstanceUID), str(pdf.SOPClassUID), data), ""


def _uid_of(ds: Any) -> str:
    try:
        return str(ds.get("SOPInstanceUID", "") or "")
    except Exception:
        return ""


# -- in a grading process ---------------------------------------------------------------------

_TABLES = TableCache()

_warm = False


def warm_up_pipeline() -> bool:
    """Grade and encode one invented study (fictional "Harbour Vale Cardiac Centre"), so
    that data the pipeline loads on first use is loaded now; once per process.  Returns
    whether the pipeline ran; a failure here is left for the first real study to report."""
    global _warm
    if _warm:
        return True
    try:
        from service.model import Measure
        from service.pipeline import GradeOptions, grade_study
        from service.sr.echo_builder import EchoItem, Patient, Study, build_echo_sr

        values = {
            "mitral_e": 80.0,
            "mitral_a": 60.0,
            "e_prime_septal": 6.0,
            "e_prime_lateral": 8.0,
            "tr_peak_velocity": 3.0,
            "lavi": 40.0,
            "lvef": 60.0,
        }
        ds = build_echo_sr(
            [EchoItem(measure=Measure(k), value=v) for k, v in values.items()],
            patient=Patient(name="Warmup^Harbourvale", id="HV-WARMUP"),
            study=Study(seed="grading-warm-up"),
        )
        outcome = grade_study([ds], GradeOptions(), table=_TABLES.get(()))
        if outcome.result is not None:
            file_bytes(outcome.result)
    except Exception:
        return False
    _warm = True
    return True


def grade_in_worker(job: GradeJob) -> GradeRecord:
    """:func:`run_job` with the real pipeline and this process's mapping table."""
    from service.pipeline import grade_study

    return run_job(job, grade_study, _TABLES.get(job.mapping_paths))

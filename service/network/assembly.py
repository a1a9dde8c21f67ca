"""Study assembly: wait for a study's settle window, then grade all its objects together.

One scheduler thread watches the journal for studies whose settle window is over and hands
each to a small pool of grading threads.  Grading reads every spooled object of the study
(also those graded before: a late SR triggers a re-grade of the whole study, so the merged
result uses all sources, the more recently created SR winning per measure), calls the grading
function, stores the result SR durably in the spool and records it with its deliveries in the
journal in one transaction.  When a destination of the study asks for it (``summary_pdf``), the
one-page summary (Encapsulated PDF) is built too and recorded as a companion of the result: it
is delivered right after the result SR to those destinations and to the results folder.  The
network threads never do any of this.
"""

from __future__ import annotations

import logging
import threading
import time
from collections.abc import Callable, Sequence
from concurrent.futures import Future, ThreadPoolExecutor
from io import BytesIO
from pathlib import Path
from typing import Any, Protocol

import pydicom
from pydicom import Dataset
from pydicom.dataset import FileMetaDataset
from pydicom.uid import PYDICOM_IMPLEMENTATION_UID, ExplicitVRLittleEndian

from service.config import Config
from service.model import InstanceRef
from service.observability.logs import event
from service.observability.metrics import Metrics
from service.store.journal import FOLDER_DESTINATION, Companion, Journal, NewResult, StudyClaim
from service.store.spool import Spool

log = logging.getLogger("diastolic_sr.assembly")


class GradeFunction(Protocol):
    """The shape of :func:`service.pipeline.grade_study`."""

    def __call__(
        self,
        datasets: Sequence[Dataset],
        options: Any,
        *,
        table: Any = None,
        predecessors: Sequence[InstanceRef] = (),
    ) -> Any: ...


def default_grade_fn() -> GradeFunction:
    from service.pipeline import grade_study

    return grade_study


def _stamp(path: Path) -> tuple[int, int]:
    """(modification time, size) of a file; (0, -1) when it cannot be read (the loader then
    reports the problem)."""
    try:
        st = path.stat()
    except OSError:
        return (0, -1)
    return (st.st_mtime_ns, st.st_size)


def screen_with_reader(ds: Dataset) -> str | None:
    """Why the SR reader refuses ``ds`` as a source, or None when it reads it."""
    from service.errors import RejectedInput
    from service.sr.read import read_document

    try:
        read_document(ds)
    except RejectedInput as exc:
        return str(exc)
    return None


def grade_options(config: Config, calling_ae: str) -> Any:
    from service.pipeline import GradeOptions

    return GradeOptions(
        guideline=config.grading.guideline,
        context=config.grading_context(calling_ae),
        compare=config.grading.compare,
        uid_root=config.grading.uid_root or None,
        switches=config.grading.switches,  # the documented rule switches ([grading.switches])
    )


def summary_targets(config: Config, calling_ae: str) -> list[tuple[str, str]]:
    """Where the summary PDF of ``calling_ae``'s study goes: the destinations that ask for it,
    and the results folder (when it is configured and a destination asks for the summary, or
    ``delivery.summary_pdf_in_results_folder`` is set).  Empty: no summary is built."""
    out = [t for t in destination_targets(config, calling_ae) if t[0] != FOLDER_DESTINATION]
    wanted = set(config.summary_destinations(calling_ae))
    out = [t for t in out if t[0] in wanted]
    folder = config.results_dir
    if folder is not None and (out or config.delivery.summary_pdf_in_results_folder):
        out.append((FOLDER_DESTINATION, str(folder)))
    return out


def destination_targets(config: Config, calling_ae: str) -> list[tuple[str, str]]:
    """(name, description) of every place a result of ``calling_ae``'s study goes."""
    out = []
    for name in config.destinations_for(calling_ae):
        d = config.destinations[name]
        out.append((name, f"{d.ae_title}@{d.host}:{d.port}"))
    if config.results_dir is not None:
        out.append((FOLDER_DESTINATION, str(config.results_dir)))
    return out


def encode_part10(ds: Dataset) -> bytes:
    """A result dataset as a Part 10 file (file meta added when missing)."""
    if not getattr(ds, "file_meta", None) or "TransferSyntaxUID" not in ds.file_meta:
        meta = FileMetaDataset()
        meta.MediaStorageSOPClassUID = ds.SOPClassUID
        meta.MediaStorageSOPInstanceUID = ds.SOPInstanceUID
        meta.TransferSyntaxUID = ExplicitVRLittleEndian
        meta.ImplementationClassUID = PYDICOM_IMPLEMENTATION_UID
        ds.file_meta = meta
    buf = BytesIO()
    ds.save_as(buf, enforce_file_format=True)
    return buf.getvalue()


class Assembler:
    def __init__(
        self,
        config: Config,
        journal: Journal,
        spool: Spool,
        *,
        grade_fn: GradeFunction | None = None,
        on_result: Callable[[], None] = lambda: None,
        poll_seconds: float = 0.5,
        screen: Callable[[Dataset], str | None] | str | None = "default",
        metrics: Metrics | None = None,
    ) -> None:
        self.config = config
        #: the mapping table, loaded once and again only when a mapping file changes
        self._table: Any = None
        self._table_key: tuple = ()
        self.metrics = metrics or Metrics()
        #: says why an object cannot be a source (or None); with the real pipeline, objects
        #: that are not readable echo SRs (e.g. an empty SR sent along) are set aside, with a
        #: note in the journal, instead of failing the whole study
        if screen == "default":
            screen = screen_with_reader if grade_fn is None else None
        self.screen: Callable[[Dataset], str | None] | None = screen  # type: ignore[assignment]
        self.journal = journal
        self.spool = spool
        self._grade_fn = grade_fn
        self._on_result = on_result
        self._poll = poll_seconds
        self._wake = threading.Event()
        self._stop = threading.Event()
        self._workers = config.assembly.workers
        self._pool = ThreadPoolExecutor(self._workers, thread_name_prefix="grade")
        self._inflight: set[Future[None]] = set()
        #: storage-error retries per study (back-off as for deliveries)
        self._io_retries: dict[str, int] = {}
        self._inflight_lock = threading.Lock()
        self._thread = threading.Thread(target=self._run, name="assembler", daemon=True)

    @property
    def grade_fn(self) -> GradeFunction:
        if self._grade_fn is None:
            self._grade_fn = default_grade_fn()
        return self._grade_fn

    def start(self) -> None:
        self._thread.start()

    def wake(self) -> None:
        self._wake.set()

    def stop(self, timeout: float = 60.0) -> None:
        """Stop claiming; let the studies being graded finish (bounded by ``timeout``)."""
        self._stop.set()
        self._wake.set()
        self._thread.join(timeout)
        self._pool.shutdown(wait=True, cancel_futures=True)

    # -- scheduling -------------------------------------------------------------------------------

    def _run(self) -> None:
        while not self._stop.is_set():
            self._wake.clear()
            wait = self._poll
            try:
                if self._schedule():  # a worker is free: sleep until the next window ends
                    due = self.journal.next_due_at()
                    if due is not None:
                        wait = max(0.01, min(wait, due - time.time()))
            except Exception:
                log.exception("assembly scheduler error; retrying")
            self._wake.wait(wait)

    def _schedule(self) -> bool:
        """Claim due studies for free workers; True when a worker is still free."""
        with self._inflight_lock:
            free = self._workers - len(self._inflight)
        if free <= 0 or self._stop.is_set():
            return False
        claims = self.journal.claim_due(limit=free)
        for claim in claims:
            fut = self._pool.submit(self._grade_claim, claim)
            with self._inflight_lock:
                self._inflight.add(fut)
            fut.add_done_callback(self._done)
        return len(claims) < free

    def _done(self, fut: Future[None]) -> None:
        with self._inflight_lock:
            self._inflight.discard(fut)
        self._wake.set()

    # -- grading ---------------------------------------------------------------------------------

    def _grade_claim(self, claim: StudyClaim) -> None:
        if self._stop.is_set():
            self.journal.release_claim(claim)
            return
        started = time.monotonic()
        try:
            self.grade(claim)
            self.metrics.processing.observe(time.monotonic() - started)
            self._io_retries.pop(claim.study_uid, None)
        except OSError as exc:
            # the node's own storage failed (disk full, ...), not the input: give the study
            # back and try again after a back-off, without anyone having to re-queue it
            self._retry_later(claim, exc)
        except Exception as exc:
            self.metrics.studies.labels(outcome="error").inc()
            log.exception("grading study %s failed", claim.study_uid)
            try:
                self.journal.finish_grading(
                    claim, result=None, failure=f"internal error while grading: {exc}"
                )
            except Exception:  # the journal itself failed: the claim resumes on restart
                log.exception("cannot record the failure of study %s", claim.study_uid)

    def _retry_later(self, claim: StudyClaim, exc: OSError) -> None:
        n = self._io_retries.get(claim.study_uid, 0) + 1
        self._io_retries[claim.study_uid] = n
        cfg = self.config.delivery
        delay = min(cfg.backoff_initial_seconds * 2 ** (n - 1), cfg.backoff_max_seconds)
        self.metrics.studies.labels(outcome="retry").inc()
        event(
            "study_retry",
            f"study {claim.study_uid}: storage error while grading ({exc}); "
            f"retry {n} in {delay:g} s",
            level=logging.ERROR,
            study_uid=claim.study_uid,
            attempt=n,
            retry_in_seconds=delay,
            reason=f"{type(exc).__name__}: {exc}",
        )
        try:
            self.journal.release_claim(claim, retry_at=time.time() + delay)
        except Exception:  # the journal itself failed: the claim resumes on restart
            log.exception("cannot give back study %s for a retry", claim.study_uid)

    def mapping_table(self) -> Any:
        """The standard and site mapping table in force.  Parsed once, not per study; parsed
        again when the configured files or their contents change (e.g. after a SIGHUP)."""
        from service.vocabulary.mapper import load_mapping_table

        paths = tuple(self.config.mapping_paths)
        key = tuple((str(p), *_stamp(p)) for p in paths)
        if self._table is None or key != self._table_key:
            self._table = load_mapping_table(paths)
            self._table_key = key
        return self._table

    def grade(self, claim: StudyClaim) -> None:
        notes: dict[str, str] = {}
        usable = []
        for uid, path in zip(claim.object_uids, claim.object_paths, strict=True):
            try:
                ds = pydicom.dcmread(path)
            except Exception as exc:  # spooled file unreadable: say so, do not guess
                problem: str | None = f"spooled file unreadable ({type(exc).__name__}: {exc})"
            else:
                problem = self.screen(ds) if self.screen is not None else None
            if problem:
                notes[uid] = f"set aside: {problem}"
                log.warning("study %s: object %s set aside: %s", claim.study_uid, uid, problem)
            else:
                usable.append((uid, ds))
        if not usable:
            self.journal.finish_grading(
                claim,
                result=None,
                failure="no usable source: " + "; ".join(notes.values()),
                object_notes=notes,
            )
            self._graded(claim, "rejected", reason="no usable source")
            return
        datasets = [ds for _, ds in usable]
        predecessors = [
            InstanceRef(
                study_instance_uid=r["study_uid"],
                series_instance_uid=r["series_uid"],
                sop_class_uid=r["sop_class_uid"],
                sop_instance_uid=r["result_uid"],
            )
            for r in claim.earlier_results
        ]
        outcome = self.grade_fn(
            datasets,
            grade_options(self.config, claim.calling_ae),
            table=self.mapping_table(),
            predecessors=predecessors,
        )
        status = str(getattr(outcome.status, "value", outcome.status))
        if outcome.result is None:
            reason = outcome.reason or status
            self.journal.finish_grading(
                claim, result=None, failure=f"{status}: {reason}", object_notes=notes
            )
            self._graded(claim, status, reason=reason)
            return
        ds: Dataset = outcome.result
        result_uid = str(ds.SOPInstanceUID)
        known = {r["result_uid"] for r in claim.earlier_results}
        path = self.spool.result_path(claim.study_uid, result_uid)
        if result_uid not in known or not path.exists():
            path = self.spool.write_result(claim.study_uid, result_uid, encode_part10(ds))
        assessment = getattr(outcome, "assessment", None)
        new = NewResult(
            result_uid=result_uid,
            series_uid=str(ds.SeriesInstanceUID),
            sop_class_uid=str(ds.SOPClassUID),
            path=path,
            status=status,
            guideline=None if assessment is None else str(assessment.guideline.value),
            grade=None if assessment is None else str(assessment.grade.value),
            filling_pressure=(
                None if assessment is None else str(assessment.filling_pressure.value)
            ),
            sources=tuple(uid for uid, _ in usable),
            predecessors=tuple(
                p.sop_instance_uid for p in predecessors if p.sop_instance_uid != result_uid
            ),
        )
        companions = self._summary(claim, outcome, datasets)
        queued = self.journal.finish_grading(
            claim,
            result=new,
            destinations=destination_targets(self.config, claim.calling_ae),
            object_notes=notes,
            companions=companions,
        )
        self._graded(
            claim,
            status,
            result_uid=result_uid,
            objects=len(datasets),
            grade=new.grade,
            filling_pressure=new.filling_pressure,
            guideline=new.guideline,
            summary_uid=companions[0].result.result_uid if companions else None,
            note="" if queued else "already delivered or no destination: nothing new to send",
        )
        if queued:
            self._on_result()

    def _graded(self, claim: StudyClaim, outcome: str, **fields: Any) -> None:
        self.metrics.studies.labels(outcome=outcome).inc()
        detail = fields.get("reason") or fields.get("result_uid") or ""
        event(
            "study_graded",
            f"study {claim.study_uid}: {outcome}" + (f" ({detail})" if detail else ""),
            study_uid=claim.study_uid,
            calling_ae=claim.calling_ae,
            outcome=outcome,
            **{k: v for k, v in fields.items() if v not in (None, "")},
        )

    def _summary(self, claim: StudyClaim, outcome: Any, datasets: list[Dataset]) -> list[Companion]:
        """The summary PDF as a companion of the result, when anyone wants it.  A summary that
        cannot be built is logged and skipped: the result SR goes out regardless."""
        targets = summary_targets(self.config, claim.calling_ae)
        if not targets:
            return []
        from service.pipeline import build_summary

        try:
            pdf = build_summary(
                outcome,
                datasets,
                page_size=self.config.delivery.summary_page_size,
                uid_root=self.config.grading.uid_root or None,
            )
        except Exception as exc:
            log.error(
                "study %s: summary PDF not built (%s: %s); the result SR is sent without it",
                claim.study_uid,
                type(exc).__name__,
                exc,
            )
            return []
        if pdf is None:
            return []
        uid = str(pdf.SOPInstanceUID)
        path = self.spool.result_path(claim.study_uid, uid)
        if not path.exists():
            path = self.spool.write_result(claim.study_uid, uid, encode_part10(pdf))
        return [
            Companion(
                result=NewResult(
                    result_uid=uid,
                    series_uid=str(pdf.SeriesInstanceUID),
                    sop_class_uid=str(pdf.SOPClassUID),
                    path=path,
                    status="summary",
                    guideline=None,
                    grade=None,
                    filling_pressure=None,
                    sources=(str(outcome.result.SOPInstanceUID),),
                    predecessors=(),
                ),
                destinations=tuple(targets),
            )
        ]

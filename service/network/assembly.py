"""Study assembly: wait for a study's settle window, then grade all its objects together.

One scheduler thread watches the journal for studies whose settle window is over and hands
each to one of ``assembly.workers`` grading slots.  The per-study work (decode every stored
object of the study, grade, encode the result SR, and the one-page summary PDF when a
destination of the study asks for it, ``summary_pdf``) runs in a pool of grading processes
(:mod:`service.network.grading_worker`), so the listener's network threads keep this
process's interpreter to themselves and every core is used.  Grading reads every object of the
study, also those graded before: a late SR triggers a re-grade of the whole study, so the
merged result uses all sources, the more recently created SR winning per measure.

Back in this process, the grading slot hands the result SR (and the summary) with its
deliveries to the journal, which stores the bytes durably and records them in one transaction;
the summary is recorded as a companion of the result, delivered right after it to the
destinations that want it and to the results folder.  A grading process that dies (killed,
out of memory) never loses the study: the claim is given back, the pool is replaced and the
study graded again; a study that keeps killing its grading process fails with that reason.  An
injected grading function (tests) runs in this process, on the grading slot's thread.  The
network threads never do any of this.
"""

from __future__ import annotations

import logging
import multiprocessing
import threading
import time
from collections.abc import Callable, Sequence
from concurrent.futures import Future, ProcessPoolExecutor, ThreadPoolExecutor, wait
from concurrent.futures.process import BrokenProcessPool
from typing import Any, Protocol

from pydicom import Dataset

from service.config import Config
from service.model import InstanceRef
from service.network.grading_worker import (
    PRELOAD,
    GradeJob,
    GradeRecord,
    TableCache,
    grade_in_worker,
    init_worker,
    run_job,
    warm_up,
)
from service.observability.logs import current_logging, event
from service.observability.metrics import Metrics
from service.store.journal import (
    FOLDER_DESTINATION,
    Companion,
    Journal,
    NewResult,
    StudyClaim,
    backoff_delay,
)

log = logging.getLogger("diastolic_sr.assembly")

__all__ = [
    "Assembler",
    "GradeFunction",
    "destination_targets",
    "grade_options",
    "summary_targets",
]

#: a study whose grading process died this many times is failed instead of graded again
MAX_WORKER_CRASHES = 3
#: seconds the node waits at start for its grading processes to be ready
READY_TIMEOUT = 120.0


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


class WorkerCrashed(Exception):
    """The grading process running a study ended without an answer."""


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
        out.append((name, config.destinations[name].target))
    if config.results_dir is not None:
        out.append((FOLDER_DESTINATION, str(config.results_dir)))
    return out


def _prestart(pool: ProcessPoolExecutor, n: int, timeout: float | None = None) -> bool:
    """Start the ``n`` processes of ``pool`` (the pool starts one per task it is given while
    none is idle); with ``timeout``, wait until each has done its start-up work.  Returns
    whether they are all up."""
    try:
        started = [pool.submit(warm_up) for _ in range(n)]
        if timeout is not None:
            done, _ = wait(started, timeout=timeout)
            return len(done) == n and all(f.exception() is None for f in done)
    except Exception:  # shut down meanwhile, or broken: the grading slots deal with it
        return False
    return True


def _process_context() -> Any:
    """A start method that is safe in a process with threads: the fork server (its grading
    processes are forked from a clean single-threaded server that imported the pipeline
    once), or spawn where there is no fork server."""
    methods = multiprocessing.get_all_start_methods()
    if "forkserver" in methods:
        ctx = multiprocessing.get_context("forkserver")
        ctx.set_forkserver_preload(list(PRELOAD))
        return ctx
    return multiprocessing.get_context("spawn")


class Assembler:
    def __init__(
        self,
        config: Config,
        journal: Journal,
        *,
        grade_fn: GradeFunction | None = None,
        on_result: Callable[[], None] = lambda: None,
        poll_seconds: float = 0.5,
        metrics: Metrics | None = None,
    ) -> None:
        self.config = config
        #: the mapping table of the in-process grading function (grading processes keep theirs)
        self._tables = TableCache()
        self.metrics = metrics or Metrics()
        self.journal = journal
        self._grade_fn = grade_fn
        self._on_result = on_result
        self._poll = poll_seconds
        self._wake = threading.Event()
        self._stop = threading.Event()
        self._workers = config.assembly.workers
        #: studies in hand at once, each on a thread of its own that waits for its grading
        #: process, then spools and journals the outcome (or grades it, with an injected
        #: grading function).  Twice the grading processes: each has its next study queued
        #: while the outcome of its last is being stored.
        self._slots = self._workers if grade_fn is not None else 2 * self._workers
        self._pool = ThreadPoolExecutor(self._slots, thread_name_prefix="grade")
        self._processes: ProcessPoolExecutor | None = None
        #: a pipe only this process writes to: grading processes end when it closes
        self._lifeline: tuple[Any, Any] | None = None
        self._processes_lock = threading.Lock()
        self._inflight: set[Future[None]] = set()
        #: storage-error retries per study (back-off as for deliveries)
        self._io_retries: dict[str, int] = {}
        #: grading processes lost per study
        self._crashes: dict[str, int] = {}
        self._inflight_lock = threading.Lock()
        self._thread = threading.Thread(target=self._run, name="assembler", daemon=True)

    @property
    def in_process(self) -> bool:
        """An injected grading function runs in this process."""
        return self._grade_fn is not None

    def start(self) -> None:
        """Start the grading processes (waiting, at most ``READY_TIMEOUT`` seconds, until
        they have imported and warmed up the pipeline, so that the first studies are graded
        at full speed), then the scheduler."""
        if not self.in_process:
            with self._processes_lock:
                self._processes = pool = self._new_processes()
            if not _prestart(pool, self._workers, READY_TIMEOUT):
                log.warning(
                    "grading processes not ready after %g s; studies wait for them", READY_TIMEOUT
                )
        self._thread.start()

    def _new_processes(self, *, prestart: bool = False) -> ProcessPoolExecutor:
        """A pool of grading processes; with ``prestart``, started now in the background
        (their start-up work begun before a study needs them)."""
        context = _process_context()
        if self._lifeline is None:
            self._lifeline = context.Pipe(duplex=False)
        pool = ProcessPoolExecutor(
            self._workers,
            mp_context=context,
            initializer=init_worker,
            initargs=(tuple(self.config.mapping_paths), self._lifeline[0], current_logging()),
        )
        if prestart:
            threading.Thread(
                target=_prestart, args=(pool, self._workers), name="grade-start", daemon=True
            ).start()
        return pool

    def wake(self) -> None:
        self._wake.set()

    def stop(self, timeout: float = 60.0) -> None:
        """Stop claiming; let the studies being graded finish (bounded by ``timeout``)."""
        self._stop.set()
        self._wake.set()
        self._thread.join(timeout)
        self._pool.shutdown(wait=True, cancel_futures=True)
        with self._processes_lock:
            processes, self._processes = self._processes, None
        if processes is not None:
            processes.shutdown(wait=True, cancel_futures=True)
        if self._lifeline is not None:
            for end in self._lifeline:
                end.close()
            self._lifeline = None

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
            free = self._slots - len(self._inflight)
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
            self._crashes.pop(claim.study_uid, None)
        except OSError as exc:
            # the node's own storage failed (disk full, ...), not the input: give the study
            # back and try again after a back-off, without anyone having to re-queue it
            self._retry_later(claim, exc)
        except WorkerCrashed as exc:
            self._worker_crashed(claim, exc)
        except Exception as exc:
            self._failed(claim, exc)

    def _failed(self, claim: StudyClaim, exc: Exception) -> None:
        self.metrics.studies.labels(outcome="error").inc()
        log.exception("grading study %s failed", claim.study_uid, exc_info=exc)
        try:
            self.journal.finish_grading(
                claim, result=None, failure=f"internal error while grading: {exc}"
            )
        except Exception:  # the journal itself failed: the claim resumes on restart
            log.exception("cannot record the failure of study %s", claim.study_uid)

    def _worker_crashed(self, claim: StudyClaim, exc: WorkerCrashed) -> None:
        """Give the study back (graded again at once), unless it keeps killing its grading
        process: then it fails with that reason."""
        if self._stop.is_set():
            self._release(claim)
            return
        n = self._crashes.get(claim.study_uid, 0) + 1
        self._crashes[claim.study_uid] = n
        if n >= MAX_WORKER_CRASHES:
            self._crashes.pop(claim.study_uid, None)
            self._failed(claim, WorkerCrashed(f"{exc} ({n} times)"))
            return
        self.metrics.studies.labels(outcome="retry").inc()
        event(
            "study_retry",
            f"study {claim.study_uid}: {exc}; graded again",
            level=logging.ERROR,
            study_uid=claim.study_uid,
            attempt=n,
            retry_in_seconds=0,
            reason=str(exc),
        )
        self._release(claim)

    def _release(self, claim: StudyClaim, retry_at: float | None = None) -> None:
        try:
            self.journal.release_claim(claim, retry_at=retry_at)
        except Exception:  # the journal itself failed: the claim resumes on restart
            log.exception("cannot give back study %s", claim.study_uid)

    def _retry_later(self, claim: StudyClaim, exc: OSError) -> None:
        n = self._io_retries.get(claim.study_uid, 0) + 1
        self._io_retries[claim.study_uid] = n
        cfg = self.config.delivery
        delay = backoff_delay(n, cfg.backoff_initial_seconds, cfg.backoff_max_seconds)
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
        self._release(claim, retry_at=time.time() + delay)

    def mapping_table(self) -> Any:
        """The standard and site mapping table in force for the in-process grading function.
        Parsed once, not per study; parsed again when the configured files or their contents
        change (e.g. after a SIGHUP).  Grading processes keep their own, the same way."""
        return self._tables.get(tuple(self.config.mapping_paths))

    def job(self, claim: StudyClaim, *, summary: bool) -> GradeJob:
        """What grading ``claim`` needs, as sent to a grading process."""
        predecessors = tuple(
            InstanceRef(
                study_instance_uid=r["study_uid"],
                series_instance_uid=r["series_uid"],
                sop_class_uid=r["sop_class_uid"],
                sop_instance_uid=r["result_uid"],
            )
            for r in claim.earlier_results
        )
        spooled = frozenset(
            r["result_uid"]
            for r in claim.earlier_results
            if self.journal.result_stored(r["result_uid"])
        )
        return GradeJob(
            study_uid=claim.study_uid,
            object_uids=tuple(claim.object_uids),
            objects=tuple(self._object_data(uid) for uid in claim.object_uids),
            options=grade_options(self.config, claim.calling_ae),
            mapping_paths=tuple(self.config.mapping_paths),
            predecessors=predecessors,
            spooled=spooled,
            summary_page_size=self.config.delivery.summary_page_size if summary else None,
            uid_root=self.config.grading.uid_root or None,
            calling_ae=claim.calling_ae,
            audit_patient_identity=self.config.audit.include_patient_identifiers,
        )

    def _object_data(self, uid: str) -> bytes | str:
        """An object's stored bytes, or why they cannot be read (the grading notes it)."""
        try:
            return self.journal.object_data(uid)
        except OSError as exc:
            return f"{type(exc).__name__}: {exc.strerror or exc}"

    def _run_job(self, job: GradeJob) -> GradeRecord:
        if self._grade_fn is not None:
            return run_job(job, self._grade_fn, self.mapping_table())
        with self._processes_lock:
            pool = self._processes
        if pool is None:
            raise WorkerCrashed("the grading processes are stopped")
        try:
            return pool.submit(grade_in_worker, job).result()
        except BrokenProcessPool as exc:
            self._replace_processes(pool)
            raise WorkerCrashed(f"the grading process ended unexpectedly ({exc})") from None

    def _replace_processes(self, broken: ProcessPoolExecutor) -> None:
        """A new pool for the broken one (once, whichever grading slot notices first)."""
        with self._processes_lock:
            if self._processes is not broken:
                return
            self._processes = None if self._stop.is_set() else self._new_processes(prestart=True)
        broken.shutdown(wait=False, cancel_futures=True)
        log.error("a grading process ended unexpectedly; grading processes restarted")

    def grade(self, claim: StudyClaim) -> None:
        summary_to = summary_targets(self.config, claim.calling_ae)
        record = self._run_job(self.job(claim, summary=bool(summary_to)))
        notes = record.notes
        for uid, note in notes.items():
            log.warning("study %s: object %s %s", claim.study_uid, uid, note)
        if not record.sources:
            self.journal.finish_grading(
                claim,
                result=None,
                failure="no usable source: " + "; ".join(notes.values()),
                object_notes=notes,
                audit=record.facts,
            )
            self._graded(claim, "rejected", reason="no usable source")
            return
        status = record.status
        # metrics and logs count studies by what they concluded (service.model.Outcome), so
        # atrial fibrillation and special situations are never counted as "not gradable"
        outcome = record.outcome or status
        if record.result is None:
            reason = record.reason or status
            self.journal.finish_grading(
                claim,
                result=None,
                failure=f"{status}: {reason}",
                object_notes=notes,
                audit=record.facts,
            )
            self._graded(claim, outcome, reason=reason)
            return
        result_uid = record.result.uid
        predecessors = [r["result_uid"] for r in claim.earlier_results]
        new = NewResult(
            result_uid=result_uid,
            series_uid=record.result.series_uid,
            sop_class_uid=record.result.sop_class_uid,
            data=record.result.data,
            status=status,
            guideline=record.guideline,
            grade=record.grade,
            filling_pressure=record.filling_pressure,
            sources=record.sources,
            predecessors=tuple(p for p in predecessors if p != result_uid),
        )
        companions = self._summary(claim, record, summary_to)
        queued = self.journal.finish_grading(
            claim,
            result=new,
            destinations=destination_targets(self.config, claim.calling_ae),
            object_notes=notes,
            companions=companions,
            audit=record.facts,
        )
        self._graded(
            claim,
            outcome,
            status=status,
            result_uid=result_uid,
            objects=len(record.sources),
            grade=new.grade,
            filling_pressure=new.filling_pressure,
            guideline=new.guideline,
            summary_uid=companions[0].result.result_uid if companions else None,
            note="" if queued else "already delivered or no destination: nothing new to send",
        )
        if record.outcome:
            self.journal.record_outcome(result_uid, record.outcome)
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

    def _summary(
        self, claim: StudyClaim, record: GradeRecord, targets: list[tuple[str, str]]
    ) -> list[Companion]:
        """The summary PDF as a companion of the result, when anyone wants it.  A summary that
        could not be built is logged and skipped: the result SR goes out regardless."""
        if not targets:
            return []
        if record.summary_error:
            log.error(
                "study %s: summary PDF not built (%s); the result SR is sent without it",
                claim.study_uid,
                record.summary_error,
            )
            return []
        pdf, result = record.summary, record.result
        if pdf is None or result is None:
            return []
        return [
            Companion(
                result=NewResult(
                    result_uid=pdf.uid,
                    series_uid=pdf.series_uid,
                    sop_class_uid=pdf.sop_class_uid,
                    data=pdf.data,
                    status="summary",
                    guideline=None,
                    grade=None,
                    filling_pressure=None,
                    sources=(result.uid,),
                    predecessors=(),
                ),
                destinations=tuple(targets),
            )
        ]

"""The grading role: claim a study whose settle window is over, grade all its objects together,
record the result.

A :class:`Grader` is one grading loop.  ``serve`` runs ``assembly.workers`` of them, each in a
process of its own (:mod:`service.network.roles`); the in-process node of the tests and the
demo runs them as threads.  Graders share nothing but the journal: a study is claimed with a
lease (:meth:`Journal.claim_due`), so two graders (of one node or of several) never grade it at
the same time, and a study whose grader died is taken over when its lease runs out (or at once,
when the supervisor gives the dead process's claims back).

The per-study work (decode every stored object of the study, grade, encode the result SR, and
the one-page summary PDF when a destination of the study asks for it, ``summary_pdf``) is
:func:`service.network.grading_worker.run_job`.  Grading reads every object of the study, also
those graded before: a late SR triggers a re-grade of the whole study, so the merged result
uses all sources, the more recently created SR winning per measure.  The result SR (and the
summary) go to the journal with their deliveries in one call, which stores the bytes durably
and records them in one transaction; the summary is recorded as a companion of the result,
delivered right after it to the destinations that want it and to the results folder.  A
storage error (disk full) gives the study back for a retry after a back-off; any other error
fails the study with the reason.
"""

from __future__ import annotations

import logging
import threading
import time
from collections.abc import Callable, Iterable, Sequence
from typing import Any, Protocol

from pydicom import Dataset

from service.config import Config
from service.model import InstanceRef
from service.network.grading_worker import GradeJob, GradeRecord, TableCache, run_job
from service.network.idle_cpu import IdleThread
from service.observability.logs import event
from service.observability.metrics import Metrics
from service.store.journal import (
    DEFAULT_LEASE_SECONDS,
    FOLDER_DESTINATION,
    Companion,
    Journal,
    JournalUnavailable,
    NewResult,
    StudyClaim,
    backoff_delay,
)

log = logging.getLogger("diastolic_sr.grader")

__all__ = [
    "GradeFunction",
    "Grader",
    "LeaseKeeper",
    "destination_targets",
    "grade_options",
    "summary_targets",
]

#: how often an idle role looks at the journal for new work (a cheap test, not a query)
CHANGE_POLL_SECONDS = 0.01


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


def idle(journal: Journal, wake: threading.Event, stop: threading.Event, seconds: float) -> None:
    """Wait up to ``seconds``: less when woken, stopped, or when another process committed
    to the journal (:meth:`Journal.changed`, looked at every ``CHANGE_POLL_SECONDS``)."""
    deadline = time.monotonic() + seconds
    while not stop.is_set():
        left = deadline - time.monotonic()
        if left <= 0 or wake.wait(min(CHANGE_POLL_SECONDS, left)):
            return
        try:
            if journal.changed():
                return
        except Exception:  # the journal is unreachable: the caller's next query says why
            return


class OutageLog:
    """One line when the journal cannot be reached, one when it can again: not one per
    attempt while it is away (``journal_unavailable``, ``journal_available``)."""

    def __init__(self, who: str) -> None:
        self.who = who
        self._down = False
        self._lock = threading.Lock()

    def failed(self, exc: BaseException) -> None:
        with self._lock:
            if self._down:
                return
            self._down = True
        event(
            "journal_unavailable",
            f"{self.who}: the journal cannot be reached ({exc}); retrying",
            level=logging.ERROR,
            reason=str(exc),
        )

    def ok(self) -> None:
        with self._lock:
            if not self._down:
                return
            self._down = False
        event("journal_available", f"{self.who}: the journal can be reached again")


class LeaseKeeper:
    """Renews the leases of every claim the given owners hold, every third of the lease, so
    that work in progress keeps its claim however long it takes."""

    def __init__(
        self,
        journal: Journal,
        owners: Callable[[], Iterable[str]],
        lease_seconds: float = DEFAULT_LEASE_SECONDS,
    ) -> None:
        self.journal = journal
        self._owners = owners
        self.lease_seconds = lease_seconds
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, name="leases", daemon=True)

    def start(self) -> None:
        self._thread.start()

    def stop(self) -> None:
        self._stop.set()
        self._thread.join(10)

    def _run(self) -> None:
        while not self._stop.wait(self.lease_seconds / 3):
            for owner in list(self._owners()):
                try:
                    self.journal.renew_leases(owner, lease_seconds=self.lease_seconds)
                except JournalUnavailable:  # said by the role itself; the next round retries
                    pass
                except Exception as exc:
                    log.warning("cannot renew the leases of %s: %s", owner, exc)


class Grader:
    """One grading loop (a thread): claims a due study, grades it, records the outcome."""

    def __init__(
        self,
        config: Config,
        journal: Journal,
        *,
        owner: str,
        grade_fn: GradeFunction | None = None,
        poll_seconds: float = 0.5,
        lease_seconds: float = DEFAULT_LEASE_SECONDS,
        metrics: Metrics | None = None,
        on_result: Callable[[], None] = lambda: None,
        name: str = "grader",
        spare: bool = False,
    ) -> None:
        self.config = config
        self.journal = journal
        self.owner = owner
        self.metrics = metrics or Metrics()
        self._grade_fn = grade_fn
        self._poll = poll_seconds
        self.lease_seconds = lease_seconds
        self._on_result = on_result
        #: the mapping table in force (parsed once, again when the files change)
        self._tables = TableCache()
        self._wake = threading.Event()
        self._stop = threading.Event()
        #: storage-error retries per study (back-off as for deliveries)
        self._io_retries: dict[str, int] = {}
        self._outage = OutageLog(name)
        self._thread = threading.Thread(target=self.run, name=name, daemon=True)
        #: a spare grader grades on a thread of the idle scheduling class (started by start())
        self.spare = spare
        self._idle: IdleThread | None = None

    # -- the loop ---------------------------------------------------------------------------

    def start(self) -> None:
        if self.spare and self._idle is None:
            self._idle = IdleThread(f"{self._thread.name}-idle")
            event(
                "spare_grader",
                f"{self._thread.name}: grades on idle CPU time only"
                + ("" if self._idle.idle_class else " (at niceness 19: no idle class here)"),
                idle_class=self._idle.idle_class,
            )
        self._thread.start()

    def wake(self) -> None:
        self._wake.set()

    def stop(self, timeout: float = 60.0) -> None:
        """Stop claiming; let the study being graded finish (bounded by ``timeout``)."""
        self._stop.set()
        self._wake.set()
        if self._thread.is_alive():
            self._thread.join(timeout)
        if self._idle is not None and not self._thread.is_alive():
            self._idle.close()

    @property
    def stopping(self) -> bool:
        return self._stop.is_set()

    def run(self) -> None:
        while not self._stop.is_set():
            self._wake.clear()
            wait = self._poll
            try:
                if self.run_once():
                    self._outage.ok()
                    continue
                due = self.journal.next_due_at()
                self._outage.ok()
                if due is not None:
                    wait = max(0.01, min(wait, due - self.journal.now()))
            except JournalUnavailable as exc:
                self._outage.failed(exc)
                wait = max(wait, 1.0)
            except Exception:
                log.exception("grading loop error; retrying")
            idle(self.journal, self._wake, self._stop, wait)

    def run_once(self) -> bool:
        """Claim and grade one due study; False when none is due."""
        claims = self.journal.claim_due(limit=1, owner=self.owner, lease_seconds=self.lease_seconds)
        for claim in claims:
            self._grade_claim(claim)
        return bool(claims)

    # -- one study ----------------------------------------------------------------------------

    def _grade_claim(self, claim: StudyClaim) -> None:
        if self._stop.is_set():
            self._release(claim)
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
            self._failed(claim, exc)

    def _failed(self, claim: StudyClaim, exc: Exception) -> None:
        self.metrics.studies.labels(outcome="error").inc()
        log.exception("grading study %s failed", claim.study_uid, exc_info=exc)
        try:
            self.journal.finish_grading(
                claim, result=None, failure=f"internal error while grading: {exc}"
            )
        except Exception:  # the journal itself failed: the claim's lease runs out
            log.exception("cannot record the failure of study %s", claim.study_uid)

    def _release(self, claim: StudyClaim, retry_at: float | None = None) -> None:
        try:
            self.journal.release_claim(claim, retry_at=retry_at)
        except Exception:  # the journal itself failed: the claim's lease runs out
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
        """The standard and site mapping table in force: parsed once, not per study; parsed
        again when the configured files or their contents change (e.g. after a SIGHUP)."""
        return self._tables.get(tuple(self.config.mapping_paths))

    def job(self, claim: StudyClaim, *, summary: bool) -> GradeJob:
        """What grading ``claim`` needs."""
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
        except JournalUnavailable:
            raise  # not the object's fault: the study is graded when the journal is back
        except OSError as exc:
            return f"{type(exc).__name__}: {exc.strerror or exc}"

    def _run_job(self, job: GradeJob) -> GradeRecord:
        grade_fn = self._grade_fn
        if grade_fn is None:
            from service.pipeline import grade_study

            grade_fn = grade_study
        table = self.mapping_table()
        if self._idle is not None:  # a spare grader: only the computing goes to the idle thread
            return self._idle.run(run_job, job, grade_fn, table)
        return run_job(job, grade_fn, table)

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
            outcome=record.outcome or None,
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

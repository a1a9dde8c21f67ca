"""The journal: the one record of every received object, study, result and delivery, and the
only thing the node's roles share.  Receivers, graders and senders (and the administrator's
``queue`` command) work through the :class:`Journal` interface; what is stored where is the
implementation's business:

* :class:`~service.store.sqlite_journal.SqliteJournal` (one machine, the default): an embedded
  SQLite database in the data directory, the objects' bytes in spool files beside it;
* a PostgreSQL journal (several machines) keeps the bytes in the database.

Both implement every method with the same meaning; :mod:`service.store.sql_journal` holds the
SQL they share.  A new table or method goes into both: the DDL into each backend's schema
module (a new schema version), the statements into the shared class, the method's contract
here.

States
------
object:   received -> assembled -> graded
study:    received -> assembled -> graded -> delivered
                                         \\-> failed (reason: not gradable by the pipeline,
                                              grading error, or a delivery past its limit)
          any state -> received again when a new object of the study arrives or an
          administrator asks for a re-grade (``generation`` counts these).
delivery: pending -> delivered | failed (reason); ``requeue_failed`` puts failed ones back.
ignored:  an object acknowledged and kept but never graded nor forwarded (the node's own
          result coming back), with the reason; its study is not touched.

Claims and leases
-----------------
Graders and senders (processes of one node, or of several nodes sharing one journal) take
work by claiming it: a claim names its owner and holds a lease.  The owner renews the leases
of what it holds while it works (:meth:`Journal.renew_leases`); work whose lease has run out
(its owner died, or lost the journal) may be claimed by anyone.  A supervisor that sees one of
its processes die gives that process's work back at once (:meth:`Journal.release_owner`).  A
study whose claims keep ending without a result (its grading kills the process) fails after
:data:`MAX_CLAIMS` of them, with that reason.

Durability
----------
What the node promises to others is durable when the call returns: a received object (its
C-STORE success is sent after :meth:`Journal.store_object` returns), a re-grade or re-queue an
administrator asked for, a retention purge.  The node's own progress (a study claimed, graded,
a delivery attempted or done) may be committed lazily: it survives a crash of the process, and
what a power loss can cost is work done again (the same result, whose UID is derived from its
sources; a result sent again with the same SOP Instance UID, which a PACS keeps once), never an
acknowledged object.  A result's bytes are durable before its journal record names them.
"""

from __future__ import annotations

import abc
import time
from collections.abc import Iterator, Sequence
from dataclasses import dataclass
from enum import StrEnum
from pathlib import Path
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
    from service.config import Config

from service.store.backfill_journal import BackfillRecords


class ObjectState(StrEnum):
    received = "received"
    assembled = "assembled"
    graded = "graded"


class StudyState(StrEnum):
    received = "received"
    assembled = "assembled"
    graded = "graded"
    delivered = "delivered"
    failed = "failed"


class DeliveryState(StrEnum):
    pending = "pending"
    delivered = "delivered"
    failed = "failed"


#: destination name of the results folder (not a DICOM peer)
FOLDER_DESTINATION = "(folder)"

#: claims of one study (one generation) that may end without a result before it fails
MAX_CLAIMS = 3

#: default lease of a claim, seconds (``--lease-seconds``)
DEFAULT_LEASE_SECONDS = 30.0


class JournalUnavailable(OSError):
    """The journal cannot be reached now (its database server is down or unreachable);
    ``str()`` says why.  The caller answers with a failure status or retries later, as for
    any storage error; never a reason to give up on an object or a delivery."""


@dataclass(frozen=True)
class StudyClaim:
    """A study taken for grading: its objects as they were when claimed."""

    study_uid: str
    calling_ae: str
    generation: int
    object_uids: tuple[str, ...]
    earlier_results: tuple[dict[str, Any], ...]  # result rows of this study, oldest first
    #: who holds the claim
    owner: str = ""


@dataclass(frozen=True)
class NewResult:
    """A result object (result SR, summary PDF) to record.  ``data``: its Part 10 bytes, or
    None when the journal holds this result already (an earlier grading stored it)."""

    result_uid: str
    series_uid: str
    sop_class_uid: str
    status: str
    guideline: str | None
    grade: str | None
    filling_pressure: str | None
    sources: tuple[str, ...]
    predecessors: tuple[str, ...]
    data: bytes | None = None
    #: what the primary assessment concluded (a service.model.Outcome token), recorded with
    #: the result in the same transaction (:meth:`Journal.outcome_of`), or None
    outcome: str | None = None


@dataclass(frozen=True)
class Companion:
    """An object delivered with a result SR (e.g. its summary PDF), to its own destinations."""

    result: NewResult
    destinations: tuple[tuple[str, str], ...]


@dataclass(frozen=True)
class Purged:
    """What a retention purge removed: studies, and stored objects and results (files)."""

    studies: tuple[str, ...]
    files: int


@dataclass(frozen=True)
class DueDelivery:
    id: int
    result_uid: str
    study_uid: str
    destination: str
    attempts: int
    #: for a companion (the summary PDF): the result SR it goes with
    parent_uid: str | None = None
    #: SOP Class UID of the result object
    sop_class_uid: str = ""


def backoff_delay(attempt: int, initial: float, maximum: float) -> float:
    """Seconds to wait before retry ``attempt`` (1, 2, ...): doubling from ``initial``, at
    most ``maximum`` (exponential back-off, common practice)."""
    return min(initial * 2 ** (attempt - 1), maximum)


class Journal(BackfillRecords, abc.ABC):
    """What every role of the node may ask of the journal (and ``backfill``, in methods of
    its own, :class:`~service.store.backfill_journal.BackfillRecords`).  Times are epoch
    seconds; ``now`` defaults to the current time (tests pass it explicitly)."""

    #: where the journal is, for logs (never a password)
    location: str = ""
    #: several nodes may use this journal at once (a node's start then gives back only its
    #: own earlier claims)
    shared: bool = False

    @abc.abstractmethod
    def close(self) -> None:
        """Release the connection(s); the object is unusable afterwards."""

    # -- receiving ------------------------------------------------------------------------------

    @abc.abstractmethod
    def store_object(
        self,
        *,
        sop_instance_uid: str,
        study_uid: str,
        sop_class_uid: str,
        transfer_syntax: str,
        calling_ae: str,
        data: bytes,
        settle_seconds: float,
        now: float | None = None,
    ) -> None:
        """Store a received object (``data``: its Part 10 bytes) and (re)open its study for
        grading ``settle_seconds`` from now.  Durable when it returns: only then may the
        C-STORE success go out.  Raises on any failure (nothing is acknowledged then)."""

    @abc.abstractmethod
    def store_ignored(
        self,
        *,
        sop_instance_uid: str,
        study_uid: str,
        sop_class_uid: str,
        calling_ae: str,
        data: bytes,
        reason: str,
        now: float | None = None,
    ) -> None:
        """Keep a received object that is never to be graded nor forwarded (the node's own
        result coming back), with the reason; durable when this returns (its C-STORE success
        follows).  Its study is neither opened nor re-opened.  Purged by
        :meth:`purge_finished` once older than its cut-off."""

    @abc.abstractmethod
    def ignored_objects(self, limit: int = 100) -> list[dict[str, Any]]:
        """The objects kept by :meth:`store_ignored`, newest first: sop_instance_uid,
        study_uid, sop_class_uid, calling_ae, reason, received_at, times_received."""

    @abc.abstractmethod
    def ignored_data(self, sop_instance_uid: str) -> bytes:
        """The stored Part 10 bytes of an object kept by :meth:`store_ignored`; OSError when
        they cannot be read."""

    @abc.abstractmethod
    def object_data(self, sop_instance_uid: str) -> bytes:
        """The stored Part 10 bytes of a received object; OSError when they cannot be read."""

    # -- assembling and grading -----------------------------------------------------------------

    @abc.abstractmethod
    def next_due_at(self) -> float | None:
        """When the next study can be claimed: its settle window ends, or the lease of the
        claim on it runs out (None: nothing waits)."""

    @abc.abstractmethod
    def claim_due(
        self,
        *,
        now: float | None = None,
        limit: int = 1,
        owner: str = "",
        lease_seconds: float = DEFAULT_LEASE_SECONDS,
    ) -> list[StudyClaim]:
        """Take up to ``limit`` studies whose settle window is over, or whose claim's lease
        ran out, for ``owner``: state -> assembled, leased for ``lease_seconds``.  A study
        whose claims ended without a result :data:`MAX_CLAIMS` times fails instead, with
        that reason.  Two callers never get the same study while its lease runs."""

    @abc.abstractmethod
    def finish_grading(
        self,
        claim: StudyClaim,
        *,
        result: NewResult | None,
        destinations: Sequence[tuple[str, str]] = (),
        failure: str = "",
        object_notes: dict[str, str] | None = None,
        companions: Sequence[Companion] = (),
        audit: Any = None,
        now: float | None = None,
    ) -> bool:
        """Record the outcome of grading ``claim``.

        With a result: its bytes (unless the journal holds them already) and its row (kept as
        is when this UID exists already: a re-sent identical study), and one pending delivery
        per ``(destination, target)`` unless that destination already has this result UID; the
        same for each companion object, queued after the result so that it follows the result
        on the same association.  Without: the study fails with ``failure``.  A newer object
        that arrived meanwhile keeps the study open for another grading.  Returns True when
        new deliveries were queued.  OSError when a result's bytes cannot be stored (nothing
        is recorded then).  ``audit``: the study's audit facts
        (:class:`service.audit.facts.StudyFacts`), recorded in the same transaction (a row
        that records the failure when there are none); see :meth:`audit_rows`."""

    @abc.abstractmethod
    def release_claim(
        self, claim: StudyClaim, *, retry_at: float | None = None, now: float | None = None
    ) -> None:
        """Give a claimed study back (e.g. on shutdown before it was graded); with
        ``retry_at`` it is not due before then (a retry after a storage error)."""

    @abc.abstractmethod
    def recover(self, *, now: float | None = None, owner_prefix: str = "") -> dict[str, int]:
        """On start: the claims of this node's earlier run (every claim whose owner starts
        with ``owner_prefix``; "": every claim, for a journal only this node uses) are given
        back, studies due now.  Returns the counts of :meth:`counts`, ``resumed_grading``
        (every study waiting to be graded: those caught mid-grading and those whose settle
        window had not ended) and ``interrupted_grading`` (those of them caught
        mid-grading)."""

    @abc.abstractmethod
    def release_owner(self, owner: str, *, now: float | None = None) -> dict[str, int]:
        """Give back everything ``owner`` holds (it died): its studies due now (the claim
        counts towards :data:`MAX_CLAIMS`), its deliveries free to claim.  Returns
        ``{"studies": n, "deliveries": m}``."""

    @abc.abstractmethod
    def renew_leases(
        self, owner: str, *, lease_seconds: float = DEFAULT_LEASE_SECONDS, now: float | None = None
    ) -> None:
        """Extend the lease of every claim ``owner`` holds to ``lease_seconds`` from now."""

    def now(self) -> float:
        """The journal's clock, epoch seconds: settle windows, leases and back-offs are
        measured on it (a journal that several machines share gives them one clock)."""
        return time.time()

    def changed(self) -> bool:
        """Whether another connection may have committed something since the last call: a
        cheap test for the roles to poll between queries.  True when the implementation
        cannot tell."""
        return True

    @abc.abstractmethod
    def request_regrade(self, study_uid: str, *, now: float | None = None) -> bool:
        """Queue a study for grading again (durable); False when the study is unknown."""

    @abc.abstractmethod
    def result_stored(self, result_uid: str) -> bool:
        """The journal records this result and holds its bytes."""

    @abc.abstractmethod
    def result_data(self, result_uid: str) -> bytes:
        """The stored Part 10 bytes of a result object; OSError when they cannot be read."""

    # -- delivering -------------------------------------------------------------------------------

    @abc.abstractmethod
    def due_deliveries(
        self, *, now: float | None = None, limit: int = 100, destination: str | None = None
    ) -> list[DueDelivery]:
        """Pending deliveries whose next attempt is due (to ``destination`` only, when
        given), oldest first."""

    @abc.abstractmethod
    def due_destinations(self, *, now: float | None = None) -> list[str]:
        """The destinations that have a pending delivery due now and not claimed."""

    @abc.abstractmethod
    def claim_deliveries(
        self,
        destination: str,
        *,
        owner: str,
        lease_seconds: float = DEFAULT_LEASE_SECONDS,
        limit: int = 100,
        now: float | None = None,
    ) -> list[DueDelivery]:
        """Take up to ``limit`` due deliveries to ``destination`` that nobody holds, for
        ``owner``, leased for ``lease_seconds``; oldest first.  Marking one delivered or
        failed ends its claim."""

    @abc.abstractmethod
    def release_deliveries(self, delivery_ids: Sequence[int]) -> None:
        """End the claims on these deliveries without an attempt (they were not sent)."""

    @abc.abstractmethod
    def delivered_to(self, result_uid: str, destination: str) -> bool: ...

    @abc.abstractmethod
    def next_delivery_at(self, *, destination: str | None = None) -> float | None:
        """When the next pending delivery (to ``destination``, when given) is due and not
        held by a claim."""

    @abc.abstractmethod
    def mark_delivered(self, delivery_id: int, *, now: float | None = None) -> None: ...

    @abc.abstractmethod
    def mark_attempt_failed(
        self,
        delivery_id: int,
        error: str,
        *,
        max_attempts: int,
        backoff_initial: float,
        backoff_max: float,
        now: float | None = None,
    ) -> DeliveryState:
        """Count a failed attempt: back off exponentially, or fail past ``max_attempts``."""

    @abc.abstractmethod
    def mark_failed(self, delivery_id: int, reason: str, *, now: float | None = None) -> None:
        """Fail a delivery at once (e.g. its destination is no longer configured)."""

    @abc.abstractmethod
    def requeue_failed(self, *, now: float | None = None) -> int:
        """Every failed delivery back to pending with fresh attempts (durable); how many."""

    # -- reading ----------------------------------------------------------------------------------

    @abc.abstractmethod
    def counts(self) -> dict[str, int]:
        """``objects.<state>``, ``studies.<state>``, ``deliveries.<state>`` -> number."""

    @abc.abstractmethod
    def study(self, study_uid: str) -> dict[str, Any] | None: ...

    @abc.abstractmethod
    def studies(self, *, states: Sequence[str] = (), limit: int = 1000) -> list[dict[str, Any]]: ...

    @abc.abstractmethod
    def objects(self, study_uid: str | None = None) -> list[dict[str, Any]]: ...

    @abc.abstractmethod
    def results(self, study_uid: str | None = None) -> list[dict[str, Any]]: ...

    @abc.abstractmethod
    def result(self, result_uid: str) -> dict[str, Any] | None: ...

    @abc.abstractmethod
    def objects_set_aside(self, limit: int = 100) -> list[dict[str, Any]]: ...

    # -- outcomes of results (service.model.Outcome tokens) ----------------------------------

    @abc.abstractmethod
    def outcome_of(self, result_uid: str) -> str | None: ...

    @abc.abstractmethod
    def deliveries(
        self, *, states: Sequence[str] = (), result_uid: str | None = None
    ) -> list[dict[str, Any]]: ...

    @abc.abstractmethod
    def queue_depth(self) -> dict[str, int]:
        """Work waiting: studies not yet graded, deliveries pending and failed."""

    @abc.abstractmethod
    def pending_work(self) -> int:
        """Studies not yet graded plus deliveries not yet done."""

    @abc.abstractmethod
    def check_writable(self, *, now: float | None = None) -> None:
        """One committed write; raises when the journal cannot take writes."""

    # -- the audit and the status page (read) ---------------------------------------------------

    @abc.abstractmethod
    def audit_rows(
        self, since: float | None = None, until: float | None = None, *, identities: bool = False
    ) -> list[Any]:
        """Audit rows (:class:`service.store.audit_records.AuditRow`) of the studies graded in
        [since, until), oldest first; patient identity only with ``identities`` (and only
        where it was recorded)."""

    @abc.abstractmethod
    def iter_audit_rows(
        self,
        since: float | None = None,
        until: float | None = None,
        *,
        identities: bool = False,
        page: int = 5000,
    ) -> Iterator[Any]:
        """:meth:`audit_rows` read a page at a time (memory bounded)."""

    @abc.abstractmethod
    def activity_since(self, since: float) -> dict[str, Any]:
        """Objects received, studies graded by outcome, deliveries done per destination and
        failed, since ``since``."""

    @abc.abstractmethod
    def recent_failures(self, limit: int = 20) -> list[dict[str, Any]]:
        """Failed deliveries and studies that could not be graded, newest first."""

    @abc.abstractmethod
    def patient_identities(self, study_uids: Sequence[str]) -> dict[str, tuple[str, str]]:
        """Patient name and ID of these studies where the audit recorded them."""

    # -- retention ---------------------------------------------------------------------------

    @abc.abstractmethod
    def purge_finished(self, older_than: float) -> Purged:
        """Remove studies finished before ``older_than`` with their objects, results,
        deliveries and stored bytes (durable).

        Finished: ``delivered`` (every delivery done), or ``failed`` with nothing pending or
        failed to deliver (a study that could not be graded).  Studies waiting to be graded,
        results waiting to be delivered and failed deliveries (which an administrator may
        re-queue) are never purged.  Objects kept by :meth:`store_ignored` before
        ``older_than`` go too.  A purged study's audit facts stay (no patient identity is in
        them); its recorded patient identity goes."""

    def __enter__(self) -> Journal:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


def open_journal(where: Config | Path | str, **options: Any) -> Journal:
    """The journal a configuration names (``journal.url``: PostgreSQL; empty: SQLite in the
    data directory), or the SQLite journal of the data directory ``where``."""
    from service.store.sqlite_journal import SqliteJournal, journal_path

    if isinstance(where, str | Path):
        data_dir = Path(where)
    else:
        if where.journal.url:
            from service.store.postgres_journal import PostgresJournal

            return PostgresJournal(where.journal.url, password=where.journal.password, **options)
        data_dir = where.data_dir.resolve()
    return SqliteJournal(journal_path(data_dir), spool_root=Path(data_dir) / "spool")

"""The journal: an embedded SQLite database (stdlib ``sqlite3``, WAL mode) that records every
received object, every study, every result and every delivery, so that nothing acknowledged is
lost across a crash and pending work resumes on start.

Durability
----------
What the node promises to others is committed with ``synchronous=FULL`` (on disk when the
commit returns): a received object (its C-STORE success is sent after this commit), a re-grade
or re-queue an administrator asked for, a retention purge.  The node's own progress (a study
claimed, graded, a delivery attempted or done) is committed with ``synchronous=NORMAL``: it
survives a crash of the process (kill -9 included) like any commit, and the next FULL commit
puts it on disk with everything before it; only a power loss or an operating-system crash
can roll back such a commit, and then the journal is still consistent (SQLite, "PRAGMA
synchronous": "WAL mode is always consistent with synchronous=NORMAL, but WAL mode does lose
durability"; https://www.sqlite.org/pragma.html#pragma_synchronous).  What that can cost is
work done again, never an acknowledged object: a study graded again (the same result, whose UID
is derived from its sources) or a result sent again (the same SOP Instance UID, which a PACS
keeps once).  The result file itself is fsync'ed before its journal row is written, so a row
that survives always names a whole file.

States
------
object:   received -> assembled -> graded
study:    received -> assembled -> graded -> delivered
                                         \\-> failed (reason: not gradable by the pipeline,
                                              grading error, or a delivery past its limit)
          any state -> received again when a new object of the study arrives or an
          administrator asks for a re-grade (``generation`` counts these).
delivery: pending -> delivered | failed (reason); ``requeue_failed`` puts failed ones back.

One connection is shared by the threads of a process behind a lock; other processes (the
``queue`` command) may open the same file at the same time (WAL readers never block).
"""

from __future__ import annotations

import json
import sqlite3
import threading
import time
from collections.abc import Iterator, Sequence
from contextlib import contextmanager
from dataclasses import dataclass
from enum import StrEnum
from pathlib import Path
from typing import Any

from service.store.activity import ActivityQueries
from service.store.audit_records import AUDIT_SCHEMA, AuditRecords

SCHEMA_VERSION = 1


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

_SCHEMA = """
CREATE TABLE IF NOT EXISTS meta (key TEXT PRIMARY KEY, value TEXT NOT NULL);
CREATE TABLE IF NOT EXISTS objects (
    sop_instance_uid TEXT PRIMARY KEY,
    study_uid TEXT NOT NULL,
    sop_class_uid TEXT NOT NULL,
    transfer_syntax TEXT NOT NULL,
    calling_ae TEXT NOT NULL,
    path TEXT NOT NULL,
    state TEXT NOT NULL,
    received_at REAL NOT NULL,
    times_received INTEGER NOT NULL DEFAULT 1,
    note TEXT NOT NULL DEFAULT ''  -- why the grading set it aside, if it did
);
CREATE INDEX IF NOT EXISTS objects_study ON objects (study_uid);
CREATE TABLE IF NOT EXISTS studies (
    study_uid TEXT PRIMARY KEY,
    calling_ae TEXT NOT NULL,
    state TEXT NOT NULL,
    reason TEXT NOT NULL DEFAULT '',
    first_received_at REAL NOT NULL,
    last_received_at REAL NOT NULL,
    due_at REAL NOT NULL,
    generation INTEGER NOT NULL DEFAULT 1,
    result_uid TEXT,
    updated_at REAL NOT NULL
);
CREATE INDEX IF NOT EXISTS studies_state ON studies (state, due_at);
CREATE TABLE IF NOT EXISTS results (
    result_uid TEXT PRIMARY KEY,
    study_uid TEXT NOT NULL,
    series_uid TEXT NOT NULL,
    sop_class_uid TEXT NOT NULL,
    path TEXT NOT NULL,
    status TEXT NOT NULL,
    guideline TEXT,
    grade TEXT,
    filling_pressure TEXT,
    sources TEXT NOT NULL,
    predecessors TEXT NOT NULL,
    created_at REAL NOT NULL
);
CREATE INDEX IF NOT EXISTS results_study ON results (study_uid, created_at);
CREATE TABLE IF NOT EXISTS deliveries (
    id INTEGER PRIMARY KEY AUTOINCREMENT,
    result_uid TEXT NOT NULL,
    destination TEXT NOT NULL,
    target TEXT NOT NULL,
    state TEXT NOT NULL,
    attempts INTEGER NOT NULL DEFAULT 0,
    next_attempt_at REAL NOT NULL,
    last_error TEXT NOT NULL DEFAULT '',
    created_at REAL NOT NULL,
    updated_at REAL NOT NULL,
    delivered_at REAL,
    UNIQUE (result_uid, destination)
);
CREATE INDEX IF NOT EXISTS deliveries_due ON deliveries (state, next_attempt_at);
-- objects that go with a result SR (the one-page summary PDF): delivered like it, and part of
-- its study's delivery state
CREATE TABLE IF NOT EXISTS companions (
    result_uid TEXT NOT NULL,
    companion_uid TEXT NOT NULL,
    PRIMARY KEY (result_uid, companion_uid)
);
CREATE INDEX IF NOT EXISTS companions_companion ON companions (companion_uid);
"""


@dataclass(frozen=True)
class StudyClaim:
    """A study taken for grading: its objects as they were when claimed."""

    study_uid: str
    calling_ae: str
    generation: int
    object_uids: tuple[str, ...]
    object_paths: tuple[Path, ...]
    earlier_results: tuple[dict[str, Any], ...]  # result rows of this study, oldest first


@dataclass(frozen=True)
class NewResult:
    result_uid: str
    series_uid: str
    sop_class_uid: str
    path: Path
    status: str
    guideline: str | None
    grade: str | None
    filling_pressure: str | None
    sources: tuple[str, ...]
    predecessors: tuple[str, ...]


@dataclass(frozen=True)
class Companion:
    """An object delivered with a result SR (e.g. its summary PDF), to its own destinations."""

    result: NewResult
    destinations: tuple[tuple[str, str], ...]


@dataclass(frozen=True)
class Purged:
    """What a retention purge removed from the journal; the caller deletes the files."""

    studies: tuple[str, ...]
    paths: tuple[Path, ...]


@dataclass(frozen=True)
class DueDelivery:
    id: int
    result_uid: str
    study_uid: str
    destination: str
    attempts: int
    path: Path
    #: for a companion (the summary PDF): the result SR it goes with
    parent_uid: str | None = None
    #: SOP Class UID of the result object
    sop_class_uid: str = ""


def backoff_delay(attempt: int, initial: float, maximum: float) -> float:
    """Seconds to wait before retry ``attempt`` (1, 2, ...): doubling from ``initial``, at
    most ``maximum`` (exponential back-off, common practice)."""
    return min(initial * 2 ** (attempt - 1), maximum)


class Journal(AuditRecords, ActivityQueries):
    def __init__(self, path: Path, *, timeout: float = 30.0) -> None:
        self.path = Path(path)
        self.path.parent.mkdir(parents=True, exist_ok=True)
        self._lock = threading.RLock()
        self._db = sqlite3.connect(
            str(self.path), timeout=timeout, isolation_level=None, check_same_thread=False
        )
        self._db.row_factory = sqlite3.Row
        with self._lock:
            mode = self._db.execute("PRAGMA journal_mode=WAL").fetchone()[0]
            if str(mode).lower() != "wal":
                raise sqlite3.OperationalError(f"journal cannot use WAL mode (got {mode})")
            self._db.execute("PRAGMA synchronous=FULL")
            self._db.execute(f"PRAGMA busy_timeout={int(timeout * 1000)}")
            self._db.executescript(_SCHEMA)
            self._db.executescript(AUDIT_SCHEMA)
            self._db.execute(
                "INSERT OR IGNORE INTO meta VALUES ('schema_version', ?)", (str(SCHEMA_VERSION),)
            )

    def close(self) -> None:
        with self._lock:
            self._db.close()

    @contextmanager
    def _tx(self, *, durable: bool = True) -> Iterator[sqlite3.Connection]:
        """One write transaction, committed on exit: on disk when the commit returns
        (``durable``: synchronous=FULL), or with the next durable commit (synchronous=NORMAL;
        see "Durability" above)."""
        with self._lock:
            if not durable:
                self._db.execute("PRAGMA synchronous=NORMAL")
            try:
                self._db.execute("BEGIN IMMEDIATE")
                try:
                    yield self._db
                except BaseException:
                    self._db.execute("ROLLBACK")
                    raise
                self._db.execute("COMMIT")
            finally:
                if not durable:
                    self._db.execute("PRAGMA synchronous=FULL")

    def _query(self, sql: str, params: Sequence[Any] = ()) -> list[sqlite3.Row]:
        with self._lock:
            return self._db.execute(sql, params).fetchall()

    # -- receiving ------------------------------------------------------------------------------

    def record_object(
        self,
        *,
        sop_instance_uid: str,
        study_uid: str,
        sop_class_uid: str,
        transfer_syntax: str,
        calling_ae: str,
        path: Path,
        settle_seconds: float,
        now: float | None = None,
    ) -> None:
        """Record a received object (already durable in the spool) and (re)open its study for
        grading ``settle_seconds`` from now.  Committed before returning."""
        now = time.time() if now is None else now
        with self._tx() as db:
            db.execute(
                """INSERT INTO objects (sop_instance_uid, study_uid, sop_class_uid,
                       transfer_syntax, calling_ae, path, state, received_at)
                   VALUES (?, ?, ?, ?, ?, ?, 'received', ?)
                   ON CONFLICT (sop_instance_uid) DO UPDATE SET
                       study_uid = excluded.study_uid, sop_class_uid = excluded.sop_class_uid,
                       transfer_syntax = excluded.transfer_syntax,
                       calling_ae = excluded.calling_ae, path = excluded.path,
                       state = 'received', received_at = excluded.received_at,
                       times_received = times_received + 1, note = ''""",
                (
                    sop_instance_uid,
                    study_uid,
                    sop_class_uid,
                    transfer_syntax,
                    calling_ae,
                    str(path),
                    now,
                ),
            )
            db.execute(
                """INSERT INTO studies (study_uid, calling_ae, state, first_received_at,
                       last_received_at, due_at, updated_at)
                   VALUES (?, ?, 'received', ?, ?, ?, ?)
                   ON CONFLICT (study_uid) DO UPDATE SET
                       calling_ae = excluded.calling_ae, state = 'received', reason = '',
                       last_received_at = excluded.last_received_at,
                       due_at = excluded.due_at, generation = generation + 1,
                       updated_at = excluded.updated_at""",
                (study_uid, calling_ae, now, now, now + settle_seconds, now),
            )

    # -- assembling and grading -----------------------------------------------------------------

    def next_due_at(self) -> float | None:
        rows = self._query("SELECT MIN(due_at) FROM studies WHERE state = 'received'")
        return rows[0][0] if rows else None

    def claim_due(self, *, now: float | None = None, limit: int = 1) -> list[StudyClaim]:
        """Take up to ``limit`` studies whose settle window is over: state -> assembled."""
        now = time.time() if now is None else now
        claims = []
        with self._tx(durable=False) as db:
            studies = db.execute(
                """SELECT study_uid, calling_ae, generation FROM studies
                   WHERE state = 'received' AND due_at <= ? ORDER BY due_at LIMIT ?""",
                (now, limit),
            ).fetchall()
            for s in studies:
                objs = db.execute(
                    "SELECT sop_instance_uid, path FROM objects WHERE study_uid = ? "
                    "ORDER BY received_at, sop_instance_uid",
                    (s["study_uid"],),
                ).fetchall()
                earlier = db.execute(
                    "SELECT * FROM results WHERE study_uid = ? ORDER BY created_at, rowid",
                    (s["study_uid"],),
                ).fetchall()
                db.execute(
                    "UPDATE studies SET state = 'assembled', updated_at = ? WHERE study_uid = ?",
                    (now, s["study_uid"]),
                )
                db.execute(
                    "UPDATE objects SET state = 'assembled' WHERE study_uid = ? "
                    "AND state = 'received'",
                    (s["study_uid"],),
                )
                claims.append(
                    StudyClaim(
                        study_uid=s["study_uid"],
                        calling_ae=s["calling_ae"],
                        generation=s["generation"],
                        object_uids=tuple(o["sop_instance_uid"] for o in objs),
                        object_paths=tuple(Path(o["path"]) for o in objs),
                        earlier_results=tuple(dict(r) for r in earlier),
                    )
                )
        return claims

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

        With a result: the result row (kept as is when this UID exists already: a re-sent
        identical study), and one pending delivery per ``(destination, target)`` unless that
        destination already has this result UID; the same for each companion object, queued
        after the result so that it follows the result on the same association.  Without: the
        study fails with ``failure``.  ``audit``: the study's audit facts
        (:class:`service.audit.facts.StudyFacts`), recorded in the same transaction (a row that
        records the failure when there are none).  Returns True when new deliveries were
        queued."""
        now = time.time() if now is None else now
        queued = False
        with self._tx(durable=False) as db:
            current = db.execute(
                "SELECT generation FROM studies WHERE study_uid = ?", (claim.study_uid,)
            ).fetchone()
            same_generation = current is not None and current["generation"] == claim.generation
            if claim.object_uids:
                marks = ",".join("?" * len(claim.object_uids))
                db.execute(
                    f"UPDATE objects SET state = 'graded' WHERE sop_instance_uid IN ({marks}) "
                    "AND state = 'assembled'",
                    claim.object_uids,
                )
            for uid, note in (object_notes or {}).items():
                db.execute("UPDATE objects SET note = ? WHERE sop_instance_uid = ?", (note, uid))
            if result is not None:
                queued = self._insert_result(db, claim.study_uid, result, destinations, now)
                for comp in companions:
                    queued = (
                        self._insert_result(
                            db, claim.study_uid, comp.result, comp.destinations, now
                        )
                        or queued
                    )
                    db.execute(
                        "INSERT OR IGNORE INTO companions VALUES (?, ?)",
                        (result.result_uid, comp.result.result_uid),
                    )
                db.execute(
                    "UPDATE studies SET result_uid = ?, updated_at = ? WHERE study_uid = ?",
                    (result.result_uid, now, claim.study_uid),
                )
            if same_generation:
                self._audit_graded(
                    db,
                    claim.study_uid,
                    audit,
                    calling_ae=claim.calling_ae,
                    failure="" if result is not None else (failure or "not graded"),
                    now=now,
                )
                if result is None:
                    db.execute(
                        "UPDATE studies SET state = 'failed', reason = ?, updated_at = ? "
                        "WHERE study_uid = ?",
                        (failure or "not graded", now, claim.study_uid),
                    )
                else:
                    db.execute(
                        "UPDATE studies SET state = 'graded', reason = '', updated_at = ? "
                        "WHERE study_uid = ?",
                        (now, claim.study_uid),
                    )
                    self._settle_study_state(db, claim.study_uid, now)
            # else: a newer object arrived while grading; the study is 'received' again
        return queued

    @staticmethod
    def _insert_result(
        db: sqlite3.Connection,
        study_uid: str,
        result: NewResult,
        destinations: Sequence[tuple[str, str]],
        now: float,
    ) -> bool:
        db.execute(
            """INSERT OR IGNORE INTO results (result_uid, study_uid, series_uid,
                   sop_class_uid, path, status, guideline, grade, filling_pressure,
                   sources, predecessors, created_at)
               VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)""",
            (
                result.result_uid,
                study_uid,
                result.series_uid,
                result.sop_class_uid,
                str(result.path),
                result.status,
                result.guideline,
                result.grade,
                result.filling_pressure,
                json.dumps(list(result.sources)),
                json.dumps(list(result.predecessors)),
                now,
            ),
        )
        queued = False
        for name, target in destinations:
            cur = db.execute(
                """INSERT OR IGNORE INTO deliveries (result_uid, destination, target,
                       state, next_attempt_at, created_at, updated_at)
                   VALUES (?, ?, ?, 'pending', ?, ?, ?)""",
                (result.result_uid, name, target, now, now, now),
            )
            queued = queued or cur.rowcount > 0
        return queued

    def release_claim(
        self, claim: StudyClaim, *, retry_at: float | None = None, now: float | None = None
    ) -> None:
        """Give a claimed study back (e.g. on shutdown before it was graded); with
        ``retry_at`` it is not due before then (a retry after a write error)."""
        now = time.time() if now is None else now
        with self._tx(durable=False) as db:
            db.execute(
                "UPDATE studies SET state = 'received', updated_at = ?, "
                "due_at = COALESCE(?, due_at) WHERE study_uid = ? AND state = 'assembled'",
                (now, retry_at, claim.study_uid),
            )
            db.execute(
                "UPDATE objects SET state = 'received' WHERE study_uid = ? AND state = 'assembled'",
                (claim.study_uid,),
            )

    def recover(self, *, now: float | None = None) -> dict[str, int]:
        """On start: studies caught mid-grading go back to received (due now)."""
        now = time.time() if now is None else now
        with self._tx() as db:
            studies = db.execute(
                "UPDATE studies SET state = 'received', due_at = MIN(due_at, ?), "
                "updated_at = ? WHERE state = 'assembled'",
                (now, now),
            ).rowcount
            db.execute("UPDATE objects SET state = 'received' WHERE state = 'assembled'")
        counts = self.counts()
        counts["resumed_grading"] = studies
        return counts

    def request_regrade(self, study_uid: str, *, now: float | None = None) -> bool:
        now = time.time() if now is None else now
        with self._tx() as db:
            n = db.execute(
                "UPDATE studies SET state = 'received', reason = '', due_at = ?, "
                "generation = generation + 1, updated_at = ? WHERE study_uid = ?",
                (now, now, study_uid),
            ).rowcount
        return n > 0

    # -- delivering -------------------------------------------------------------------------------

    def due_deliveries(self, *, now: float | None = None, limit: int = 100) -> list[DueDelivery]:
        now = time.time() if now is None else now
        rows = self._query(
            """SELECT d.id, d.result_uid, r.study_uid, d.destination, d.attempts, r.path,
                      r.sop_class_uid,
                      (SELECT c.result_uid FROM companions c
                       WHERE c.companion_uid = d.result_uid LIMIT 1) AS parent_uid
               FROM deliveries d JOIN results r ON r.result_uid = d.result_uid
               WHERE d.state = 'pending' AND d.next_attempt_at <= ?
               ORDER BY d.next_attempt_at, d.id LIMIT ?""",
            (now, limit),
        )
        return [
            DueDelivery(
                id=r["id"],
                result_uid=r["result_uid"],
                study_uid=r["study_uid"],
                destination=r["destination"],
                attempts=r["attempts"],
                path=Path(r["path"]),
                parent_uid=r["parent_uid"],
                sop_class_uid=r["sop_class_uid"],
            )
            for r in rows
        ]

    def delivered_to(self, result_uid: str, destination: str) -> bool:
        rows = self._query(
            "SELECT 1 FROM deliveries WHERE result_uid = ? AND destination = ? "
            "AND state = 'delivered'",
            (result_uid, destination),
        )
        return bool(rows)

    def next_delivery_at(self) -> float | None:
        rows = self._query("SELECT MIN(next_attempt_at) FROM deliveries WHERE state = 'pending'")
        return rows[0][0] if rows else None

    def mark_delivered(self, delivery_id: int, *, now: float | None = None) -> None:
        now = time.time() if now is None else now
        with self._tx(durable=False) as db:
            db.execute(
                "UPDATE deliveries SET state = 'delivered', attempts = attempts + 1, "
                "last_error = '', delivered_at = ?, updated_at = ? WHERE id = ?",
                (now, now, delivery_id),
            )
            self._settle_study_of_delivery(db, delivery_id, now)

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
        now = time.time() if now is None else now
        with self._tx(durable=False) as db:
            row = db.execute(
                "SELECT attempts FROM deliveries WHERE id = ?", (delivery_id,)
            ).fetchone()
            attempts = (row["attempts"] if row else 0) + 1
            if attempts >= max_attempts:
                state = DeliveryState.failed
                reason = f"gave up after {attempts} attempts: {error}"
                db.execute(
                    "UPDATE deliveries SET state = 'failed', attempts = ?, last_error = ?, "
                    "updated_at = ? WHERE id = ?",
                    (attempts, reason, now, delivery_id),
                )
                self._settle_study_of_delivery(db, delivery_id, now)
            else:
                state = DeliveryState.pending
                delay = backoff_delay(attempts, backoff_initial, backoff_max)
                db.execute(
                    "UPDATE deliveries SET attempts = ?, last_error = ?, next_attempt_at = ?, "
                    "updated_at = ? WHERE id = ?",
                    (attempts, error, now + delay, now, delivery_id),
                )
        return state

    def mark_failed(self, delivery_id: int, reason: str, *, now: float | None = None) -> None:
        """Fail a delivery at once (e.g. its destination is no longer configured)."""
        now = time.time() if now is None else now
        with self._tx(durable=False) as db:
            db.execute(
                "UPDATE deliveries SET state = 'failed', attempts = attempts + 1, "
                "last_error = ?, updated_at = ? WHERE id = ?",
                (reason, now, delivery_id),
            )
            self._settle_study_of_delivery(db, delivery_id, now)

    def requeue_failed(self, *, now: float | None = None) -> int:
        now = time.time() if now is None else now
        with self._tx() as db:
            studies = [
                r[0]
                for r in db.execute(
                    "SELECT DISTINCT r.study_uid FROM deliveries d JOIN results r "
                    "ON r.result_uid = d.result_uid WHERE d.state = 'failed'"
                )
            ]
            n = db.execute(
                "UPDATE deliveries SET state = 'pending', attempts = 0, next_attempt_at = ?, "
                "updated_at = ? WHERE state = 'failed'",
                (now, now),
            ).rowcount
            for study in studies:
                self._settle_study_state(db, study, now)
        return n

    def _settle_study_of_delivery(self, db: sqlite3.Connection, delivery_id: int, now: float):
        row = db.execute(
            "SELECT r.study_uid FROM deliveries d JOIN results r ON r.result_uid = d.result_uid "
            "WHERE d.id = ?",
            (delivery_id,),
        ).fetchone()
        if row:
            self._settle_study_state(db, row[0], now)

    def _settle_study_state(self, db: sqlite3.Connection, study_uid: str, now: float) -> None:
        """graded/delivered/failed of a study from the deliveries of its current result."""
        study = db.execute(
            "SELECT state, result_uid FROM studies WHERE study_uid = ?", (study_uid,)
        ).fetchone()
        if study is None or study["state"] not in ("graded", "delivered", "failed"):
            return
        if study["result_uid"] is None:
            return
        rows = db.execute(
            "SELECT destination, state, last_error FROM deliveries WHERE result_uid = ? "
            "OR result_uid IN (SELECT companion_uid FROM companions WHERE result_uid = ?)",
            (study["result_uid"], study["result_uid"]),
        ).fetchall()
        failed = [r for r in rows if r["state"] == "failed"]
        pending = [r for r in rows if r["state"] == "pending"]
        if failed:
            state = "failed"
            reason = "; ".join(f"delivery to {r['destination']}: {r['last_error']}" for r in failed)
        elif pending or not rows:
            state, reason = "graded", ""
        else:
            state, reason = "delivered", ""
        db.execute(
            "UPDATE studies SET state = ?, reason = ?, updated_at = ? WHERE study_uid = ?",
            (state, reason, now, study_uid),
        )
        self._audit_settled(db, study_uid, state, reason, now)

    # -- reading ----------------------------------------------------------------------------------

    def counts(self) -> dict[str, int]:
        out: dict[str, int] = {}
        for table in ("objects", "studies", "deliveries"):
            for row in self._query(f"SELECT state, COUNT(*) FROM {table} GROUP BY state"):
                out[f"{table}.{row[0]}"] = row[1]
        return out

    def study(self, study_uid: str) -> dict[str, Any] | None:
        rows = self._query("SELECT * FROM studies WHERE study_uid = ?", (study_uid,))
        return dict(rows[0]) if rows else None

    def studies(self, *, states: Sequence[str] = (), limit: int = 1000) -> list[dict[str, Any]]:
        if states:
            marks = ",".join("?" * len(states))
            rows = self._query(
                f"SELECT * FROM studies WHERE state IN ({marks}) ORDER BY updated_at DESC LIMIT ?",
                (*states, limit),
            )
        else:
            rows = self._query("SELECT * FROM studies ORDER BY updated_at DESC LIMIT ?", (limit,))
        return [dict(r) for r in rows]

    def objects(self, study_uid: str | None = None) -> list[dict[str, Any]]:
        if study_uid is None:
            rows = self._query("SELECT * FROM objects ORDER BY received_at")
        else:
            rows = self._query(
                "SELECT * FROM objects WHERE study_uid = ? ORDER BY received_at", (study_uid,)
            )
        return [dict(r) for r in rows]

    def results(self, study_uid: str | None = None) -> list[dict[str, Any]]:
        if study_uid is None:
            rows = self._query("SELECT * FROM results ORDER BY created_at, rowid")
        else:
            rows = self._query(
                "SELECT * FROM results WHERE study_uid = ? ORDER BY created_at, rowid",
                (study_uid,),
            )
        out = []
        for r in rows:
            d = dict(r)
            d["sources"] = json.loads(d["sources"])
            d["predecessors"] = json.loads(d["predecessors"])
            out.append(d)
        return out

    def result(self, result_uid: str) -> dict[str, Any] | None:
        rows = self._query("SELECT * FROM results WHERE result_uid = ?", (result_uid,))
        if not rows:
            return None
        d = dict(rows[0])
        d["sources"] = json.loads(d["sources"])
        d["predecessors"] = json.loads(d["predecessors"])
        return d

    def objects_set_aside(self, limit: int = 100) -> list[dict[str, Any]]:
        rows = self._query(
            "SELECT * FROM objects WHERE note != '' ORDER BY received_at DESC LIMIT ?", (limit,)
        )
        return [dict(r) for r in rows]

    def deliveries(
        self, *, states: Sequence[str] = (), result_uid: str | None = None
    ) -> list[dict[str, Any]]:
        sql = (
            "SELECT d.*, r.study_uid FROM deliveries d JOIN results r "
            "ON r.result_uid = d.result_uid WHERE 1=1"
        )
        params: list[Any] = []
        if states:
            sql += f" AND d.state IN ({','.join('?' * len(states))})"
            params += list(states)
        if result_uid is not None:
            sql += " AND d.result_uid = ?"
            params.append(result_uid)
        return [dict(r) for r in self._query(sql + " ORDER BY d.id", params)]

    def queue_depth(self) -> dict[str, int]:
        """Work waiting: studies not yet graded, deliveries pending and failed."""
        studies = self._query(
            "SELECT COUNT(*) FROM studies WHERE state IN ('received', 'assembled')"
        )[0][0]
        rows = self._query(
            "SELECT state, COUNT(*) FROM deliveries WHERE state IN ('pending', 'failed') "
            "GROUP BY state"
        )
        by_state = {r[0]: int(r[1]) for r in rows}
        return {
            "studies_waiting": int(studies),
            "deliveries_pending": by_state.get("pending", 0),
            "deliveries_failed": by_state.get("failed", 0),
        }

    def check_writable(self, *, now: float | None = None) -> None:
        """One committed write (raises sqlite3.Error when the journal cannot take writes)."""
        now = time.time() if now is None else now
        with self._tx() as db:
            db.execute("INSERT OR REPLACE INTO meta VALUES ('health_checked_at', ?)", (str(now),))

    # -- retention ---------------------------------------------------------------------------

    def purge_finished(self, older_than: float) -> Purged:
        """Remove studies finished before ``older_than`` (epoch seconds) with their objects,
        results and deliveries; returns the spool files to delete.

        Finished: ``delivered`` (every delivery done), or ``failed`` with nothing pending or
        failed to deliver (a study that could not be graded).  Studies waiting to be graded,
        results waiting to be delivered and failed deliveries (which an administrator may
        re-queue) are never purged."""
        with self._tx() as db:
            rows = db.execute(
                """SELECT s.study_uid FROM studies s
                   WHERE s.updated_at < ? AND (s.state = 'delivered' OR (s.state = 'failed'
                     AND NOT EXISTS (SELECT 1 FROM deliveries d JOIN results r
                         ON r.result_uid = d.result_uid
                         WHERE r.study_uid = s.study_uid AND d.state IN ('pending', 'failed'))))
                   AND NOT EXISTS (SELECT 1 FROM objects o WHERE o.study_uid = s.study_uid
                         AND o.state IN ('received', 'assembled'))""",
                (older_than,),
            ).fetchall()
            studies = tuple(r[0] for r in rows)
            paths: list[Path] = []
            for study in studies:
                paths += [
                    Path(r[0])
                    for r in db.execute("SELECT path FROM objects WHERE study_uid = ?", (study,))
                ]
                results = [
                    (r[0], r[1])
                    for r in db.execute(
                        "SELECT result_uid, path FROM results WHERE study_uid = ?", (study,)
                    )
                ]
                paths += [Path(p) for _, p in results]
                for uid, _ in results:
                    db.execute("DELETE FROM deliveries WHERE result_uid = ?", (uid,))
                    db.execute(
                        "DELETE FROM companions WHERE result_uid = ? OR companion_uid = ?",
                        (uid, uid),
                    )
                db.execute("DELETE FROM results WHERE study_uid = ?", (study,))
                self._audit_forget(db, (study,))
                db.execute("DELETE FROM objects WHERE study_uid = ?", (study,))
                db.execute("DELETE FROM studies WHERE study_uid = ?", (study,))
        return Purged(studies=studies, paths=tuple(paths))

    def pending_work(self) -> int:
        """Studies not yet graded plus deliveries not yet done."""
        a = self._query("SELECT COUNT(*) FROM studies WHERE state IN ('received', 'assembled')")[0][
            0
        ]
        b = self._query("SELECT COUNT(*) FROM deliveries WHERE state = 'pending'")[0][0]
        return int(a) + int(b)

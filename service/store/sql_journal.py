"""The journal's statements, written once for every backend.

:class:`SqlJournal` implements :class:`~service.store.journal.Journal` in SQL that SQLite and
PostgreSQL both accept (``INSERT ... ON CONFLICT``, ``CASE``, ``COALESCE``, ``?`` parameters,
which the PostgreSQL backend turns into its own).  A backend supplies the connection and its
transactions (:meth:`SqlJournal._tx`, :meth:`SqlJournal._query`), where the objects' bytes live
(the ``_put_*``, ``_read_*`` and purge hooks) and the few phrases where the dialects
differ (:attr:`SqlJournal.RESULT_ORDER`, :attr:`SqlJournal.LOCK_ROWS`).  Its schema lives in a
schema module of its own (``sqlite_schema.py``, ...).
"""

from __future__ import annotations

import abc
import functools
import json
import time
from collections.abc import Sequence
from contextlib import AbstractContextManager
from typing import Any

from service.errors import UserError
from service.store.activity import ActivityQueries
from service.store.audit_records import AuditRecords
from service.store.backfill_journal import SqlBackfillRecords
from service.store.journal import (
    DEFAULT_LEASE_SECONDS,
    MAX_CLAIMS,
    Companion,
    DeliveryState,
    DueDelivery,
    Journal,
    NewResult,
    Purged,
    StudyClaim,
    backoff_delay,
)


class Cursor(abc.ABC):
    """What the shared statements use of a backend's connection inside a transaction."""

    @abc.abstractmethod
    def execute(self, sql: str, params: Sequence[Any] = ()) -> Any:
        """Run one statement; the result has ``fetchone()``, ``fetchall()`` and ``rowcount``,
        and its rows can be read by column name and by position."""


def _retried(method: Any) -> Any:
    """Run a write method again when the database rolled its transaction back for a conflict
    with another (a deadlock it broke, a serialization failure): the method reads what it
    needs inside its transaction, so running it again is safe."""

    @functools.wraps(method)
    def run(self: SqlJournal, *args: Any, **kwargs: Any) -> Any:
        for attempt in range(RETRIES):
            try:
                return method(self, *args, **kwargs)
            except self.RETRYABLE:
                if attempt == RETRIES - 1:
                    raise
                time.sleep(0.005 * 2**attempt)
        raise AssertionError("unreachable")

    return run


#: times a write method runs before a conflict with another transaction is reported
RETRIES = 5


class SqlJournal(AuditRecords, ActivityQueries, SqlBackfillRecords, Journal):
    #: ORDER BY of results: oldest first, in the order they were recorded
    RESULT_ORDER = "created_at, rowid"
    #: appended to the SELECT that picks rows to claim (rows other transactions hold are
    #: skipped; ``{table}``: the table or alias whose rows are claimed); "" where a write
    #: transaction excludes every other writer
    LOCK_ROWS = ""
    #: errors of a transaction the database rolled back for a conflict with another (run the
    #: method again); none where a write transaction excludes every other writer
    RETRYABLE: tuple[type[BaseException], ...] = ()
    #: appended to a SELECT that locks the row it reads until the transaction ends ("" where
    #: a write transaction excludes every other writer)
    LOCK_ROW = ""

    # -- what a backend supplies ------------------------------------------------------------

    @abc.abstractmethod
    def _tx(self, *, durable: bool = True) -> AbstractContextManager[Cursor]:
        """One write transaction, committed on exit: durable when the commit returns
        (``durable``), or lazily (see "Durability" in :mod:`service.store.journal`)."""

    @abc.abstractmethod
    def _query(self, sql: str, params: Sequence[Any] = ()) -> list[Any]:
        """Rows of one read-only statement."""

    # -- the bytes: in the database, in the transaction that records them ----------------------

    def _put_object_in_tx(self, db: Cursor, sop_instance_uid: str, data: bytes) -> None:
        """Store an object's bytes in the transaction that records it: the row and its bytes
        are committed together, with one commit (one flush to disk) for both."""
        db.execute(
            "INSERT INTO object_data (sop_instance_uid, data) VALUES (?, ?) "
            "ON CONFLICT (sop_instance_uid) DO UPDATE SET data = excluded.data",
            (sop_instance_uid, data),
        )

    def _read_object(self, row: Any) -> bytes:
        """The bytes of the object whose row is ``row``."""
        rows = self._query(
            "SELECT data FROM object_data WHERE sop_instance_uid = ?", (row["sop_instance_uid"],)
        )
        if not rows:
            raise FileNotFoundError(f"the bytes of object {row['sop_instance_uid']} are missing")
        return bytes(rows[0][0])

    def _put_result_in_tx(self, db: Cursor, result_uid: str, data: bytes) -> None:
        """As :meth:`_put_object_in_tx`, for a result object."""
        db.execute(
            "INSERT INTO result_data (result_uid, data) VALUES (?, ?) "
            "ON CONFLICT (result_uid) DO NOTHING",
            (result_uid, data),
        )

    def _read_result(self, row: Any) -> bytes:
        """The bytes of the result whose row is ``row``."""
        rows = self._query(
            "SELECT data FROM result_data WHERE result_uid = ?", (row["result_uid"],)
        )
        if not rows:
            raise FileNotFoundError(f"the bytes of result {row['result_uid']} are missing")
        return bytes(rows[0][0])

    def _result_bytes_present(self, row: Any) -> bool:
        """The bytes of the recorded result ``row`` are there."""
        return bool(
            self._query("SELECT 1 FROM result_data WHERE result_uid = ?", (row["result_uid"],))
        )

    def _purge_study_bytes(self, db: Cursor, study_uid: str) -> int:
        """Inside a purge's transaction, before the study's rows go: drop the bytes of its
        objects and results; returns how many."""
        a = db.execute(
            "DELETE FROM object_data WHERE sop_instance_uid IN "
            "(SELECT sop_instance_uid FROM objects WHERE study_uid = ?)",
            (study_uid,),
        ).rowcount
        b = db.execute(
            "DELETE FROM result_data WHERE result_uid IN "
            "(SELECT result_uid FROM results WHERE study_uid = ?)",
            (study_uid,),
        ).rowcount
        return int(a) + int(b)

    def _after_purge(self, paths: list[str], studies: Sequence[str]) -> int:
        """After a purge's commit: delete bytes held outside the database (``paths``, and
        what else ``studies`` left there); returns how many."""
        return 0

    def _work_added(self, db: Cursor) -> None:
        """Inside a transaction that gives the roles new work (an object stored, deliveries
        queued, claims given back): let the other connections know, where the backend needs
        to be told (:meth:`Journal.changed`).  Nothing by default."""

    # -- receiving ------------------------------------------------------------------------------

    @_retried
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
        path = ""  # the bytes go in with the row (a path names a spool file of old)
        now = self.now() if now is None else now
        with self._tx() as db:
            self._work_added(db)
            # rows are locked in one order everywhere: a study, then its objects, then its
            # deliveries (no two transactions wait for each other)
            db.execute(
                """INSERT INTO studies (study_uid, calling_ae, state, first_received_at,
                       last_received_at, due_at, updated_at)
                   VALUES (?, ?, 'received', ?, ?, ?, ?)
                   ON CONFLICT (study_uid) DO UPDATE SET
                       calling_ae = excluded.calling_ae, state = 'received', reason = '',
                       last_received_at = excluded.last_received_at,
                       due_at = excluded.due_at, generation = studies.generation + 1,
                       claims = 0, updated_at = excluded.updated_at""",
                (study_uid, calling_ae, now, now, now + settle_seconds, now),
            )
            db.execute(
                """INSERT INTO objects (sop_instance_uid, study_uid, sop_class_uid,
                       transfer_syntax, calling_ae, path, state, received_at)
                   VALUES (?, ?, ?, ?, ?, ?, 'received', ?)
                   ON CONFLICT (sop_instance_uid) DO UPDATE SET
                       study_uid = excluded.study_uid, sop_class_uid = excluded.sop_class_uid,
                       transfer_syntax = excluded.transfer_syntax,
                       calling_ae = excluded.calling_ae, path = excluded.path,
                       state = 'received', received_at = excluded.received_at,
                       times_received = objects.times_received + 1, note = ''""",
                (
                    sop_instance_uid,
                    study_uid,
                    sop_class_uid,
                    transfer_syntax,
                    calling_ae,
                    path,
                    now,
                ),
            )
            self._put_object_in_tx(db, sop_instance_uid, data)

    @_retried
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
        path = ""  # the bytes go in with the row (a path names a spool file of old)
        now = self.now() if now is None else now
        with self._tx() as db:
            db.execute(
                """INSERT INTO ignored_objects (sop_instance_uid, study_uid, sop_class_uid,
                       calling_ae, path, reason, received_at)
                   VALUES (?, ?, ?, ?, ?, ?, ?)
                   ON CONFLICT (sop_instance_uid) DO UPDATE SET
                       calling_ae = excluded.calling_ae, path = excluded.path,
                       reason = excluded.reason, received_at = excluded.received_at,
                       times_received = ignored_objects.times_received + 1""",
                (sop_instance_uid, study_uid, sop_class_uid, calling_ae, path, reason, now),
            )
            self._put_object_in_tx(db, sop_instance_uid, data)

    def outcome_of(self, result_uid: str) -> str | None:
        rows = self._query(
            "SELECT outcome FROM result_outcomes WHERE result_uid = ?", (result_uid,)
        )
        return str(rows[0][0]) if rows else None

    def ignored_data(self, sop_instance_uid: str) -> bytes:
        rows = self._query(
            "SELECT * FROM ignored_objects WHERE sop_instance_uid = ?", (sop_instance_uid,)
        )
        if not rows:
            raise FileNotFoundError(f"object {sop_instance_uid} is not among the ignored ones")
        return self._read_object(rows[0])

    def ignored_objects(self, limit: int = 100) -> list[dict[str, Any]]:
        rows = self._query(
            "SELECT * FROM ignored_objects ORDER BY received_at DESC LIMIT ?", (limit,)
        )
        return [dict(r) for r in rows]

    def _purge_ignored_bytes(self, db: Cursor, sop_instance_uids: Sequence[str]) -> int:
        """Inside a purge's transaction: drop the bytes of these ignored objects (unless an
        object of the same UID was received for grading since); returns how many."""
        n = 0
        for uid in sop_instance_uids:
            n += db.execute(
                "DELETE FROM object_data WHERE sop_instance_uid = ? AND NOT EXISTS "
                "(SELECT 1 FROM objects WHERE sop_instance_uid = ?)",
                (uid, uid),
            ).rowcount
        return n

    def object_data(self, sop_instance_uid: str) -> bytes:
        rows = self._query("SELECT * FROM objects WHERE sop_instance_uid = ?", (sop_instance_uid,))
        if not rows:
            raise FileNotFoundError(f"object {sop_instance_uid} is not in the journal")
        return self._read_object(rows[0])

    # -- assembling and grading -----------------------------------------------------------------

    def next_due_at(self) -> float | None:
        due = self._query("SELECT MIN(due_at) AS due FROM studies WHERE state = 'received'")
        lease = self._query("SELECT MIN(lease_until) AS due FROM studies WHERE state = 'assembled'")
        times = [r[0][0] for r in (due, lease) if r and r[0][0] is not None]
        return min(times) if times else None

    @_retried
    def claim_due(
        self,
        *,
        now: float | None = None,
        limit: int = 1,
        owner: str = "",
        lease_seconds: float = DEFAULT_LEASE_SECONDS,
    ) -> list[StudyClaim]:
        now = self.now() if now is None else now
        claims = []
        # a read first: most calls find nothing due, and a read takes no write lock
        if not self._query(
            "SELECT 1 AS due FROM studies WHERE state = 'received' AND due_at <= ? "
            "UNION ALL SELECT 1 FROM studies WHERE state = 'assembled' AND lease_until <= ? "
            "LIMIT 1",
            (now, now),
        ):
            return []
        with self._tx(durable=False) as db:
            studies = [
                *db.execute(
                    """SELECT study_uid, calling_ae, generation, claims, due_at FROM studies
                       WHERE state = 'received' AND due_at <= ? ORDER BY due_at LIMIT ?"""
                    + self.LOCK_ROWS.format(table="studies"),
                    (now, limit),
                ).fetchall(),
                *db.execute(
                    """SELECT study_uid, calling_ae, generation, claims, due_at FROM studies
                       WHERE state = 'assembled' AND lease_until <= ?
                       ORDER BY lease_until LIMIT ?"""
                    + self.LOCK_ROWS.format(table="studies"),
                    (now, limit),
                ).fetchall(),
            ]
            studies.sort(key=lambda s: s["due_at"])
            for s in studies[:limit]:
                if s["claims"] >= MAX_CLAIMS:
                    self._fail_unfinished(db, s["study_uid"], s["claims"], now)
                    continue
                objs = db.execute(
                    "SELECT sop_instance_uid FROM objects WHERE study_uid = ? "
                    "ORDER BY received_at, sop_instance_uid",
                    (s["study_uid"],),
                ).fetchall()
                earlier = db.execute(
                    f"SELECT * FROM results WHERE study_uid = ? ORDER BY {self.RESULT_ORDER}",
                    (s["study_uid"],),
                ).fetchall()
                db.execute(
                    "UPDATE studies SET state = 'assembled', claimed_by = ?, lease_until = ?, "
                    "claims = claims + 1, updated_at = ? WHERE study_uid = ?",
                    (owner, now + lease_seconds, now, s["study_uid"]),
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
                        earlier_results=tuple(_result_row(r) for r in earlier),
                        owner=owner,
                    )
                )
        return claims

    @staticmethod
    def _fail_unfinished(db: Cursor, study_uid: str, claims: int, now: float) -> None:
        """A study whose claims keep ending without a result: failed, with that reason."""
        db.execute(
            "UPDATE studies SET state = 'failed', reason = ?, claimed_by = '', lease_until = 0, "
            "claims = 0, updated_at = ? WHERE study_uid = ?",
            (
                f"internal error while grading: grading ended without a result {claims} times "
                "(the grading process ended unexpectedly, or lost its claim)",
                now,
                study_uid,
            ),
        )
        db.execute(
            "UPDATE objects SET state = 'graded' WHERE study_uid = ? AND state != 'graded'",
            (study_uid,),
        )

    @staticmethod
    def _give_back(
        db: Cursor, study_uid: str, holder: str, who: str, now: float, *, uncount: bool
    ) -> None:
        """Put a study held in grading (``holder``: the SQL condition on ``claimed_by``, with
        ``who`` its parameter) back in the queue, due now at the latest, with its objects;
        ``uncount``: the claim is not counted against the study (a node's own restart).
        Nothing happens when another took it over meanwhile."""
        uncounted = "claims = CASE WHEN claims > 0 THEN claims - 1 ELSE 0 END, " if uncount else ""
        if not db.execute(
            "UPDATE studies SET state = 'received', claimed_by = '', lease_until = 0, "
            + uncounted
            + "due_at = CASE WHEN due_at < ? THEN due_at ELSE ? END, updated_at = ? "
            f"WHERE study_uid = ? AND state = 'assembled' AND {holder}",
            (now, now, now, study_uid, who),
        ).rowcount:
            return
        db.execute(
            "UPDATE objects SET state = 'received' WHERE study_uid = ? AND state = 'assembled'",
            (study_uid,),
        )

    @_retried
    def release_owner(self, owner: str, *, now: float | None = None) -> dict[str, int]:
        now = self.now() if now is None else now
        with self._tx(durable=False) as db:
            self._work_added(db)
            studies = db.execute(
                "SELECT study_uid FROM studies WHERE state = 'assembled' AND claimed_by = ?",
                (owner,),
            ).fetchall()
            for s in studies:
                self._give_back(db, s[0], "claimed_by = ?", owner, now, uncount=False)
            deliveries = db.execute(
                "UPDATE deliveries SET claimed_by = '', lease_until = 0 "
                "WHERE claimed_by = ? AND state = 'pending'",
                (owner,),
            ).rowcount
        return {"studies": len(studies), "deliveries": deliveries}

    @_retried
    def renew_leases(
        self, owner: str, *, lease_seconds: float = DEFAULT_LEASE_SECONDS, now: float | None = None
    ) -> None:
        now = self.now() if now is None else now
        with self._tx(durable=False) as db:
            db.execute(
                "UPDATE studies SET lease_until = ? WHERE claimed_by = ? AND state = 'assembled'",
                (now + lease_seconds, owner),
            )
            db.execute(
                "UPDATE deliveries SET lease_until = ? WHERE claimed_by = ? AND state = 'pending'",
                (now + lease_seconds, owner),
            )

    @_retried
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
        # a result without bytes must be recorded already; one with bytes goes in with its row
        # (a result recorded before keeps its row and its bytes: both inserts do nothing then)
        paths: dict[str, str] = {}
        held: list[NewResult] = []
        for new in ([result] if result is not None else []) + [c.result for c in companions]:
            if new.data is None:
                rows = self._query("SELECT * FROM results WHERE result_uid = ?", (new.result_uid,))
                if not rows or not self._result_bytes_present(rows[0]):
                    raise FileNotFoundError(f"stored result {new.result_uid} vanished")
                paths[new.result_uid] = rows[0]["path"]
            else:
                paths[new.result_uid] = ""
                held.append(new)
        now = self.now() if now is None else now
        queued = False
        with self._tx(durable=False) as db:
            self._work_added(db)
            current = db.execute(
                "SELECT generation, last_received_at FROM studies WHERE study_uid = ?"
                + self.LOCK_ROW,
                (claim.study_uid,),
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
            for new in held:
                self._put_result_in_tx(db, new.result_uid, new.data or b"")
            if result is not None:
                queued = self._insert_result(
                    db, claim.study_uid, result, paths[result.result_uid], destinations, now
                )
                for comp in companions:
                    queued = (
                        self._insert_result(
                            db,
                            claim.study_uid,
                            comp.result,
                            paths[comp.result.result_uid],
                            comp.destinations,
                            now,
                        )
                        or queued
                    )
                    db.execute(
                        "INSERT INTO companions VALUES (?, ?) ON CONFLICT DO NOTHING",
                        (result.result_uid, comp.result.result_uid),
                    )
                if not same_generation:  # a newer object arrived: 'received' again, kept so
                    db.execute(
                        "UPDATE studies SET result_uid = ?, updated_at = ? WHERE study_uid = ?",
                        (result.result_uid, now, claim.study_uid),
                    )
            if same_generation:
                # the outcome and the end of the claim, in one statement (one round trip)
                if result is None:
                    db.execute(
                        "UPDATE studies SET state = 'failed', reason = ?, updated_at = ?, "
                        "claimed_by = '', lease_until = 0, claims = 0 WHERE study_uid = ?",
                        (failure or "not graded", now, claim.study_uid),
                    )
                else:
                    db.execute(
                        "UPDATE studies SET result_uid = ?, state = 'graded', reason = '', "
                        "updated_at = ?, claimed_by = '', lease_until = 0, claims = 0 "
                        "WHERE study_uid = ?",
                        (result.result_uid, now, claim.study_uid),
                    )
                self._audit_graded(
                    db,
                    claim.study_uid,
                    audit,
                    calling_ae=claim.calling_ae,
                    failure="" if result is not None else (failure or "not graded"),
                    now=now,
                    last_received_at=current["last_received_at"],
                )
                if result is not None:
                    self._settle_study_state(db, claim.study_uid, now)
            # else: a newer object arrived while grading; the study is 'received' again
        return queued

    @staticmethod
    def _insert_result(
        db: Cursor,
        study_uid: str,
        result: NewResult,
        path: str,
        destinations: Sequence[tuple[str, str]],
        now: float,
    ) -> bool:
        db.execute(
            """INSERT INTO results (result_uid, study_uid, series_uid,
                   sop_class_uid, path, status, guideline, grade, filling_pressure,
                   sources, predecessors, created_at)
               VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?) ON CONFLICT DO NOTHING""",
            (
                result.result_uid,
                study_uid,
                result.series_uid,
                result.sop_class_uid,
                path,
                result.status,
                result.guideline,
                result.grade,
                result.filling_pressure,
                json.dumps(list(result.sources)),
                json.dumps(list(result.predecessors)),
                now,
            ),
        )
        if result.outcome:
            db.execute(
                """INSERT INTO result_outcomes (result_uid, outcome) VALUES (?, ?)
                   ON CONFLICT (result_uid) DO UPDATE SET outcome = excluded.outcome""",
                (result.result_uid, result.outcome),
            )
        queued = False
        for name, target in destinations:
            if db.execute(  # a plain read waits for nobody (an insert that conflicts may)
                "SELECT 1 FROM deliveries WHERE result_uid = ? AND destination = ?",
                (result.result_uid, name),
            ).fetchone():
                continue
            cur = db.execute(
                """INSERT INTO deliveries (result_uid, destination, target,
                       state, next_attempt_at, created_at, updated_at)
                   VALUES (?, ?, ?, 'pending', ?, ?, ?) ON CONFLICT DO NOTHING""",
                (result.result_uid, name, target, now, now, now),
            )
            queued = queued or cur.rowcount > 0
        return queued

    @_retried
    def release_claim(
        self, claim: StudyClaim, *, retry_at: float | None = None, now: float | None = None
    ) -> None:
        now = self.now() if now is None else now
        with self._tx(durable=False) as db:
            self._work_added(db)
            db.execute(
                "UPDATE studies SET state = 'received', updated_at = ?, claimed_by = '', "
                "lease_until = 0, claims = CASE WHEN claims > 0 THEN claims - 1 ELSE 0 END, "
                "due_at = COALESCE(?, due_at) WHERE study_uid = ? AND state = 'assembled' "
                "AND claimed_by = ?",
                (now, retry_at, claim.study_uid, claim.owner),
            )
            db.execute(
                "UPDATE objects SET state = 'received' WHERE study_uid = ? AND state = 'assembled'",
                (claim.study_uid,),
            )

    @_retried
    def recover(self, *, now: float | None = None, owner_prefix: str = "") -> dict[str, int]:
        # the node's own restart is not held against the studies it was grading: their claim
        # is not counted
        now = self.now() if now is None else now
        pattern = _like_prefix(owner_prefix)
        with self._tx() as db:
            self._work_added(db)
            held = db.execute(
                "SELECT study_uid FROM studies WHERE state = 'assembled' "
                "AND claimed_by LIKE ? ESCAPE '!'",
                (pattern,),
            ).fetchall()
            for s in held:
                holder = "claimed_by LIKE ? ESCAPE '!'"
                self._give_back(db, s[0], holder, pattern, now, uncount=True)
            db.execute(
                "UPDATE deliveries SET claimed_by = '', lease_until = 0 "
                "WHERE state = 'pending' AND claimed_by LIKE ? ESCAPE '!'",
                (pattern,),
            )
            studies = len(held)
            # every study not yet graded resumes: those caught mid-grading and those whose
            # settle window had not ended (or had ended unclaimed) when the node stopped
            waiting = db.execute(
                "SELECT COUNT(*) AS n FROM studies WHERE state = 'received'"
            ).fetchone()[0]
        counts = self.counts()
        counts["resumed_grading"] = int(waiting)
        counts["interrupted_grading"] = studies
        return counts

    @_retried
    def request_regrade(self, study_uid: str, *, now: float | None = None) -> bool:
        now = self.now() if now is None else now
        with self._tx() as db:
            self._work_added(db)
            n = db.execute(
                "UPDATE studies SET state = 'received', reason = '', due_at = ?, "
                "generation = generation + 1, claims = 0, updated_at = ? WHERE study_uid = ?",
                (now, now, study_uid),
            ).rowcount
        return n > 0

    def result_stored(self, result_uid: str) -> bool:
        rows = self._query("SELECT * FROM results WHERE result_uid = ?", (result_uid,))
        return bool(rows) and self._result_bytes_present(rows[0])

    def result_data(self, result_uid: str) -> bytes:
        rows = self._query("SELECT * FROM results WHERE result_uid = ?", (result_uid,))
        if not rows:
            raise FileNotFoundError(f"result {result_uid} is not in the journal")
        return self._read_result(rows[0])

    # -- delivering -------------------------------------------------------------------------------

    def due_deliveries(
        self, *, now: float | None = None, limit: int = 100, destination: str | None = None
    ) -> list[DueDelivery]:
        now = self.now() if now is None else now
        where, params = "", [now]
        if destination is not None:
            where, params = " AND d.destination = ?", [now, destination]
        rows = self._query(
            """SELECT d.id, d.result_uid, r.study_uid, d.destination, d.attempts,
                      r.sop_class_uid,
                      (SELECT c.result_uid FROM companions c
                       WHERE c.companion_uid = d.result_uid LIMIT 1) AS parent_uid
               FROM deliveries d JOIN results r ON r.result_uid = d.result_uid
               WHERE d.state = 'pending' AND d.next_attempt_at <= ?"""
            + where
            + " ORDER BY d.next_attempt_at, d.id LIMIT ?",
            (*params, limit),
        )
        return [_due(r) for r in rows]

    def delivered_to(self, result_uid: str, destination: str) -> bool:
        rows = self._query(
            "SELECT 1 FROM deliveries WHERE result_uid = ? AND destination = ? "
            "AND state = 'delivered'",
            (result_uid, destination),
        )
        return bool(rows)

    def due_destinations(self, *, now: float | None = None) -> list[str]:
        now = self.now() if now is None else now
        rows = self._query(
            "SELECT DISTINCT destination FROM deliveries WHERE state = 'pending' "
            "AND next_attempt_at <= ? AND lease_until <= ?",
            (now, now),
        )
        return sorted(r[0] for r in rows)

    @_retried
    def claim_deliveries(
        self,
        destination: str,
        *,
        owner: str,
        lease_seconds: float = DEFAULT_LEASE_SECONDS,
        limit: int = 100,
        now: float | None = None,
    ) -> list[DueDelivery]:
        now = self.now() if now is None else now
        # a read first: most calls find nothing due, and a read takes no write lock
        if not self._query(
            "SELECT 1 AS due FROM deliveries WHERE destination = ? AND state = 'pending' "
            "AND next_attempt_at <= ? AND lease_until <= ? LIMIT 1",
            (destination, now, now),
        ):
            return []
        with self._tx(durable=False) as db:
            rows = db.execute(
                """SELECT d.id, d.result_uid, r.study_uid, d.destination, d.attempts,
                          r.sop_class_uid,
                          (SELECT c.result_uid FROM companions c
                           WHERE c.companion_uid = d.result_uid LIMIT 1) AS parent_uid
                   FROM deliveries d JOIN results r ON r.result_uid = d.result_uid
                   WHERE d.destination = ? AND d.state = 'pending'
                     AND d.next_attempt_at <= ? AND d.lease_until <= ?
                   ORDER BY d.next_attempt_at, d.id LIMIT ?"""
                + self.LOCK_ROWS.format(table="d"),
                (destination, now, now, limit),
            ).fetchall()
            if rows:  # one statement for all of them (one round trip to a database server)
                marks = ",".join("?" * len(rows))
                db.execute(
                    f"UPDATE deliveries SET claimed_by = ?, lease_until = ? WHERE id IN ({marks})",
                    (owner, now + lease_seconds, *(r["id"] for r in rows)),
                )
        return [_due(r) for r in rows]

    @_retried
    def release_deliveries(self, delivery_ids: Sequence[int]) -> None:
        if not delivery_ids:
            return
        marks = ",".join("?" * len(delivery_ids))
        with self._tx(durable=False) as db:
            self._work_added(db)
            db.execute(
                f"UPDATE deliveries SET claimed_by = '', lease_until = 0 WHERE id IN ({marks}) "
                "AND state = 'pending'",
                tuple(delivery_ids),
            )

    def next_delivery_at(self, *, destination: str | None = None) -> float | None:
        when = (
            "MIN(CASE WHEN lease_until > next_attempt_at THEN lease_until ELSE next_attempt_at END)"
        )
        if destination is None:
            rows = self._query(f"SELECT {when} AS due FROM deliveries WHERE state = 'pending'")
        else:
            rows = self._query(
                f"SELECT {when} AS due FROM deliveries WHERE state = 'pending' AND destination = ?",
                (destination,),
            )
        return rows[0][0] if rows else None

    @_retried
    def mark_delivered(self, delivery_id: int, *, now: float | None = None) -> None:
        now = self.now() if now is None else now
        with self._tx(durable=False) as db:
            db.execute(
                "UPDATE deliveries SET state = 'delivered', attempts = attempts + 1, "
                "last_error = '', delivered_at = ?, updated_at = ?, claimed_by = '', "
                "lease_until = 0 WHERE id = ?",
                (now, now, delivery_id),
            )
            self._settle_study_of_delivery(db, delivery_id, now)

    @_retried
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
        now = self.now() if now is None else now
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
                    "updated_at = ?, claimed_by = '', lease_until = 0 WHERE id = ?",
                    (attempts, reason, now, delivery_id),
                )
                self._settle_study_of_delivery(db, delivery_id, now)
            else:
                state = DeliveryState.pending
                delay = backoff_delay(attempts, backoff_initial, backoff_max)
                db.execute(
                    "UPDATE deliveries SET attempts = ?, last_error = ?, next_attempt_at = ?, "
                    "updated_at = ?, claimed_by = '', lease_until = 0 WHERE id = ?",
                    (attempts, error, now + delay, now, delivery_id),
                )
        return state

    @_retried
    def mark_failed(self, delivery_id: int, reason: str, *, now: float | None = None) -> None:
        now = self.now() if now is None else now
        with self._tx(durable=False) as db:
            db.execute(
                "UPDATE deliveries SET state = 'failed', attempts = attempts + 1, "
                "last_error = ?, updated_at = ?, claimed_by = '', lease_until = 0 WHERE id = ?",
                (reason, now, delivery_id),
            )
            self._settle_study_of_delivery(db, delivery_id, now)

    @_retried
    def requeue_failed(self, *, now: float | None = None) -> int:
        now = self.now() if now is None else now
        with self._tx() as db:
            self._work_added(db)
            studies = [
                r[0]
                for r in db.execute(
                    "SELECT DISTINCT r.study_uid FROM deliveries d JOIN results r "
                    "ON r.result_uid = d.result_uid WHERE d.state = 'failed'"
                ).fetchall()
            ]
            n = db.execute(
                "UPDATE deliveries SET state = 'pending', attempts = 0, next_attempt_at = ?, "
                "updated_at = ?, claimed_by = '', lease_until = 0 WHERE state = 'failed'",
                (now, now),
            ).rowcount
            for study in studies:
                self._settle_study_state(db, study, now)
        return n

    def _settle_study_of_delivery(self, db: Cursor, delivery_id: int, now: float) -> None:
        row = db.execute(
            "SELECT r.study_uid FROM deliveries d JOIN results r ON r.result_uid = d.result_uid "
            "WHERE d.id = ?",
            (delivery_id,),
        ).fetchone()
        if row:
            self._settle_study_state(db, row[0], now)

    def _settle_study_state(self, db: Cursor, study_uid: str, now: float) -> None:
        """graded/delivered/failed of a study from the deliveries of its current result.  The
        study's row is locked first: two deliveries of one study finishing at once (two
        destinations) then settle it one after the other, the second seeing the first."""
        study = db.execute(
            "SELECT state, result_uid FROM studies WHERE study_uid = ?" + self.LOCK_ROW,
            (study_uid,),
        ).fetchone()
        if study is None or study["state"] not in ("graded", "delivered", "failed"):
            return
        if study["result_uid"] is None:
            return
        rows = db.execute(
            "SELECT d.destination, d.state, d.last_error, d.result_uid, r.sop_class_uid "
            "FROM deliveries d LEFT JOIN results r ON r.result_uid = d.result_uid "
            "WHERE d.result_uid = ? "
            "OR d.result_uid IN (SELECT companion_uid FROM companions WHERE result_uid = ?)",
            (study["result_uid"], study["result_uid"]),
        ).fetchall()
        failed = [r for r in rows if r["state"] == "failed"]
        pending = [r for r in rows if r["state"] == "pending"]
        if failed:
            state = "failed"
            reason = "; ".join(
                f"delivery of {_kind(r['sop_class_uid'])} {r['result_uid']} to "
                f"{r['destination']}: {r['last_error']}"
                for r in failed
            )
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
            for row in self._query(f"SELECT state, COUNT(*) AS n FROM {table} GROUP BY state"):
                out[f"{table}.{row[0]}"] = int(row[1])
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
            rows = self._query(f"SELECT * FROM results ORDER BY {self.RESULT_ORDER}")
        else:
            rows = self._query(
                f"SELECT * FROM results WHERE study_uid = ? ORDER BY {self.RESULT_ORDER}",
                (study_uid,),
            )
        return [_result_row(r, decode=True) for r in rows]

    def result(self, result_uid: str) -> dict[str, Any] | None:
        rows = self._query("SELECT * FROM results WHERE result_uid = ?", (result_uid,))
        return _result_row(rows[0], decode=True) if rows else None

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
        studies = self._query(
            "SELECT COUNT(*) AS n FROM studies WHERE state IN ('received', 'assembled')"
        )[0][0]
        rows = self._query(
            "SELECT state, COUNT(*) AS n FROM deliveries WHERE state IN ('pending', 'failed') "
            "GROUP BY state"
        )
        by_state = {r[0]: int(r[1]) for r in rows}
        return {
            "studies_waiting": int(studies),
            "deliveries_pending": by_state.get("pending", 0),
            "deliveries_failed": by_state.get("failed", 0),
        }

    def pending_work(self) -> int:
        a = self._query(
            "SELECT COUNT(*) AS n FROM studies WHERE state IN ('received', 'assembled')"
        )[0][0]
        b = self._query("SELECT COUNT(*) AS n FROM deliveries WHERE state = 'pending'")[0][0]
        return int(a) + int(b)

    @_retried
    def check_writable(self, *, now: float | None = None) -> None:
        now = self.now() if now is None else now
        with self._tx() as db:
            db.execute(
                "INSERT INTO meta VALUES ('health_checked_at', ?) "
                "ON CONFLICT (key) DO UPDATE SET value = excluded.value",
                (str(now),),
            )

    # -- retention ---------------------------------------------------------------------------

    @_retried
    def purge_finished(self, older_than: float) -> Purged:
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
            paths: list[str] = []
            files = 0
            for study in studies:
                paths += [
                    r[0]
                    for r in db.execute(
                        "SELECT path FROM objects WHERE study_uid = ?", (study,)
                    ).fetchall()
                ]
                results = [
                    (r[0], r[1])
                    for r in db.execute(
                        "SELECT result_uid, path FROM results WHERE study_uid = ?", (study,)
                    ).fetchall()
                ]
                paths += [p for _, p in results]
                for uid, _ in results:
                    db.execute("DELETE FROM deliveries WHERE result_uid = ?", (uid,))
                    db.execute(
                        "DELETE FROM companions WHERE result_uid = ? OR companion_uid = ?",
                        (uid, uid),
                    )
                files += self._purge_study_bytes(db, study)
                db.execute(
                    "DELETE FROM result_outcomes WHERE result_uid IN "
                    "(SELECT result_uid FROM results WHERE study_uid = ?)",
                    (study,),
                )
                db.execute("DELETE FROM results WHERE study_uid = ?", (study,))
                self._audit_forget(db, (study,))
                db.execute("DELETE FROM objects WHERE study_uid = ?", (study,))
                db.execute("DELETE FROM studies WHERE study_uid = ?", (study,))
            ignored = db.execute(
                "SELECT sop_instance_uid, path FROM ignored_objects WHERE received_at < ?",
                (older_than,),
            ).fetchall()
            if ignored:
                paths += [r[1] for r in ignored]
                files += self._purge_ignored_bytes(db, [r[0] for r in ignored])
                db.execute("DELETE FROM ignored_objects WHERE received_at < ?", (older_than,))
        files += self._after_purge([p for p in paths if p], studies)
        return Purged(studies=studies, files=files)


def _due(r: Any) -> DueDelivery:
    return DueDelivery(
        id=r["id"],
        result_uid=r["result_uid"],
        study_uid=r["study_uid"],
        destination=r["destination"],
        attempts=r["attempts"],
        parent_uid=r["parent_uid"],
        sop_class_uid=r["sop_class_uid"],
    )


def _like_prefix(prefix: str) -> str:
    """A LIKE pattern (escape character ``!``) matching every text that starts with
    ``prefix``."""
    return prefix.replace("!", "!!").replace("%", "!%").replace("_", "!_") + "%"


#: Encapsulated PDF Storage (PS3.4 Annex B.5): the summary delivered with a result SR
_ENCAPSULATED_PDF = "1.2.840.10008.5.1.4.1.1.104.1"


def _kind(sop_class_uid: str | None) -> str:
    return "summary PDF" if sop_class_uid == _ENCAPSULATED_PDF else "result SR"


def _result_row(row: Any, *, decode: bool = False) -> dict[str, Any]:
    d = dict(row)
    if decode:
        d["sources"] = json.loads(d["sources"])
        d["predecessors"] = json.loads(d["predecessors"])
    return d


class SchemaTooNew(UserError):
    """The journal was written by a newer version of the program."""


def migrate(db: Cursor, migrations: Sequence[Sequence[str]]) -> tuple[int, int]:
    """Inside a write transaction (the ``meta`` table exists): run the statements of every
    schema version the journal does not have yet and record the new version.  Returns (version
    found, version now).  Raises :class:`SchemaTooNew` for a journal of a newer program."""
    row = db.execute("SELECT value FROM meta WHERE key = 'schema_version'").fetchone()
    found = int(row[0]) if row else 0
    latest = len(migrations)
    if found > latest:
        raise SchemaTooNew(
            f"the journal has schema version {found}; this program knows versions up to "
            f"{latest} (was it written by a newer version?)"
        )
    for statements in migrations[found:]:
        for statement in statements:
            db.execute(statement)
    if found != latest:
        db.execute(
            "INSERT INTO meta VALUES ('schema_version', ?) "
            "ON CONFLICT (key) DO UPDATE SET value = excluded.value",
            (str(latest),),
        )
    return found, latest

"""What ``backfill`` keeps in the journal between runs: its own tables (``backfill_runs``,
``backfill_studies``) and methods, apart from the tables of received objects, studies, results
and deliveries, which backfill only reads (it records retrieved objects through the node's
intake, as the listener does).

:class:`BackfillRecords` is the contract (part of :class:`~service.store.journal.Journal`);
:class:`SqlBackfillRecords` its statements, shared by every SQL backend
(:class:`~service.store.sql_journal.SqlJournal`); the tables are in each backend's schema
module, schema version 4 (:data:`SQLITE_DDL` for SQLite; PostgreSQL's types in
:mod:`service.store.postgres_schema`).

Study states::

    found -> retrieved -> done       graded (a result, or the pipeline's stated reason why
                                     not) under the rules recorded in ``rules``
                      \\-> failed     retrieval failed, or the study went away; tried again by
                                     the next run
    any -> retrieved again when the rules changed or the archive holds objects not yet seen

``done`` under the same rules is what lets a second run skip a study without asking the archive
for its objects again.
"""

from __future__ import annotations

import abc
import json
import time
from collections.abc import Sequence
from contextlib import AbstractContextManager
from enum import StrEnum
from typing import Any


class BackfillState(StrEnum):
    found = "found"
    retrieved = "retrieved"
    done = "done"
    failed = "failed"


class RunState(StrEnum):
    running = "running"
    finished = "finished"
    interrupted = "interrupted"
    #: ended by an error of the archive or of the node
    stopped = "stopped"


#: the backfill tables in SQLite (a schema version of :mod:`service.store.sqlite_schema`)
SQLITE_DDL: list[str] = [
    """CREATE TABLE IF NOT EXISTS backfill_runs (
        id INTEGER PRIMARY KEY AUTOINCREMENT,
        source TEXT NOT NULL,
        since TEXT NOT NULL DEFAULT '',
        until TEXT NOT NULL DEFAULT '',
        state TEXT NOT NULL,
        started_at REAL NOT NULL,
        finished_at REAL,
        summary TEXT NOT NULL DEFAULT '{}'
    )""",
    """CREATE TABLE IF NOT EXISTS backfill_studies (
        study_uid TEXT PRIMARY KEY,
        source TEXT NOT NULL,
        state TEXT NOT NULL,
        -- digest of what decides the result besides the sources (options, mapping table,
        -- software version, document layout)
        rules TEXT NOT NULL DEFAULT '',
        -- SOP Instance UIDs retrieved (JSON list)
        sources TEXT NOT NULL DEFAULT '[]',
        -- the study's journal generation once its objects were recorded
        generation INTEGER NOT NULL DEFAULT 0,
        outcome TEXT NOT NULL DEFAULT '',
        reason TEXT NOT NULL DEFAULT '',
        attempts INTEGER NOT NULL DEFAULT 0,
        run_id INTEGER,
        updated_at REAL NOT NULL
    )""",
    "CREATE INDEX IF NOT EXISTS backfill_studies_state ON backfill_studies (state, rules)",
]


class BackfillRecords(abc.ABC):
    """The backfill part of the journal's contract."""

    @abc.abstractmethod
    def backfill_start_run(
        self, source: str, since: str, until: str, *, now: float | None = None
    ) -> int:
        """Record a run that starts; its id."""

    @abc.abstractmethod
    def backfill_finish_run(
        self, run_id: int, state: RunState, summary: dict[str, Any], *, now: float | None = None
    ) -> None:
        """Record how a run ended, with its summary (durable)."""

    @abc.abstractmethod
    def backfill_runs(self, limit: int = 20) -> list[dict[str, Any]]:
        """The latest runs, newest first (``summary`` decoded)."""

    @abc.abstractmethod
    def backfill_study(self, study_uid: str) -> dict[str, Any] | None:
        """A study's backfill record (``sources`` decoded), None when backfill never saw it."""

    @abc.abstractmethod
    def backfill_done_under(self, rules: str) -> set[str]:
        """Studies done under ``rules`` (a run skips them)."""

    @abc.abstractmethod
    def backfill_found(
        self, run_id: int, source: str, study_uids: Sequence[str], *, now: float | None = None
    ) -> None:
        """Record the studies a query found (a study already known keeps its state)."""

    @abc.abstractmethod
    def backfill_retrieved(
        self,
        study_uid: str,
        *,
        rules: str,
        sources: Sequence[str],
        generation: int,
        now: float | None = None,
    ) -> None:
        """The study's objects are recorded in the journal (its ``generation`` then), for
        grading under ``rules``."""

    @abc.abstractmethod
    def backfill_done(
        self,
        study_uid: str,
        *,
        outcome: str,
        reason: str = "",
        rules: str | None = None,
        now: float | None = None,
    ) -> None:
        """The study is graded (or the pipeline said why not, or it holds nothing to grade:
        then ``rules`` are those it was looked at under)."""

    @abc.abstractmethod
    def backfill_failed(self, study_uid: str, reason: str, *, now: float | None = None) -> None:
        """Retrieving the study failed; the next run tries again."""

    @abc.abstractmethod
    def backfill_counts(self) -> dict[str, int]:
        """Backfill studies by state."""


class SqlBackfillRecords(BackfillRecords):
    """The backfill statements in SQL that SQLite and PostgreSQL both accept (``?``
    parameters, ``INSERT ... ON CONFLICT``, ``RETURNING``)."""

    @abc.abstractmethod
    def _tx(self, *, durable: bool = True) -> AbstractContextManager[Any]: ...

    @abc.abstractmethod
    def _query(self, sql: str, params: Sequence[Any] = ()) -> list[Any]: ...

    def backfill_start_run(
        self, source: str, since: str, until: str, *, now: float | None = None
    ) -> int:
        now = time.time() if now is None else now
        with self._tx(durable=False) as db:
            row = db.execute(
                "INSERT INTO backfill_runs (source, since, until, state, started_at) "
                "VALUES (?, ?, ?, 'running', ?) RETURNING id",
                (source, since, until, now),
            ).fetchone()
        return int(row[0])

    def backfill_finish_run(
        self, run_id: int, state: RunState, summary: dict[str, Any], *, now: float | None = None
    ) -> None:
        now = time.time() if now is None else now
        with self._tx() as db:
            db.execute(
                "UPDATE backfill_runs SET state = ?, finished_at = ?, summary = ? WHERE id = ?",
                (state.value, now, json.dumps(summary, sort_keys=True), run_id),
            )

    def backfill_runs(self, limit: int = 20) -> list[dict[str, Any]]:
        rows = self._query("SELECT * FROM backfill_runs ORDER BY id DESC LIMIT ?", (limit,))
        out = []
        for r in rows:
            d = dict(r)
            d["summary"] = json.loads(d["summary"] or "{}")
            out.append(d)
        return out

    def backfill_study(self, study_uid: str) -> dict[str, Any] | None:
        rows = self._query("SELECT * FROM backfill_studies WHERE study_uid = ?", (study_uid,))
        if not rows:
            return None
        d = dict(rows[0])
        d["sources"] = json.loads(d["sources"] or "[]")
        return d

    def backfill_done_under(self, rules: str) -> set[str]:
        rows = self._query(
            "SELECT study_uid FROM backfill_studies WHERE state = 'done' AND rules = ?", (rules,)
        )
        return {r[0] for r in rows}

    def backfill_found(
        self, run_id: int, source: str, study_uids: Sequence[str], *, now: float | None = None
    ) -> None:
        now = time.time() if now is None else now
        with self._tx(durable=False) as db:
            for uid in study_uids:
                db.execute(
                    "INSERT INTO backfill_studies (study_uid, source, state, run_id, updated_at) "
                    "VALUES (?, ?, 'found', ?, ?) ON CONFLICT (study_uid) DO UPDATE SET "
                    "source = excluded.source, run_id = excluded.run_id",
                    (uid, source, run_id, now),
                )

    def backfill_retrieved(
        self,
        study_uid: str,
        *,
        rules: str,
        sources: Sequence[str],
        generation: int,
        now: float | None = None,
    ) -> None:
        now = time.time() if now is None else now
        with self._tx(durable=False) as db:
            db.execute(
                "UPDATE backfill_studies SET state = 'retrieved', rules = ?, sources = ?, "
                "generation = ?, outcome = '', reason = '', attempts = attempts + 1, "
                "updated_at = ? WHERE study_uid = ?",
                (rules, json.dumps(sorted(sources)), generation, now, study_uid),
            )

    def backfill_done(
        self,
        study_uid: str,
        *,
        outcome: str,
        reason: str = "",
        rules: str | None = None,
        now: float | None = None,
    ) -> None:
        now = time.time() if now is None else now
        with self._tx(durable=False) as db:
            db.execute(
                "UPDATE backfill_studies SET state = 'done', outcome = ?, reason = ?, "
                "rules = COALESCE(?, rules), updated_at = ? WHERE study_uid = ?",
                (outcome, reason, rules, now, study_uid),
            )

    def backfill_failed(self, study_uid: str, reason: str, *, now: float | None = None) -> None:
        now = time.time() if now is None else now
        with self._tx(durable=False) as db:
            db.execute(
                "UPDATE backfill_studies SET state = 'failed', reason = ?, "
                "attempts = attempts + 1, updated_at = ? WHERE study_uid = ?",
                (reason, now, study_uid),
            )

    def backfill_counts(self) -> dict[str, int]:
        rows = self._query("SELECT state, COUNT(*) FROM backfill_studies GROUP BY state")
        return {r[0]: int(r[1]) for r in rows}

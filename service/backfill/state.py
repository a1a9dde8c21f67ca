"""What ``backfill`` remembers between runs, in tables of its own in the node's journal
(``backfill_runs``, ``backfill_studies``): separate from the tables of received objects,
studies, results and deliveries, which it only reads (it records retrieved objects through the
node's intake, as the listener does).

Study states::

    found -> retrieved -> done       graded (a result, or the pipeline's stated reason why
                                     not) under the rules recorded in ``rules``
                      \\-> failed     retrieval failed, or the study went away; tried again by
                                     the next run
    any -> retrieved again when the rules changed or the archive holds objects not yet seen

``done`` with the same rules is what lets a second run skip a study without asking the archive
for its objects again.
"""

from __future__ import annotations

import json
import time
from collections.abc import Sequence
from enum import StrEnum
from typing import Any

from service.store.journal import Journal


class BackfillState(StrEnum):
    found = "found"
    retrieved = "retrieved"
    done = "done"
    failed = "failed"


class RunState(StrEnum):
    running = "running"
    finished = "finished"
    interrupted = "interrupted"
    stopped = "stopped"  # ended by an error of the archive or of the node


_SCHEMA = """
CREATE TABLE IF NOT EXISTS backfill_runs (
    id INTEGER PRIMARY KEY AUTOINCREMENT,
    source TEXT NOT NULL,
    since TEXT NOT NULL DEFAULT '',
    until TEXT NOT NULL DEFAULT '',
    state TEXT NOT NULL,
    started_at REAL NOT NULL,
    finished_at REAL,
    summary TEXT NOT NULL DEFAULT '{}'
);
CREATE TABLE IF NOT EXISTS backfill_studies (
    study_uid TEXT PRIMARY KEY,
    source TEXT NOT NULL,
    state TEXT NOT NULL,
    -- digest of what decides the result besides the sources (options, mapping table, version)
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
);
CREATE INDEX IF NOT EXISTS backfill_studies_state ON backfill_studies (state);
"""


class BackfillLog:
    """The backfill tables of one journal (SQLite; it shares the journal's connection, lock
    and transactions)."""

    def __init__(self, journal: Journal) -> None:
        self.journal = journal
        with journal._lock:  # as the journal creates its own tables (autocommit, idempotent)
            journal._db.executescript(_SCHEMA)

    def _tx(self) -> Any:
        return self.journal._tx(durable=False)

    def _query(self, sql: str, params: Sequence[Any] = ()) -> list[Any]:
        return self.journal._query(sql, params)

    # -- runs -------------------------------------------------------------------------------------

    def start_run(self, source: str, since: str, until: str, *, now: float | None = None) -> int:
        now = time.time() if now is None else now
        with self._tx() as db:
            cur = db.execute(
                "INSERT INTO backfill_runs (source, since, until, state, started_at) "
                "VALUES (?, ?, ?, 'running', ?)",
                (source, since, until, now),
            )
            return int(cur.lastrowid or 0)

    def finish_run(
        self, run_id: int, state: RunState, summary: dict[str, Any], *, now: float | None = None
    ) -> None:
        now = time.time() if now is None else now
        with self.journal._tx() as db:  # durable: what an operator reads back
            db.execute(
                "UPDATE backfill_runs SET state = ?, finished_at = ?, summary = ? WHERE id = ?",
                (state.value, now, json.dumps(summary, sort_keys=True), run_id),
            )

    def runs(self, limit: int = 20) -> list[dict[str, Any]]:
        rows = self._query("SELECT * FROM backfill_runs ORDER BY id DESC LIMIT ?", (limit,))
        out = []
        for r in rows:
            d = dict(r)
            d["summary"] = json.loads(d["summary"] or "{}")
            out.append(d)
        return out

    # -- studies ----------------------------------------------------------------------------------

    def study(self, study_uid: str) -> dict[str, Any] | None:
        rows = self._query("SELECT * FROM backfill_studies WHERE study_uid = ?", (study_uid,))
        if not rows:
            return None
        d = dict(rows[0])
        d["sources"] = json.loads(d["sources"] or "[]")
        return d

    def done_under(self, rules: str) -> set[str]:
        """Studies done under ``rules`` (a second run skips them)."""
        rows = self._query(
            "SELECT study_uid FROM backfill_studies WHERE state = 'done' AND rules = ?", (rules,)
        )
        return {r[0] for r in rows}

    def found(
        self, run_id: int, source: str, study_uids: Sequence[str], *, now: float | None = None
    ) -> None:
        """Record the studies a query found (a study already known keeps its state)."""
        now = time.time() if now is None else now
        with self._tx() as db:
            db.executemany(
                "INSERT INTO backfill_studies (study_uid, source, state, run_id, updated_at) "
                "VALUES (?, ?, 'found', ?, ?) ON CONFLICT (study_uid) DO UPDATE SET "
                "source = excluded.source, run_id = excluded.run_id",
                [(uid, source, run_id, now) for uid in study_uids],
            )

    def retrieved(
        self,
        study_uid: str,
        *,
        rules: str,
        sources: Sequence[str],
        generation: int,
        now: float | None = None,
    ) -> None:
        now = time.time() if now is None else now
        with self._tx() as db:
            db.execute(
                "UPDATE backfill_studies SET state = 'retrieved', rules = ?, sources = ?, "
                "generation = ?, outcome = '', reason = '', attempts = attempts + 1, "
                "updated_at = ? WHERE study_uid = ?",
                (rules, json.dumps(sorted(sources)), generation, now, study_uid),
            )

    def done(
        self, study_uid: str, *, outcome: str, reason: str = "", now: float | None = None
    ) -> None:
        now = time.time() if now is None else now
        with self._tx() as db:
            db.execute(
                "UPDATE backfill_studies SET state = 'done', outcome = ?, reason = ?, "
                "updated_at = ? WHERE study_uid = ?",
                (outcome, reason, now, study_uid),
            )

    def failed(self, study_uid: str, reason: str, *, now: float | None = None) -> None:
        now = time.time() if now is None else now
        with self._tx() as db:
            db.execute(
                "UPDATE backfill_studies SET state = 'failed', reason = ?, "
                "attempts = attempts + 1, updated_at = ? WHERE study_uid = ?",
                (reason, now, study_uid),
            )

    def counts(self) -> dict[str, int]:
        rows = self._query("SELECT state, COUNT(*) FROM backfill_studies GROUP BY state")
        return {r[0]: int(r[1]) for r in rows}

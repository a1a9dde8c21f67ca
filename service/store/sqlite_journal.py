"""The journal on one machine: an embedded SQLite database (stdlib ``sqlite3``, WAL mode) in the
data directory, the objects' and results' bytes in spool files beside it
(:mod:`service.store.spool`).

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
keeps once).  A spool file is fsync'ed before its journal row is written, so a row that
survives always names a whole file.

One connection is shared by the threads of a process behind a lock; other processes (the
``queue`` command) may open the same file at the same time (WAL readers never block).
"""

from __future__ import annotations

import contextlib
import sqlite3
import threading
from collections.abc import Iterator, Sequence
from pathlib import Path
from typing import Any

from service.store import sqlite_schema
from service.store.spool import Spool
from service.store.sql_journal import Cursor, SqlJournal, migrate

#: the journal's file name in the data directory
JOURNAL_NAME = "journal.sqlite3"

SCHEMA_VERSION = sqlite_schema.SCHEMA_VERSION


def journal_path(data_dir: Path) -> Path:
    return Path(data_dir) / JOURNAL_NAME


class SqliteJournal(SqlJournal):
    def __init__(
        self, path: Path, *, spool_root: Path | None = None, timeout: float = 30.0
    ) -> None:
        self.path = Path(path)
        self.location = str(self.path)
        self.path.parent.mkdir(parents=True, exist_ok=True)
        #: where the objects' and results' bytes are kept
        self.spool = Spool(
            self.path.parent / "spool" if spool_root is None else spool_root, clean=False
        )
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
            self._db.execute(sqlite_schema.META)
            with self._tx() as db:
                migrate(db, sqlite_schema.MIGRATIONS)

    def close(self) -> None:
        with self._lock:
            self._db.close()

    @contextlib.contextmanager
    def _tx(self, *, durable: bool = True) -> Iterator[Cursor]:
        with self._lock:
            if not durable:
                self._db.execute("PRAGMA synchronous=NORMAL")
            try:
                self._db.execute("BEGIN IMMEDIATE")
                try:
                    yield self._db  # type: ignore[misc]
                except BaseException:
                    self._db.execute("ROLLBACK")
                    raise
                self._db.execute("COMMIT")
            finally:
                if not durable:
                    self._db.execute("PRAGMA synchronous=FULL")

    def _query(self, sql: str, params: Sequence[Any] = ()) -> list[Any]:
        with self._lock:
            return self._db.execute(sql, params).fetchall()

    # -- the bytes: spool files ----------------------------------------------------------------

    def _put_object(self, study_uid: str, sop_instance_uid: str, data: bytes) -> str:
        return str(self.spool.write_object(study_uid, sop_instance_uid, data))

    def _read_object(self, row: Any) -> bytes:
        return Path(row["path"]).read_bytes()

    def _put_result(self, study_uid: str, result_uid: str, data: bytes) -> str:
        return str(self.spool.write_result(study_uid, result_uid, data))

    def _read_result(self, row: Any) -> bytes:
        return Path(row["path"]).read_bytes()

    def _result_bytes_present(self, row: Any) -> bool:
        return Path(row["path"]).exists()

    def _after_purge(self, paths: list[str]) -> int:
        """Delete the purged spool files (only ever inside the spool) and their emptied
        folders."""
        root = self.spool.root.resolve()
        removed = 0
        folders = set()
        for path in paths:
            p = Path(path)
            with contextlib.suppress(OSError):
                if root in p.resolve().parents:
                    p.unlink()
                    removed += 1
                    folders.add(p.parent)
        for folder in folders:
            with contextlib.suppress(OSError):
                folder.rmdir()  # only when empty
        return removed

    def recover(self, *, now: float | None = None) -> dict[str, int]:
        """On start: also removes half-written temporary spool files a crash left (never
        acknowledged)."""
        self.spool.clean_temporaries()
        return super().recover(now=now)

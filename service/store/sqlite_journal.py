"""The journal on one machine: an embedded SQLite database (stdlib ``sqlite3``, WAL mode) in the
data directory.  The objects' and results' bytes are rows of the journal (``object_data``,
``result_data``), written in the transaction that records them, as on PostgreSQL: one commit
makes an object and its record durable together (before schema version 7 they were spool files
beside the journal, :mod:`service.store.spool`; rows of that time keep their file's path and
are read from it until retention purges them).

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
keeps once).  A row and its bytes are committed together, so a row that survives always has
its bytes.  A full disk (SQLite's ``SQLITE_FULL``) or a failed write (``SQLITE_IOERR``) is
raised as :class:`OSError`, as a full disk was when the bytes were files: the receiver answers
Out of Resources and a grader gives its study back for a retry.

One connection is shared by the threads of a process behind a lock; other processes (the
``queue`` command) may open the same file at the same time (WAL readers never block).
"""

from __future__ import annotations

import contextlib
import errno
import os
import sqlite3
import threading
import time
from collections.abc import Iterator, Sequence
from pathlib import Path
from typing import Any

from service.store import sqlite_schema
from service.store.spool import Spool, safe_name
from service.store.sql_journal import Cursor, SqlJournal, migrate

#: the journal's file name in the data directory
JOURNAL_NAME = "journal.sqlite3"

SCHEMA_VERSION = sqlite_schema.SCHEMA_VERSION


#: SQLite result codes of a storage failure (https://www.sqlite.org/rescode.html), and the
#: errno each is raised as
_STORAGE_ERRORS = {13: errno.ENOSPC, 10: errno.EIO}  # SQLITE_FULL, SQLITE_IOERR


@contextlib.contextmanager
def _storage_errors() -> Iterator[None]:
    """Raise SQLite's full-disk and I/O errors as :class:`OSError` (the storage failed, not
    the statement)."""
    try:
        yield
    except sqlite3.Error as exc:
        code = getattr(exc, "sqlite_errorcode", None)
        primary = None if code is None else code & 0xFF  # extended codes keep it in the low byte
        if primary in _STORAGE_ERRORS:
            raise OSError(_STORAGE_ERRORS[primary], f"journal storage failed: {exc}") from exc
        raise


def _owner_only(path: Path) -> None:
    """The journal holds patient data (the received objects): its file is created readable
    by its owner only, as the spool files were, and an older journal's file (with its WAL
    and shared-memory files, which SQLite creates with the database's permissions) loses any
    access by others."""
    fd = os.open(path, os.O_RDWR | os.O_CREAT | getattr(os, "O_CLOEXEC", 0), 0o600)
    os.close(fd)
    for p in (path, Path(f"{path}-wal"), Path(f"{path}-shm")):
        with contextlib.suppress(FileNotFoundError):
            mode = p.stat().st_mode & 0o777
            if mode & 0o077:
                os.chmod(p, mode & 0o700)


def journal_path(data_dir: Path) -> Path:
    return Path(data_dir) / JOURNAL_NAME


class SqliteJournal(SqlJournal):
    def __init__(
        self, path: Path, *, spool_root: Path | None = None, timeout: float = 30.0
    ) -> None:
        self.path = Path(path)
        self.location = str(self.path)
        self.path.parent.mkdir(parents=True, exist_ok=True)
        _owner_only(self.path)
        #: the spool files of rows recorded before schema version 7 (read, and purged)
        self.spool = Spool(
            self.path.parent / "spool" if spool_root is None else spool_root, clean=False
        )
        self._lock = threading.RLock()
        self._timeout = timeout
        self._data_version: int | None = None
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

    def changed(self) -> bool:
        """SQLite's ``PRAGMA data_version`` moves when another connection commits (it does
        not for this connection's own commits; https://www.sqlite.org/pragma.html)."""
        with self._lock:
            version = self._db.execute("PRAGMA data_version").fetchone()[0]
        if version == self._data_version:
            return False
        self._data_version = version
        return True

    @contextlib.contextmanager
    def _tx(self, *, durable: bool = True) -> Iterator[Cursor]:
        with self._lock, _storage_errors():
            if not durable:
                self._db.execute("PRAGMA synchronous=NORMAL")
            try:
                self._begin()
                try:
                    yield self._db  # type: ignore[misc]
                except BaseException:
                    with contextlib.suppress(sqlite3.Error):  # SQLite may have rolled back
                        self._db.execute("ROLLBACK")
                    raise
                self._db.execute("COMMIT")
            finally:
                if not durable:
                    self._db.execute("PRAGMA synchronous=FULL")

    def _begin(self) -> None:
        """BEGIN IMMEDIATE (the write lock), waiting for another process's transaction in
        steps from 0.1 ms: SQLite's own busy handler sleeps at least 1 ms, then 2, 5, 10 ms,
        which the node's processes, each committing for every object, study and delivery,
        would spend mostly asleep.  The busy timeout still bounds the whole wait."""
        self._db.execute("PRAGMA busy_timeout=0")
        try:
            deadline = time.monotonic() + self._timeout
            delay = 0.0001
            while True:
                try:
                    self._db.execute("BEGIN IMMEDIATE")
                    return
                except sqlite3.OperationalError as exc:
                    if "locked" not in str(exc) or time.monotonic() > deadline:
                        raise
                time.sleep(delay)
                delay = min(delay * 1.5, 0.002)
        finally:
            self._db.execute(f"PRAGMA busy_timeout={int(self._timeout * 1000)}")

    def _query(self, sql: str, params: Sequence[Any] = ()) -> list[Any]:
        with self._lock:
            return self._db.execute(sql, params).fetchall()

    # -- the bytes: in the journal; spool files of rows recorded before schema version 7 --------

    def _read_object(self, row: Any) -> bytes:
        if row["path"]:
            return Path(row["path"]).read_bytes()
        return super()._read_object(row)

    def _read_result(self, row: Any) -> bytes:
        if row["path"]:
            return Path(row["path"]).read_bytes()
        return super()._read_result(row)

    def _result_bytes_present(self, row: Any) -> bool:
        if row["path"]:
            return Path(row["path"]).exists()
        return super()._result_bytes_present(row)

    def _after_purge(self, paths: list[str], studies: Sequence[str]) -> int:
        """Delete the purged spool files (only ever inside the spool) and their emptied
        folders, and the spool files the purged studies left that no row named any more (an
        object received before schema version 7 and again after it: its row now holds its
        bytes)."""
        root = self.spool.root.resolve()
        removed = 0
        folders = {
            folder / safe_name(study)
            for study in studies
            for folder in (self.spool.objects, self.spool.results)
        }
        left = [str(p) for folder in folders if folder.is_dir() for p in folder.glob("*.dcm")]
        for path in dict.fromkeys([*paths, *left]):
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

    def recover(self, *, now: float | None = None, owner_prefix: str = "") -> dict[str, int]:
        """On start: also removes half-written temporary spool files a crash left (never
        acknowledged)."""
        self.spool.clean_temporaries()
        return super().recover(now=now, owner_prefix=owner_prefix)

"""The journal for several nodes: a PostgreSQL database (psycopg 3 with a connection pool,
``psycopg_pool``), which holds the received objects' and the results' bytes too, so that the
nodes share nothing else.

* A received object's bytes and its journal record go in one transaction; the C-STORE success
  is sent after its commit (``synchronous_commit`` on: on disk at the server).  The node's own
  progress (claims, results, deliveries) is committed with ``synchronous_commit = off`` for
  that transaction: it survives a crash of the node and of the server's processes, and only a
  crash of the server's machine can lose the last fraction of a second of it, which means work
  done again, never an acknowledged object (the same trade as the SQLite journal's
  ``synchronous=NORMAL``; PostgreSQL manual, "Asynchronous Commit").
* Claims take rows with ``SELECT ... FOR UPDATE SKIP LOCKED`` and hold a lease: two nodes never
  grade one study, or send one delivery, at the same time.
* Times are the database server's clock (the offset is measured on connecting and refreshed),
  so settle windows and leases mean the same on every node.
* A transaction that gives the roles new work sends ``NOTIFY`` on one channel; the roles'
  :meth:`PostgresJournal.changed` listens on it.
* The URL names user, host, port and database (``postgresql://USER@HOST:PORT/DB``); the
  password comes from the configuration (``journal.password``) or libpq's own sources (the
  ``PGPASSWORD`` variable, the ``~/.pgpass`` file), never from the URL (a command line is seen
  by every user of the machine) and never into a log.
* When the server cannot be reached, every call raises: the receiver answers C-STORE with a
  failure status, graders and senders retry; the pool connects again once the server is back.
"""

from __future__ import annotations

import contextlib
import threading
import time
from collections.abc import Iterator, Sequence
from typing import Any

from service.errors import UserError
from service.store import postgres_schema
from service.store.journal import JournalUnavailable
from service.store.sql_journal import Cursor, SqlJournal, migrate

#: seconds to wait for a connection (connecting, or one free in the pool) before a call fails
CONNECT_TIMEOUT = 5
#: how often the offset to the server's clock is measured again, seconds
CLOCK_REFRESH_SECONDS = 60.0


def is_postgres_url(text: str) -> bool:
    return text.startswith(("postgresql://", "postgres://"))


def check_url(url: str) -> dict[str, Any]:
    """The URL's parts (libpq's parser); a password in it, or anything but a PostgreSQL URL,
    is refused with the reason."""
    import psycopg

    if not is_postgres_url(url):
        raise UserError(
            f'journal: "{_shown(url)}" is not a PostgreSQL URL; expected '
            "postgresql://USER@HOST:PORT/DATABASE"
        )
    try:
        parts = psycopg.conninfo.conninfo_to_dict(url)
    except psycopg.ProgrammingError as exc:
        raise UserError(f'journal: "{_shown(url)}" cannot be read: {exc}') from None
    if parts.get("password"):
        raise UserError(
            "journal: the URL holds a password; give it in journal.password, the PGPASSWORD "
            "variable or ~/.pgpass instead (a command line is visible to every user of the "
            "machine, and a URL ends up in logs)"
        )
    if not parts.get("dbname"):
        raise UserError(f'journal: "{_shown(url)}" names no database')
    return parts


def _shown(url: str) -> str:
    """A URL as it may be shown: without whatever follows a ':' in its user part."""
    if "@" in url and "://" in url:
        scheme, rest = url.split("://", 1)
        user, host = rest.split("@", 1)
        return f"{scheme}://{user.split(':', 1)[0]}@{host}"
    return url


class _Row(dict):
    """A result row readable by column name and by position (as ``sqlite3.Row``)."""

    __slots__ = ("_values",)

    def __getitem__(self, key: Any) -> Any:
        if isinstance(key, int):
            return self._values[key]
        return dict.__getitem__(self, key)


def _row_factory(cursor: Any) -> Any:
    names = [c.name for c in cursor.description or ()]

    def make(values: Sequence[Any]) -> _Row:
        row = _Row(zip(names, values, strict=True))
        row._values = tuple(values)
        return row

    return make


_SQL: dict[str, str] = {}


def _pg_sql(sql: str) -> str:
    """The shared statements' ``?`` parameters as psycopg's ``%s`` (a literal ``%`` doubled)."""
    out = _SQL.get(sql)
    if out is None:
        out = _SQL[sql] = sql.replace("%", "%%").replace("?", "%s")
    return out


class _PgCursor(Cursor):
    def __init__(self, conn: Any) -> None:
        self._conn = conn

    def execute(self, sql: str, params: Sequence[Any] = ()) -> Any:
        return self._conn.execute(_pg_sql(sql), tuple(params))


class PostgresJournal(SqlJournal):
    RESULT_ORDER = "created_at, seq"
    LOCK_ROWS = " FOR UPDATE OF {table} SKIP LOCKED"
    LOCK_ROW = " FOR UPDATE"
    shared = True

    def __init__(
        self,
        url: str,
        *,
        password: str = "",
        max_connections: int = 8,
        connect_timeout: float = CONNECT_TIMEOUT,
        application_name: str = "diastolic-sr",
    ) -> None:
        import psycopg
        from psycopg_pool import ConnectionPool

        check_url(url)
        self.RETRYABLE = (psycopg.errors.DeadlockDetected, psycopg.errors.SerializationFailure)
        self.location = _shown(url)
        extra: dict[str, Any] = {
            "connect_timeout": max(1, int(connect_timeout)),
            "application_name": application_name,
        }
        if password:
            extra["password"] = password
        self._conninfo = psycopg.conninfo.make_conninfo(url, **extra)
        self._connect_timeout = connect_timeout
        # connect once directly: a refused login or an unknown host is reported with libpq's
        # reason (the pool only says it timed out)
        try:
            with psycopg.connect(self._conninfo, autocommit=True) as conn:
                conn.execute("SELECT 1")
        except psycopg.Error as exc:
            raise UserError(f"cannot open the journal at {self.location}: {_reason(exc)}") from None
        self._pool = ConnectionPool(
            self._conninfo,
            min_size=1,
            max_size=max(1, max_connections),
            kwargs={"autocommit": True, "row_factory": _row_factory},
            timeout=connect_timeout,
            open=False,
            name="journal",
        )
        try:
            self._pool.open(wait=True, timeout=connect_timeout * 2)
        except Exception as exc:
            raise UserError(f"cannot open the journal at {self.location}: {_reason(exc)}") from None
        with self._tx() as db:
            db.execute("SELECT pg_advisory_xact_lock(?)", (postgres_schema.MIGRATION_LOCK,))
            db.execute(postgres_schema.META)
            migrate(db, postgres_schema.MIGRATIONS)
        self._clock_lock = threading.Lock()
        self._offset = 0.0
        self._offset_at = float("-inf")
        self.now()
        self._listener: Any = None
        self._listen_lock = threading.Lock()

    def close(self) -> None:
        with self._listen_lock:
            if self._listener is not None:
                with contextlib.suppress(Exception):
                    self._listener.close()
                self._listener = None
        self._pool.close()

    # -- transactions ---------------------------------------------------------------------------

    @contextlib.contextmanager
    def _tx(self, *, durable: bool = True) -> Iterator[Cursor]:
        import psycopg

        try:
            with self._pool.connection() as conn, conn.transaction():
                cursor = _PgCursor(conn)
                if not durable:
                    cursor.execute("SET LOCAL synchronous_commit = off")
                yield cursor
        except (psycopg.errors.DeadlockDetected, psycopg.errors.SerializationFailure):
            raise  # a conflict with another transaction: the method runs again (RETRYABLE)
        except (psycopg.OperationalError, _pool_timeout()) as exc:
            raise JournalUnavailable(f"journal {self.location}: {_reason(exc)}") from None

    def _query(self, sql: str, params: Sequence[Any] = ()) -> list[Any]:
        import psycopg

        try:
            with self._pool.connection() as conn:
                return conn.execute(_pg_sql(sql), tuple(params)).fetchall()
        except (psycopg.OperationalError, _pool_timeout()) as exc:
            raise JournalUnavailable(f"journal {self.location}: {_reason(exc)}") from None

    def _work_added(self, db: Cursor) -> None:
        db.execute(f"NOTIFY {postgres_schema.WORK_CHANNEL}")

    # -- the clock and notifications ------------------------------------------------------------

    def now(self) -> float:
        local = time.time()
        if time.monotonic() - self._offset_at > CLOCK_REFRESH_SECONDS:
            with self._clock_lock, contextlib.suppress(JournalUnavailable):
                t0 = time.time()
                server = float(self._query("SELECT extract(epoch FROM clock_timestamp())")[0][0])
                t1 = time.time()
                self._offset = server - (t0 + t1) / 2
                self._offset_at = time.monotonic()
            local = time.time()
        return local + self._offset

    def changed(self) -> bool:
        """A notification on the work channel since the last call (a connection of its own
        that listens); True when that connection is lost (the caller then looks)."""
        import psycopg

        with self._listen_lock:
            try:
                if self._listener is None:
                    self._listener = psycopg.connect(self._conninfo, autocommit=True)
                    self._listener.execute(f"LISTEN {postgres_schema.WORK_CHANNEL}")
                    return True
                got = False
                for _ in self._listener.notifies(timeout=0):
                    got = True
                return got
            except psycopg.Error:
                with contextlib.suppress(Exception):
                    if self._listener is not None:
                        self._listener.close()
                self._listener = None
                return True


def _pool_timeout() -> type[Exception]:
    from psycopg_pool import PoolTimeout

    return PoolTimeout


def _reason(exc: BaseException) -> str:
    """libpq's message, first line (it never holds the password)."""
    text = str(exc).strip() or type(exc).__name__
    return " ".join(text.split())


def probe(url: str, *, password: str = "") -> str:
    """Whether the node could open the journal at ``url`` (connect, log in, read the schema
    version), in one line; UserError with libpq's reason when it could not.  Creates nothing."""
    import psycopg

    check_url(url)
    extra: dict[str, Any] = {"connect_timeout": CONNECT_TIMEOUT}
    if password:
        extra["password"] = password
    try:
        with psycopg.connect(psycopg.conninfo.make_conninfo(url, **extra)) as conn:
            server = conn.info.server_version
            exists = conn.execute("SELECT to_regclass('meta') IS NOT NULL").fetchone()[0]
            version = None
            if exists:
                row = conn.execute("SELECT value FROM meta WHERE key = 'schema_version'").fetchone()
                version = int(row[0]) if row else None
    except psycopg.Error as exc:
        raise UserError(f"cannot open the journal at {_shown(url)}: {_reason(exc)}") from None
    latest = postgres_schema.SCHEMA_VERSION
    if version is not None and version > latest:
        raise UserError(
            f"the journal at {_shown(url)} has schema version {version}; this program knows "
            f"versions up to {latest}"
        )
    state = (
        "no schema yet (the node creates it)"
        if version is None
        else f"schema version {version}" + ("" if version == latest else f" (moves to {latest})")
    )
    return f"{_shown(url)} reachable (PostgreSQL {server // 10000}), {state}"

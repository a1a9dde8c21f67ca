"""A real PostgreSQL server for the tests (Debian ``postgresql``), started once per session in
a temporary folder on a free loopback port, and one fresh database per test.

PostgreSQL refuses to run as root: as root (CI, containers) the server is initialised and
started as the ``postgres`` system user (``su postgres -s /bin/sh -c ...``), in a folder owned
by it; as anyone else, as that user.  Connections over the Unix socket (in the same folder) are
trusted; TCP connections on 127.0.0.1 need a password (SCRAM), so that the node's password
handling is exercised.  The server is stopped by its PID file (``pg_ctl stop``) at the end.
"""

from __future__ import annotations

import contextlib
import os
import pwd
import shlex
import shutil
import subprocess
import tempfile
import uuid
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path

PG_BIN = Path(os.environ.get("DIASTOLIC_SR_PG_BIN", "/usr/lib/postgresql/15/bin"))
#: the role the node connects as (TCP, with a password)
NODE_ROLE = "diastolic_node"
NODE_PASSWORD = "hv-journal-secret-7c41"  # invented; a test checks it never reaches a log


def have_postgresql() -> bool:
    return all(os.access(PG_BIN / t, os.X_OK) for t in ("initdb", "pg_ctl", "postgres"))


#: PostgreSQL is a hard dependency in CI (the README's test command installs it): there a
#: missing server fails the test; elsewhere the test is skipped with the reason.
SKIP_WITHOUT_POSTGRESQL = not have_postgresql() and not os.environ.get("CI")
POSTGRESQL_REASON = f"PostgreSQL server binaries missing in {PG_BIN} (Debian postgresql)"


def _as_postgres(command: list[str], **kw) -> subprocess.CompletedProcess[str]:
    """Run ``command`` as the ``postgres`` system user (as root), else as ourselves."""
    if os.geteuid() == 0:
        line = " ".join(shlex.quote(c) for c in command)
        command = ["su", "postgres", "-s", "/bin/sh", "-c", line]
    return subprocess.run(command, capture_output=True, text=True, **kw)


@dataclass
class PgServer:
    folder: Path
    port: int
    host: str = "127.0.0.1"

    @property
    def socket_dir(self) -> str:
        return str(self.folder)

    def admin_conninfo(self, dbname: str = "postgres") -> str:
        """Superuser over the Unix socket (trusted)."""
        return f"host={self.socket_dir} port={self.port} user=postgres dbname={dbname}"

    def url(self, dbname: str) -> str:
        """The node's journal URL (no password in it: the node gets that elsewhere)."""
        return f"postgresql://{NODE_ROLE}@{self.host}:{self.port}/{dbname}"

    def create_database(self) -> str:
        import psycopg

        name = "test_" + uuid.uuid4().hex[:16]
        with psycopg.connect(self.admin_conninfo(), autocommit=True) as conn:
            conn.execute(f'CREATE DATABASE "{name}" OWNER {NODE_ROLE}')
        return name

    def drop_database(self, name: str) -> None:
        import psycopg

        with psycopg.connect(self.admin_conninfo(), autocommit=True) as conn:
            conn.execute(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)')

    def pg_ctl(self, *args: str, timeout: float = 60) -> subprocess.CompletedProcess[str]:
        return _as_postgres(
            [str(PG_BIN / "pg_ctl"), "-D", str(self.folder / "data"), *args], timeout=timeout
        )

    def start(self) -> None:
        options = (
            f"-p {self.port} -k {self.folder} -c listen_addresses={self.host} "
            "-c max_connections=200 -c shared_buffers=32MB"
        )
        r = self.pg_ctl("-o", options, "-l", str(self.folder / "server.log"), "-w", "start")
        if r.returncode != 0:
            raise RuntimeError(f"pg_ctl start failed: {r.stdout}{r.stderr}{self.log()}")

    def stop(self) -> None:
        self.pg_ctl("-m", "fast", "-w", "stop")

    def log(self) -> str:
        with contextlib.suppress(OSError):
            return (self.folder / "server.log").read_text(errors="replace")
        return ""


def start_server(port: int) -> PgServer:
    """initdb in a new temporary folder owned by the ``postgres`` user, start the server on
    ``port``, create the node's role."""
    folder = Path(tempfile.mkdtemp(prefix="diastolic-sr-pg-"))
    if os.geteuid() == 0:
        pw = pwd.getpwnam("postgres")
        os.chown(folder, pw.pw_uid, pw.pw_gid)
    folder.chmod(0o700)
    r = _as_postgres(
        [
            str(PG_BIN / "initdb"),
            "-D",
            str(folder / "data"),
            "-U",
            "postgres",
            "--auth-local=trust",
            "--auth-host=scram-sha-256",
            "-E",
            "UTF8",
            "--no-instructions",
        ],
        timeout=120,
    )
    if r.returncode != 0:
        shutil.rmtree(folder, ignore_errors=True)
        raise RuntimeError(f"initdb failed: {r.stdout}{r.stderr}")
    server = PgServer(folder, port)
    server.start()
    import psycopg

    with psycopg.connect(server.admin_conninfo(), autocommit=True) as conn:
        conn.execute(f"CREATE ROLE {NODE_ROLE} LOGIN PASSWORD '{NODE_PASSWORD}'")
    return server


@contextlib.contextmanager
def running_server(port: int) -> Iterator[PgServer]:
    server = start_server(port)
    try:
        yield server
    finally:
        server.stop()
        shutil.rmtree(server.folder, ignore_errors=True)

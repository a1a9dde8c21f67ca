"""Spool (durable files) and journal (SQLite WAL): states, idempotency, back-off, recovery."""

from __future__ import annotations

import os
import sqlite3
import stat
from pathlib import Path

import pytest

from service.store.journal import (
    FOLDER_DESTINATION,
    MAX_CLAIMS,
    DeliveryState,
    Journal,
    NewResult,
)
from service.store.spool import Spool, durable_write, safe_name
from service.store.sqlite_journal import SqliteJournal

STUDY = "1.2.826.0.1.3680043.10.999.1"


def _result(uid: str, sources: tuple[str, ...], data: bytes = b"result") -> NewResult:
    return NewResult(
        result_uid=uid,
        series_uid="2.25.77",
        sop_class_uid="1.2.840.10008.5.1.4.1.1.88.33",
        data=data,
        status="graded",
        guideline="ase-eacvi-2016",
        grade="grade-1",
        filling_pressure="normal",
        sources=sources,
        predecessors=(),
    )


@pytest.fixture
def sqlite_journal(tmp_path):
    j = SqliteJournal(tmp_path / "journal.sqlite3")
    yield j
    j.close()


def _receive(j: Journal, sop: str, *, study: str = STUDY, now: float = 1000.0, settle=5.0):
    j.store_object(
        sop_instance_uid=sop,
        study_uid=study,
        sop_class_uid="1.2.840.10008.5.1.4.1.1.88.33",
        transfer_syntax="1.2.840.10008.1.2.1",
        calling_ae="ECHO1",
        data=b"object " + sop.encode(),
        settle_seconds=settle,
        now=now,
    )


# -- spool ------------------------------------------------------------------------------------


def test_durable_write_replaces_atomically_and_leaves_no_temporaries(tmp_path):
    target = tmp_path / "a" / "b" / "file.dcm"
    durable_write(target, b"first")
    durable_write(target, b"second")
    assert target.read_bytes() == b"second"
    assert [p.name for p in target.parent.iterdir()] == ["file.dcm"]


def _record_fsyncs(monkeypatch) -> list[str]:
    """The paths os.fsync is called on, in order (read from /proc/self/fd)."""
    seen: list[str] = []
    real = os.fsync

    def fsync(fd: int) -> None:
        seen.append(os.readlink(f"/proc/self/fd/{fd}"))
        real(fd)

    monkeypatch.setattr(os, "fsync", fsync)
    return seen


def test_a_new_file_appears_only_when_whole_and_its_new_folders_are_fsynced(tmp_path, monkeypatch):
    # the results folder may be watched by an importer: no file under its final name before
    # its content is complete (temporary file, then rename; POSIX rename(2) is atomic); POSIX
    # fsync(2): a new name is durable once its folder is fsync'ed, so every folder created
    # for it is fsync'ed too, from the innermost
    target = tmp_path / "results" / "study" / "file.dcm"
    seen = _record_fsyncs(monkeypatch)
    durable_write(target, b"DICM")
    assert target.read_bytes() == b"DICM"
    assert seen[0].endswith(".part")
    assert seen[1:] == [str(target.parent), str(target.parent.parent), str(tmp_path)]


def test_durable_files_are_readable_by_their_owner_only(tmp_path):
    # they hold patient data; the same mode as a temporary file (Python tempfile.mkstemp: 0600)
    new = tmp_path / "results" / "1.2.3.4.dcm"
    durable_write(new, b"DICM")
    assert stat.S_IMODE(new.stat().st_mode) == 0o600
    durable_write(new, b"DICM again")
    assert stat.S_IMODE(new.stat().st_mode) == 0o600


def test_existing_file_is_never_written_in_place(tmp_path, monkeypatch):
    target = tmp_path / "file.dcm"
    durable_write(target, b"first")
    real = os.fsync

    def failing_fsync(fd: int) -> None:
        if os.readlink(f"/proc/self/fd/{fd}").endswith(".part"):
            raise OSError(28, "No space left on device")
        real(fd)

    monkeypatch.setattr(os, "fsync", failing_fsync)
    with pytest.raises(OSError):
        durable_write(target, b"second")
    assert target.read_bytes() == b"first"  # the recorded file is whole
    assert [p.name for p in tmp_path.iterdir()] == ["file.dcm"]


def test_failed_new_file_leaves_nothing_under_its_name(tmp_path, monkeypatch):
    target = tmp_path / "file.dcm"

    def failing_fsync(fd: int) -> None:
        raise OSError(5, "Input/output error")

    monkeypatch.setattr(os, "fsync", failing_fsync)
    with pytest.raises(OSError):
        durable_write(target, b"DICM")
    assert list(tmp_path.iterdir()) == []  # neither the file nor its temporary
    monkeypatch.undo()
    durable_write(target, b"DICM")  # written again: whole
    assert target.read_bytes() == b"DICM"


def test_spool_layout_and_crash_leftovers_are_cleaned(tmp_path):
    spool = Spool(tmp_path / "spool", clean=False)
    p = spool.object_path(STUDY, "1.2.3.4")
    assert p == tmp_path / "spool" / "objects" / STUDY / "1.2.3.4.dcm"
    p.parent.mkdir(parents=True)
    leftover = p.parent / ".tmp-abc.part"
    leftover.write_bytes(b"half")
    assert Spool(tmp_path / "spool").clean_temporaries() == 0  # constructor already cleaned
    assert not leftover.exists()


def test_malformed_uid_never_becomes_a_path():
    assert safe_name("1.2.3") == "1.2.3"
    for bad in ("../../etc/passwd", "1.2/3", "", ".", "1.2.3."):
        name = safe_name(bad)
        assert "/" not in name and name.startswith("x") and len(name) == 41


# -- journal ----------------------------------------------------------------------------------


def test_journal_uses_wal_with_full_sync(sqlite_journal):
    # sqlite docs (https://sqlite.org/pragma.html): synchronous FULL = 2
    assert sqlite_journal._db.execute("PRAGMA journal_mode").fetchone()[0] == "wal"
    assert sqlite_journal._db.execute("PRAGMA synchronous").fetchone()[0] == 2


def _sync_of_commits(journal: Journal, action) -> list[str]:
    """The synchronous setting in force at each COMMIT ``action`` makes."""
    settings: list[str] = []
    current = ["FULL"]

    def trace(sql: str) -> None:
        text = " ".join(sql.split()).upper()
        if text.startswith("PRAGMA SYNCHRONOUS="):
            current[0] = text.split("=", 1)[1]
        elif text == "COMMIT":
            settings.append(current[0])

    journal._db.set_trace_callback(trace)
    try:
        action()
    finally:
        journal._db.set_trace_callback(None)
    return settings


def test_what_is_acknowledged_is_on_disk_and_progress_is_committed_lazily(sqlite_journal, tmp_path):
    # SQLite "PRAGMA synchronous" (https://www.sqlite.org/pragma.html#pragma_synchronous): in
    # WAL mode FULL syncs the WAL at every commit; NORMAL stays consistent and survives an
    # application crash, and may roll back only on power loss.  A received object is promised
    # to the sender (C-STORE success), so FULL; the node's own progress, NORMAL.
    assert _sync_of_commits(
        sqlite_journal, lambda: _receive(sqlite_journal, "1.1", now=1000.0)
    ) == ["FULL"]
    claims: list = []
    assert _sync_of_commits(
        sqlite_journal, lambda: claims.extend(sqlite_journal.claim_due(now=1010.0))
    ) == ["NORMAL"]
    result = _result("2.25.1", ("1.1",))
    grade = lambda: sqlite_journal.finish_grading(  # noqa: E731
        claims[0], result=result, destinations=[("PACS", "PACS")], now=1011.0
    )
    assert _sync_of_commits(sqlite_journal, grade) == ["NORMAL"]
    (due,) = sqlite_journal.due_deliveries(now=1012.0)
    assert _sync_of_commits(
        sqlite_journal, lambda: sqlite_journal.mark_delivered(due.id, now=1012.0)
    ) == ["NORMAL"]
    assert _sync_of_commits(
        sqlite_journal, lambda: sqlite_journal.request_regrade(STUDY, now=1013.0)
    ) == ["FULL"]
    # and the connection is back at FULL for whatever comes next
    assert sqlite_journal._db.execute("PRAGMA synchronous").fetchone()[0] == 2


def test_lazily_committed_progress_survives_a_crash_of_the_process(journal_backend):
    # a new connection sees what the old one committed lazily (SQLite: the WAL holds it; only
    # a power loss can roll it back, SQLite docs as above; PostgreSQL: asynchronous commit
    # loses nothing to a crash of the client, PostgreSQL manual "Asynchronous Commit")
    _, open_journal = journal_backend
    j = open_journal()
    _receive(j, "1.1", now=1000.0)
    (claim,) = j.claim_due(now=1010.0)
    j.finish_grading(claim, result=None, failure="rejected: no echo measurement recognised")
    # no close(): the process "dies" with the connection open
    again = open_journal()
    assert again.study(STUDY)["state"] == "failed"
    again.close()
    j.close()


def test_settle_window_then_claim_then_graded_then_delivered(journal, tmp_path):
    _receive(journal, "1.1", now=1000.0)
    _receive(journal, "1.2", now=1002.0)  # window restarts at the last object
    assert journal.claim_due(now=1006.9) == []
    [claim] = journal.claim_due(now=1007.0)
    assert claim.object_uids == ("1.1", "1.2")
    assert journal.study(STUDY)["state"] == "assembled"
    assert {o["state"] for o in journal.objects(STUDY)} == {"assembled"}
    queued = journal.finish_grading(
        claim,
        result=_result("2.25.1", claim.object_uids),
        destinations=[("PACS", "PACS@127.0.0.1:104"), (FOLDER_DESTINATION, "/out")],
        now=1008.0,
    )
    assert queued
    assert journal.study(STUDY)["state"] == "graded"
    assert {o["state"] for o in journal.objects(STUDY)} == {"graded"}
    due = journal.due_deliveries(now=1008.0)
    assert sorted(d.destination for d in due) == [FOLDER_DESTINATION, "PACS"]
    journal.mark_delivered(due[0].id, now=1009.0)
    assert journal.study(STUDY)["state"] == "graded"  # one still pending
    journal.mark_delivered(due[1].id, now=1009.0)
    assert journal.study(STUDY)["state"] == "delivered"
    assert journal.pending_work() == 0


def test_object_arriving_during_grading_reopens_the_study(journal, tmp_path):
    _receive(journal, "1.1", now=1000.0, settle=0)
    [claim] = journal.claim_due(now=1000.0)
    _receive(journal, "1.2", now=1000.5, settle=0)  # while the first grading runs
    journal.finish_grading(
        claim,
        result=_result("2.25.1", claim.object_uids),
        destinations=[("PACS", "x")],
        now=1001.0,
    )
    study = journal.study(STUDY)
    assert study["state"] == "received", "the late object must trigger a re-grade"
    [again] = journal.claim_due(now=1001.0)
    assert again.object_uids == ("1.1", "1.2")
    assert [r["result_uid"] for r in again.earlier_results] == ["2.25.1"]


def test_same_result_uid_is_not_delivered_twice(journal, tmp_path):
    _receive(journal, "1.1", now=1000.0, settle=0)
    [claim] = journal.claim_due(now=1000.0)
    r = _result("2.25.1", ("1.1",))
    assert journal.finish_grading(claim, result=r, destinations=[("PACS", "x")], now=1000.0)
    [d] = journal.due_deliveries(now=1000.0)
    journal.mark_delivered(d.id, now=1000.0)
    # the archive re-sends the same study: same sources, same rules -> same result UID
    _receive(journal, "1.1", now=2000.0, settle=0)
    [claim2] = journal.claim_due(now=2000.0)
    assert not journal.finish_grading(claim2, result=r, destinations=[("PACS", "x")], now=2000)
    assert journal.due_deliveries(now=3000.0) == []
    assert len(journal.results()) == 1
    assert journal.study(STUDY)["state"] == "delivered"
    assert journal.objects(STUDY)[0]["times_received"] == 2


def test_backoff_doubles_up_to_the_cap_then_fails_with_reason(journal, tmp_path):
    _receive(journal, "1.1", now=0.0, settle=0)
    [claim] = journal.claim_due(now=0.0)
    journal.finish_grading(
        claim, result=_result("2.25.1", ("1.1",)), destinations=[("P", "x")], now=0
    )
    now = 0.0
    delays = []
    for _ in range(4):
        [d] = journal.due_deliveries(now=now)
        state = journal.mark_attempt_failed(
            d.id,
            "connection refused",
            max_attempts=5,
            backoff_initial=1.0,
            backoff_max=5.0,
            now=now,
        )
        assert state is DeliveryState.pending
        nxt = journal.next_delivery_at()
        delays.append(nxt - now)
        assert journal.due_deliveries(now=nxt - 0.01) == []
        now = nxt
    assert delays == [1.0, 2.0, 4.0, 5.0]  # 1 * 2^(n-1), capped at 5
    [d] = journal.due_deliveries(now=now)
    state = journal.mark_attempt_failed(
        d.id, "connection refused", max_attempts=5, backoff_initial=1.0, backoff_max=5.0, now=now
    )
    assert state is DeliveryState.failed
    [failed] = journal.deliveries(states=["failed"])
    assert failed["last_error"] == "gave up after 5 attempts: connection refused"
    study = journal.study(STUDY)
    assert study["state"] == "failed" and "connection refused" in study["reason"]
    # never dropped: re-queue puts it back with fresh attempts
    assert journal.requeue_failed(now=now) == 1
    [again] = journal.due_deliveries(now=now)
    assert again.attempts == 0
    assert journal.study(STUDY)["state"] == "graded"


def test_grading_failure_is_recorded_with_reason(journal):
    _receive(journal, "1.1", now=0.0, settle=0)
    [claim] = journal.claim_due(now=0.0)
    journal.finish_grading(claim, result=None, failure="rejected: no echo measurement", now=1)
    study = journal.study(STUDY)
    assert (study["state"], study["reason"]) == ("failed", "rejected: no echo measurement")
    # a later SR of the same study opens it again
    _receive(journal, "1.2", now=2.0, settle=0)
    assert journal.study(STUDY)["state"] == "received"


def test_recover_after_crash_mid_grading_and_state_survives_reopen(journal_backend):
    _, open_journal = journal_backend
    j = open_journal()
    _receive(j, "1.1", now=0.0, settle=0)
    _receive(j, "2.1", study="1.2.9", now=0.0, settle=100)
    j.claim_due(now=0.0)  # then the process dies (no finish_grading)
    # the process dies: no clean close of the journal object
    j2 = open_journal()
    counts = j2.recover(now=50.0)
    # both studies resume (one caught mid-grading, one still in its settle window): the count
    # the restart log shows is the number of studies that will be graded
    assert counts["resumed_grading"] == 2
    assert counts["interrupted_grading"] == 1
    assert j2.study(STUDY)["state"] == "received"
    [claim] = j2.claim_due(now=50.0)  # due again at once
    assert claim.study_uid == STUDY
    assert j2.study("1.2.9")["state"] == "received"  # its window is still running
    j2.close()
    j.close()


def test_regrade_request_from_another_connection(journal_backend, journal):
    _receive(journal, "1.1", now=0.0, settle=0)
    [claim] = journal.claim_due(now=0.0)
    journal.finish_grading(claim, result=None, failure="x", now=0.0)
    other = journal_backend[1]()  # e.g. the queue command while the node runs
    assert other.request_regrade(STUDY, now=10.0)
    assert not other.request_regrade("9.9.9")
    other.close()
    [again] = journal.claim_due(now=10.0)
    assert again.generation == claim.generation + 1


def test_incomplete_study_rows_are_refused_by_the_schema(journal):
    import psycopg

    with pytest.raises((sqlite3.Error, psycopg.Error)), journal._tx() as db:
        db.execute("INSERT INTO studies (study_uid) VALUES ('x')")


def test_claim_given_back_for_a_retry_is_not_due_before_its_time(journal):
    _receive(journal, "1.2.3.1", now=1000.0, settle=0)
    (claim,) = journal.claim_due(now=1000.0)
    journal.release_claim(claim, retry_at=1010.0, now=1000.0)  # a storage error: retry later
    assert journal.study(STUDY)["state"] == "received"
    assert journal.claim_due(now=1009.0) == []
    (again,) = journal.claim_due(now=1010.0)
    assert again.object_uids == claim.object_uids
    journal.release_claim(again, now=1011.0)  # shutdown: due as it was
    assert journal.claim_due(now=1011.0)


def test_result_bytes_are_committed_with_their_row_and_a_recorded_result_is_kept(sqlite_journal):
    # the result's bytes go into the journal in the transaction that records the result: no
    # spool file, and a later grading that finds the result recorded does not write it again
    _receive(sqlite_journal, "1.1", now=0.0, settle=0)
    (claim,) = sqlite_journal.claim_due(now=0.0)
    statements: list[str] = []
    sqlite_journal._db.set_trace_callback(statements.append)
    try:
        sqlite_journal.finish_grading(
            claim, result=_result("2.25.11", ("1.1",), b"%PDF-new"), now=1.0
        )
    finally:
        sqlite_journal._db.set_trace_callback(None)
    words = [" ".join(sql.split()[:3]).upper() for sql in statements]
    begin, commit = words.index("BEGIN IMMEDIATE"), words.index("COMMIT")
    assert begin < words.index("INSERT INTO RESULT_DATA") < commit
    assert not sqlite_journal.spool.result_path(STUDY, "2.25.11").exists()
    assert sqlite_journal.result_data("2.25.11") == b"%PDF-new"
    assert sqlite_journal.result_stored("2.25.11")
    _receive(sqlite_journal, "1.2", now=2.0, settle=0)
    (again,) = sqlite_journal.claim_due(now=2.0)
    sqlite_journal.finish_grading(
        again, result=_result("2.25.11", ("1.1",), b"%PDF-later"), now=3.0
    )
    assert sqlite_journal.result_data("2.25.11") == b"%PDF-new"


def test_a_full_disk_is_a_storage_error_and_records_nothing(sqlite_journal):
    # SQLite's SQLITE_FULL, provoked for real by capping the database's pages
    # (https://www.sqlite.org/pragma.html#pragma_max_page_count), is an OSError (ENOSPC), as a
    # full disk was for a spool file: the receiver answers Out of Resources, a grader retries
    import errno

    pages = sqlite_journal._db.execute("PRAGMA page_count").fetchone()[0]
    sqlite_journal._db.execute(f"PRAGMA max_page_count={pages}")
    with pytest.raises(OSError) as caught:
        sqlite_journal.store_object(
            sop_instance_uid="1.1",
            study_uid=STUDY,
            sop_class_uid="1.2.840.10008.5.1.4.1.1.88.33",
            transfer_syntax="1.2.840.10008.1.2.1",
            calling_ae="HV_ECHO1",
            data=b"x" * 200_000,
            settle_seconds=0,
            now=0.0,
        )
    assert caught.value.errno == errno.ENOSPC
    assert sqlite_journal.objects() == []
    sqlite_journal._db.execute("PRAGMA max_page_count=1073741823")
    _receive(sqlite_journal, "1.1", now=1.0, settle=0)  # space again: stored as usual
    assert sqlite_journal.object_data("1.1") == b"object 1.1"


def _version_6_journal(tmp_path: Path) -> Path:
    """A journal of schema version 6 (the bytes in spool files) holding one received object,
    1.1 of STUDY, in its spool file; the spool file's path."""
    from service.store import sqlite_schema
    from service.store.sql_journal import migrate

    old = sqlite3.connect(tmp_path / "journal.sqlite3", isolation_level=None)
    old.execute(sqlite_schema.META)
    old.execute("BEGIN")
    migrate(old, sqlite_schema.MIGRATIONS[:6])
    old.execute("COMMIT")
    spooled = tmp_path / "spool" / "objects" / STUDY / "1.1.dcm"
    spooled.parent.mkdir(parents=True)
    spooled.write_bytes(b"object 1.1, spooled")
    old.execute(
        "INSERT INTO studies (study_uid, calling_ae, state, first_received_at, "
        "last_received_at, due_at, updated_at) VALUES (?, 'HV_ECHO1', 'received', 0, 0, 0, 0)",
        (STUDY,),
    )
    old.execute(
        "INSERT INTO objects (sop_instance_uid, study_uid, sop_class_uid, transfer_syntax, "
        "calling_ae, path, state, received_at) VALUES ('1.1', ?, "
        "'1.2.840.10008.5.1.4.1.1.88.33', '1.2.840.10008.1.2.1', 'HV_ECHO1', ?, 'received', 0)",
        (STUDY, str(spooled)),
    )
    old.close()
    return spooled


def test_rows_recorded_before_version_7_are_read_from_their_spool_files(tmp_path):
    # a journal of schema version 6 kept the bytes in spool files: after the upgrade its rows
    # are read from them, new rows from the journal, and a purge deletes the old files
    spooled = _version_6_journal(tmp_path)
    journal = SqliteJournal(tmp_path / "journal.sqlite3")
    try:
        version = journal._query("SELECT value FROM meta WHERE key = 'schema_version'")[0][0]
        assert int(version) == 7
        assert journal.object_data("1.1") == b"object 1.1, spooled"
        _receive(journal, "1.2", now=1.0, settle=0)
        assert journal.object_data("1.2") == b"object 1.2"
        (claim,) = journal.claim_due(now=1.0)
        assert set(claim.object_uids) == {"1.1", "1.2"}
        journal.finish_grading(claim, result=None, failure="not gradable: test", now=2.0)
        assert journal.purge_finished(older_than=3.0).files == 2  # its spool file, its row's bytes
        assert not spooled.exists()
    finally:
        journal.close()


def test_an_old_object_received_again_leaves_no_spool_file_after_the_purge(tmp_path):
    # received before the upgrade (a spool file) and again after it: its row holds its bytes
    # now and names no file, yet the purge of its study removes the old file too
    spooled = _version_6_journal(tmp_path)
    journal = SqliteJournal(tmp_path / "journal.sqlite3")
    try:
        _receive(journal, "1.1", now=1.0, settle=0)
        assert journal.objects(STUDY)[0]["path"] == "" and spooled.exists()
        assert journal.object_data("1.1") == b"object 1.1"
        (claim,) = journal.claim_due(now=1.0)
        journal.finish_grading(claim, result=None, failure="not gradable: test", now=2.0)
        assert journal.purge_finished(older_than=3.0).files == 2  # the row's bytes, the old file
        assert not spooled.exists() and not spooled.parent.exists()
    finally:
        journal.close()


def test_a_result_said_to_be_stored_that_is_not_raises_and_records_nothing(journal):
    _receive(journal, "1.1", now=0.0, settle=0)
    (claim,) = journal.claim_due(now=0.0)
    with pytest.raises(FileNotFoundError):
        journal.finish_grading(claim, result=_result("2.25.11", ("1.1",), None), now=1.0)
    assert journal.results() == []
    assert journal.study(STUDY)["state"] == "assembled"


def test_received_bytes_are_committed_with_their_row_and_read_back(sqlite_journal):
    statements: list[str] = []
    sqlite_journal._db.set_trace_callback(statements.append)
    try:
        _receive(sqlite_journal, "1.1", now=0.0)
    finally:
        sqlite_journal._db.set_trace_callback(None)
    words = [" ".join(sql.split()[:3]).upper() for sql in statements]
    begin, commit = words.index("BEGIN IMMEDIATE"), words.index("COMMIT")
    assert begin < words.index("INSERT INTO OBJECTS") < words.index("INSERT INTO OBJECT_DATA")
    assert words.index("INSERT INTO OBJECT_DATA") < commit
    assert sqlite_journal.object_data("1.1") == b"object 1.1"
    assert sqlite_journal.objects(STUDY)[0]["path"] == ""
    assert not sqlite_journal.spool.object_path(STUDY, "1.1").exists()
    with pytest.raises(FileNotFoundError):
        sqlite_journal.object_data("9.9")


def test_schema_version_is_recorded_and_a_newer_journal_is_refused(journal_backend):
    from service.store import postgres_schema, sqlite_schema
    from service.store.sql_journal import SchemaTooNew

    _, open_journal = journal_backend
    j = open_journal()
    version = j._query("SELECT value FROM meta WHERE key = 'schema_version'")[0][0]
    assert int(version) == sqlite_schema.SCHEMA_VERSION == postgres_schema.SCHEMA_VERSION
    with j._tx() as db:
        db.execute("UPDATE meta SET value = '999' WHERE key = 'schema_version'")
    j.close()
    with pytest.raises(SchemaTooNew, match="schema version 999"):
        open_journal()


def test_open_journal_gives_the_interface(tmp_path):
    from service.store.journal import open_journal

    j = open_journal(tmp_path)
    assert isinstance(j, Journal)
    assert j.location == str(tmp_path / "journal.sqlite3")
    j.close()


# -- claims and leases --------------------------------------------------------------------------


def test_a_claimed_study_is_not_claimed_again_until_its_lease_runs_out(journal):
    _receive(journal, "1.1", now=0.0, settle=0)
    (mine,) = journal.claim_due(now=0.0, owner="a", lease_seconds=30)
    assert journal.study(STUDY)["claimed_by"] == "a"
    assert journal.claim_due(now=29.9, owner="b") == []
    assert journal.next_due_at() == pytest.approx(30.0)  # when the lease runs out
    journal.renew_leases("a", lease_seconds=30, now=20.0)
    assert journal.claim_due(now=49.9, owner="b") == []
    (theirs,) = journal.claim_due(now=50.0, owner="b")  # a died: b takes over
    assert (theirs.owner, theirs.object_uids) == ("b", mine.object_uids)
    journal.finish_grading(theirs, result=_result("2.25.1", ("1.1",)), now=51.0)
    study = journal.study(STUDY)
    assert (study["state"], study["claimed_by"], study["claims"]) == ("graded", "", 0)


def test_a_dead_owners_work_is_given_back_at_once_and_counted(journal):
    _receive(journal, "1.1", now=0.0, settle=0)
    for attempt in range(1, MAX_CLAIMS + 1):
        journal.claim_due(now=float(attempt), owner=f"grader/{attempt}")
        assert journal.study(STUDY)["claims"] == attempt
        assert journal.release_owner(f"grader/{attempt}", now=float(attempt)) == {
            "studies": 1,
            "deliveries": 0,
        }
        assert journal.study(STUDY)["state"] == "received"
    # its grading killed the process MAX_CLAIMS times: failed with the reason, not claimed
    assert journal.claim_due(now=10.0, owner="grader/9") == []
    study = journal.study(STUDY)
    assert study["state"] == "failed"
    assert f"grading ended without a result {MAX_CLAIMS} times" in study["reason"]
    assert {o["state"] for o in journal.objects(STUDY)} == {"graded"}
    # a new object gives it a new generation and a fresh count
    _receive(journal, "1.2", now=11.0, settle=0)
    (again,) = journal.claim_due(now=11.0, owner="grader/10")
    assert journal.study(STUDY)["claims"] == 1 and again.object_uids == ("1.1", "1.2")


def test_claims_given_back_by_their_owner_or_a_restart_do_not_count(journal):
    _receive(journal, "1.1", now=0.0, settle=0)
    for i in range(MAX_CLAIMS + 2):
        (claim,) = journal.claim_due(now=float(i), owner="nodeA/grader/1")
        if i % 2:
            journal.release_claim(claim, now=float(i))  # e.g. shutdown before grading
        else:
            assert journal.recover(now=float(i), owner_prefix="nodeA/")["interrupted_grading"] == 1
    assert journal.study(STUDY)["claims"] == 0
    assert journal.claim_due(now=99.0, owner="x")


def test_recover_gives_back_only_the_claims_of_its_own_node(journal):
    _receive(journal, "1.1", now=0.0, settle=0)
    _receive(journal, "2.1", study="1.2.9", now=0.0, settle=0)
    journal.claim_due(now=0.0, owner="nodeA/grader/1", limit=1)
    journal.claim_due(now=0.0, owner="nodeB/grader/1", limit=1)
    held = {s["study_uid"]: s["claimed_by"] for s in journal.studies()}
    assert sorted(held.values()) == ["nodeA/grader/1", "nodeB/grader/1"]
    assert journal.recover(now=1.0, owner_prefix="nodeA/")["interrupted_grading"] == 1
    after = {s["study_uid"]: (s["state"], s["claimed_by"]) for s in journal.studies()}
    a_study = next(u for u, o in held.items() if o.startswith("nodeA/"))
    b_study = next(u for u, o in held.items() if o.startswith("nodeB/"))
    assert after[a_study] == ("received", "")
    assert after[b_study] == ("assembled", "nodeB/grader/1")
    # a prefix with LIKE's wildcard characters matches only itself
    assert journal.recover(now=2.0, owner_prefix="node_/")["interrupted_grading"] == 0


def _graded_with_deliveries(journal, dests=("PACS",)):
    _receive(journal, "1.1", now=0.0, settle=0)
    (claim,) = journal.claim_due(now=0.0)
    journal.finish_grading(
        claim, result=_result("2.25.1", ("1.1",)), destinations=[(d, d) for d in dests], now=0
    )


def test_a_claimed_delivery_goes_to_one_sender_at_a_time(journal):
    _graded_with_deliveries(journal, ("PACS", "ARCHIVE"))
    assert journal.due_destinations(now=1.0) == ["ARCHIVE", "PACS"]
    (d,) = journal.claim_deliveries("PACS", owner="s1", lease_seconds=30, now=1.0)
    assert d.destination == "PACS"
    assert journal.claim_deliveries("PACS", owner="s2", now=2.0) == []
    assert journal.due_destinations(now=2.0) == ["ARCHIVE"]
    assert journal.next_delivery_at(destination="PACS") == pytest.approx(31.0)
    journal.renew_leases("s1", lease_seconds=30, now=20.0)
    assert journal.claim_deliveries("PACS", owner="s2", now=49.0) == []
    (again,) = journal.claim_deliveries("PACS", owner="s2", now=50.0)  # s1's lease ran out
    assert again.id == d.id
    journal.mark_attempt_failed(
        again.id, "refused", max_attempts=5, backoff_initial=1, backoff_max=1, now=50.0
    )
    row = journal.deliveries(result_uid="2.25.1")
    pacs = next(r for r in row if r["destination"] == "PACS")
    assert (pacs["claimed_by"], pacs["lease_until"]) == ("", 0)
    (third,) = journal.claim_deliveries("PACS", owner="s3", now=51.0)
    assert journal.release_owner("s3", now=52.0) == {"studies": 0, "deliveries": 1}
    assert journal.claim_deliveries("PACS", owner="s4", now=52.0)
    journal.mark_delivered(third.id, now=53.0)
    assert journal.claim_deliveries("PACS", owner="s5", now=100.0) == []


# -- PostgreSQL: the bytes in the record's transaction, claims that skip locked rows -----------


@pytest.fixture
def pg_journal(pg_url):
    from pgutil import NODE_PASSWORD

    from service.store.postgres_journal import PostgresJournal

    j = PostgresJournal(pg_url, password=NODE_PASSWORD)
    yield j
    j.close()


def _transactions(journal, action) -> list[list[str]]:
    """The statements of each transaction ``action`` runs on a PostgreSQL journal."""
    import contextlib

    from service.store import postgres_journal

    txs: list[list[str]] = []
    real_tx, real_execute = journal._tx, postgres_journal._PgCursor.execute

    @contextlib.contextmanager
    def tx(**kw):
        txs.append([])
        with real_tx(**kw) as db:
            yield db

    def execute(self, sql, params=()):
        if txs:
            txs[-1].append(" ".join(sql.split()))
        return real_execute(self, sql, params)

    journal._tx = tx
    postgres_journal._PgCursor.execute = execute
    try:
        action()
    finally:
        del journal._tx
        postgres_journal._PgCursor.execute = real_execute
    return txs


def test_postgresql_keeps_the_bytes_in_the_records_transaction_and_commits_it_durably(
    pg_journal,
):
    # the object's bytes and its record commit together, with the server's default
    # synchronous_commit (on: durable when the commit returns, PostgreSQL manual "WAL
    # Configuration"); the node's own progress commits asynchronously
    (store,) = _transactions(pg_journal, lambda: _receive(pg_journal, "1.1", now=0.0, settle=0))
    assert any(s.startswith("INSERT INTO objects") for s in store)
    assert any(s.startswith("INSERT INTO object_data") for s in store)
    assert not any("synchronous_commit" in s for s in store)
    assert pg_journal.object_data("1.1") == b"object 1.1"
    claims: list = []
    (claim,) = _transactions(pg_journal, lambda: claims.extend(pg_journal.claim_due(now=1.0)))
    assert claim[0] == "SET LOCAL synchronous_commit = off"
    assert any("FOR UPDATE OF studies SKIP LOCKED" in s for s in claim)
    (finish,) = _transactions(
        pg_journal,
        lambda: pg_journal.finish_grading(claims[0], result=_result("2.25.1", ("1.1",)), now=2),
    )
    assert finish[0] == "SET LOCAL synchronous_commit = off"
    assert any(s.startswith("INSERT INTO result_data") for s in finish)
    assert pg_journal.result_data("2.25.1") == b"result"
    assert pg_journal.result_stored("2.25.1")


def test_postgresql_claims_from_several_connections_never_overlap(pg_url):
    # FOR UPDATE SKIP LOCKED (PostgreSQL manual, SELECT "The Locking Clause"): four
    # connections claim at once, each study goes to exactly one of them
    import threading

    from pgutil import NODE_PASSWORD

    from service.store.postgres_journal import PostgresJournal

    setup = PostgresJournal(pg_url, password=NODE_PASSWORD)
    studies = [f"1.2.{i}" for i in range(120)]
    for study in studies:
        _receive(setup, f"{study}.1", study=study, now=0.0, settle=0)
    claimed: list[list[str]] = [[] for _ in range(4)]

    def claimer(k: int) -> None:
        j = PostgresJournal(pg_url, password=NODE_PASSWORD)
        try:
            while True:
                got = j.claim_due(now=1.0, limit=3, owner=f"g{k}")
                if not got:
                    return
                claimed[k] += [c.study_uid for c in got]
        finally:
            j.close()

    threads = [threading.Thread(target=claimer, args=(k,)) for k in range(4)]
    for t in threads:
        t.start()
    for t in threads:
        t.join(120)
    everything = [s for part in claimed for s in part]
    assert sorted(everything) == sorted(studies)  # every study once, none twice
    owners = {s["study_uid"]: s["claimed_by"] for s in setup.studies(limit=1000)}
    for k, part in enumerate(claimed):
        assert all(owners[s] == f"g{k}" for s in part)
    setup.close()


def test_a_password_in_the_url_is_refused_and_a_wrong_one_named_without_it(pg_server, pg_url):
    from pgutil import NODE_PASSWORD

    from service.errors import UserError
    from service.store.postgres_journal import PostgresJournal

    with_password = pg_url.replace("@", f":{NODE_PASSWORD}@", 1)
    with pytest.raises(UserError, match="holds a password") as err:
        PostgresJournal(with_password)
    assert NODE_PASSWORD not in str(err.value)
    with pytest.raises(UserError, match="password authentication failed") as err:
        PostgresJournal(pg_url, password="not-the-password")
    assert "not-the-password" not in str(err.value)


def test_postgresql_runs_a_method_again_after_the_server_broke_a_deadlock(pg_journal):
    # PostgreSQL breaks a deadlock by rolling one transaction back (SQLSTATE 40P01, manual
    # "Explicit Locking"); the journal runs that method again instead of failing the caller
    import contextlib

    import psycopg

    real_tx = pg_journal._tx
    raised = []

    @contextlib.contextmanager
    def tx(**kw):
        with real_tx(**kw) as db:
            yield db
            if not raised:
                raised.append(1)
                raise psycopg.errors.DeadlockDetected("deadlock detected (test)")

    pg_journal._tx = tx
    try:
        _receive(pg_journal, "1.1", now=0.0, settle=0)
    finally:
        del pg_journal._tx
    assert raised == [1]
    assert [o["sop_instance_uid"] for o in pg_journal.objects()] == ["1.1"]
    assert pg_journal.object_data("1.1") == b"object 1.1"


def test_postgresql_two_deliveries_of_a_study_finishing_at_once_leave_it_delivered(pg_url):
    # two destinations' workers record their deliveries of one result at the same moment: with
    # PostgreSQL's READ COMMITTED each transaction would see the other's delivery still
    # pending (manual, "Transaction Isolation") unless the study's row is locked first
    import contextlib
    import threading

    from pgutil import NODE_PASSWORD

    from service.store.postgres_journal import PostgresJournal

    ja = PostgresJournal(pg_url, password=NODE_PASSWORD)
    jb = PostgresJournal(pg_url, password=NODE_PASSWORD)
    _graded_with_deliveries(ja, ("PACS", "ARCHIVE"))
    (da,) = ja.claim_deliveries("PACS", owner="a", now=1.0)
    (db_,) = jb.claim_deliveries("ARCHIVE", owner="b", now=1.0)
    both_updated = threading.Barrier(2, timeout=20)
    both_read = threading.Barrier(2, timeout=3)

    class _Looked:
        """The transaction's cursor; before it writes the study's state, it waits (a few
        seconds at most) until the other transaction has read the deliveries too."""

        def __init__(self, db):
            self._db = db

        def execute(self, sql, params=()):
            if sql.startswith("UPDATE studies SET state = ?"):
                with contextlib.suppress(threading.BrokenBarrierError):
                    both_read.wait()
            return self._db.execute(sql, params)

    for j in (ja, jb):
        settle = j._settle_study_state

        def held(db, study_uid, now, settle=settle):
            both_updated.wait()  # each has recorded its own delivery, neither has committed
            return settle(_Looked(db), study_uid, now)

        j._settle_study_state = held
    threads = [
        threading.Thread(target=ja.mark_delivered, args=(da.id,), kwargs={"now": 2.0}),
        threading.Thread(target=jb.mark_delivered, args=(db_.id,), kwargs={"now": 2.0}),
    ]
    for t in threads:
        t.start()
    for t in threads:
        t.join(30)
    assert ja.study(STUDY)["state"] == "delivered"
    ja.close()
    jb.close()


def test_what_a_result_concluded_is_recorded_with_it_in_one_transaction(journal):
    # the grader records the assessment's outcome with the result (one commit), not after it
    import dataclasses

    _receive(journal, "1.1", now=0.0, settle=0)
    (claim,) = journal.claim_due(now=0.0)
    result = dataclasses.replace(_result("2.25.11", ("1.1",)), outcome="atrial-fibrillation")
    journal.finish_grading(claim, result=result, destinations=[("PACS", "PACS@h:1")], now=1.0)
    assert journal.outcome_of("2.25.11") == "atrial-fibrillation"
    _receive(journal, "1.2", now=2.0, settle=0)
    (again,) = journal.claim_due(now=2.0)
    journal.finish_grading(again, result=_result("2.25.12", ("1.1", "1.2")), now=3.0)
    assert journal.outcome_of("2.25.12") is None  # none said: none recorded


def test_the_journal_holding_the_objects_is_readable_by_its_owner_only(tmp_path):
    # it holds patient data: owner-only, as the spool files were (an older journal's files
    # with wider permissions are narrowed when it is opened)
    path = tmp_path / "journal.sqlite3"
    journal = SqliteJournal(path)
    _receive(journal, "1.1", now=0.0)
    files = sorted(p.name for p in tmp_path.glob("journal.sqlite3*"))
    assert files == ["journal.sqlite3", "journal.sqlite3-shm", "journal.sqlite3-wal"]
    for name in files:
        assert stat.S_IMODE((tmp_path / name).stat().st_mode) == 0o600, name
    journal.close()
    path.chmod(0o644)
    SqliteJournal(path).close()
    assert stat.S_IMODE(path.stat().st_mode) == 0o600

"""The backfill part of the journal (service/store/backfill_journal.py) on SQLite: its tables
come as schema version 4 (an existing version-1 journal is moved forward and keeps its rows),
and its methods keep what a run needs to skip done studies and resume the others."""

from __future__ import annotations

import sqlite3

from service.store.backfill_journal import RunState
from service.store.sqlite_journal import SqliteJournal


def test_a_version_1_journal_gets_the_backfill_tables_and_keeps_its_rows(tmp_path):
    from service.store import sqlite_schema
    from service.store.sql_journal import migrate

    path = tmp_path / "journal.sqlite3"
    db = sqlite3.connect(path, isolation_level=None)
    db.execute(sqlite_schema.META)
    db.execute("BEGIN")
    migrate(db, sqlite_schema.MIGRATIONS[:1])  # the journal as version 1 wrote it
    db.execute(
        "INSERT INTO studies (study_uid, calling_ae, state, first_received_at, "
        "last_received_at, due_at, updated_at) VALUES ('1.2.3', 'HV_ECHO1', 'delivered', 0, 0, "
        "0, 0)"
    )
    db.execute("COMMIT")
    db.close()

    j = SqliteJournal(path)
    try:
        version = j._query("SELECT value FROM meta WHERE key = 'schema_version'")[0][0]
        assert int(version) == sqlite_schema.SCHEMA_VERSION >= 4  # backfill came with 4
        assert j.study("1.2.3")["state"] == "delivered"
        assert j.backfill_runs() == [] and j.backfill_counts() == {}
    finally:
        j.close()


def test_runs_are_recorded_with_their_summary_newest_first(journal):
    first = journal.backfill_start_run("PACS@h:104", "2025-01-01", "")
    second = journal.backfill_start_run("https://pacs.example/dw", "", "")
    assert second > first
    journal.backfill_finish_run(first, RunState.interrupted, {"graded": 3})
    runs = journal.backfill_runs()
    assert [r["id"] for r in runs] == [second, first]
    assert runs[1]["state"] == "interrupted" and runs[1]["summary"] == {"graded": 3}
    assert runs[1]["since"] == "2025-01-01" and runs[1]["finished_at"] is not None
    assert runs[0]["state"] == "running"


def test_done_under_the_same_rules_is_what_a_later_run_skips(journal):
    run = journal.backfill_start_run("PACS@h:104", "", "")
    journal.backfill_found(run, "PACS@h:104", ["1.1", "1.2", "1.3"])
    journal.backfill_retrieved("1.1", rules="R1", sources=["9.2", "9.1"], generation=2)
    journal.backfill_done("1.1", outcome="grade-1")
    journal.backfill_retrieved("1.2", rules="R1", sources=["9.3"], generation=1)
    journal.backfill_failed("1.3", "the retrieve returned nothing")
    assert journal.backfill_done_under("R1") == {"1.1"}
    assert journal.backfill_done_under("R2") == set()  # other rules: graded again
    row = journal.backfill_study("1.1")
    assert (row["state"], row["outcome"], row["sources"]) == ("done", "grade-1", ["9.1", "9.2"])
    assert (row["generation"], row["attempts"]) == (2, 1)
    assert journal.backfill_study("1.3")["reason"] == "the retrieve returned nothing"
    assert journal.backfill_counts() == {"done": 1, "retrieved": 1, "failed": 1}
    assert journal.backfill_study("9.9") is None

    # found again by a later run: a study keeps its state
    later = journal.backfill_start_run("PACS@h:104", "", "")
    journal.backfill_found(later, "PACS@h:104", ["1.1", "1.3", "1.4"])
    assert journal.backfill_study("1.1")["state"] == "done"
    assert journal.backfill_study("1.3")["state"] == "failed"
    assert journal.backfill_study("1.4")["state"] == "found"
    assert journal.backfill_study("1.1")["run_id"] == later


def test_the_queue_command_lists_the_latest_backfill_runs(tmp_path, capsys):
    from service.cli import main as cli_main
    from service.store.journal import open_journal

    journal = open_journal(tmp_path)
    run = journal.backfill_start_run("HV_PACS@pacs.example:104", "2025-01-01", "")
    journal.backfill_finish_run(
        run,
        RunState.interrupted,
        {"found": 12, "graded": 5, "skipped": 2, "failed": [{"study": "1.2", "reason": "x"}]},
    )
    journal.close()
    assert cli_main(["queue", "--data-dir", str(tmp_path), "--json"]) == 0
    import json

    (listed,) = json.loads(capsys.readouterr().out)["backfill_runs"]
    assert listed["source"] == "HV_PACS@pacs.example:104" and listed["state"] == "interrupted"
    assert (listed["found"], listed["graded"], listed["skipped"], listed["failed"]) == (12, 5, 2, 1)
    assert cli_main(["queue", "--data-dir", str(tmp_path)]) == 0
    assert "backfill runs (latest first): 1" in capsys.readouterr().out

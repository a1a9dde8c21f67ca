"""Retention: stored sources and results of studies finished more than N days ago are purged;
pending work (studies waiting to be graded, results waiting to be delivered) and failed
deliveries never are.  The journal and spool are driven directly with explicit times."""

from __future__ import annotations

from pathlib import Path

import pytest

from service.store.journal import Journal, NewResult
from service.store.retention import DAY, purge
from service.store.sqlite_journal import SqliteJournal

T0 = 1_900_000_000.0  # an arbitrary fixed epoch time


@pytest.fixture
def store(journal_backend):
    """The journal, once per implementation (SQLite, PostgreSQL)."""
    journal = journal_backend[1]()
    yield journal
    journal.close()


class _Stored:
    """Where an object's or a result's bytes are: a row of the journal, or the spool file of
    a row recorded before SQLite's schema version 7; ``exists()`` either way."""

    def __init__(self, journal: Journal, kind: str, uid: str, path: str) -> None:
        self.journal, self.kind, self.uid, self.path = journal, kind, uid, path

    def exists(self) -> bool:
        if self.path:
            return Path(self.path).exists()
        table, key = ("object_data", "sop_instance_uid")
        if self.kind == "result":
            table, key = ("result_data", "result_uid")
        return bool(self.journal._query(f"SELECT 1 FROM {table} WHERE {key} = ?", (self.uid,)))


def _receive(journal: Journal, study: str, sop: str, now: float, settle: float = 0) -> _Stored:
    """A received object; where its bytes are."""
    journal.store_object(
        sop_instance_uid=sop,
        study_uid=study,
        sop_class_uid="1.2.840.10008.5.1.4.1.1.88.33",
        transfer_syntax="1.2.840.10008.1.2.1",
        calling_ae="HV_ECHO1",
        data=b"object " + sop.encode(),
        settle_seconds=settle,
        now=now,
    )
    (row,) = [o for o in journal.objects(study) if o["sop_instance_uid"] == sop]
    return _Stored(journal, "object", sop, row["path"])


def _grade(journal: Journal, study: str, now: float, dests=("PACS",)) -> _Stored:
    """The study graded; where its result's bytes are."""
    (claim,) = journal.claim_due(now=now)
    result_uid = f"{study}.9"
    journal.finish_grading(
        claim,
        result=NewResult(
            result_uid=result_uid,
            series_uid=f"{study}.8",
            sop_class_uid="1.2.840.10008.5.1.4.1.1.88.33",
            data=b"result",
            status="graded",
            guideline="ase-eacvi-2016",
            grade="normal",
            filling_pressure="normal",
            sources=claim.object_uids,
            predecessors=(),
        ),
        destinations=[(d, "X@127.0.0.1:104") for d in dests],
        now=now,
    )
    return _Stored(journal, "result", result_uid, journal.result(result_uid)["path"])


def _deliver_all(journal: Journal, study: str, now: float) -> None:
    for d in journal.due_deliveries(now=now):
        if d.study_uid == study:
            journal.mark_delivered(d.id, now=now)


def test_purges_finished_studies_and_never_pending_work(store):
    journal = store
    old = T0 - 40 * DAY
    # 1. delivered 40 days ago: purged
    src1 = _receive(journal, "1.2.1", "1.2.1.1", old)
    res1 = _grade(journal, "1.2.1", old)
    _deliver_all(journal, "1.2.1", old)
    # 2. not gradable 40 days ago, nothing to deliver: purged
    src2 = _receive(journal, "1.2.2", "1.2.2.1", old)
    (claim,) = journal.claim_due(now=old)
    journal.finish_grading(claim, result=None, failure="rejected: no echo measurement", now=old)
    # 3. graded 40 days ago, delivery still pending: kept
    src3 = _receive(journal, "1.2.3", "1.2.3.1", old)
    _grade(journal, "1.2.3", old)
    # 4. received 40 days ago, never graded (settle window far ahead): kept
    _receive(journal, "1.2.4", "1.2.4.1", old, settle=10 * 365 * DAY)
    # 5. delivery failed for good 40 days ago: kept (an administrator may re-queue it)
    _receive(journal, "1.2.5", "1.2.5.1", old)
    _grade(journal, "1.2.5", old)
    (d,) = [x for x in journal.due_deliveries(now=old) if x.study_uid == "1.2.5"]
    journal.mark_attempt_failed(
        d.id, "refused", max_attempts=1, backoff_initial=1, backoff_max=1, now=old
    )
    # 6. delivered 2 days ago: kept (younger than the retention)
    recent = T0 - 2 * DAY
    src6 = _receive(journal, "1.2.6", "1.2.6.1", recent)
    _grade(journal, "1.2.6", recent)
    _deliver_all(journal, "1.2.6", recent)
    assert journal.study("1.2.3")["state"] == "graded"  # its delivery was never attempted

    report = purge(journal, 30, now=T0)

    assert report.studies == 2
    assert not src1.exists() and not res1.exists() and not src2.exists()
    assert journal.study("1.2.1") is None and journal.study("1.2.2") is None
    for study in ("1.2.3", "1.2.4", "1.2.5", "1.2.6"):
        assert journal.study(study) is not None, study
    assert src3.exists() and src6.exists()
    assert journal.deliveries(states=["failed"])  # the failed delivery is still there
    assert journal.deliveries(states=["pending"])  # and the pending one
    assert report.files == 3  # two sources and one result


def test_zero_days_keeps_everything(store):
    journal = store
    old = T0 - 400 * DAY
    src = _receive(journal, "1.3.1", "1.3.1.1", old)
    _grade(journal, "1.3.1", old, dests=())
    assert journal.study("1.3.1")["state"] == "graded"
    assert purge(journal, 0, now=T0).studies == 0
    assert src.exists()


def test_a_late_object_reopens_the_study_and_protects_it(store):
    journal = store
    old = T0 - 40 * DAY
    _receive(journal, "1.4.1", "1.4.1.1", old)
    _grade(journal, "1.4.1", old)
    _deliver_all(journal, "1.4.1", old)
    late = _receive(journal, "1.4.1", "1.4.1.2", T0 - 40 * DAY + 1)
    _receive(journal, "1.4.1", "1.4.1.2", T0, settle=60)  # a re-send today: pending again
    assert purge(journal, 30, now=T0).studies == 0
    assert late.exists()


@pytest.mark.network
def test_node_purges_with_its_configured_retention(tmp_path):
    import time

    from netutil import LOOPBACK, fake_grade, send, simple_sr, wait_for

    from service.config import apply_overrides, config_from_dict
    from service.network.service import Node

    cfg = apply_overrides(
        config_from_dict({"retention": {"days": 1}, "http": {"enabled": False}}),
        port=0,
        bind=LOOPBACK,
        data_dir=str(tmp_path / "node"),
        settle_seconds=0,
    )
    node = Node(cfg, grade_fn=fake_grade, poll_seconds=0.05)
    node.start()
    try:
        ds = simple_sr()
        study = str(ds.StudyInstanceUID)
        assert send([ds], node.port) == [0]
        wait_for(lambda: (node.journal.study(study) or {}).get("state") == "delivered")
        row = node.journal.objects(study)[0]
        source = _Stored(node.journal, "object", row["sop_instance_uid"], row["path"])
        assert source.exists()
        assert node.purge_now() == 0  # finished less than a day ago
        assert node.purge_now(now=time.time() + 2 * DAY) == 1
        assert not source.exists() and node.journal.study(study) is None
        assert any(node.config.results_dir.glob("*.dcm"))  # the results folder is left alone
    finally:
        node.stop()


def test_queue_purge_command(tmp_path, capsys):
    from service.cli import main as cli_main

    data = tmp_path / "data"
    journal = SqliteJournal(data / "journal.sqlite3")
    import time

    old = time.time() - 40 * DAY  # the command purges relative to the real clock
    src = _receive(journal, "1.5.1", "1.5.1.1", old)
    _grade(journal, "1.5.1", old)
    _deliver_all(journal, "1.5.1", old)
    journal.close()
    cfg = tmp_path / "node.toml"
    cfg.write_text(f'[node]\ndata_dir = "{data}"\n')
    assert cli_main(["queue", "--config", str(cfg), "--purge"]) == 2
    assert "retention.days is 0" in capsys.readouterr().err
    cfg.write_text(f'[node]\ndata_dir = "{data}"\n[retention]\ndays = 30\n')
    src.journal = SqliteJournal(data / "journal.sqlite3")  # a look of the test's own
    try:
        assert src.exists()
        assert cli_main(["queue", "--config", str(cfg), "--purge"]) == 0
        assert (
            "1 finished study older than 30 days purged (2 stored objects and results)"
            in capsys.readouterr().out
        )
        assert not src.exists()
    finally:
        src.journal.close()

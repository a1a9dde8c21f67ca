"""Spare graders (``assembly.spare_workers``): a study's grading runs on a thread of the Linux
``SCHED_IDLE`` scheduling class (sched(7): it runs only when a core would otherwise be idle),
while the claim and the recording of the result run on the grader's own thread, at the
process's priority, so that no journal transaction waits on a starved thread."""

from __future__ import annotations

import os
import sys
import threading

import pytest
from netutil import echo_sr, wait_for

from service.config import AssemblyConfig, Config
from service.network.grader import Grader
from service.network.idle_cpu import IdleThread
from service.network.service import effective_reload
from service.store.sqlite_journal import SqliteJournal

linux = pytest.mark.skipif(not sys.platform.startswith("linux"), reason="SCHED_IDLE is Linux's")


def _policy() -> int:
    return os.sched_getscheduler(0)  # pid 0: the calling thread (Linux)


@linux
def test_idle_thread_runs_work_at_the_idle_class_and_leaves_the_caller_alone():
    idle = IdleThread("t")
    try:
        assert idle.idle_class
        seen = idle.run(lambda: (_policy(), threading.get_native_id()))
        assert seen[0] == os.SCHED_IDLE
        assert seen[1] != threading.get_native_id()
        assert _policy() == os.SCHED_OTHER  # the calling thread keeps its class
        with pytest.raises(ZeroDivisionError):  # an exception reaches the caller
            idle.run(lambda: 1 / 0)
        assert idle.run(lambda x: x + 1, 41) == 42  # and the thread goes on
    finally:
        idle.close()


@linux
def test_without_the_idle_class_the_thread_runs_at_the_lowest_niceness(monkeypatch):
    def refused(*_args):
        raise OSError(1, "Operation not permitted")

    monkeypatch.setattr(os, "sched_setscheduler", refused)
    idle = IdleThread("t")
    try:
        assert not idle.idle_class
        assert idle.run(lambda: os.getpriority(os.PRIO_PROCESS, 0)) == 19
        assert os.getpriority(os.PRIO_PROCESS, 0) != 19  # only that thread
    finally:
        idle.close()


class _WatchedJournal(SqliteJournal):
    """Records the scheduling class of the thread of each claim and each recorded outcome."""

    def __init__(self, *args, **kwargs) -> None:
        super().__init__(*args, **kwargs)
        self.policies: dict[str, list[int]] = {"claim": [], "finish": []}

    def claim_due(self, *args, **kwargs):
        claims = super().claim_due(*args, **kwargs)
        if claims:
            self.policies["claim"].append(_policy())
        return claims

    def finish_grading(self, *args, **kwargs):
        self.policies["finish"].append(_policy())
        return super().finish_grading(*args, **kwargs)


def _receive(journal: SqliteJournal, ds) -> None:
    from pydicom.filebase import DicomBytesIO

    buf = DicomBytesIO()
    ds.save_as(buf, enforce_file_format=True)
    journal.store_object(
        sop_instance_uid=str(ds.SOPInstanceUID),
        study_uid=str(ds.StudyInstanceUID),
        sop_class_uid=str(ds.SOPClassUID),
        transfer_syntax=str(ds.file_meta.TransferSyntaxUID),
        calling_ae="HV_ECHO_1",
        data=buf.getvalue(),
        settle_seconds=0,
    )


@linux
@pytest.mark.parametrize("spare", [True, False])
def test_a_spare_grader_grades_at_the_idle_class_and_journals_at_its_own(tmp_path, spare):
    journal = _WatchedJournal(tmp_path / "journal.sqlite3")
    graded_at: list[int] = []

    def grade_fn(datasets, options, **kwargs):
        from service.pipeline import grade_study

        graded_at.append(_policy())
        return grade_study(datasets, options, **kwargs)

    owner = "node/grader-spare-1/1"
    grader = Grader(Config(), journal, owner=owner, grade_fn=grade_fn, spare=spare)
    try:
        grader.start()
        studies = [echo_sr(f"spare-{i}", patient_id=f"HV-SP-{i}") for i in range(3)]
        for ds in studies:
            _receive(journal, ds)
            grader.wake()
        wait_for(lambda: len(journal.policies["finish"]) == 3, 60)
    finally:
        grader.stop()
        journal.close()
    states = SqliteJournal(tmp_path / "journal.sqlite3")
    try:
        assert [states.study(str(s.StudyInstanceUID))["state"] for s in studies] == ["graded"] * 3
    finally:
        states.close()
    expected = os.SCHED_IDLE if spare else os.SCHED_OTHER
    assert graded_at == [expected] * 3
    # claims and results: never on the idle thread
    assert journal.policies["claim"] and set(journal.policies["claim"]) == {os.SCHED_OTHER}
    assert journal.policies["finish"] == [os.SCHED_OTHER] * 3


def test_one_spare_grader_by_default_and_it_changes_on_a_restart_only():
    assert AssemblyConfig().spare_workers == 1
    assert AssemblyConfig(spare_workers=0).spare_workers == 0
    old = Config()
    new = Config(assembly=AssemblyConfig(spare_workers=3))
    effective, kept = effective_reload(old, new)
    assert effective.assembly.spare_workers == 1
    assert "assembly.spare_workers" in kept

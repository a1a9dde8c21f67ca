"""Fault drills with real processes on loopback: the node (``python -m service.cli serve``) is
killed with SIGKILL at seeded random moments while DCMTK ``storescu`` streams 200 studies;
the PACS (DCMTK ``storescp``) is down for part of a stream; the data directory's disk fills
up.  Whatever ``storescu`` saw acknowledged must end graded and delivered (or failed with a
reason), each result at the PACS by SOP Instance UID, and the journal must stay intact
(SQLite ``PRAGMA integrity_check``).  Every wait is bounded; the load is invented."""

from __future__ import annotations

import contextlib
import os
import random
import re
import sqlite3
import subprocess
import sys
import time
from collections import Counter
from collections.abc import Iterator, Sequence
from pathlib import Path

import pytest
from netutil import (
    DCMTK_REASON,
    LOOPBACK,
    NODE_AE,
    SKIP_WITHOUT_DCMTK,
    STORESCU,
    NodeProcess,
    echo_ok,
    free_port,
    pacs_uids,
    storescp,
    wait_for,
    write_config,
)

sys.path.insert(0, str(Path(__file__).parent / "bench"))
from load import write_studies

pytestmark = [
    pytest.mark.network,
    pytest.mark.external,
    pytest.mark.skipif(SKIP_WITHOUT_DCMTK, reason=DCMTK_REASON),
]

CONFIG = """
[assembly]
workers = 2
[limits]
shutdown_grace_seconds = 2
[delivery]
results_folder = ""
backoff_initial_seconds = 0.1
backoff_max_seconds = 0.5
"""

#: DCMTK reads TCP_NODELAY from the environment; without it every small response waits for
#: Nagle's algorithm and delayed acknowledgements (~40 ms each)
NODELAY = {**os.environ, "TCP_NODELAY": "1"}


def storescu(files: Sequence[Path], port: int) -> subprocess.Popen[str]:
    """DCMTK storescu over one association, verbose (each file and each response logged),
    going on after a failure status (``-nh``) as a scanner queue does."""
    return subprocess.Popen(
        [
            STORESCU,
            *("-v", "-R", "-nh", "-aet", "SCANNER1", "-aec", NODE_AE, "-to", "10"),
            *(LOOPBACK, str(port)),
            *map(str, files),
        ],
        stdout=subprocess.PIPE,
        stderr=subprocess.STDOUT,
        text=True,
        env=NODELAY,
    )


_SENDING = re.compile(r"Sending file: (.+)$")
_RESPONSE = re.compile(r"Received Store Response \(([^)]*)\)")


def acknowledged(output: str) -> tuple[set[str], set[str]]:
    """(files answered with Success, files answered with anything else) from storescu -v."""
    ok: set[str] = set()
    failed: set[str] = set()
    current = None
    for line in output.splitlines():
        m = _SENDING.search(line)
        if m:
            current = m.group(1).strip()
            continue
        m = _RESPONSE.search(line)
        if m and current is not None:
            (ok if m.group(1).strip() == "Success" else failed).add(current)
            current = None
    return ok, failed


def journal_rows(data_dir: Path, sql: str, params: Sequence = ()) -> list[tuple]:
    db = sqlite3.connect(f"file:{data_dir / 'journal.sqlite3'}?mode=ro", uri=True, timeout=30)
    try:
        return db.execute(sql, params).fetchall()
    finally:
        db.close()


def recorded(data_dir: Path) -> int:
    """Objects the node has recorded in its journal (0 before the journal exists)."""
    try:
        return int(journal_rows(data_dir, "SELECT COUNT(*) FROM objects")[0][0])
    except sqlite3.OperationalError:
        return 0


def integrity(data_dir: Path) -> str:
    return str(journal_rows(data_dir, "PRAGMA integrity_check")[0][0])


def settled(data_dir: Path, n: int) -> bool:
    try:
        rows = journal_rows(
            data_dir, "SELECT COUNT(*) FROM studies WHERE state IN ('delivered', 'failed')"
        )
    except sqlite3.OperationalError:
        return False
    return rows[0][0] >= n


def sop_uid_of(path: Path) -> str:
    import pydicom

    return str(pydicom.dcmread(path, stop_before_pixels=True).SOPInstanceUID)


def check_end_state(
    data_dir: Path, pacs_dir: Path, sent: dict[str, str], acked: set[str], *, max_duplicates: int
) -> Counter[str]:
    """Every acknowledged object graded; every study delivered (or failed with a reason);
    every current result at the PACS; nothing at the PACS the journal does not know."""
    objects = dict(journal_rows(data_dir, "SELECT sop_instance_uid, state FROM objects"))
    lost = {f for f in acked if sent[f] not in objects}
    assert not lost, f"{len(lost)} acknowledged object(s) missing from the journal"
    assert {objects[sent[f]] for f in acked} == {"graded"}
    studies = journal_rows(data_dir, "SELECT study_uid, state, reason, result_uid FROM studies")
    for study_uid, state, reason, _ in studies:
        assert state in ("delivered", "failed"), (study_uid, state)
        if state == "failed":
            assert reason.strip(), f"study {study_uid} failed without a reason"
    per_study = journal_rows(
        data_dir, "SELECT study_uid, COUNT(*) FROM results GROUP BY study_uid HAVING COUNT(*) > 1"
    )
    assert not per_study, f"studies with more than one result: {per_study[:3]}"
    expected = {r for _, s, _, r in studies if s == "delivered"}
    at_pacs = Counter(wait_for(lambda: _pacs_has(pacs_dir, expected), 60))
    assert set(at_pacs) == expected, "PACS and journal disagree on the delivered results"
    extra = sum(c - 1 for c in at_pacs.values())
    assert extra <= max_duplicates, f"{extra} results delivered more than once"
    assert integrity(data_dir) == "ok"
    return at_pacs


def _pacs_has(pacs_dir: Path, expected: set[str]) -> list[str] | None:
    got = pacs_uids(pacs_dir)
    return got if set(got) >= expected else None


# ---------------------------------------------------------------------------------------------


def test_kill9_at_random_moments_during_a_stream_of_200_studies(tmp_path):
    """Three SIGKILLs at seeded random moments (two while storescu streams, after a random
    number of objects stored; one while results are being graded and delivered), a restart
    after each; storescu re-sends what it did not see acknowledged, as a scanner does."""
    rng = random.Random(20261202)
    files = write_studies(tmp_path / "load", 200, run="kill9-drill")
    sent = {str(f): sop_uid_of(f) for f in files}
    pacs_port, pacs_dir = free_port(), tmp_path / "pacs"
    cfg = write_config(tmp_path / "node.toml", CONFIG)
    data_dir = tmp_path / "data"
    args = ["--config", str(cfg), "--port", "0", "--settle-seconds", "0"]
    args += ["--forward", f"PACS@{LOOPBACK}:{pacs_port}"]
    acked: set[str] = set()
    kills = 0
    with storescp(pacs_dir, pacs_port):
        node = NodeProcess(data_dir, args)
        try:
            for round_ in range(2):  # killed while storescu streams
                port = node.start(timeout=60)
                # the moment: after a seeded random number of objects are recorded (stored
                # durably, so acknowledged or about to be), not after a time, which would
                # depend on the machine's speed
                kill_at = recorded(data_dir) + rng.randint(15, 70)
                scu = storescu([f for f in files if str(f) not in acked], port)
                deadline = time.monotonic() + 120
                while (
                    time.monotonic() < deadline
                    and scu.poll() is None
                    and recorded(data_dir) < kill_at
                ):
                    time.sleep(0.005)
                node.kill()  # SIGKILL
                kills += 1
                out, _ = scu.communicate(timeout=60)
                ok, _ = acknowledged(out)
                acked |= ok
                assert integrity(data_dir) == "ok", f"journal damaged after kill {round_ + 1}"
            assert len(acked) < len(files), "the kills did not fall inside the stream"
            port = node.start(timeout=60)
            scu = storescu([f for f in files if str(f) not in acked], port)
            out, _ = scu.communicate(timeout=600)
            ok, failed = acknowledged(out)
            acked |= ok
            assert not failed, f"failure statuses without a fault: {sorted(failed)[:3]}"
            assert len(acked) == len(files), "storescu did not get every object acknowledged"
            # a kill while grading and delivery are still under way
            wait_for(lambda: settled(data_dir, rng.randint(20, 120)), 300, 0.05)
            node.kill()
            kills += 1
            assert integrity(data_dir) == "ok"
            node.start(timeout=60)
            wait_for(lambda: settled(data_dir, len(files)), 600, 0.2)
            # one kill can interrupt one delivery between the PACS's answer and the journal
            at_pacs = check_end_state(data_dir, pacs_dir, sent, acked, max_duplicates=kills)
            assert len(at_pacs) == len(files)
            assert node.terminate(timeout=60) == 0
            assert "Traceback" not in node.log()
        finally:
            node.kill()


def test_pacs_down_for_part_of_a_stream_then_up_every_result_delivered(tmp_path):
    files = write_studies(tmp_path / "load", 60, run="pacs-down-drill")
    sent = {str(f): sop_uid_of(f) for f in files}
    pacs_port, pacs_dir = free_port(), tmp_path / "pacs"
    cfg = write_config(tmp_path / "node.toml", CONFIG)
    data_dir = tmp_path / "data"
    args = ["--config", str(cfg), "--port", "0", "--settle-seconds", "0"]
    args += ["--forward", f"PACS@{LOOPBACK}:{pacs_port}"]
    node = NodeProcess(data_dir, args)
    try:
        port = node.start(timeout=60)
        scu = storescu(files, port)

        def retried() -> bool:  # results exist and attempts to the absent PACS have failed
            try:
                rows = journal_rows(data_dir, "SELECT COUNT(*) FROM deliveries WHERE attempts > 0")
            except sqlite3.OperationalError:
                return False
            return rows[0][0] >= 5

        wait_for(retried, 120, 0.1)
        with storescp(pacs_dir, pacs_port):
            out, _ = scu.communicate(timeout=300)
            ok, failed = acknowledged(out)
            assert ok == set(sent) and not failed
            wait_for(lambda: settled(data_dir, len(files)), 300, 0.2)
            at_pacs = check_end_state(data_dir, pacs_dir, sent, ok, max_duplicates=0)
        assert len(at_pacs) == len(files)
        states = journal_rows(data_dir, "SELECT DISTINCT state FROM studies")
        assert states == [("delivered",)]
        assert node.terminate(timeout=60) == 0
    finally:
        node.kill()


# -- disk full -------------------------------------------------------------------------------------


@contextlib.contextmanager
def small_disk(folder: Path, size: str) -> Iterator[Path]:
    """A size-limited tmpfs at ``folder`` (needs root and a kernel that allows the mount)."""
    folder.mkdir(parents=True, exist_ok=True)
    r = subprocess.run(
        ["mount", "-t", "tmpfs", "-o", f"size={size}", "tmpfs", str(folder)],
        capture_output=True,
        text=True,
    )
    if r.returncode != 0:
        pytest.skip(f"cannot mount a size-limited tmpfs here: {r.stderr.strip() or r.returncode}")
    try:
        yield folder
    finally:
        subprocess.run(["umount", "-l", str(folder)], capture_output=True)


def fill(folder: Path) -> Path:
    """Write a filler file until the disk is full (unbuffered: every byte that fits lands)."""
    filler = folder / "filler.bin"
    fd = os.open(filler, os.O_WRONLY | os.O_CREAT | os.O_TRUNC)
    try:
        for size in (65536, 512, 1):
            with contextlib.suppress(OSError):
                while os.write(fd, b"\0" * size):
                    pass
    finally:
        os.close(fd)
    return filler


@pytest.mark.skipif(os.geteuid() != 0, reason="mounting a size-limited tmpfs needs root")
def test_disk_full_answers_out_of_resources_then_recovers(tmp_path):
    files = write_studies(tmp_path / "load", 12, run="disk-full-drill")
    sent = {str(f): sop_uid_of(f) for f in files}
    pacs_port, pacs_dir = free_port(), tmp_path / "pacs"
    cfg = write_config(tmp_path / "node.toml", CONFIG)
    with small_disk(tmp_path / "disk", "4m") as disk:
        data_dir = disk / "data"
        args = ["--config", str(cfg), "--port", "0", "--settle-seconds", "0"]
        args += ["--forward", f"PACS@{LOOPBACK}:{pacs_port}"]
        node = NodeProcess(data_dir, args)
        node.log_path = tmp_path / "node.log"  # the log must not live on the full disk
        with storescp(pacs_dir, pacs_port):
            try:
                port = node.start(timeout=60)
                first, rest = files[:4], files[4:]
                out, _ = storescu(first, port).communicate(timeout=120)
                ok, failed = acknowledged(out)
                assert ok == {str(f) for f in first} and not failed
                wait_for(lambda: settled(data_dir, len(first)), 120, 0.1)
                filler = fill(disk)
                out, _ = storescu(rest, port).communicate(timeout=120)
                ok, failed = acknowledged(out)
                assert not ok, "an object was acknowledged on a full disk"
                assert failed == {str(f) for f in rest}
                # DCMTK's name for 0xA7xx (PS3.4 B.2.3 "Refused: Out of Resources")
                assert out.count("Refused: OutOfResources") == len(rest), out[-800:]
                assert echo_ok(port, NODE_AE), "node stopped answering on a full disk"
                filler.unlink()  # space returns
                assert integrity(data_dir) == "ok"
                out, _ = storescu(rest, port).communicate(timeout=120)
                ok2, failed2 = acknowledged(out)
                assert ok2 == {str(f) for f in rest} and not failed2
                wait_for(lambda: settled(data_dir, len(files)), 180, 0.1)
                acked = {str(f) for f in files}
                check_end_state(data_dir, pacs_dir, sent, acked, max_duplicates=0)
                assert node.terminate(timeout=60) == 0
            finally:
                node.kill()


def test_disk_full_while_grading_recovers_without_manual_action(tmp_path, monkeypatch):
    """In-process node (the real pipeline); storing the result fails twice with a full disk,
    then space returns: the study must end delivered without anyone re-queueing it."""
    from service.config import apply_overrides, config_from_dict
    from service.network.service import Node

    cfg = apply_overrides(
        config_from_dict(
            {
                "delivery": {"backoff_initial_seconds": 0.1, "backoff_max_seconds": 0.4},
                "limits": {"shutdown_grace_seconds": 2},
                "http": {"port": 0},
            }
        ),
        port=0,
        bind=LOOPBACK,
        data_dir=str(tmp_path / "node"),
        settle_seconds=0,
    )
    node = Node(cfg, poll_seconds=0.05)
    node.start()
    try:
        real = node.journal._put_result_in_tx
        failures = {"left": 2}

        def full_then_space(*args, **kwargs):
            if failures["left"] > 0:
                failures["left"] -= 1
                # what SQLite raises when the disk is full (https://www.sqlite.org/rescode.html)
                full = sqlite3.OperationalError("database or disk is full")
                full.sqlite_errorcode = sqlite3.SQLITE_FULL
                raise full
            return real(*args, **kwargs)

        monkeypatch.setattr(node.journal, "_put_result_in_tx", full_then_space)
        files = write_studies(tmp_path / "load", 1, run="grading-disk-full")
        import pydicom
        from netutil import send

        ds = pydicom.dcmread(files[0])
        assert send([ds], node.port) == [0x0000]
        study = str(ds.StudyInstanceUID)

        def delivered() -> bool:
            row = node.journal.study(study)
            return row is not None and row["state"] == "delivered"

        wait_for(delivered, 10, 0.05)  # at back-off 0.1-0.4 s a retry has had ample time
        assert failures["left"] == 0
    finally:
        node.stop()

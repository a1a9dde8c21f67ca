"""The node as a real process (``python -m service.cli serve``): flags, SIGTERM, kill -9 and
restart.  Whatever the node acknowledged must end graded and delivered (or failed with a
reason), each result once by SOP Instance UID.  Loopback only; every wait is bounded."""

from __future__ import annotations

import subprocess
import sys
import threading
from pathlib import Path

import pytest
from netutil import (
    DCMTK_REASON,
    LOOPBACK,
    NODE_AE,
    REPO,
    SKIP_WITHOUT_DCMTK,
    NodeProcess,
    echo_ok,
    echo_sr,
    free_port,
    pacs_uids,
    storescp,
    wait_for,
    write_config,
)
from pynetdicom import AE

from service.store.journal import Journal
from service.store.sqlite_journal import SqliteJournal

pytestmark = [
    pytest.mark.network,
    pytest.mark.external,
    pytest.mark.skipif(SKIP_WITHOUT_DCMTK, reason=DCMTK_REASON),
]

CONFIG = """
[assembly]
workers = 2
[limits]
shutdown_grace_seconds = 3
[delivery]
backoff_initial_seconds = 0.1
backoff_max_seconds = 0.5
"""


class BatchSender(threading.Thread):
    """A scanner sending one object per study over one association, noting what the node
    acknowledged (status 0x0000) before anything happens to it."""

    def __init__(self, datasets, port: int) -> None:
        super().__init__(daemon=True)
        self.datasets = datasets
        self.port = port
        self.acked: list[str] = []  # SOP Instance UIDs acknowledged with success

    def run(self) -> None:
        ae = AE(ae_title="SCANNER1")
        ae.acse_timeout = ae.dimse_timeout = ae.network_timeout = 10
        ae.add_requested_context(self.datasets[0].SOPClassUID)
        assoc = ae.associate(LOOPBACK, self.port, ae_title=NODE_AE)
        if not assoc.is_established:
            return
        try:
            for ds in self.datasets:
                if not assoc.is_established:
                    break
                try:
                    status = assoc.send_c_store(ds)
                except Exception:
                    break
                if "Status" in status and status.Status == 0:
                    self.acked.append(str(ds.SOPInstanceUID))
        finally:
            if assoc.is_established:
                assoc.release()


def _journal_view(data_dir: Path) -> Journal:
    return SqliteJournal(data_dir / "journal.sqlite3")


def _all_settled(data_dir: Path, study_uids):
    def check():
        j = _journal_view(data_dir)
        try:
            states = [(j.study(u) or {}).get("state") for u in study_uids]
        finally:
            j.close()
        return all(s in ("delivered", "failed") for s in states)

    return check


def test_serve_with_flags_only_answers_echo_and_stops_on_sigterm(tmp_path):
    node = NodeProcess(
        tmp_path / "data", ["--port", "0", "--settle-seconds", "0.2", "--ae-title", "HV_NODE"]
    )
    try:
        port = node.start()
        assert echo_ok(port, "HV_NODE")
        assert not echo_ok(port, NODE_AE)  # the called AE title must match ours
        assert node.terminate() == 0  # SIGTERM: clean exit 0
        log = node.log()
        assert "signal SIGTERM received" in log and "stopped; journal" in log
        assert "Traceback" not in log
    finally:
        node.kill()


def test_bad_configuration_is_one_line_and_exit_2(tmp_path):
    bad = write_config(tmp_path / "bad.toml", '[node]\nport = "x"\n')
    r = subprocess.run(
        [sys.executable, "-m", "service.cli", "serve", "--config", str(bad)],
        cwd=REPO,
        capture_output=True,
        text=True,
        timeout=60,
    )
    assert r.returncode == 2
    assert 'node.port: "x" is not allowed' in r.stderr
    assert "Traceback" not in r.stderr


@pytest.mark.parametrize("how", ["sigterm", "kill9"])
def test_stop_mid_batch_then_restart_loses_nothing_acknowledged(tmp_path, how):
    pacs_port, pacs_dir = free_port(), tmp_path / "pacs"
    cfg = write_config(tmp_path / "node.toml", CONFIG)
    data_dir = tmp_path / "data"
    args = [
        "--config",
        str(cfg),
        "--port",
        "0",
        "--settle-seconds",
        "0.3",
        "--forward",
        f"PACS@{LOOPBACK}:{pacs_port}",
    ]
    studies = [echo_sr(f"{how}-{i}", patient_id=f"HV-L-{i:03d}") for i in range(6)]
    with storescp(pacs_dir, pacs_port):
        first = NodeProcess(data_dir, args)
        second = NodeProcess(data_dir, args)
        try:
            port = first.start()
            sender = BatchSender(studies, port)
            sender.start()
            wait_for(lambda: len(sender.acked) >= 2, 30)
            if how == "sigterm":
                assert first.terminate(timeout=60) == 0
            else:
                first.kill()  # SIGKILL: no chance to clean up
            sender.join(30)
            acked = set(sender.acked)
            assert acked, "nothing was acknowledged before the stop"
            port = second.start()
            # the scanner sends again what was not acknowledged (as a real sender would)
            rest = [ds for ds in studies if str(ds.SOPInstanceUID) not in acked]
            if rest:
                again = BatchSender(rest, port)
                again.start()
                again.join(60)
                assert len(again.acked) == len(rest)
            uids = [str(ds.StudyInstanceUID) for ds in studies]
            wait_for(_all_settled(data_dir, uids), 90)
            j = _journal_view(data_dir)
            try:
                objects = {o["sop_instance_uid"]: o for o in j.objects()}
                assert acked <= set(objects), "an acknowledged object was lost"
                assert {o["state"] for o in objects.values()} == {"graded"}
                rows = [j.study(u) for u in uids]
                assert all(r["state"] == "delivered" for r in rows), rows
                expected = {r["result_uid"] for r in rows}
            finally:
                j.close()
            got = wait_for(
                lambda: (lambda x: x if len(set(x)) >= len(expected) else None)(
                    pacs_uids(pacs_dir)
                ),
                30,
            )
            assert set(got) == expected  # every result at the PACS, by SOP Instance UID
            if how == "sigterm":
                assert len(got) == len(expected)  # and nothing sent twice
            assert second.terminate() == 0
        finally:
            first.kill()
            second.kill()

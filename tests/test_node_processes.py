"""``serve`` as processes: the receiver, the graders and the sender each in a process of its
own under one supervisor.  A role process killed with SIGKILL is logged, its claims given back
at once and the process started again, and nothing acknowledged is lost; SIGTERM and SIGHUP
reach every role; the roles end with a killed supervisor; /metrics sums the roles' counters
and /healthz lists the processes.  Nodes in subprocesses on loopback (the real pipeline), every wait
bounded; the load is invented (fictional Harbour Vale Cardiac Centre)."""

from __future__ import annotations

import contextlib
import json
import os
import signal
import socket
import sys
import urllib.error
import urllib.request
from pathlib import Path

import pytest
from netutil import (
    LOOPBACK,
    NodeProcess,
    echo_sr,
    send,
    wait_for,
    write_config,
)
from prometheus_client.parser import text_string_to_metric_families

from service.network.demo_loop import ResultReceiver
from service.store.sqlite_journal import SqliteJournal

pytestmark = [
    pytest.mark.network,
    pytest.mark.skipif(not sys.platform.startswith("linux"), reason="reads /proc"),
]

ROLES = {"receiver", "grader-1", "grader-2", "grader-spare-1", "sender"}


def _children(pid: int) -> dict[str, int]:
    """The role processes below the supervisor ``pid``: name -> pid (Linux /proc)."""
    out = {}
    for task in Path(f"/proc/{pid}/task").glob("*"):
        try:
            children = (task / "children").read_text().split()
        except OSError:
            continue
        for c in children:
            try:
                argv = Path(f"/proc/{c}/cmdline").read_bytes().split(b"\0")
            except OSError:
                continue
            if b"service.network.roles" in argv:
                out[argv[argv.index(b"--name") + 1].decode()] = int(c)
    return out


def _all_roles(node: NodeProcess) -> dict[str, int]:
    """The role processes of a node, once all of them are up."""
    assert node.proc is not None
    pid = node.proc.pid
    return wait_for(lambda: (lambda c: c if set(c) == ROLES else None)(_children(pid)), 60)


def _policies(pid: int) -> set[int]:
    """The scheduling classes of a process's threads (Linux: per thread)."""
    out = set()
    for task in Path(f"/proc/{pid}/task").glob("*"):
        with contextlib.suppress(OSError):
            out.add(os.sched_getscheduler(int(task.name)))
    return out


def _alive(pid: int) -> bool:
    try:
        state = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()[0]
    except OSError:
        return False
    return state != "Z"


def _events(node: NodeProcess, name: str) -> list[dict]:
    out = []
    for line in node.log().splitlines():
        if line.startswith("{") and f'"event": "{name}"' in line:
            out.append(json.loads(line))
    return out


def _study_states(data_dir: Path, studies) -> list[str | None]:
    j = SqliteJournal(data_dir / "journal.sqlite3")
    try:
        return [(j.study(str(s.StudyInstanceUID)) or {}).get("state") for s in studies]
    finally:
        j.close()


def _all_delivered(data_dir: Path, studies):
    return lambda: all(s == "delivered" for s in _study_states(data_dir, studies))


def _http(node: NodeProcess, path: str) -> tuple[int, bytes]:
    info = json.loads((node.data_dir / "run" / "listener.json").read_text())
    url = f"http://{LOOPBACK}:{info['http_port']}{path}"
    try:
        with urllib.request.urlopen(url, timeout=10) as r:
            return r.status, r.read()
    except urllib.error.HTTPError as exc:
        return exc.code, exc.read()


@pytest.fixture
def pacs():
    receiver = ResultReceiver("HV_PACS")
    receiver.start()
    yield receiver
    receiver.stop()


@pytest.fixture
def node_process(tmp_path, pacs):
    started: list[NodeProcess] = []

    def start(extra: str = "", *, settle: str = "0", name: str = "data") -> NodeProcess:
        cfg = write_config(
            tmp_path / f"{name}.toml",
            "[assembly]\nworkers = 2\n[limits]\nshutdown_grace_seconds = 2\n"
            '[delivery]\nresults_folder = ""\nbackoff_initial_seconds = 0.2\n'
            "backoff_max_seconds = 0.5\n" + extra,
        )
        node = NodeProcess(
            tmp_path / name,
            [
                *("--config", str(cfg), "--port", "0", "--settle-seconds", settle),
                *("--forward", f"HV_PACS@{LOOPBACK}:{pacs.port}"),
            ],
        )
        node.start(timeout=90)
        started.append(node)
        return node

    yield start
    for node in started:
        node.kill()


def test_each_role_runs_in_a_process_of_its_own_and_metrics_sum_them(node_process, pacs):
    node = node_process()
    assert node.proc is not None
    children = _all_roles(node)
    assert len(set(children.values())) == 5 and node.proc.pid not in children.values()
    # the spare grader (assembly.spare_workers, one by default) grades on a thread of the
    # SCHED_IDLE class (sched(7)); its other threads keep the process's class
    spare = children["grader-spare-1"]
    policies = wait_for(lambda: _policies(spare) if os.SCHED_IDLE in _policies(spare) else None)
    assert os.SCHED_OTHER in policies
    assert os.SCHED_IDLE not in _policies(children["grader-1"])
    studies = [echo_sr(f"roles-{i}", patient_id=f"HV-R-{i}") for i in range(4)]
    assert send(studies, node.port) == [0, 0, 0, 0]
    wait_for(_all_delivered(node.data_dir, studies), 60)
    # each event is logged by the process of the role that did it
    assert {e["process"] for e in _events(node, "object_received")} == {"receiver"}
    graders = {"grader-1", "grader-2", "grader-spare-1"}
    assert {e["process"] for e in _events(node, "study_graded")} <= graders
    assert {e["process"] for e in _events(node, "result_delivered")} == {"sender"}
    assert len(pacs.uids()) == 4
    # /metrics: the counters of the role processes, summed (prometheus-client's parser)
    status, body = _http(node, "/metrics")
    assert status == 200
    samples = {
        (s.name, tuple(sorted(s.labels.items()))): s.value
        for f in text_string_to_metric_families(body.decode())
        for s in f.samples
    }
    assert samples[("diastolic_sr_objects_received_total", (("outcome", "stored"),))] == 4
    graded = [v for (name, _), v in samples.items() if name == "diastolic_sr_studies_graded_total"]
    assert sum(graded) == 4  # counted by outcome in the grader processes, summed
    delivered = (("kind", "result"), ("outcome", "delivered"))
    assert samples[("diastolic_sr_deliveries_total", delivered)] == 4
    assert samples[("diastolic_sr_queue_depth", (("queue", "studies_waiting"),))] == 0
    # the status page names each process in words, not as a data structure
    status, body = _http(node, "/")
    page = body.decode()
    assert status == 200
    for name, pid in children.items():
        assert f"{name} running (process {pid})" in page
    assert "alive" not in page and "restarts" not in page
    # /healthz: every role's process
    status, body = _http(node, "/healthz")
    report = json.loads(body)
    assert status == 200 and report["status"] == "ok"
    processes = report["checks"]["processes"]
    assert processes["ok"] and all(processes[r]["alive"] for r in ROLES)


def test_killed_role_processes_are_restarted_and_nothing_is_lost(node_process, pacs):
    node = node_process()
    assert node.proc is not None
    sent = []
    for n, role in enumerate(["grader-1", "sender", "receiver"], start=1):
        batch = [echo_sr(f"before-{role}-{i}", patient_id=f"HV-K-{i}") for i in range(3)]
        assert wait_for(lambda batch=batch: send(batch, node.port) == [0, 0, 0], 60)
        sent += batch
        old = wait_for(lambda role=role: _children(node.proc.pid).get(role))
        os.kill(old, signal.SIGKILL)  # as the kernel's out-of-memory killer would
        ended = wait_for(
            lambda n=n: (lambda e: e if len(e) >= n else None)(_events(node, "process_ended")), 30
        )
        assert ended[-1]["process_role"] == role and ended[-1]["exit"] == "signal SIGKILL"
        restarted = wait_for(
            lambda n=n: (lambda e: e if len(e) >= n else None)(_events(node, "process_restarted")),
            60,
        )
        assert restarted[-1]["process_role"] == role
        new = _children(node.proc.pid).get(role)
        assert new and new != old and _alive(new)
    # the receiver came back on the same port
    after = [echo_sr(f"after-kills-{i}", patient_id=f"HV-K2-{i}") for i in range(3)]
    assert wait_for(lambda: send(after, node.port) == [0, 0, 0], 60)
    wait_for(_all_delivered(node.data_dir, sent + after), 90)
    got = pacs.uids()
    # every result at the PACS; only the sender's death may send one again (the same
    # SOP Instance UID, kept once by a PACS)
    assert len(set(got)) == len(sent + after) and len(got) <= len(sent + after) + 3
    children = _all_roles(node)
    node.kill()  # SIGKILL of the supervisor: no clean-up in it
    wait_for(lambda: not any(_alive(pid) for pid in children.values()), 30)


def test_a_killed_graders_study_is_given_back_at_once(tmp_path, pacs):
    # the supervisor gives a dead grader's claims back without waiting for their leases
    from netutil import send as send_one

    cfg = write_config(
        tmp_path / "node.toml",
        "[assembly]\nworkers = 1\nspare_workers = 0\n[journal]\nlease_seconds = 3600\n"
        '[delivery]\nresults_folder = ""\n',
    )
    node = NodeProcess(
        tmp_path / "data",
        [
            *("--config", str(cfg), "--port", "0", "--settle-seconds", "1"),
            *("--forward", f"HV_PACS@{LOOPBACK}:{pacs.port}"),
        ],
    )
    try:
        node.start(timeout=90)
        grader = wait_for(lambda: _children(node.proc.pid).get("grader-1"))
        os.kill(grader, signal.SIGSTOP)  # the grader holds still
        ds = echo_sr("held-study")
        assert send_one([ds], node.port) == [0]
        # the owner the supervisor gives grader-1 (service.network.service.owner_name)
        owner = f"{socket.gethostname()}:{node.data_dir.resolve()}/grader-1/{grader}"
        j = SqliteJournal(node.data_dir / "journal.sqlite3")
        try:  # claim the study in the grader's name, as it would have
            (claim,) = wait_for(lambda: j.claim_due(owner=owner, lease_seconds=3600), 30)
            held = j.study(claim.study_uid)
        finally:
            j.close()
        os.kill(grader, signal.SIGKILL)
        wait_for(_all_delivered(node.data_dir, [ds]), 60)  # well before a 3600 s lease
        assert held["claims"] == 1
        ended = wait_for(lambda: _events(node, "process_ended"), 30)
        assert ended[0]["process_role"] == "grader-1"
    finally:
        node.kill()


def test_sigterm_and_sighup_reach_every_role(node_process, tmp_path, pacs):
    second_pacs = ResultReceiver("HV_PACS2")
    second_pacs.start()
    try:
        node = node_process()
        assert node.proc is not None
        children = _all_roles(node)
        first = echo_sr("before-reload")
        assert send([first], node.port) == [0]
        wait_for(lambda: len(pacs.uids()) == 1, 60)
        # a second destination on the default route: graders (routing) and sender (peers)
        # must both take the new configuration
        cfg = tmp_path / "data.toml"
        cfg.write_text(
            cfg.read_text() + f'[destinations.SECOND]\nae_title = "HV_PACS2"\nhost = "{LOOPBACK}"\n'
            f"port = {second_pacs.port}\n"
            + '[[routes]]\ncalling_ae = "*"\ndestinations = ["SECOND"]\n'
        )
        node.proc.send_signal(signal.SIGHUP)
        wait_for(lambda: _events(node, "config_reloaded"), 30)
        second = echo_sr("after-reload")
        wait_for(lambda: send([second], node.port) == [0], 30)
        wait_for(lambda: len(second_pacs.uids()) == 1, 60)
        assert node.terminate() == 0
        assert not any(_alive(pid) for pid in children.values())
        log = node.log()
        assert "signal SIGTERM received" in log and "stopped; journal" in log
        assert "Traceback" not in log
    finally:
        second_pacs.stop()

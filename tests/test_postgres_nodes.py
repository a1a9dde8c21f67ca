"""Nodes on a PostgreSQL journal (Debian ``postgresql``, started by the tests as the
``postgres`` system user on a loopback port): ``serve --journal`` with the password from the
environment (never in a log), ``check-config --journal``, a database that stops and comes
back (C-STORE answered with a failure status meanwhile, nothing acknowledged lost), several
nodes on one database.  Nodes in subprocesses, every wait bounded; invented load."""

from __future__ import annotations

import contextlib
import json
import os
import random
import signal
import socket
import subprocess
import sys
import time
from collections import Counter
from pathlib import Path

import pytest
from netutil import (
    DCMTK_REASON,
    LOOPBACK,
    SKIP_WITHOUT_DCMTK,
    NodeProcess,
    echo_sr,
    free_port,
    pacs_uids,
    send,
    storescp,
    wait_for,
    write_config,
)
from pgutil import NODE_PASSWORD, running_server

from service.cli import main as cli_main
from service.store.postgres_journal import PostgresJournal

pytestmark = [pytest.mark.network]

CONFIG = """
[assembly]
workers = 1
[limits]
shutdown_grace_seconds = 2
[delivery]
results_folder = ""
backoff_initial_seconds = 0.2
backoff_max_seconds = 1
"""


def _node(tmp_path: Path, name: str, url: str, pacs_port: int, *extra: str) -> NodeProcess:
    cfg = write_config(tmp_path / f"{name}.toml", CONFIG)
    return NodeProcess(
        tmp_path / name,
        [
            *("--config", str(cfg), "--port", "0", "--journal", url),
            *("--forward", f"PACS@{LOOPBACK}:{pacs_port}", *extra),
        ],
        env={"PGPASSWORD": NODE_PASSWORD},
    )


def _journal(url: str) -> PostgresJournal:
    return PostgresJournal(url, password=NODE_PASSWORD)


def _states(url: str, studies) -> list[str | None]:
    j = _journal(url)
    try:
        return [(j.study(str(s.StudyInstanceUID)) or {}).get("state") for s in studies]
    finally:
        j.close()


@pytest.mark.external
@pytest.mark.skipif(SKIP_WITHOUT_DCMTK, reason=DCMTK_REASON)
def test_serve_on_postgresql_keeps_everything_in_the_database(tmp_path, pg_url, capsys):
    pacs_port = free_port()
    with storescp(tmp_path / "pacs", pacs_port):
        node = _node(tmp_path, "node", pg_url, pacs_port, "--settle-seconds", "0")
        try:
            port = node.start(timeout=90)
            studies = [echo_sr(f"pg-{i}", patient_id=f"HV-P-{i}") for i in range(3)]
            assert send(studies, port) == [0, 0, 0]
            wait_for(lambda: _states(pg_url, studies) == ["delivered"] * 3, 60)
            # the objects and results are in the database; nothing was spooled
            assert not list((tmp_path / "node").rglob("*.dcm"))
            j = _journal(pg_url)
            try:
                assert all(j.object_data(str(s.SOPInstanceUID)) for s in studies)
                assert {r["path"] for r in j.results()} == {""}
            finally:
                j.close()
            wait_for(lambda: len(pacs_uids(tmp_path / "pacs")) == 3, 30)
            # the queue command reads the same journal
            os.environ["PGPASSWORD"] = NODE_PASSWORD
            try:
                assert cli_main(["queue", "--journal", pg_url, "--json"]) == 0
            finally:
                del os.environ["PGPASSWORD"]
            report = json.loads(capsys.readouterr().out)
            assert report["counts"]["studies.delivered"] == 3
            assert node.terminate() == 0
        finally:
            node.kill()
    log = node.log()
    assert NODE_PASSWORD not in log and "Traceback" not in log
    assert pg_url.split("@")[1] in log  # the journal is named, without a password


def test_check_config_names_the_journal_and_refuses_a_password_in_its_url(
    tmp_path, pg_url, capsys, monkeypatch
):
    cfg = write_config(tmp_path / "node.toml", "")
    monkeypatch.setenv("PGPASSWORD", NODE_PASSWORD)
    assert cli_main(["check-config", str(cfg), "--journal", pg_url]) == 0
    out = capsys.readouterr().out
    assert f"# journal: {pg_url} reachable" in out and "no schema yet" in out
    monkeypatch.setenv("PGPASSWORD", "wrong-password")
    assert cli_main(["check-config", str(cfg), "--journal", pg_url]) == 2
    err = capsys.readouterr().err
    assert "password authentication failed" in err and "wrong-password" not in err
    in_url = pg_url.replace("@", f":{NODE_PASSWORD}@", 1)
    assert cli_main(["check-config", str(cfg), "--journal", in_url]) == 2
    err = capsys.readouterr().err
    assert "journal.url: the URL holds a password" in err and NODE_PASSWORD not in err
    # the password in the configuration is masked when printed
    cfg.write_text(f'[journal]\nurl = "{pg_url}"\npassword = "{NODE_PASSWORD}"\n')
    monkeypatch.delenv("PGPASSWORD")
    assert cli_main(["check-config", str(cfg)]) == 0
    out = capsys.readouterr().out
    assert NODE_PASSWORD not in out and 'password = "********"' in out


@pytest.mark.external
@pytest.mark.skipif(SKIP_WITHOUT_DCMTK, reason=DCMTK_REASON)
def test_a_node_that_loses_its_database_refuses_objects_then_resumes(tmp_path):
    # a server of this test's own: it is stopped and started again
    pacs_port = free_port()
    with running_server(free_port()) as server, storescp(tmp_path / "pacs", pacs_port):
        url = server.url(server.create_database())
        node = _node(tmp_path, "node", url, pacs_port, "--settle-seconds", "0")
        try:
            port = node.start(timeout=90)
            before = [echo_sr(f"up-{i}", patient_id=f"HV-U-{i}") for i in range(2)]
            assert send(before, port) == [0, 0]
            wait_for(lambda: _states(url, before) == ["delivered"] * 2, 60)
            server.stop()
            # no database: the C-STORE is answered with a failure status (PS3.4 B.2.3 A700,
            # out of resources), so the sender keeps the object
            during = echo_sr("down", patient_id="HV-D-1")
            t0 = time.monotonic()
            assert send([during], port) == [0xA700]
            assert time.monotonic() - t0 < 30
            server.start()
            after = [echo_sr(f"back-{i}", patient_id=f"HV-B-{i}") for i in range(2)]
            # the sender sends again what was refused, as a scanner does
            wait_for(lambda: send([during], port) == [0], 60, interval=0.5)
            assert send(after, port) == [0, 0]
            everything = [*before, during, *after]
            wait_for(lambda: _states(url, everything) == ["delivered"] * 5, 90)
            wait_for(lambda: len(set(pacs_uids(tmp_path / "pacs"))) == 5, 30)
            assert node.proc is not None and node.proc.poll() is None
            assert node.terminate() == 0
        finally:
            node.kill()
    log = node.log()
    assert NODE_PASSWORD not in log and "Traceback" not in log
    # the outage is said once per process, and its end too
    events = [json.loads(line)["event"] for line in log.splitlines() if line.startswith("{")]
    # grader, spare grader, sender, (their lease keepers)
    assert 1 <= events.count("journal_unavailable") <= 6
    assert events.count("journal_available") == events.count("journal_unavailable")


# -- several nodes on one journal ---------------------------------------------------------------


def _study_of(path: str) -> str:
    import pydicom

    return str(pydicom.dcmread(path, stop_before_pixels=True).StudyInstanceUID)


def _descendants(pid: int) -> list[int]:
    """Every process below ``pid`` (Linux /proc)."""
    out, todo = [], [pid]
    while todo:
        p = todo.pop()
        for task in Path(f"/proc/{p}/task").glob("*"):
            with contextlib.suppress(OSError):
                for c in map(int, (task / "children").read_text().split()):
                    out.append(c)
                    todo.append(c)
    return out


def _two_nodes(tmp_path: Path, url: str, pacs_port: int, *extra: str):
    return [
        _node(tmp_path, name, url, pacs_port, "--lease-seconds", "5", *extra)
        for name in ("node-a", "node-b")
    ]


def _split_study(i: int):
    """A study of two SRs (Harbour Vale): half its measurements in each."""
    first = echo_sr(
        f"split-{i}",
        instance=1,
        content_time="101500",
        patient_id=f"HV-S-{i:03d}",
        values={"mitral_e": 80.0, "mitral_a": 60.0, "e_prime_septal": 6.0},
    )
    second = echo_sr(
        f"split-{i}",
        instance=2,
        content_time="103000",
        patient_id=f"HV-S-{i:03d}",
        values={"e_prime_lateral": 8.0, "tr_peak_velocity": 3.0, "lavi": 40.0, "lvef": 60.0},
    )
    assert first.StudyInstanceUID == second.StudyInstanceUID
    return first, second


@pytest.mark.external
@pytest.mark.skipif(SKIP_WITHOUT_DCMTK, reason=DCMTK_REASON)
def test_two_nodes_with_each_study_split_between_them_give_one_result_per_study(tmp_path, pg_url):
    import pydicom
    from netutil import evidence_uids

    pacs_port, pacs_dir = free_port(), tmp_path / "pacs"
    studies = [_split_study(i) for i in range(6)]
    with storescp(pacs_dir, pacs_port):
        nodes = _two_nodes(tmp_path, pg_url, pacs_port, "--settle-seconds", "3")
        try:
            a, b = (n.start(timeout=90) for n in nodes)
            # each study's first SR to one node, its second to the other, in one settle window
            assert send([s[0] for s in studies], a) == [0] * 6
            assert send([s[1] for s in studies], b) == [0] * 6
            firsts = [s[0] for s in studies]
            wait_for(lambda: _states(pg_url, firsts) == ["delivered"] * 6, 90)
            j = _journal(pg_url)
            try:
                for first, second in studies:
                    (result,) = j.results(str(first.StudyInstanceUID))
                    assert set(result["sources"]) == {first.SOPInstanceUID, second.SOPInstanceUID}
            finally:
                j.close()
            at_pacs = wait_for(lambda: (lambda x: x if len(x) >= 6 else None)(pacs_uids(pacs_dir)))
            assert len(at_pacs) == len(set(at_pacs)) == 6  # one result instance per study
            for f in pacs_dir.iterdir():
                if f.is_file():
                    result = pydicom.dcmread(f)
                    study = next(
                        s for s in studies if s[0].StudyInstanceUID == result.StudyInstanceUID
                    )
                    assert evidence_uids(result) == {s.SOPInstanceUID for s in study}
            graders = {
                json.loads(line).get("process")
                for n in nodes
                for line in n.log().splitlines()
                if '"event": "study_graded"' in line
            }
            assert graders  # graded by whichever node claimed first
            for n in nodes:
                assert n.terminate() == 0
        finally:
            for n in nodes:
                n.kill()


def _storescu(files, port: int) -> subprocess.Popen[str]:
    from test_drills import storescu

    return storescu(files, port)


@pytest.mark.external
@pytest.mark.skipif(SKIP_WITHOUT_DCMTK, reason=DCMTK_REASON)
def test_kill9_of_one_node_mid_stream_the_other_completes_every_acknowledged_study(
    tmp_path, pg_url
):
    sys.path.insert(0, str(Path(__file__).parent / "bench"))
    from load import write_studies
    from test_drills import acknowledged, sop_uid_of

    rng = random.Random(16)
    files = write_studies(tmp_path / "load", 380, run="two-nodes-kill")
    sent = {str(f): sop_uid_of(f) for f in files}
    # node A's stream is the long one (300 studies, a few seconds on loopback), so that the
    # kill, which waits for A to hold a claim (after the settle window), falls inside it
    to_a, to_b = files[80:], files[:80]
    pacs_port, pacs_dir = free_port(), tmp_path / "pacs"
    lease, settle = 5.0, 0.5
    with storescp(pacs_dir, pacs_port):
        node_a, node_b = _two_nodes(tmp_path, pg_url, pacs_port, "--settle-seconds", str(settle))
        try:
            port_a, port_b = node_a.start(timeout=90), node_b.start(timeout=90)
            j = _journal(pg_url)
            scu_a, scu_b = _storescu(to_a, port_a), _storescu(to_b, port_b)
            kill_at = rng.randint(8, 20)
            wait_for(lambda: len(j.objects()) >= kill_at or scu_a.poll() is not None, 120, 0.005)
            # the moment: while node A holds a claim on a study (so that the other node must
            # take it over when the claim's lease runs out), or soon after kill_at
            assert node_a.proc is not None
            a_procs = [node_a.proc.pid, *_descendants(node_a.proc.pid)]
            prefix = f"{socket.gethostname()}:{node_a.data_dir.resolve()}/"
            held: list[str] = []
            deadline = time.monotonic() + 20
            while not held and time.monotonic() < deadline and scu_a.poll() is None:
                held = [
                    s["study_uid"]
                    for s in j.studies(states=["assembled"])
                    if s["claimed_by"].startswith(prefix)
                ]
            for pid in a_procs:  # freeze the whole node, then kill it: no clean-up anywhere
                with contextlib.suppress(ProcessLookupError):
                    os.kill(pid, signal.SIGSTOP)
            for pid in a_procs:
                with contextlib.suppress(ProcessLookupError):
                    os.kill(pid, signal.SIGKILL)
            node_a.kill()
            killed_at = time.monotonic()
            out_a, _ = scu_a.communicate(timeout=60)
            out_b, _ = scu_b.communicate(timeout=300)
            acked_a, _ = acknowledged(out_a)
            acked_b, failed_b = acknowledged(out_b)
            assert not failed_b and len(acked_b) == len(to_b)
            assert len(acked_a) < len(to_a), "the kill did not fall inside the stream"
            acked = acked_a | acked_b
            studies = {_study_of(f) for f in acked}
            # every acknowledged study ends delivered, through the node that is left
            wait_for(
                lambda: all((j.study(s) or {}).get("state") == "delivered" for s in studies),
                lease + settle + 90,
                0.2,
            )
            took = time.monotonic() - killed_at
            objects = {o["sop_instance_uid"] for o in j.objects()}
            assert {sent[f] for f in acked} <= objects, "an acknowledged object was lost"
            assert held, "the killed node held no claim: nothing was taken over"
            per_study = Counter(r["study_uid"] for r in j.results())
            assert set(per_study.values()) == {1}, "a study with two result instances"
            expected = {r["result_uid"] for r in j.results()}
            at_pacs = Counter(
                wait_for(
                    lambda: (lambda x: x if set(x) >= expected else None)(pacs_uids(pacs_dir)),
                    60,
                )
            )
            assert set(at_pacs) == expected
            # the killed node's sender may have sent a result it had no time to record
            assert sum(c - 1 for c in at_pacs.values()) <= 2
            for study in held:  # taken over after the lease of the dead node's claim
                assert j.study(study)["state"] == "delivered"
            j.close()
            print(
                f"every acknowledged study delivered {took:.1f} s after the kill "
                f"({len(held)} held by the killed node)"
            )
            assert node_b.terminate() == 0
        finally:
            node_a.kill()
            node_b.kill()


@pytest.mark.external
@pytest.mark.skipif(SKIP_WITHOUT_DCMTK, reason=DCMTK_REASON)
@pytest.mark.parametrize("backend", ["sqlite", "postgresql"])
def test_concurrent_requeue_commands_requeue_each_failed_delivery_once(tmp_path, request, backend):
    pacs_port, pacs_dir = free_port(), tmp_path / "pacs"
    cfg = write_config(
        tmp_path / "node.toml",
        CONFIG.replace(
            "backoff_initial_seconds = 0.2", "max_attempts = 1\nbackoff_initial_seconds = 0.2"
        ),
    )
    args = ["--config", str(cfg), "--port", "0", "--settle-seconds", "0"]
    args += ["--forward", f"PACS@{LOOPBACK}:{pacs_port}"]
    queue = [sys.executable, "-m", "service.cli", "queue", "--data-dir", str(tmp_path / "data")]
    env = {**os.environ}
    if backend == "postgresql":
        url = request.getfixturevalue("pg_url")
        args += ["--journal", url]
        queue += ["--journal", url]
        env["PGPASSWORD"] = NODE_PASSWORD
    node = NodeProcess(tmp_path / "data", args, env={"PGPASSWORD": NODE_PASSWORD})
    studies = [echo_sr(f"requeue-{i}", patient_id=f"HV-Q-{i}") for i in range(8)]
    try:
        port = node.start(timeout=90)
        assert send(studies, port) == [0] * 8  # the PACS is down: every delivery fails
        reports = lambda: json.loads(  # noqa: E731
            subprocess.run(
                [*queue, "--json"], capture_output=True, text=True, env=env, timeout=60
            ).stdout
        )
        wait_for(lambda: len(reports()["deliveries_failed"]) == 8, 60, 0.5)
        # the node stops, so that only the four commands touch the deliveries; they run at
        # the same time (as administrators at two consoles could)
        assert node.terminate() == 0
        runs = [
            subprocess.Popen(
                [*queue, "--requeue-failed"], stdout=subprocess.PIPE, text=True, env=env
            )
            for _ in range(4)
        ]
        outputs = [r.communicate(timeout=120)[0] for r in runs]
        assert all(r.returncode == 0 for r in runs)
        counts = [
            int(line.split()[0])
            for out in outputs
            for line in out.splitlines()
            if "re-queued" in line
        ]
        assert sum(counts) == 8, outputs  # each failed delivery re-queued once
        assert len(reports()["deliveries_pending"]) == 8
        with storescp(pacs_dir, pacs_port):
            node.start(timeout=90)
            wait_for(lambda: len(set(pacs_uids(pacs_dir))) == 8, 60)
            assert len(pacs_uids(pacs_dir)) == 8  # one file per delivery: none went twice
            assert node.terminate() == 0
    finally:
        node.kill()

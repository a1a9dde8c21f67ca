"""The benchmark script runs end to end at a tiny size and prints its figures (it asserts
nothing about time: speed is reported by ``tests/bench/bench.py``, not tested)."""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import pytest
from netutil import DCMTK_REASON, REPO, SKIP_WITHOUT_DCMTK

BENCH = REPO / "tests" / "bench" / "bench.py"


def run_bench(tmp_path: Path, *args: str) -> tuple[subprocess.CompletedProcess[str], dict]:
    out = tmp_path / "figures.json"
    r = subprocess.run(
        [sys.executable, str(BENCH), "--json", str(out), "--work", str(tmp_path / "w"), *args],
        cwd=REPO,
        capture_output=True,
        text=True,
        timeout=600,
    )
    assert r.returncode == 0, r.stdout[-2000:] + r.stderr[-2000:]
    assert "Traceback" not in r.stderr
    return r, json.loads(out.read_text())


def test_offline_and_journal_sections(tmp_path):
    r, figures = run_bench(
        tmp_path,
        "--sections",
        "offline,summary,journal",
        "--n",
        "4",
        "--summary-n",
        "3",
        "--rounds",
        "1",
        "--journal-sizes",
        "50,200",
    )
    summary = figures["summary"]  # grade --pdf --out against grade --out, printed
    assert summary["n"] == 3 and summary["ratio_median"] > 0 and summary["cpu_ratio_median"] > 0
    assert "ratio" in r.stdout and "(target >= 0.5)" in r.stdout
    off = figures["offline"]
    assert off["n"] == 4 and off["grade_exit"] in (0, 1)
    assert off["grade_files_per_s"] > 0 and off["bare_pydicom_files_per_s"] > 0
    assert "files/s" in r.stdout
    journal = figures["journal"]
    assert set(journal["sizes"]) == {"50", "200"}
    # the statements the service runs, each with SQLite's plan
    plans = journal["plans"]
    assert any("FROM studies" in sql for sql in plans)
    assert any(line.startswith("SEARCH") for plan in plans.values() for line in plan)


@pytest.mark.network
@pytest.mark.external
@pytest.mark.skipif(SKIP_WITHOUT_DCMTK, reason=DCMTK_REASON)
def test_journals_and_nodes_sections(tmp_path):
    from pgutil import POSTGRESQL_REASON, SKIP_WITHOUT_POSTGRESQL

    if SKIP_WITHOUT_POSTGRESQL:
        pytest.skip(POSTGRESQL_REASON)
    r, figures = run_bench(tmp_path, "--sections", "journals,nodes", "--n", "4", "--rounds", "1")
    journals = figures["journals"]
    assert journals["sqlite_end_to_end"] > 0 and journals["postgresql_end_to_end"] > 0
    assert journals["delivered"] == 4  # every result at the PACS, on both journals
    nodes = figures["nodes"]
    assert nodes["one_node"] > 0 and nodes["two_nodes"] > 0 and nodes["delivered"] == 4
    # the same with each node held to a core of its own (where there are two cores)
    if len(os.sched_getaffinity(0)) >= 2:
        pinned = nodes["core_each"]
        assert pinned["one_node"] > 0 and pinned["two_nodes"] > 0 and pinned["delivered"] == 4
        assert "a core per node" in r.stdout
    assert "two / one" in r.stdout and "PostgreSQL / SQLite" in r.stdout


@pytest.mark.network
@pytest.mark.external
@pytest.mark.skipif(SKIP_WITHOUT_DCMTK, reason=DCMTK_REASON)
def test_receivers_latency_and_memory_sections(tmp_path):
    r, figures = run_bench(
        tmp_path,
        "--sections",
        "receivers,latency,sender,memory",
        "--n",
        "5",
        "--latency-n",
        "4",
        "--memory-at",
        "3,6",
        "--memory-batch",
        "3",
        "--rounds",
        "2",
    )
    rec = figures["receivers"]
    assert len(rec["rounds"]) == 2
    for key in ("pynetdicom_storescp", "pynetdicom_durable", "dcmtk_storescp"):
        assert rec[key] > 0, key
    assert rec["diastolic_sr_end_to_end"] > 0
    for one in rec["rounds"]:  # every role of the node was measured
        assert set(one["cpu_ms_per_study"]) == {
            "supervisor",
            "receiver",
            "grader",
            "spare grader",  # assembly.spare_workers, one by default
            "sender",
        }
        # the bare receiver's CPU per object (/proc ticks: 0 is possible over 5 objects)
        assert one["pynetdicom_storescp_cpu_ms"] >= 0
    assert rec["diastolic_sr_delivered"] + rec["diastolic_sr_failed"] >= 5
    lat = figures["latency"]
    assert lat["delivered"] == 4 and lat["p50_ms"] <= lat["p95_ms"] <= lat["p99_ms"]
    sender = figures["sender"]
    assert sender["n"] >= 1
    for key in ("store_scu", "pynetdicom_file"):
        assert sender[key]["objects_per_s"] > 0 and sender[key]["cpu_ms_per_object"] > 0
    mem = figures["memory"]["marks"]
    assert set(mem) == {"3", "6"} and all(v["rss_kib"] > 0 for v in mem.values())
    assert "objects/s" in r.stdout and "p95" in r.stdout


def _hot_path_statements(tmp_path: Path) -> dict[str, str]:
    """Every SQL statement one study's trip through the node runs (receive, claim, grade,
    deliver), captured from the journal's connection."""
    from service.store.journal import NewResult
    from service.store.sqlite_journal import SqliteJournal

    j = SqliteJournal(tmp_path / "journal.sqlite3")
    seen: dict[str, str] = {}

    def trace(sql: str) -> None:
        head = sql.lstrip().split(" ", 1)[0].upper()
        if head in ("SELECT", "UPDATE", "INSERT", "DELETE"):
            seen.setdefault(" ".join(sql.split()), sql)

    j._db.set_trace_callback(trace)
    j.store_object(
        sop_instance_uid="2.25.11",
        study_uid="2.25.1",
        sop_class_uid="1.2.840.10008.5.1.4.1.1.88.33",
        transfer_syntax="1.2.840.10008.1.2.1",
        calling_ae="SCANNER1",
        data=b"object",
        settle_seconds=0,
        now=1.0,
    )
    j.next_due_at()
    (claim,) = j.claim_due(now=2.0, owner="node/grader-1/1", lease_seconds=30)
    j.renew_leases("node/grader-1/1", now=2.5)
    result = NewResult(
        result_uid="2.25.19",
        series_uid="2.25.18",
        sop_class_uid="1.2.840.10008.5.1.4.1.1.88.33",
        data=b"result",
        status="graded",
        guideline="ase-eacvi-2016",
        grade="normal",
        filling_pressure="normal",
        sources=("2.25.11",),
        predecessors=(),
    )
    j.finish_grading(claim, result=result, destinations=[("PACS", "PACS@127.0.0.1:1")], now=3.0)
    j.next_delivery_at()
    j.due_destinations(now=4.0)
    j.next_delivery_at(destination="PACS")
    for d in j.claim_deliveries("PACS", owner="node/sender/2", now=4.0):
        j.renew_leases("node/sender/2", now=4.5)
        j.mark_delivered(d.id, now=5.0)
    j._db.set_trace_callback(None)
    plans = {}
    for key, sql in seen.items():
        rows = j._db.execute("EXPLAIN QUERY PLAN " + sql).fetchall()
        plans[key] = [str(r[-1]) for r in rows]
    j.close()
    return plans


def test_every_lookup_on_a_studys_way_through_the_node_is_indexed(tmp_path):
    """No statement of the hot path reads a whole table (SQLite EXPLAIN QUERY PLAN 'SCAN'),
    so the journal's query times stay flat as it grows.  (Start, stop and the queue command
    count by state over whole tables; they are not on the hot path.)"""
    plans = _hot_path_statements(tmp_path)
    assert any("FROM deliveries" in sql for sql in plans)  # the delivery lookups were seen
    scans = {sql: plan for sql, plan in plans.items() if any(p.startswith("SCAN") for p in plan)}
    assert not scans, scans

"""The benchmark script runs end to end at a tiny size and prints its figures (it asserts
nothing about time: speed is reported by ``tests/bench/bench.py``, not tested)."""

from __future__ import annotations

import json
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
        tmp_path, "--sections", "offline,journal", "--n", "4", "--journal-sizes", "50,200"
    )
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
def test_receivers_latency_and_memory_sections(tmp_path):
    r, figures = run_bench(
        tmp_path,
        "--sections",
        "receivers,latency,memory",
        "--n",
        "5",
        "--latency-n",
        "4",
        "--memory-at",
        "3,6",
        "--memory-batch",
        "3",
    )
    rec = figures["receivers"]
    for key in ("pynetdicom_storescp", "dcmtk_storescp", "diastolic_sr_end_to_end"):
        assert rec[key] > 0, key
    assert rec["diastolic_sr_delivered"] + rec["diastolic_sr_failed"] >= 5
    lat = figures["latency"]
    assert lat["delivered"] == 4 and lat["p50_ms"] <= lat["p95_ms"] <= lat["p99_ms"]
    mem = figures["memory"]["marks"]
    assert set(mem) == {"3", "6"} and all(v["rss_kib"] > 0 for v in mem.values())
    assert "objects/s" in r.stdout and "p95" in r.stdout

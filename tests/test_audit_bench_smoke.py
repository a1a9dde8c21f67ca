"""The audit benchmark runs end to end at a tiny size and prints its figures (speed is reported
by ``tests/bench/audit_bench.py``, never asserted)."""

from __future__ import annotations

import json
import subprocess
import sys

from netutil import REPO

BENCH = REPO / "tests" / "bench" / "audit_bench.py"


def test_audit_bench_prints_its_figures(tmp_path):
    out = tmp_path / "figures.json"
    r = subprocess.run(
        [sys.executable, str(BENCH), "--studies", "300", "--pool", "12", "--json", str(out)],
        cwd=REPO,
        capture_output=True,
        text=True,
        timeout=600,
    )
    assert r.returncode == 0, r.stdout[-2000:] + r.stderr[-2000:]
    figures = json.loads(out.read_text())
    assert figures["studies"] == 300
    assert 0 < figures["assessed"] <= 300
    for key in ("read_rows_seconds", "figures_seconds", "html_seconds", "command_seconds"):
        assert figures[key] > 0 and key in r.stdout
    assert figures["command_peak_rss_mib"] > 10

"""The backfill benchmark runs end to end at a tiny size and prints its figures; it asserts
what the benchmark itself checks (every study graded once, one result per study in Orthanc, a
second run that adds nothing), never a time."""

from __future__ import annotations

import json
import subprocess
import sys

import pytest
from netutil import REPO
from orthancutil import ORTHANC_REASON, SKIP_WITHOUT_ORTHANC

BENCH = REPO / "tests" / "bench" / "bench_backfill.py"


@pytest.mark.network
@pytest.mark.external
@pytest.mark.skipif(SKIP_WITHOUT_ORTHANC, reason=ORTHANC_REASON)
def test_backfill_bench_over_dimse_and_dicomweb(tmp_path):
    out = tmp_path / "figures.json"
    r = subprocess.run(
        [sys.executable, str(BENCH), "--n", "3", "--json", str(out), "--work", str(tmp_path / "w")],
        cwd=REPO,
        capture_output=True,
        text=True,
        timeout=600,
    )
    assert r.returncode == 0, r.stdout[-2000:] + r.stderr[-2000:]
    assert "studies/s" in r.stdout
    figures = json.loads(out.read_text())
    for protocol in ("dimse", "dicomweb"):
        f = figures[protocol]
        assert (f["found"], f["graded"], f["delivered"], f["failed"]) == (3, 3, 3, [])
        assert f["journal"]["studies_with_results"] == 3
        assert f["journal"]["max_results_per_study"] == 1
        assert f["journal"]["max_times_received"] == 1
        assert f["orthanc_after_first"]["instances_per_study"] == [2]  # source + one result
        assert (f["second_run_graded"], f["second_run_skipped"]) == (0, 3)
        assert f["orthanc_after_second"]["instances"] == f["orthanc_after_first"]["instances"]
        assert f["studies_per_s"] > 0

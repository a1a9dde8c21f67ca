"""diastolic-sr backfill benchmark: prints figures, asserts nothing about time.

Run from the repository root (the venv active, Orthanc and its DICOMweb plugin installed)::

    python tests/bench/bench_backfill.py               # N = 200 studies per protocol
    python tests/bench/bench_backfill.py --n 50 --json figures.json

What it does: starts Orthanc (Debian, with its DICOMweb plugin) on loopback ports, stores 2 x N
invented echo SR studies in it (the benchmark load of ``load.py``, one SR each, half of them
dated one day and half the next), then runs ``diastolic-sr backfill`` as an operator would
(a subprocess, a fresh data directory each):

* over DIMSE: ``--source AET@HOST:PORT`` (C-FIND, C-GET), results sent back by C-STORE
  (``--forward``);
* over DICOMweb: ``--source http://.../dicom-web`` (QIDO-RS, WADO-RS), results sent back by
  STOW-RS (a DICOMweb destination in a configuration file);

then runs each a second time.  It reports studies/s of each run (studies found / wall time
of the command, which includes starting the node's grading processes and the settle window
of the last study, ``--settle-seconds``), and checks what the issue asks: every study graded
exactly once (one result per study in the journal, every object received once), one result per
study in Orthanc, and a second run that adds nothing (no study graded, no new instance).
"""

from __future__ import annotations

import argparse
import json
import os
import random
import shutil
import subprocess
import sys
import tempfile
import time
from collections import Counter
from pathlib import Path
from typing import Any

HERE = Path(__file__).resolve().parent
REPO = HERE.parents[1]
sys.path[:0] = [str(HERE), str(REPO / "tests"), str(REPO)]

from load import bench_study  # noqa: E402
from orthancutil import Orthanc, have_orthanc  # noqa: E402

NODE_AE = "DIASTOLIC_SR"
DAYS = {"dimse": "20250301", "dicomweb": "20250302"}


def say(*parts: Any) -> None:
    print(*parts, flush=True)


def write_load(folder: Path, n: int, day: str, start: int) -> list[Path]:
    folder.mkdir(parents=True, exist_ok=True)
    rng = random.Random(2026 + start)
    paths = []
    for i in range(start, start + n):
        ds = bench_study(i, rng, run=f"backfill-{day}")
        ds.StudyDate = day
        p = folder / f"s{i:06d}.dcm"
        ds.save_as(p, enforce_file_format=True)
        paths.append(p)
    return paths


def backfill(args: list[str], data_dir: Path, config: Path | None) -> tuple[float, dict]:
    cmd = [
        sys.executable, "-m", "service.cli", "backfill", *args,
        "--data-dir", str(data_dir), "--json", "--settle-seconds", "1",
    ]  # fmt: skip
    if config is not None:
        cmd += ["--config", str(config)]
    started = time.monotonic()
    r = subprocess.run(cmd, cwd=REPO, capture_output=True, text=True, timeout=3600)
    elapsed = time.monotonic() - started
    if r.returncode != 0:
        raise SystemExit(f"backfill exited {r.returncode}:\n{r.stdout[-3000:]}\n{r.stderr[-3000:]}")
    return elapsed, json.loads(r.stdout)


def journal_check(data_dir: Path) -> dict[str, Any]:
    from service.store.journal import open_journal

    journal = open_journal(data_dir)
    try:
        per_study = Counter(r["study_uid"] for r in journal.results())
        objects = journal.objects()
        return {
            "studies_with_results": len(per_study),
            "max_results_per_study": max(per_study.values(), default=0),
            "objects": len(objects),
            "max_times_received": max((o["times_received"] for o in objects), default=0),
        }
    finally:
        journal.close()


def orthanc_check(orthanc: Orthanc, day: str) -> dict[str, Any]:
    found = orthanc.rest(
        "POST",
        "/tools/find",
        {"Level": "Instance", "Query": {"StudyDate": day}, "Expand": True},
        timeout=120,
    )
    by_study: Counter[str] = Counter()
    for inst in found or []:
        parent = orthanc.rest("GET", f"/instances/{inst['ID']}/study", timeout=30)
        by_study[parent["MainDicomTags"]["StudyInstanceUID"]] += 1
    return {
        "instances": len(found or []),
        "studies": len(by_study),
        "instances_per_study": sorted(set(by_study.values())),
    }


def run(n: int, work: Path) -> dict[str, Any]:
    orthanc = Orthanc(work / "orthanc", modalities={"node": (NODE_AE, 1)})
    orthanc.start()
    figures: dict[str, Any] = {"n": n, "cpus": os.cpu_count()}
    try:
        t = time.monotonic()
        for k, (_name, day) in enumerate(DAYS.items()):
            orthanc.upload(write_load(work / f"load-{day}", n, day, start=k * n))
        say(f"stored {2 * n} studies in Orthanc in {time.monotonic() - t:.1f} s")
        web_config = work / "stow.toml"
        web_config.write_text(
            f'[destinations.ORTHANC_WEB]\nurl = "{orthanc.dicomweb_url}"\n', encoding="utf-8"
        )
        sources = {
            "dimse": ([orthanc.source, "--forward", orthanc.source], None),
            "dicomweb": ([orthanc.dicomweb_url], web_config),
        }
        for name, (source_args, config) in sources.items():
            day = DAYS[name]
            when = ["--since", f"{day[:4]}-{day[4:6]}-{day[6:]}", "--until"]
            when.append(when[1])
            data_dir = work / f"data-{name}"
            args = ["--source", *source_args, *when]
            first_s, first = backfill(args, data_dir, config)
            before = orthanc_check(orthanc, day)
            second_s, second = backfill(args, data_dir, config)
            after = orthanc_check(orthanc, day)
            checks = journal_check(data_dir)
            figures[name] = {
                "first_run_seconds": round(first_s, 2),
                "studies_per_s": round(first["found"] / first_s, 2),
                "found": first["found"],
                "graded": first["graded"],
                "delivered": first["delivered"],
                "failed": first["failed"],
                "retries": first["retries"],
                "run_seconds": first["elapsed_seconds"],
                "retrieve_seconds": first["retrieve_seconds"],
                "second_run_seconds": round(second_s, 2),
                "second_run_graded": second["graded"],
                "second_run_skipped": second["skipped"],
                "second_run_objects": second["objects"],
                "journal": checks,
                "orthanc_after_first": before,
                "orthanc_after_second": after,
            }
            f = figures[name]
            say(
                f"{name:8s} {f['found']} studies in {first_s:.1f} s = {f['studies_per_s']} "
                f"studies/s (the run {f['run_seconds']:.1f} s, of which retrieving "
                f"{f['retrieve_seconds']:.1f} s); graded {f['graded']}, delivered "
                f"{f['delivered']}, failed "
                f"{len(f['failed'])}, queries asked again {f['retries']}; journal: "
                f"{checks['studies_with_results']} studies with a result, at most "
                f"{checks['max_results_per_study']} per study, objects received "
                f"at most {checks['max_times_received']} time(s); Orthanc: "
                f"{before['instances']} instances in {before['studies']} studies "
                f"({before['instances_per_study']} per study); second run {second_s:.1f} s: "
                f"graded {second['graded']}, skipped {second['skipped']}, Orthanc "
                f"{after['instances']} instances"
            )
    finally:
        orthanc.stop()
    return figures


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawTextHelpFormatter)
    p.add_argument("--n", type=int, default=200, help="studies per protocol (default 200)")
    p.add_argument("--json", type=Path, help="write the figures to this JSON file")
    p.add_argument("--keep", action="store_true", help="keep the work folder")
    p.add_argument("--work", type=Path, help="work folder (default: a new temporary one)")
    args = p.parse_args(argv)
    if not have_orthanc():
        print("Orthanc with its DICOMweb plugin missing (Debian orthanc, orthanc-dicomweb)")
        return 2
    work = args.work or Path(tempfile.mkdtemp(prefix="diastolic-sr-bench-backfill-"))
    work.mkdir(parents=True, exist_ok=True)
    say(f"diastolic-sr backfill benchmark; {os.cpu_count()} CPUs; work folder {work}")
    try:
        figures = run(args.n, work)
        if args.json:
            args.json.write_text(json.dumps(figures, indent=2, default=str))
    finally:
        if not args.keep and args.work is None:
            shutil.rmtree(work, ignore_errors=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())

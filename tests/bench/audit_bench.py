"""The audit on a large journal: prints figures, asserts nothing about time.

Run from the repository root (the venv active)::

    python tests/bench/audit_bench.py                     # 100 000 studies
    python tests/bench/audit_bench.py --studies 10000 --json figures.json

What it does: grades a pool of invented studies (fictional Harbour Vale Cardiac Centre, three
scanners, the demo history) with the real pipeline to get realistic audit facts, then records
``--studies`` studies in a fresh journal through the journal's own audit statement (facts drawn
from the pool, devices and times spread over a year, some delivered late, some failed), and
times each step of the audit on it:

* reading the audit rows of the period from the journal,
* computing the figures (``build_report``),
* the JSON document,
* the charts and the HTML page,
* the PDF,
* the whole ``diastolic-sr audit --html --json`` command in a new process (imports included),

with the peak resident memory of that process.  The rows are read a page at a time, so that
memory does not grow with the number of studies.
"""

from __future__ import annotations

import argparse
import json
import random
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

HERE = Path(__file__).resolve().parent
REPO = HERE.parents[1]
sys.path[:0] = [str(REPO)]

DAY = 86400.0


def _pool(size: int, seed: int) -> list[Any]:
    """Audit facts of ``size`` invented studies graded by the real pipeline."""
    from service.audit.facts import study_facts
    from service.demo.history import invented_studies
    from service.demo.scenario import SITE_MAPPING
    from service.pipeline import GradeOptions, grade_study
    from service.vocabulary.mapper import load_mapping_table

    table = load_mapping_table([SITE_MAPPING])
    out = []
    for h in invented_studies(size, days=30, seed=seed):
        options = GradeOptions(context=h.context)
        outcome = grade_study([h.dataset], options, table=table)
        out.append(study_facts(outcome, [h.dataset], options, calling_ae=h.scanner.calling_ae))
    return out


def fill(journal_file: Path, studies: int, pool: list[Any], *, now: float, seed: int) -> float:
    """Record ``studies`` studies' audit rows in one transaction; returns seconds taken."""
    from service.store.sqlite_journal import SqliteJournal

    rng = random.Random(seed)
    journal = SqliteJournal(journal_file)
    started = time.perf_counter()
    try:
        with journal._tx(durable=False) as db:
            for n in range(studies):
                facts = rng.choice(pool)
                graded = now - rng.random() * 365 * DAY
                failure = ""
                if facts.outcome is None:
                    failure = f"{facts.status}: {facts.reason}"
                journal._audit_graded(
                    db,
                    f"2.25.{seed}{n:09d}",
                    facts,
                    calling_ae=facts.device.calling_ae,
                    failure=failure,
                    now=graded,
                    last_received_at=None,  # set for every row below
                )
            db.execute(
                "UPDATE audit_studies SET last_received_at = graded_at - 10.1, "
                "delivered_at = CASE WHEN outcome IS NULL THEN NULL "
                "WHEN abs(random()) % 100 = 0 THEN NULL "
                "WHEN abs(random()) % 50 = 0 THEN graded_at + 3600 "
                "ELSE graded_at + (abs(random()) % 400) / 1000.0 END"
            )
            db.execute(
                "UPDATE audit_studies SET failure = 'delivery to PACS: gave up after 10 "
                "attempts: cannot connect to PACS@10.20.0.5:104: Connection refused' "
                "WHERE delivered_at IS NULL AND outcome IS NOT NULL"
            )
    finally:
        journal.close()
    return time.perf_counter() - started


def _timed(fn: Any) -> tuple[Any, float]:
    started = time.perf_counter()
    value = fn()
    return value, time.perf_counter() - started


def _command(data_dir: Path, page: Path) -> tuple[float, int]:
    """Seconds and peak resident memory (KiB) of ``diastolic-sr audit --html --json`` in a
    new process.  GNU time measures the memory where it is installed (a process started from
    this one would count the pages it shares with this one before exec); else the command
    reports its own high-water mark, an upper bound."""
    args = ["audit", "--data-dir", str(data_dir), "--html", str(page), "--json"]
    gnu_time = Path("/usr/bin/time")
    if gnu_time.exists():
        command = [str(gnu_time), "-f", "%M", sys.executable, "-m", "service.cli", *args]
    else:
        command = [
            sys.executable,
            "-c",
            "import resource, sys\n"
            "from service.cli import main\n"
            "code = main(sys.argv[1:])\n"
            "print(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss, file=sys.stderr)\n"
            "sys.exit(code)",
            *args,
        ]
    started = time.perf_counter()
    proc = subprocess.run(command, cwd=REPO, capture_output=True, text=True, check=False)
    seconds = time.perf_counter() - started
    if proc.returncode != 0:
        raise SystemExit(f"audit command failed: {proc.stderr}")
    return seconds, int(proc.stderr.strip().splitlines()[-1])


def run(studies: int, work: Path, *, pool_size: int, seed: int) -> dict[str, Any]:
    from service.audit.pdf import audit_pdf
    from service.audit.render import audit_html
    from service.audit.report import build_report, report_json
    from service.store.sqlite_journal import SqliteJournal

    data_dir = work / "node"
    data_dir.mkdir(parents=True, exist_ok=True)
    journal_file = data_dir / "journal.sqlite3"
    now = time.time()
    pool, pool_s = _timed(lambda: _pool(pool_size, seed))
    fill_s = fill(journal_file, studies, pool, now=now, seed=seed)
    journal = SqliteJournal(journal_file)
    try:
        rows, read_s = _timed(lambda: journal.audit_rows(now - 366 * DAY, None))
    finally:
        journal.close()
    report, report_s = _timed(lambda: build_report(rows, since=now - 366 * DAY, now=now))
    document, json_s = _timed(lambda: json.dumps(report_json(report)))
    html, html_s = _timed(lambda: audit_html(report))
    _, pdf_s = _timed(lambda: audit_pdf(report, work / "audit.pdf"))
    page = work / "audit.html"
    cli_s, peak_kib = _command(data_dir, page)
    return {
        "studies": studies,
        "assessed": report.studies,
        "journal_mib": round(journal_file.stat().st_size / 2**20, 1),
        "pool_graded": pool_size,
        "pool_seconds": round(pool_s, 2),
        "fill_seconds": round(fill_s, 2),
        "read_rows_seconds": round(read_s, 3),
        "figures_seconds": round(report_s, 3),
        "json_seconds": round(json_s, 3),
        "json_kib": round(len(document) / 1024, 1),
        "html_seconds": round(html_s, 3),
        "html_kib": round(len(html.encode()) / 1024, 1),
        "pdf_seconds": round(pdf_s, 3),
        "command_seconds": round(cli_s, 2),
        "command_peak_rss_mib": round(peak_kib / 1024, 1),
    }


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    p.add_argument("--studies", type=int, default=100_000, help="studies in the journal")
    p.add_argument("--pool", type=int, default=300, help="invented studies graded for facts")
    p.add_argument("--seed", type=int, default=17)
    p.add_argument("--json", type=Path, help="also write the figures to this file")
    p.add_argument("--work", type=Path, help="work folder (default: a temporary one)")
    args = p.parse_args(argv)
    work = args.work or Path(tempfile.mkdtemp(prefix="diastolic-sr-audit-bench-"))
    try:
        figures = run(args.studies, work, pool_size=args.pool, seed=args.seed)
    finally:
        if args.work is None:
            shutil.rmtree(work, ignore_errors=True)
    width = max(len(k) for k in figures)
    for key, value in figures.items():
        print(f"{key:<{width}}  {value}")
    if args.json:
        args.json.write_text(json.dumps(figures, indent=2))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())

"""``diastolic-sr grade``: grade SR files offline, write result SRs, print a table or JSON lines."""

from __future__ import annotations

import argparse
import json
import multiprocessing
import os
import sys
from collections.abc import Iterator
from concurrent.futures import ProcessPoolExecutor
from pathlib import Path
from typing import Any, NamedTuple

from service.commands.columns import print_columns
from service.model import CAUTION, Measure
from service.options import add_grading_arguments, grade_options_from_args
from service.pipeline import GradeOptions, GradeStatus, StudyOutcome, grade_study
from service.sr.encode import file_bytes
from service.wording import headline, measure_name


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser(
        "grade",
        help="grade echo measurement SR files (no network)",
        description="Grade LV diastolic function from echo measurement SR files. PATH may be "
        "files or folders (searched recursively). One result SR is written per graded source "
        "when --out is given.",
    )
    p.add_argument("paths", nargs="+", metavar="PATH", help="SR file or folder")
    p.add_argument("--out", type=Path, metavar="DIR", help="write result SRs into DIR")
    p.add_argument("--json", action="store_true", help="one JSON object per input, per line")
    p.add_argument(
        "--pdf",
        action="store_true",
        help="also write a one-page summary (DICOM Encapsulated PDF) beside each result SR",
    )
    p.add_argument("--page-size", choices=("A4", "Letter"), default="A4", help="summary page")
    p.add_argument(
        "--jobs",
        type=int,
        default=0,
        metavar="N",
        help="grade N files at a time in worker processes (default: one per core)",
    )
    add_grading_arguments(p)
    p.set_defaults(func=run)


def iter_inputs(paths: list[str]) -> Iterator[Path]:
    """Files in the order given; folders searched recursively in sorted order."""
    for raw in paths:
        path = Path(raw)
        if path.is_dir():
            for root, dirs, files in os.walk(path):
                dirs.sort()
                for name in sorted(files):
                    yield Path(root) / name
        else:
            yield path


class _Job(NamedTuple):
    """What every file of one run is graded with (inherited by worker processes)."""

    options: GradeOptions
    table: Any
    out_dir: Path | None
    pdf: bool
    page_size: str
    json_lines: bool = False  # the run prints JSON lines (made by the workers)


class _Graded(NamedTuple):
    """One graded file as handed back: its row, or (JSON mode) only its status and JSON line,
    so that the workers, not the printing process, turn rows into text."""

    rejected: bool
    row: dict | None
    line: str | None


def _json_line(row: dict) -> str:
    return json.dumps(row, ensure_ascii=False)


def _graded_file(path: Path, job: _Job) -> _Graded:
    row = grade_one(path, job)
    rejected = row["status"] == GradeStatus.rejected.value
    if job.json_lines:
        return _Graded(rejected, None, _json_line(row))
    return _Graded(rejected, row, None)


_WORKER_JOB: _Job | None = None


def _init_worker(job: _Job) -> None:
    global _WORKER_JOB
    _WORKER_JOB = job


def _grade_in_worker(path: Path) -> _Graded:
    assert _WORKER_JOB is not None
    return _graded_file(path, _WORKER_JOB)


def run(args: argparse.Namespace) -> int:
    from service.errors import UserError
    from service.vocabulary.mapper import load_mapping_table

    options = grade_options_from_args(args)
    if args.pdf and not args.out:
        raise UserError("--pdf writes files: give --out DIR as well")
    if args.jobs < 0:
        raise UserError(f"--jobs {args.jobs}: give a number of worker processes, 1 or more")
    job = _Job(
        options=options,
        table=load_mapping_table(args.mapping or ()),
        out_dir=args.out,
        pdf=args.pdf,
        page_size=args.page_size,
        json_lines=args.json,
    )
    if args.out:
        args.out.mkdir(parents=True, exist_ok=True)
    paths = list(iter_inputs(args.paths))
    if not paths:
        print("diastolic-sr: no input files found", file=sys.stderr)
        return 1
    rows: list[dict[str, Any]] = []
    any_rejected = False
    for done in _graded(paths, job, args.jobs or os.cpu_count() or 1):
        any_rejected |= done.rejected
        if done.line is not None:
            print(done.line, flush=True)
        elif done.row is not None:
            rows.append(done.row)
    if not args.json:
        print_table(rows)
    return 1 if any_rejected else 0


def _graded(paths: list[Path], job: _Job, jobs: int) -> Iterator[_Graded]:
    """Results in input order; several files at a time in worker processes when asked (each
    worker inherits the loaded mapping table; results are written by the workers)."""
    jobs = min(jobs, len(paths))
    if jobs <= 1 or "fork" not in multiprocessing.get_all_start_methods():
        yield from (_graded_file(p, job) for p in paths)
        return
    context = multiprocessing.get_context("fork")
    # files go to the workers in small batches (one round trip per batch, not per file) while
    # keeping the batches small enough that both workers stay busy to the end
    chunk = max(1, min(8, len(paths) // (jobs * 8)))
    with ProcessPoolExecutor(
        jobs, mp_context=context, initializer=_init_worker, initargs=(job,)
    ) as pool:
        yield from pool.map(_grade_in_worker, paths, chunksize=chunk)


def grade_one(path: Path, job: _Job) -> dict:
    """Grade one file; never raises (an unexpected failure is a rejected row with its reason)."""
    try:
        return _grade_file(path, job)
    except Exception as exc:  # the run goes on with the next file
        return rejected_row(
            path, job.options, f"internal error while grading: {type(exc).__name__}: {exc}"
        )


def _grade_file(path: Path, job: _Job) -> dict:
    from service.errors import RejectedInput
    from service.sr.read import load_path

    options, out_dir = job.options, job.out_dir
    try:
        ds = load_path(path)
    except RejectedInput as exc:
        return rejected_row(path, options, str(exc))
    # the content tree is read once, by grade_study (a content-tree rejection there gives the
    # same row as read_path's would)
    outcome = grade_study([ds], options, table=job.table)
    if outcome.status is GradeStatus.rejected:
        return rejected_row(path, options, outcome.reason, outcome)
    output = None
    if out_dir is not None and outcome.result is not None:
        target = out_dir / f"{path.stem}.result.dcm"
        target.write_bytes(file_bytes(outcome.result))
        output = str(target)
    row = outcome_row(path, options, outcome, output)
    if job.pdf and out_dir is not None:
        from service.pipeline import build_summary

        summary = build_summary(outcome, [ds], page_size=job.page_size, uid_root=options.uid_root)
        if summary is not None:
            target = out_dir / f"{path.stem}.summary.dcm"
            target.write_bytes(file_bytes(summary))
            row["summary"] = str(target)
    return row


def rejected_row(
    path: Path, options: GradeOptions, reason: str, outcome: StudyOutcome | None = None
) -> dict:
    row = empty_row(path, options)
    row.update(status=GradeStatus.rejected.value, reason=reason)
    if outcome is not None and outcome.measurements is not None:
        row["excluded"] = [e.model_dump(mode="json") for e in outcome.measurements.excluded]
    return row


def empty_row(path: Path, options: GradeOptions) -> dict:
    return {
        "input": str(path),
        "status": None,
        "reason": None,
        "guideline": options.guideline.value,
        "outcome": None,
        "conclusion": None,
        "pathway": None,
        "grade": None,
        "filling_pressure": None,
        "borderline": [],
        "measurements": {},
        "criteria": [],
        "notes": [],
        "output": None,
        "caution": CAUTION,
    }


def outcome_row(path: Path, options: GradeOptions, outcome: StudyOutcome, output: str | None):
    a = outcome.assessment
    m = outcome.measurements
    assert a is not None and m is not None
    row = empty_row(path, options)
    row.update(
        status=outcome.status.value,
        reason=outcome.reason or None,
        guideline=a.guideline.value,
        outcome=a.outcome.value,
        conclusion=headline(a),
        pathway=a.pathway.value,
        pathway_reason=a.pathway_reason,
        grade=a.grade.value,
        filling_pressure=a.filling_pressure.value,
        rhythm=a.rhythm.value,
        borderline=[b.model_dump(mode="json") for b in a.borderline],
        readings=[r.model_dump(mode="json") for r in a.readings],
        measurements={
            name.value: {
                "value": mv.value,
                "unit": mv.unit,
                "origin": mv.origin.value,
                "n": mv.n,
                "detail": mv.detail,
            }
            for name, mv in m.values.items()
        },
        criteria=[c.model_dump(mode="json") for c in a.criteria],
        reasoning=list(a.reasoning),
        notes=list(a.notes) + list(m.notes),
        excluded=[e.model_dump(mode="json") for e in m.excluded],
        output=output,
        result_uid=outcome.result_uid,
        caution=a.caution,
    )
    if outcome.assessments and outcome.assessments.others:
        row["compared"] = [
            {
                "guideline": o.guideline.value,
                "outcome": o.outcome.value,
                "conclusion": headline(o),
                "pathway": o.pathway.value,
                "grade": o.grade.value,
                "filling_pressure": o.filling_pressure.value,
            }
            for o in outcome.assessments.others
        ]
        row["disagreements"] = list(outcome.assessments.disagreements)
    return row


def table_note(row: dict) -> str:
    """The last column: the conclusion as the result SR and the summary say it (and the
    borderline measures by their clinical names), or the reason a file was rejected."""
    if not row.get("conclusion"):
        return row.get("reason") or ""
    note = row["conclusion"]
    if row.get("borderline"):
        names = ", ".join(
            dict.fromkeys(measure_name(Measure(b["measure"])) for b in row["borderline"])
        )
        note += f" Borderline: {names}."
    return note


def print_table(rows: list[dict]) -> None:
    headers = ("input", "status", "outcome", "filling pressure", "conclusion")
    table = []
    for r in rows:
        table.append(
            (
                r["input"],
                r["status"] or "",
                r["outcome"] or "-",
                r["filling_pressure"] or "-",
                table_note(r),
            )
        )
    print_columns(headers, table, pad_last=False)  # the conclusion column is free text
    print()
    print(CAUTION)

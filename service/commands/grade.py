"""``diastolic-sr grade``: grade SR files offline, write result SRs, print a table or JSON lines."""

from __future__ import annotations

import argparse
import json
import os
import sys
from collections.abc import Iterator
from pathlib import Path
from typing import Any

from service.model import CAUTION
from service.options import add_grading_arguments, grade_options_from_args
from service.pipeline import GradeOptions, GradeStatus, StudyOutcome, grade_study


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


def run(args: argparse.Namespace) -> int:
    from service.errors import UserError
    from service.sr.read import read_path
    from service.vocabulary.mapper import load_mapping_table

    options = grade_options_from_args(args)
    if args.pdf and not args.out:
        raise UserError("--pdf writes files: give --out DIR as well")
    table = load_mapping_table(args.mapping or ())
    if args.out:
        args.out.mkdir(parents=True, exist_ok=True)
    rows: list[dict[str, Any]] = []
    any_rejected = False
    for path in iter_inputs(args.paths):
        row = grade_one(path, options, table, args.out, read_path, args)
        any_rejected |= row["status"] == GradeStatus.rejected.value
        rows.append(row)
        if args.json:
            print(json.dumps(row, ensure_ascii=False), flush=True)
    if not rows:
        print("diastolic-sr: no input files found", file=sys.stderr)
        return 1
    if not args.json:
        print_table(rows)
    return 1 if any_rejected else 0


def grade_one(
    path: Path, options: GradeOptions, table, out_dir: Path | None, read_path, args
) -> dict:
    from service.errors import RejectedInput

    try:
        ds, _ = read_path(path)
    except RejectedInput as exc:
        return rejected_row(path, options, str(exc))
    outcome = grade_study([ds], options, table=table)
    if outcome.status is GradeStatus.rejected:
        return rejected_row(path, options, outcome.reason, outcome)
    output = None
    if out_dir is not None and outcome.result is not None:
        target = out_dir / f"{path.stem}.result.dcm"
        outcome.result.save_as(target, enforce_file_format=True)
        output = str(target)
    row = outcome_row(path, options, outcome, output)
    if getattr(args, "pdf", False) and out_dir is not None:
        from service.pipeline import build_summary

        summary = build_summary(outcome, [ds], page_size=args.page_size, uid_root=options.uid_root)
        if summary is not None:
            target = out_dir / f"{path.stem}.summary.dcm"
            summary.save_as(target, enforce_file_format=True)
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
        pathway=a.pathway.value,
        pathway_reason=a.pathway_reason,
        grade=a.grade.value,
        filling_pressure=a.filling_pressure.value,
        rhythm=a.rhythm.value,
        borderline=[b.model_dump(mode="json") for b in a.borderline],
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
                "pathway": o.pathway.value,
                "grade": o.grade.value,
                "filling_pressure": o.filling_pressure.value,
            }
            for o in outcome.assessments.others
        ]
        row["disagreements"] = list(outcome.assessments.disagreements)
    return row


def print_table(rows: list[dict]) -> None:
    headers = ("input", "status", "grade", "filling pressure", "pathway", "note")
    table = []
    for r in rows:
        note = r.get("reason") or ""
        if r.get("borderline"):
            note = "borderline: " + ", ".join(b["measure"] for b in r["borderline"])
        table.append(
            (
                r["input"],
                r["status"] or "",
                r["grade"] or "-",
                r["filling_pressure"] or "-",
                r["pathway"] or "-",
                note,
            )
        )
    widths = [max(len(h), *(len(str(t[i])) for t in table)) for i, h in enumerate(headers)]
    widths[-1] = len(headers[-1])  # the note column is not padded
    line = "  ".join(h.ljust(w) for h, w in zip(headers, widths, strict=True))
    print(line.rstrip())
    print("  ".join("-" * w for w in widths))
    for t in table:
        print("  ".join(str(v).ljust(w) for v, w in zip(t, widths, strict=True)).rstrip())
    print()
    print(CAUTION)

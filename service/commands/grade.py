"""``diastolic-sr grade``: grade SR files offline, write result SRs, print a table or JSON lines."""

from __future__ import annotations

import argparse
import json
import multiprocessing
import os
import stat
import sys
from collections.abc import Iterator, Sequence
from concurrent.futures import ProcessPoolExecutor
from pathlib import Path, PurePath
from typing import Any, NamedTuple

from pydicom import Dataset

from service.commands.columns import print_columns
from service.model import CAUTION, Measure
from service.options import add_grading_arguments, grade_options_from_args
from service.pipeline import GradeOptions, GradeStatus, StudyOutcome, grade_study
from service.sr.encode import file_bytes
from service.wording import borderline_words, headline


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser(
        "grade",
        help="grade echo measurement SR files (no network)",
        description="Grade LV diastolic function from echo measurement SR files. PATH may be "
        "files or folders (searched recursively; a DICOMDIR's referenced files are followed). "
        "Files of one study (Study Instance UID) are graded together, as the node grades "
        "them; one result SR is written per study when --out is given. Results this "
        "software wrote are skipped, never graded again.",
    )
    p.add_argument("paths", nargs="+", metavar="PATH", help="SR file or folder")
    p.add_argument(
        "--out",
        type=Path,
        metavar="DIR",
        help="write result SRs into DIR, at each input's path inside the folder given "
        "(NAME.result.dcm; NAME.2.result.dcm, ... when a name is already taken in the run)",
    )
    p.add_argument(
        "--per-file",
        action="store_true",
        help="grade each file alone instead of grading the files of one study together "
        "(as the node does)",
    )
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


#: Media Storage Directory Storage (PS3.4 Annex F.1; PS3.10 8.6): a DICOMDIR
MEDIA_DIRECTORY = "1.2.840.10008.1.3.10"
_LAST_HEADER_TAG = 0x0020000D  # Study Instance UID: the last attribute the scan reads


class _Entry(NamedTuple):
    """One input file and the command-line argument it was found under."""

    path: Path
    root: Path  # the folder argument it was found in, or the file argument itself


def name_order(name: str) -> tuple[str, str]:
    """Sort key of one file or folder name: the name without its extension, then the
    extension, so that a name comes before the same name with more added ("two-reports.dcm"
    before "two-reports-part2.dcm", as a person lists them; a plain string sort puts "-"
    before ".")."""
    pure = PurePath(name)
    return pure.stem, pure.suffix


def path_order(path: Path) -> tuple[tuple[str, str], ...]:
    """Sort key of a path: folder by folder, each name by :func:`name_order`."""
    return tuple(name_order(part) for part in path.parts)


def iter_inputs(paths: list[str]) -> Iterator[_Entry]:
    """Files in the order given; folders searched recursively in path order
    (:func:`path_order`)."""
    for raw in paths:
        path = Path(raw)
        if path.is_dir():
            for root, dirs, files in os.walk(path):
                dirs.sort(key=name_order)
                for name in sorted(files, key=name_order):
                    yield _Entry(Path(root) / name, path)
        else:
            yield _Entry(path, path)


def not_regular(path: Path) -> str | None:
    """What a path is when it is neither a regular file nor missing (a missing file is reported
    by the reader); reading a named pipe, socket or device could block forever."""
    try:
        mode = path.stat().st_mode
    except OSError:
        return None
    if stat.S_ISREG(mode):
        return None
    kinds = (
        (stat.S_ISFIFO, "a named pipe"),
        (stat.S_ISSOCK, "a socket"),
        (stat.S_ISCHR, "a character device"),
        (stat.S_ISBLK, "a block device"),
        (stat.S_ISDIR, "a folder"),
    )
    kind = next((name for test, name in kinds if test(mode)), "not a regular file")
    return f"{kind}, not a regular file: not read"


def _header(path: Path) -> tuple[str, str] | None:
    """(Media Storage SOP Class UID, Study Instance UID) from the start of a DICOM file, None
    when it cannot be read that far (the reader reports why when the file is graded)."""
    import pydicom.filereader

    try:
        with open(path, "rb") as fh:
            ds = pydicom.filereader.read_partial(
                fh, stop_when=lambda tag, vr, length: tag > _LAST_HEADER_TAG
            )
            meta = getattr(ds, "file_meta", None)
            sop_class = str(meta.get("MediaStorageSOPClassUID", "")) if meta else ""
            study = str(ds.get("StudyInstanceUID", "") or "")
    except Exception:
        return None
    return sop_class, study


def _media_directory(path: Path) -> tuple[list[Path], str]:
    """The files a DICOMDIR references (pydicom's FileSet, PS3.10 8.6), and the line that
    says so; ([], reason) when it cannot be read."""
    from pydicom.fileset import FileSet

    try:
        files = [Path(instance.path) for instance in FileSet(path)]
    except Exception as exc:
        return [], f"media directory (DICOMDIR) that cannot be read ({type(exc).__name__})"
    return files, (
        f"media directory (DICOMDIR): its {len(files)} referenced "
        f"file{'' if len(files) == 1 else 's'} are graded, not the directory itself"
    )


class _Unit(NamedTuple):
    """What one worker call does: grade the files of one study together (or one file with
    --per-file), or hand back rows already made (inputs that are not read)."""

    files: tuple[Path, ...] = ()
    #: output path without its suffix (".result.dcm", ".summary.dcm"); None without --out
    out_base: Path | None = None
    rows: tuple[dict, ...] = ()


def plan_units(
    paths: list[str], options: GradeOptions, out_dir: Path | None, *, per_file: bool
) -> list[_Unit]:
    """The run's work in input order: files grouped by Study Instance UID (unless
    ``per_file``), each group named an output that no other group of the run shares."""
    items: list[dict | tuple[_Entry, str]] = []  # a row already made, or (file, study)
    seen: set[Path] = set()
    pending = list(iter_inputs(paths))
    while pending:
        entry = pending.pop(0)
        key = Path(os.path.abspath(entry.path))
        if key in seen:  # given twice, or also listed by a DICOMDIR: graded once
            continue
        seen.add(key)
        why = not_regular(entry.path)
        if why is not None:
            items.append(skipped_row(entry.path, options, why))
            continue
        header = _header(entry.path)
        if header is not None and header[0] == MEDIA_DIRECTORY:
            files, why = _media_directory(entry.path)
            items.append(skipped_row(entry.path, options, why))
            pending[:0] = [_Entry(f, entry.root) for f in files]
            continue
        items.append((entry, "" if header is None else header[1]))
    groups: dict[str, list[_Entry]] = {}
    order: list[dict | str] = []
    for item in items:
        if isinstance(item, dict):
            order.append(item)
            continue
        entry, study = item
        key = f"file:{entry.path}" if per_file or not study else f"study:{study}"
        if key not in groups:
            groups[key] = []
            order.append(key)
        groups[key].append(entry)
    used: set[str] = set()
    units: list[_Unit] = []
    for o in order:
        if isinstance(o, dict):
            units.append(_Unit(rows=(o,)))
            continue
        # a study's files in path order: its first file names the row, the JSON's ``input``
        # and the output, whatever order the files were given in
        group = sorted(groups[o], key=lambda e: path_order(e.path))
        base = None if out_dir is None else _unique_base(out_dir, group[0], used)
        units.append(_Unit(files=tuple(e.path for e in group), out_base=base))
    return units


def _unique_base(out_dir: Path, entry: _Entry, used: set[str]) -> Path:
    """``out_dir`` / the input's path inside the folder argument it was found in, without its
    suffix; ".2", ".3", ... added when an earlier study of the same run already has that name
    (export folders often name every study's file alike)."""
    if entry.root == entry.path:
        relative = Path(entry.path.name)
    else:
        relative = entry.path.relative_to(entry.root)
    first = out_dir / relative.parent / relative.stem
    base, n = first, 1
    while str(base) in used:
        n += 1
        base = first.with_name(f"{first.name}.{n}")
    used.add(str(base))
    return base


class _Job(NamedTuple):
    """What every file of one run is graded with (inherited by worker processes)."""

    options: GradeOptions
    table: Any
    out_dir: Path | None
    pdf: bool
    page_size: str
    json_lines: bool = False  # the run prints JSON lines (made by the workers)


class _Graded(NamedTuple):
    """One unit as handed back: its rows, or (JSON mode) only whether one is a rejection and
    the JSON lines, so that the workers, not the printing process, turn rows into text."""

    rejected: bool
    rows: list[dict] | None
    lines: list[str] | None


def _json_line(row: dict) -> str:
    return json.dumps(row, ensure_ascii=False)


def _graded_unit(unit: _Unit, job: _Job) -> _Graded:
    rows = list(unit.rows) if unit.rows else grade_unit(unit, job)
    rejected = any(r["status"] == GradeStatus.rejected.value for r in rows)
    if job.json_lines:
        return _Graded(rejected, None, [_json_line(r) for r in rows])
    return _Graded(rejected, rows, None)


_WORKER_JOB: _Job | None = None


def _init_worker(job: _Job) -> None:
    global _WORKER_JOB
    _WORKER_JOB = job


def _grade_in_worker(unit: _Unit) -> _Graded:
    assert _WORKER_JOB is not None
    return _graded_unit(unit, _WORKER_JOB)


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
    units = plan_units(args.paths, options, args.out, per_file=args.per_file)
    if not units:
        print("diastolic-sr: no input files found", file=sys.stderr)
        return 1
    if args.out:
        args.out.mkdir(parents=True, exist_ok=True)
    rows: list[dict[str, Any]] = []
    any_rejected = False
    for done in _graded(units, job, args.jobs or os.cpu_count() or 1):
        any_rejected |= done.rejected
        if done.lines is not None:
            for line in done.lines:
                print(line, flush=True)
        elif done.rows is not None:
            rows.extend(done.rows)
    if not args.json:
        print_table(rows, compare=options.compare, outputs=args.out is not None)
    return 1 if any_rejected else 0


def _graded(units: list[_Unit], job: _Job, jobs: int) -> Iterator[_Graded]:
    """Results in input order; several units at a time in worker processes when asked (each
    worker inherits the loaded mapping table; results are written by the workers)."""
    jobs = min(jobs, sum(1 for u in units if u.files))
    if jobs <= 1 or "fork" not in multiprocessing.get_all_start_methods():
        yield from (_graded_unit(u, job) for u in units)
        return
    context = multiprocessing.get_context("fork")
    # units go to the workers in small batches (one round trip per batch, not per unit) while
    # keeping the batches small enough that both workers stay busy to the end
    chunk = max(1, min(8, len(units) // (jobs * 8)))
    with ProcessPoolExecutor(
        jobs, mp_context=context, initializer=_init_worker, initargs=(job,)
    ) as pool:
        yield from pool.map(_grade_in_worker, units, chunksize=chunk)


def grade_unit(unit: _Unit, job: _Job) -> list[dict]:
    """Grade one unit; never raises (an unexpected failure is a rejected row with its
    reason)."""
    try:
        return _grade_files(unit, job)
    except Exception as exc:  # the run goes on with the next unit
        return [
            rejected_row(
                unit.files[0],
                job.options,
                f"internal error while grading: {type(exc).__name__}: {exc}",
                inputs=unit.files,
            )
        ]


def _grade_files(unit: _Unit, job: _Job) -> list[dict]:
    """The files of one study graded together, as the node grades a study
    (:func:`service.pipeline.grade_study`); a file that cannot be read, or that is a result
    this software wrote, gets a row of its own."""
    from service.errors import RejectedInput
    from service.sr.provenance import IGNORED_OWN_RESULT, own_result_reason
    from service.sr.read import load_path

    options = job.options
    rows: list[dict] = []
    loaded: list[tuple[Path, Dataset]] = []
    for path in unit.files:
        try:
            ds = load_path(path)
        except RejectedInput as exc:
            rows.append(rejected_row(path, options, str(exc)))
            continue
        own = own_result_reason(ds)
        if own is not None:
            rows.append(skipped_row(path, options, f"{IGNORED_OWN_RESULT}: {own}"))
            continue
        loaded.append((path, ds))
    if not loaded:
        return rows
    datasets = [ds for _, ds in loaded]
    outcome = grade_study(datasets, options, table=job.table)
    # the files set aside in the order they were given (the study is graded in its own order)
    given = {_sop_uid(ds): i for i, (_, ds) in enumerate(loaded)}
    aside = dict(sorted(outcome.set_aside, key=lambda item: given.get(item[0], -1)))
    by_uid = {_sop_uid(ds): path for path, ds in loaded}
    used = [p for p, ds in loaded if _sop_uid(ds) not in aside]
    if outcome.status is GradeStatus.rejected and (not used or len(loaded) == 1):
        # nothing usable: each file says why (one file: the reader's own reason)
        if len(loaded) == 1 or not aside:
            paths = [p for p, _ in loaded]
            return [*rows, rejected_row(paths[0], options, outcome.reason, outcome, paths)]
        return rows + [
            rejected_row(by_uid.get(uid, loaded[0][0]), options, why) for uid, why in aside.items()
        ]
    study_row = _study_row(
        [(p, ds) for p, ds in loaded if _sop_uid(ds) not in aside], outcome, unit, job
    )
    set_aside_rows = [
        rejected_row(by_uid.get(uid, loaded[0][0]), options, f"set aside: {why}")
        for uid, why in aside.items()
    ]
    return [study_row, *rows, *set_aside_rows]


def _sop_uid(ds: Dataset) -> str:
    try:
        return str(ds.get("SOPInstanceUID", "") or "")
    except Exception:
        return ""


def _study_row(
    used: list[tuple[Path, Dataset]], outcome: StudyOutcome, unit: _Unit, job: _Job
) -> dict:
    options = job.options
    paths = [p for p, _ in used]
    if outcome.status is GradeStatus.rejected:
        return rejected_row(paths[0], options, outcome.reason, outcome, paths)
    output = None
    base = unit.out_base
    if base is not None and outcome.result is not None:
        target = base.with_name(base.name + ".result.dcm")
        target.parent.mkdir(parents=True, exist_ok=True)
        target.write_bytes(file_bytes(outcome.result))
        output = str(target)
    row = outcome_row(paths[0], options, outcome, output, paths)
    if job.pdf and base is not None:
        from service.pipeline import build_summary

        summary = build_summary(
            outcome, [ds for _, ds in used], page_size=job.page_size, uid_root=options.uid_root
        )
        if summary is not None:
            target = base.with_name(base.name + ".summary.dcm")
            target.write_bytes(file_bytes(summary))
            row["summary"] = str(target)
    return row


def rejected_row(
    path: Path,
    options: GradeOptions,
    reason: str,
    outcome: StudyOutcome | None = None,
    inputs: Sequence[Path] = (),
) -> dict:
    row = empty_row(path, options, inputs)
    row.update(status=GradeStatus.rejected.value, reason=reason)
    if outcome is not None and outcome.measurements is not None:
        row["excluded"] = [e.model_dump(mode="json") for e in outcome.measurements.excluded]
    return row


def skipped_row(path: Path, options: GradeOptions, reason: str) -> dict:
    """An input deliberately not graded (not a regular file, a media directory, a result this
    software wrote): said so, and no reason for a non-zero exit status."""
    row = empty_row(path, options)
    row.update(status=GradeStatus.skipped.value, reason=reason)
    return row


def empty_row(path: Path, options: GradeOptions, inputs: Sequence[Path] = ()) -> dict:
    return {
        "input": str(path),
        "inputs": [str(p) for p in inputs] or [str(path)],
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


def outcome_row(
    path: Path,
    options: GradeOptions,
    outcome: StudyOutcome,
    output: str | None,
    inputs: Sequence[Path] = (),
):
    a = outcome.assessment
    m = outcome.measurements
    assert a is not None and m is not None
    row = empty_row(path, options, inputs)
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
        notes=list(_context_notes(outcome)) + list(a.notes) + list(m.notes),
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


def _context_notes(outcome: StudyOutcome) -> tuple[str, ...]:
    """What holds for the study whichever guideline is applied, once."""
    return () if outcome.assessments is None else outcome.assessments.context_notes


def _input_cell(row: dict) -> str:
    more = len(row.get("inputs") or ()) - 1
    return row["input"] + (f" (+{more} more of the study)" if more > 0 else "")


def table_note(row: dict) -> str:
    """The last column: the conclusion as the result SR and the summary say it (and the
    borderline measures by their clinical names), or the reason a file was not graded."""
    if not row.get("conclusion"):
        return row.get("reason") or ""
    note = row["conclusion"]
    if row.get("borderline"):
        note += " " + borderline_words(Measure(b["measure"]) for b in row["borderline"])
    return note


def print_table(rows: list[dict], *, compare: bool = False, outputs: bool = False) -> None:
    """The table: each row's outcome token and filling pressure, and the conclusion in the
    words of the result SR and the summary (docs/vocabulary.md); with ``compare`` a column with
    each other guideline's outcome and, under the table, each study where the guidelines
    differ in plain words; with ``outputs`` where each result went."""
    headers = ["input", "status", "outcome", "filling pressure"]
    if compare:
        headers.append("other guidelines")
    if outputs:
        headers.append("result")
    headers.append("conclusion")
    table = []
    for r in rows:
        cells = [
            _input_cell(r),
            r["status"] or "",
            r.get("outcome") or "-",
            r["filling_pressure"] or "-",
        ]
        if compare:
            others = r.get("compared") or ()
            cells.append(", ".join(f"{o['guideline']}: {o['outcome']}" for o in others) or "-")
        if outputs:
            cells.append(r.get("output") or "-")
        table.append((*cells, table_note(r)))
    print_columns(headers, table, pad_last=False)  # the conclusion column is free text
    differing = [r for r in rows if r.get("disagreements")]
    if compare:
        print()
        if not differing:
            print("The guidelines compared agree on every graded study.")
        for r in differing:
            print(f"Guidelines differ for {_input_cell(r)}:")
            for sentence in r["disagreements"]:
                print(f"  {sentence}")
    print()
    print(CAUTION)

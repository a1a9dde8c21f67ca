"""``diastolic-sr demo`` and ``diastolic-sr demo-data``.

``demo`` runs the whole job on loopback with embedded defaults: a diastolic-sr node, a result
receiver standing in for the PACS, and the invented demo SRs sent as a scanner would send
them.  ``demo-data`` only writes the demo SRs to a folder (for ``grade`` or a real peer).
"""

from __future__ import annotations

import argparse
import logging
import tempfile
from pathlib import Path

from service.commands.columns import print_columns
from service.model import CAUTION


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser(
        "demo",
        help="run the service end to end on loopback with invented demo studies",
        description="Start a diastolic-sr node on loopback (embedded defaults) and a loopback "
        "result receiver, send the invented demo SRs to the node as a scanner would, wait for "
        "the graded results, print a summary and exit.",
    )
    p.add_argument("--workdir", type=Path, help="keep the node's data here (default: temporary)")
    p.add_argument("--timeout", type=float, default=90.0, help="seconds to wait for all results")
    p.set_defaults(func=run_demo)

    d = sub.add_parser(
        "demo-data",
        help="write the invented demo SRs to a folder",
        description="Write the invented demo echo SRs (fictional Harbour Vale Cardiac Centre) "
        "to DIR: normal function, each grade, indeterminate, not gradable, borderline, atrial "
        "fibrillation, and a study sent as two SRs; both encodings and mixed units.",
    )
    d.add_argument("out", type=Path, metavar="DIR")
    d.set_defaults(func=run_demo_data)


def run_demo_data(args: argparse.Namespace) -> int:
    from service.demo.scenario import write_demo_files

    for path in write_demo_files(args.out):
        print(path)
    return 0


def run_demo(args: argparse.Namespace) -> int:
    """The demo node knows the fictional scanner's private codes (its site mapping table)."""
    from service.demo.scenario import CASES, SITE_MAPPING, case_datasets
    from service.network.demo_loop import run_network_demo

    logging.basicConfig(level=logging.WARNING, format="%(levelname)s %(name)s: %(message)s")
    sent = [(case, case_datasets(case)) for case in CASES]
    datasets = [ds for _, objects in sent for ds in objects]
    scenarios = {str(objects[0].StudyInstanceUID): case.title for case, objects in sent}
    split = [case.key for case, objects in sent if len(objects) > 1]
    print(
        f"Sending {len(datasets)} demo SRs of {len(sent)} studies to a diastolic-sr node on "
        "loopback"
        + (f" ({', '.join(split)}: one study sent as two SRs, graded together)" if split else "")
        + " ...",
        flush=True,
    )
    if args.workdir:
        args.workdir.mkdir(parents=True, exist_ok=True)
        rows = run_network_demo(
            datasets, args.workdir, timeout=args.timeout, mapping_files=[SITE_MAPPING]
        )
    else:
        with tempfile.TemporaryDirectory(prefix="diastolic-sr-demo-") as tmp:
            rows = run_network_demo(
                datasets, Path(tmp), timeout=args.timeout, mapping_files=[SITE_MAPPING]
            )
    print_rows(rows, scenarios)
    delivered = sum(1 for r in rows if r["delivered"])
    print(f"\n{delivered} of {len(rows)} studies: result SR delivered to the loopback PACS.")
    print(CAUTION)
    return 0 if delivered == len(rows) else 1


def print_rows(rows: list[dict], scenarios: dict[str, str] | None = None) -> None:
    """One line per study; with ``scenarios`` (study UID -> what the demo case shows) a
    column naming each row's scenario."""
    scenarios = scenarios or {}
    headers = ("patient", "study", "guideline", "outcome", "filling pressure", "result instance")
    if scenarios:
        headers = ("scenario", *headers)
    table = []
    for r in rows:
        cells = (
            f"{r['patient_name'].replace('^', ', ')} ({r['patient_id']})",
            "…" + r["study_uid"][-12:],
            r["guideline"] or "-",
            r.get("outcome") or r["grade"] or r["status"],
            r["filling_pressure"] or "-",
            r["result_uid"] or (r.get("reason") or "-"),
        )
        table.append((scenarios.get(r["study_uid"], "-"), *cells) if scenarios else cells)
    print_columns(headers, table)

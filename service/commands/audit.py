"""``diastolic-sr audit``: the quality audit of the lab's diastolic reporting, from the node's
journal: outcomes by pathway and month, the indeterminate share beside a registry, measure
availability overall and per sending device, the missing measures that kept studies undecided,
borderline values, guideline disagreement and processing.  Writes one self-contained HTML page
(``--html``), JSON (``--json``) and a PDF (``--pdf``); prints a short summary otherwise.

Studies are counted, not listed, unless ``--list-studies`` is given; patient names and IDs
appear only when the node recorded them (``audit.include_patient_identifiers``)."""

from __future__ import annotations

import argparse
import json
import sys
from datetime import datetime, timedelta
from pathlib import Path

from service.errors import UserError


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser(
        "audit",
        help="quality audit of the lab's diastolic reporting (HTML, JSON, PDF)",
        description="Audit the studies in the node's journal: outcomes by pathway and month, "
        "indeterminate share beside a registry, measure availability overall and per sending "
        "device, missing measures that kept studies undecided, borderline values, guideline "
        "disagreement, processing times and failures. Studies are counted by the day the node "
        "graded them (local time).",
    )
    p.add_argument("--config", metavar="FILE", help="configuration file (for its data_dir)")
    p.add_argument("--data-dir", metavar="DIR", help="the node's data directory")
    from service.commands.serve import add_journal_argument

    add_journal_argument(p)
    p.add_argument(
        "--since",
        metavar="DATE",
        help="first day (YYYY-MM-DD, or YYYY-MM-DDTHH:MM) of the period; default: the first study",
    )
    p.add_argument(
        "--until",
        metavar="DATE",
        help="last day of the period, included (YYYY-MM-DD), or an exclusive end time "
        "(YYYY-MM-DDTHH:MM); default: now",
    )
    p.add_argument("--html", metavar="FILE", type=Path, help="write the self-contained HTML page")
    p.add_argument("--json", action="store_true", help="print the figures as one JSON document")
    p.add_argument("--pdf", metavar="FILE", type=Path, help="write the audit as a PDF")
    p.add_argument(
        "--list-studies",
        action="store_true",
        help="also list each study (Study Instance UID; patient name and ID only when the node "
        "recorded them)",
    )
    p.set_defaults(func=run)


def parse_when(text: str, *, end: bool) -> float:
    """Local date or date-time -> epoch seconds.  A bare date as an end is the end of that day."""
    text = text.strip()
    try:
        if len(text) == 10:
            day = datetime.strptime(text, "%Y-%m-%d")
            return (day + timedelta(days=1) if end else day).timestamp()
        return datetime.fromisoformat(text).timestamp()
    except ValueError:
        option = "--until" if end else "--since"
        raise UserError(
            f'{option} "{text}": expected a date YYYY-MM-DD or a time YYYY-MM-DDTHH:MM'
        ) from None


def run(args: argparse.Namespace) -> int:
    from service.audit.render import audit_html
    from service.audit.report import build_report, report_json
    from service.config import apply_overrides, load_config
    from service.store.journal import open_journal
    from service.store.sqlite_journal import journal_path

    since = None if args.since is None else parse_when(args.since, end=False)
    until = None if args.until is None else parse_when(args.until, end=True)
    if since is not None and until is not None and since >= until:
        raise UserError(f'--since "{args.since}" is not before --until "{args.until}"')
    cfg = apply_overrides(load_config(args.config), data_dir=args.data_dir, journal=args.journal)
    path = journal_path(cfg.data_dir)
    if not cfg.journal.url and not path.exists():
        raise UserError(f"no journal at {path} (has the node run with this data directory?)")
    identities = cfg.audit.include_patient_identifiers and args.list_studies
    journal = open_journal(cfg, max_connections=1)
    try:
        report = build_report(
            journal.iter_audit_rows(since, until, identities=identities),
            since=since,
            until=until,
            list_studies=args.list_studies,
        )
    finally:
        journal.close()
    written = []
    if args.html is not None:
        _write(args.html, audit_html(report, node=cfg.node.ae_title, identities=identities))
        written.append(args.html)
    if args.pdf is not None:
        from service.audit.pdf import audit_pdf

        try:
            audit_pdf(report, args.pdf)
        except OSError as exc:
            raise UserError(f"cannot write {args.pdf}: {exc.strerror or exc}") from None
        written.append(args.pdf)
    if args.json:
        print(json.dumps(report_json(report), indent=2, ensure_ascii=False))
    else:
        print_summary(report)
        for p in written:
            print(f"written: {p}")
    if args.json and written:
        for p in written:
            print(f"written: {p}", file=sys.stderr)
    return 0


def _write(path: Path, text: str) -> None:
    try:
        path.write_text(text, encoding="utf-8")
    except OSError as exc:
        raise UserError(f"cannot write {path}: {exc.strerror or exc}") from None


def print_summary(report) -> None:  # type: ignore[no-untyped-def]
    from service.audit.figures import pct
    from service.audit.labels import measure_label, outcome_label
    from service.audit.render import period_text

    r = report
    print(f"Diastolic function audit: {period_text(r) or 'all studies in the journal'}")
    print(f"studies assessed: {r.studies} (not assessed: {r.not_assessed})")
    for token, n in r.outcomes.items():
        print(f"  {outcome_label(token):45} {n:6}  {pct(r.outcome_shares[token]):>7}")
    for row in r.indeterminate_by_pathway:
        ref = "" if row.registry_share is None else f" (registry {pct(row.registry_share)})"
        print(
            f"indeterminate, {row.pathway.value}: {row.indeterminate.count} of "
            f"{row.indeterminate.of} ({pct(row.indeterminate.share)}){ref}"
        )
    for key, d in r.devices.items():
        low = [m for m, s in d.measures.items() if s < 0.5 and r.measures.get(m)]
        if low:
            print(
                f"device {key}: seldom or never sends "
                + ", ".join(f"{measure_label(m)} ({pct(d.measures[m])})" for m in low)
            )
    if r.missing:
        top = r.missing[0]
        print(
            f"missing measure most often in the way: {measure_label(top.measure.value)} "
            f"({top.would_decide} of {top.of} undecided studies decided whatever its value, "
            f"{top.could_decide} for some values)"
        )
    print(
        f"borderline: {r.borderline.studies.count} ({pct(r.borderline.studies.share)}); "
        f"guidelines disagree: {r.disagreement.disagree.count} of {r.disagreement.compared}; "
        f"failed: {r.processing.failed}"
    )
    print(r.caution)

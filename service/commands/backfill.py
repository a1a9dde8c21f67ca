"""``diastolic-sr backfill``: grade the echo SR studies already in an archive.

The archive is a name from the configuration (``[archives.NAME]``), ``AET@HOST:PORT`` (DICOM:
C-FIND, then C-GET, or C-MOVE with ``--move-to``) or an ``http(s)://`` DICOMweb base URL
(QIDO-RS, WADO-RS).  What is retrieved is recorded in the node's journal (``--data-dir`` /
``--config``) and graded and delivered by the node's own roles; see
:mod:`service.backfill.runner`.  Exit status: 0 when every study found was graded or skipped,
1 when some failed or are left, 2 on a usage, configuration or archive error, 130 when stopped
by Ctrl-C (the next run continues).
"""

from __future__ import annotations

import argparse
import json
import logging
import re
import signal
import sys
import threading
from datetime import date
from types import FrameType
from typing import Any

from pydantic import ValidationError

from service.config import (
    Config,
    DicomwebArchiveConfig,
    DimseArchiveConfig,
    apply_overrides,
    check_ae_title,
    load_config,
)
from service.errors import UserError

_DIMSE = re.compile(r"^(?P<aet>[^@]{1,16})@(?P<host>[^:@]+|\[[0-9a-fA-F:]+\]):(?P<port>\d{1,5})$")


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser(
        "backfill",
        help="find the echo SR studies in an archive and have each graded",
        description="Query an archive for studies with SR objects (by Study Date), retrieve "
        "their SR objects (never images) and have each study graded and its result delivered "
        "by the node's own journal, grading and delivery, as if the objects had been sent to "
        "the node. Resumable: a second run skips studies already graded under the same rules, "
        "and a run stopped with Ctrl-C continues where it stopped.",
    )
    p.add_argument(
        "--source",
        required=True,
        metavar="ARCHIVE",
        help="an archive name from the configuration, AET@HOST:PORT (DICOM) or an "
        "http(s):// DICOMweb base URL",
    )
    p.add_argument("--since", metavar="YYYY-MM-DD", help="studies on or after this date")
    p.add_argument("--until", metavar="YYYY-MM-DD", help="studies on or before this date")
    p.add_argument(
        "--limit",
        type=int,
        metavar="N",
        help="retrieve at most N studies in this run (oldest first; done ones do not count)",
    )
    p.add_argument(
        "--move-to",
        metavar="AET",
        help="retrieve by C-MOVE to this AE title (the node running on --data-dir) instead of "
        "C-GET",
    )
    p.add_argument("--rate", type=float, metavar="N", help="start at most N studies per minute")
    p.add_argument(
        "--dry-run",
        action="store_true",
        help="count the matching studies and SR objects, retrieve nothing, and exit",
    )
    p.add_argument("--config", metavar="FILE", help="configuration file (TOML)")
    p.add_argument("--data-dir", metavar="DIR", help="the node's data directory (its journal)")
    from service.commands.serve import add_journal_argument

    add_journal_argument(p)
    p.add_argument(
        "--forward",
        action="append",
        default=[],
        metavar="AET@HOST:PORT",
        help="also send results to this DICOM peer (repeatable; joins the default route)",
    )
    p.add_argument(
        "--settle-seconds",
        type=float,
        metavar="S",
        help="grade a retrieved study S seconds after its last object (default: "
        "assembly.settle_seconds)",
    )
    p.add_argument(
        "--retry-for",
        type=float,
        default=120.0,
        metavar="S",
        help="wait this long for an archive that stops answering before stopping (default 120)",
    )
    p.add_argument(
        "--wait",
        type=float,
        default=600.0,
        metavar="S",
        help="wait at most this long without progress for grading and delivery (default 600)",
    )
    p.add_argument("--json", action="store_true", help="print the summary as one JSON document")
    p.add_argument(
        "--log-level",
        choices=["DEBUG", "INFO", "WARNING", "ERROR"],
        default="WARNING",
        help="log level of the node's events on stderr (default WARNING)",
    )
    p.set_defaults(func=run)


def _date(value: str | None, flag: str) -> date | None:
    if value is None:
        return None
    if not re.fullmatch(r"\d{4}-\d{2}-\d{2}", value.strip()):
        raise UserError(f'{flag} "{value}": expected a date as YYYY-MM-DD, e.g. 2025-01-31')
    try:
        return date.fromisoformat(value.strip())
    except ValueError as exc:
        raise UserError(f'{flag} "{value}": not a date ({exc})') from None


def resolve_source(config: Config, text: str) -> DimseArchiveConfig | DicomwebArchiveConfig:
    """``--source``: a configured archive, ``AET@HOST:PORT`` or a DICOMweb base URL."""
    text = text.strip()
    if text in config.archives:
        return config.archives[text]
    try:
        if text.lower().startswith(("http://", "https://")):
            return DicomwebArchiveConfig(url=text)
        m = _DIMSE.match(text)
        if m:
            return DimseArchiveConfig(
                ae_title=m["aet"], host=m["host"].strip("[]"), port=int(m["port"])
            )
    except ValidationError as exc:
        problems = "; ".join(str(e["msg"]).removeprefix("Value error, ") for e in exc.errors())
        shown = re.sub(r"//[^/@]*@", "//********@", text)
        raise UserError(f'--source "{shown}": {problems}') from None
    names = ", ".join(sorted(config.archives)) or "none configured"
    shown = re.sub(r"//[^/@]*@", "//********@", text)
    raise UserError(
        f'--source "{shown}": not an archive of the configuration ({names}), not AET@HOST:PORT '
        "and not an http(s):// DICOMweb URL"
    )


def archive_client(
    config: Config, source: DimseArchiveConfig | DicomwebArchiveConfig, move_to: str = ""
) -> Any:
    if isinstance(source, DicomwebArchiveConfig):
        if move_to:
            raise UserError(
                "--move-to: a DICOMweb archive is retrieved from by WADO-RS; C-MOVE needs a "
                "DICOM archive (AET@HOST:PORT)"
            )
        from service.archive.dicomweb import DicomwebArchive

        return DicomwebArchive(source, config)
    from service.archive.dimse import DimseArchive

    return DimseArchive(source, config, move_to=move_to)


def run(args: argparse.Namespace) -> int:
    from service.archive.model import ArchiveError
    from service.backfill.progress import progress_for
    from service.backfill.runner import Backfill, BackfillOptions
    from service.network.preflight import preflight
    from service.observability.logs import configure_logging

    since, until = _date(args.since, "--since"), _date(args.until, "--until")
    if since and until and since > until:
        raise UserError(f"--since {since} is after --until {until}")
    if args.limit is not None and args.limit < 1:
        raise UserError(f"--limit {args.limit}: give at least 1")
    if args.rate is not None and not args.rate > 0:
        raise UserError(f"--rate {args.rate}: give a number of studies per minute above 0")
    for flag, value in (("--retry-for", args.retry_for), ("--wait", args.wait)):
        if not value >= 0:
            raise UserError(f"{flag} {value}: give a number of seconds, 0 or more")
    move_to = ""
    if args.move_to:
        try:
            move_to = check_ae_title(args.move_to)
        except ValueError as exc:
            raise UserError(f'--move-to "{args.move_to}": {exc}') from None
    config = apply_overrides(
        load_config(args.config),
        forward=args.forward,
        data_dir=args.data_dir,
        journal=args.journal,
        settle_seconds=args.settle_seconds,
    )
    configure_logging("text", args.log_level)
    logging.getLogger("pynetdicom").setLevel(logging.CRITICAL)  # its errors are reported here
    preflight(config)
    source = resolve_source(config, args.source)
    archive = archive_client(config, source, move_to)
    options = BackfillOptions(
        since=since,
        until=until,
        limit=args.limit,
        move_to=move_to,
        rate=args.rate,
        dry_run=args.dry_run,
        retry_for=args.retry_for,
        wait_seconds=args.wait,
    )
    stop = threading.Event()
    progress = progress_for(sys.stderr)

    def on_signal(signum: int, _frame: FrameType | None) -> None:
        if stop.is_set():  # a second Ctrl-C: at once
            raise KeyboardInterrupt
        stop.set()
        progress.note(
            f"{signal.Signals(signum).name}: stopping after the study in hand "
            "(Ctrl-C again to stop at once); the next run continues from there"
        )

    old = {s: signal.signal(s, on_signal) for s in (signal.SIGINT, signal.SIGTERM)}
    runner = Backfill(config, archive, options, progress=progress, stop=stop)
    try:
        summary = runner.run()
    except ArchiveError:
        if runner.summary.found:  # what was done before the archive failed, then the error
            print(summary_text(runner.summary, dry_run=args.dry_run))
        raise
    finally:
        for s, handler in old.items():
            signal.signal(s, handler)
    if args.json:
        print(json.dumps(summary.as_dict(), indent=2))
    else:
        print(summary_text(summary, dry_run=args.dry_run))
    if summary.state == "interrupted":
        return 130
    if summary.failed or summary.left or summary.delivery_pending:
        return 1
    return 0


def summary_text(summary: Any, *, dry_run: bool = False) -> str:
    s = summary
    lines = [f"backfill from {s.source} ({s.retrieve}): {s.state} in {s.elapsed:.1f} s"]
    if dry_run:
        lines.append(f"  studies found                {s.found:>6}")
        lines.append(f"  already graded (skipped)     {s.skipped:>6}")
        lines.append(f"  to retrieve and grade        {s.to_do:>6}")
        lines.append(f"  SR objects in them           {s.objects:>6}")
        if s.beyond_limit:
            lines.append(f"  beyond --limit               {s.beyond_limit:>6}")
        for uid, reason in s.failed:
            lines.append(f"    {uid}: {reason}")
        return "\n".join(lines)
    lines.append(f"  studies found                {s.found:>6}")
    lines.append(f"  graded                       {s.graded:>6}")
    if s.outcomes:
        lines.append("    " + ", ".join(f"{k} {v}" for k, v in sorted(s.outcomes.items())))
    lines.append(f"  results delivered            {s.delivered:>6}")
    lines.append(f"  skipped                      {s.skipped:>6}")
    for why, n in sorted(s.skipped_reasons.items()):
        lines.append(f"    {why}: {n}")
    lines.append(f"  failed                       {len(s.failed):>6}")
    for uid, reason in s.failed:
        lines.append(f"    {uid}: {reason}")
    if s.delivery_pending:
        lines.append(f"  delivery being retried       {len(s.delivery_pending):>6}")
        for uid, reason in s.delivery_pending:
            lines.append(f"    {uid}: {reason}")
    if s.left:
        lines.append(f"  not finished                 {s.left:>6}")
    if s.beyond_limit:
        lines.append(f"  beyond --limit (later run)   {s.beyond_limit:>6}")
    lines.append(f"  SR objects retrieved         {s.objects:>6}")
    if s.retries:
        lines.append(f"  queries asked again          {s.retries:>6}")
    if s.note:
        lines.append(f"  {s.note}")
    return "\n".join(lines)

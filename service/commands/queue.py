"""``diastolic-sr queue``: pending, failed and recent work from the node's journal; re-queue
failed deliveries; re-grade a study; purge finished work now.  Works while the node runs (the
journal is shared)."""

from __future__ import annotations

import argparse
import json
import time
from datetime import UTC, datetime
from typing import Any

from service.config import apply_overrides, load_config
from service.errors import UserError


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser(
        "queue",
        help="show pending, failed and recent work; re-queue failed deliveries; re-grade",
        description="Show the node's work from its journal: studies waiting to be graded, "
        "results waiting to be delivered, failures with their reasons, and recent studies.",
    )
    p.add_argument("--config", metavar="FILE", help="configuration file (for its data_dir)")
    p.add_argument("--data-dir", metavar="DIR", help="the node's data directory")
    from service.commands.serve import add_journal_argument

    add_journal_argument(p)
    p.add_argument(
        "--requeue-failed",
        action="store_true",
        help="put every failed delivery back in the outbox (attempts start again)",
    )
    p.add_argument(
        "--regrade",
        action="append",
        default=[],
        metavar="STUDY_UID",
        help="grade this study again from its stored objects (repeatable)",
    )
    p.add_argument(
        "--purge",
        action="store_true",
        help="delete now the stored objects and results of studies finished more than "
        "retention.days ago "
        "(never pending work or failed deliveries; needs --config with retention.days > 0)",
    )
    p.add_argument("--recent", type=int, default=20, metavar="N", help="recent studies shown")
    p.add_argument("--json", action="store_true", help="print one JSON document")
    p.set_defaults(func=run)


def _when(ts: float | None) -> str:
    if ts is None:
        return "-"
    return datetime.fromtimestamp(ts, UTC).strftime("%Y-%m-%d %H:%M:%S")


def run(args: argparse.Namespace) -> int:
    from service.store.journal import open_journal
    from service.store.sqlite_journal import journal_path

    cfg = apply_overrides(load_config(args.config), data_dir=args.data_dir, journal=args.journal)
    path = journal_path(cfg.data_dir)
    if not cfg.journal.url and not path.exists():
        raise UserError(f"no journal at {path} (has the node run with this data directory?)")
    journal = open_journal(cfg)
    try:
        actions: list[str] = []
        for study in args.regrade:
            if not journal.request_regrade(study):
                raise UserError(f"unknown study {study!r}: not in the journal")
            actions.append(f"study {study} queued for re-grading")
        if args.requeue_failed:
            n = journal.requeue_failed()
            actions.append(f"{n} failed deliver{'y' if n == 1 else 'ies'} re-queued")
        if args.purge:
            from service.store.retention import purge

            days = cfg.retention.days
            if days <= 0:
                raise UserError(
                    "retention.days is 0 (keep everything): nothing to purge; set it in the "
                    "configuration and pass --config"
                )
            done = purge(journal, days)
            actions.append(
                f"{done.studies} finished stud{'y' if done.studies == 1 else 'ies'} older than "
                f"{days:g} days purged ({done.files} stored objects and results)"
            )
        report = build_report(journal, recent=args.recent)
    finally:
        journal.close()
    if args.json:
        print(json.dumps({"actions": actions, **report}, indent=2))
        return 0
    for line in actions:
        print(line)
    print_report(report)
    return 0


#: Encapsulated PDF Storage (PS3.4 Annex B.5): the one-page summary sent with a result SR
_ENCAPSULATED_PDF = "1.2.840.10008.5.1.4.1.1.104.1"


def object_kind(sop_class_uid: str) -> str:
    """What a result object is, in the words the queue uses."""
    return "summary PDF" if sop_class_uid == _ENCAPSULATED_PDF else "result SR"


def _delivery(journal: Any, d: dict[str, Any]) -> dict[str, Any]:
    """One delivery: which object (kind and UID), for which study, where, and its own state."""
    row = journal.result(d["result_uid"]) or {}
    return {
        "kind": object_kind(str(row.get("sop_class_uid", ""))),
        "uid": d["result_uid"],
        "study_uid": d["study_uid"],
        "destination": d["destination"],
        "target": d["target"],
        "attempts": d["attempts"],
    }


def _failed_study(journal: Any, s: dict[str, Any], failed: list[dict[str, Any]]) -> dict:
    """A failed study: its result SR, and either each failed delivery of its objects (with that
    object's kind, UID and own reason) or, when it was never graded, the grading's reason."""
    mine = [d for d in failed if d["study_uid"] == s["study_uid"]]
    out: dict[str, Any] = {"study_uid": s["study_uid"], "result_uid": s["result_uid"]}
    if mine:
        out["failed_deliveries"] = [
            f"{d['kind']} {d['uid']} to {d['destination']}: {d['reason']}" for d in mine
        ]
    else:
        out["reason"] = s["reason"]
    return out


def build_report(journal: Any, *, recent: int) -> dict[str, Any]:
    now = time.time()
    waiting = journal.studies(states=["received", "assembled"])
    failed_studies = journal.studies(states=["failed"])
    pending = journal.deliveries(states=["pending"])
    failed = [
        {**_delivery(journal, d), "reason": d["last_error"]}
        for d in journal.deliveries(states=["failed"])
    ]
    return {
        "counts": journal.counts(),
        "studies_waiting": [
            {
                "study_uid": s["study_uid"],
                "state": s["state"],
                "calling_ae": s["calling_ae"],
                "due_in_seconds": round(max(0.0, s["due_at"] - now), 1),
            }
            for s in waiting
        ],
        "deliveries_pending": [
            {
                **_delivery(journal, d),
                "next_attempt": _when(d["next_attempt_at"]),
                "last_error": d["last_error"],
            }
            for d in pending
        ],
        "failed": [_failed_study(journal, s, failed) for s in failed_studies],
        "deliveries_failed": failed,
        "objects_set_aside": [
            {
                "sop_instance_uid": o["sop_instance_uid"],
                "study_uid": o["study_uid"],
                "note": o["note"],
            }
            for o in journal.objects_set_aside()
        ],
        "objects_ignored": [
            {
                "kind": object_kind(o["sop_class_uid"]),
                "sop_instance_uid": o["sop_instance_uid"],
                "study_uid": o["study_uid"],
                "calling_ae": o["calling_ae"],
                "received": _when(o["received_at"]),
                "times_received": o["times_received"],
                "reason": o["reason"],
            }
            for o in journal.ignored_objects()
        ],
        "recent": [_recent(journal, s) for s in journal.studies(limit=recent)],
        "backfill_runs": [_backfill_run(r) for r in journal.backfill_runs(limit=5)],
    }


def _backfill_run(run: dict[str, Any]) -> dict[str, Any]:
    """A backfill run as the journal keeps it: where from, when, how it ended, its counts."""
    summary = run.get("summary") or {}
    return {
        "source": run["source"],
        "since": run["since"] or "-",
        "until": run["until"] or "-",
        "state": run["state"],
        "started": _when(run["started_at"]),
        "finished": _when(run["finished_at"]),
        "found": summary.get("found", 0),
        "graded": summary.get("graded", 0),
        "skipped": summary.get("skipped", 0),
        "failed": len(summary.get("failed", [])),
    }


def _recent(journal: Any, s: dict[str, Any]) -> dict[str, Any]:
    result = journal.result(s["result_uid"]) if s["result_uid"] else None
    return {
        "study_uid": s["study_uid"],
        "state": s["state"],
        "calling_ae": s["calling_ae"],
        "outcome": journal.outcome_of(s["result_uid"]) if s["result_uid"] else None,
        "grade": (result or {}).get("grade"),
        "filling_pressure": (result or {}).get("filling_pressure"),
        "result_uid": s["result_uid"],
        "updated": _when(s["updated_at"]),
        "reason": s["reason"],
    }


def print_report(report: dict[str, Any]) -> None:
    counts = report["counts"]
    print("journal: " + (", ".join(f"{k}={v}" for k, v in sorted(counts.items())) or "empty"))
    sections = [
        ("studies waiting to be graded", report["studies_waiting"]),
        ("deliveries pending", report["deliveries_pending"]),
        ("failed studies", report["failed"]),
        ("failed deliveries", report["deliveries_failed"]),
        ("objects set aside", report["objects_set_aside"]),
        ("objects ignored (never graded)", report["objects_ignored"]),
        ("recent studies", report["recent"]),
        ("backfill runs (latest first)", report["backfill_runs"]),
    ]
    for title, rows in sections:
        print(f"\n{title}: {len(rows)}")
        for row in rows:
            lines = row.get("failed_deliveries", ())
            fields = {k: v for k, v in row.items() if k != "failed_deliveries"}
            print("  " + "  ".join(f"{k}={v}" for k, v in fields.items() if v not in (None, "")))
            for line in lines:
                print(f"    {line}")

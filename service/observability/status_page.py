"""The node's status page (``/``) and its audit (``/audit``), served on the HTTP endpoint.

The status page says, for an administrator at a glance: is the listener up, how much work is
waiting, what arrived and went out in the last hour, which deliveries or studies failed and
why (with the command that re-queues them), and the configuration in force (secrets masked as
``check-config`` masks them).  No patient identity unless the configuration allows it.

Both pages read the journal through a connection of their own, never the node's, so a long
read never holds up the listener's writes (SQLite in WAL mode: readers do not block writers).
"""

from __future__ import annotations

import shlex
import threading
import time
from typing import Any

from service import __version__
from service.store.journal import Journal, open_journal
from service.web import render

#: how far back the "last hour" counts go, seconds
LAST_HOUR = 3600.0
#: days offered as links on the audit page
AUDIT_PERIODS = (7, 30, 90, 365)


class StatusPages:
    """The page functions of :class:`service.observability.http.HttpEndpoint` for one node."""

    def __init__(self, node: Any) -> None:
        self.node = node
        self._lock = threading.Lock()
        self._journal: Journal | None = None

    def _reader(self) -> Journal:
        if self._journal is None:
            self._journal = open_journal(self.node.config, max_connections=2)
        return self._journal

    def close(self) -> None:
        with self._lock:
            if self._journal is not None:
                self._journal.close()
                self._journal = None

    def pages(self) -> dict[str, Any]:
        return {"/": self.status, "/audit": self.audit}

    # -- the status page ---------------------------------------------------------------------

    def context(self, now: float | None = None) -> dict[str, Any]:
        """Everything the status page shows (also used by tests)."""
        from service.commands.check_config import effective_toml

        now = time.time() if now is None else now
        node = self.node
        cfg = node.config
        with self._lock:
            journal = self._reader()
            depth = journal.queue_depth()
            activity = journal.activity_since(now - LAST_HOUR)
            failures = journal.recent_failures()
            identities = {}
            if cfg.audit.include_patient_identifiers:
                identities = journal.patient_identities([f["study_uid"] for f in failures])
        for f in failures:
            name, pid = identities.get(f["study_uid"], ("", ""))
            f["patient"] = " ".join(p for p in (name.replace("^", ", "), pid) if p)
        health = node.health()
        up = bool(health["checks"].get("listener", {}).get("ok"))
        listener = getattr(node, "listener", None)  # in this process only when it runs here
        associations = None if listener is None else listener.active_associations()
        data_dir = str(node.data_dir)
        where = "--data-dir " + shlex.quote(data_dir)
        if cfg.journal.url:  # the password from journal.password or PGPASSWORD, never here
            where += " --journal " + shlex.quote(cfg.journal.url)
        return {
            "now": now,
            "version": __version__,
            "ae_title": cfg.node.ae_title,
            "listener": {
                "up": up,
                "bind": cfg.node.bind or "all interfaces",
                "port": node.port,
                "tls": cfg.tls.enabled,
                "associations": associations,
                "started_at": getattr(node, "_started_at", None),
            },
            "health": health,
            "queue": depth,
            "activity": activity,
            "failures": failures,
            "show_patients": cfg.audit.include_patient_identifiers,
            "requeue_command": f"diastolic-sr queue {where} --requeue-failed",
            "regrade_command": f"diastolic-sr queue {where} --regrade STUDY_INSTANCE_UID",
            "config_digest": cfg.digest(),
            "config_toml": effective_toml(cfg),
            "audit_days": cfg.audit.default_days,
            "data_dir": data_dir,
        }

    def status(self, query: dict[str, list[str]]) -> tuple[int, str]:
        ctx = self.context()
        return 200, render("status.html.j2", **ctx)

    # -- the audit ---------------------------------------------------------------------------

    def audit(self, query: dict[str, list[str]], now: float | None = None) -> tuple[int, str]:
        """The audit of the last ``days`` days (``?days=N``; default ``audit.default_days``),
        or ``?all=1`` for the whole journal."""
        from service.audit.render import audit_html
        from service.audit.report import build_report

        now = time.time() if now is None else now
        cfg = self.node.config
        days: int | None = cfg.audit.default_days
        if query.get("all"):
            days = None
        elif query.get("days"):
            try:
                days = int(query["days"][0])
                if not 1 <= days <= 36600:
                    raise ValueError
            except ValueError:
                return 400, render(
                    "message.html.j2",
                    title="Bad request",
                    message="days must be a whole number of days from 1 to 36600",
                )
        since = None if days is None else now - days * 86400
        with self._lock:
            report = build_report(self._reader().iter_audit_rows(since, None), since=since, now=now)
        links = tuple((f"last {d} days", f"/audit?days={d}") for d in AUDIT_PERIODS)
        return 200, audit_html(
            report,
            node=cfg.node.ae_title,
            back_link="/",
            period_links=(*links, ("all", "/audit?all=1")),
        )

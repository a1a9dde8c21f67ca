"""The node's lifecycle: open the store, resume pending work, start the threads, stop cleanly.

Threads
-------
* pynetdicom's server thread and one thread per association (``listener``): receive, store
  durably, journal, acknowledge.
* ``assembler``: waits for settle windows, hands studies to the ``grade`` pool.
* ``sender``: delivers results from the journal's outbox, with back-off.
* ``http`` (when enabled): ``/healthz`` and ``/metrics``.
* ``retention`` (when ``retention.days`` > 0): purges finished work every few hours.

Reload (SIGHUP, :meth:`Node.reload`): a new configuration that passes validation and the
preflight checks is put in force for new associations, new studies and new deliveries; open
associations go on untouched.  Keys that need a restart (listening address, limits, TLS, the
HTTP endpoint, worker count, log format) keep their running values and are named in the log.

Stop (SIGTERM): close the listening socket, let open associations finish (bounded by
``limits.shutdown_grace_seconds``, then abort them: whatever they had not been acknowledged
stays with the sender), let the studies being graded finish, stop the sender after its current
association, close the journal.  Pending work stays in the journal and resumes on the next start.
"""

from __future__ import annotations

import contextlib
import fcntl
import json
import logging
import os
import shutil
import threading
import time
from pathlib import Path
from typing import IO, Any

from prometheus_client import CollectorRegistry

from service.config import RESTART_ONLY, Config
from service.errors import UserError
from service.network.assembly import Assembler, GradeFunction
from service.network.listener import Listener
from service.network.sender import Sender
from service.observability.http import HttpEndpoint
from service.observability.logs import event, set_level
from service.observability.metrics import Metrics
from service.store.journal import Journal, open_journal
from service.store.retention import purge
from service.store.spool import durable_write

log = logging.getLogger("diastolic_sr.service")


def status_path(data_dir: Path) -> Path:
    return Path(data_dir) / "run" / "listener.json"


class Node:
    def __init__(
        self,
        config: Config,
        *,
        grade_fn: GradeFunction | None = None,
        poll_seconds: float = 0.5,
        registry: CollectorRegistry | None = None,
        listen: bool = True,
    ) -> None:
        self.config = config
        #: False: the grading and delivery roles only (no listener, no HTTP endpoint, no
        #: retention), for ``backfill`` when no node runs on the data directory
        self._listen = listen
        #: metrics of this node only (a registry per node: nodes in one process never mix)
        self.metrics = Metrics(registry)
        self.http: HttpEndpoint | None = None
        self.http_port: int | None = None
        self._retention_stop = threading.Event()
        self._retention_thread: threading.Thread | None = None
        self.data_dir = config.data_dir.resolve()
        self._grade_fn = grade_fn
        self._poll = poll_seconds
        self._lock_file: IO[str] | None = None
        self.journal: Journal | None = None
        self.listener: Listener | None = None
        self.assembler: Assembler | None = None
        self.sender: Sender | None = None
        self.port: int | None = None
        self._stopped = threading.Event()
        self._pages: Any = None

    def start(self) -> int:
        """Open the store, resume pending work, start listening; returns the port."""
        try:
            (self.data_dir / "run").mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise UserError(f"cannot create data directory {self.data_dir}: {exc}") from None
        self._lock_file = open(self.data_dir / "run" / "lock", "w")  # noqa: SIM115
        try:
            fcntl.flock(self._lock_file, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError:
            self._lock_file.close()
            self._lock_file = None
            raise UserError(
                f"data directory {self.data_dir} is in use by another running node"
            ) from None
        self.journal = open_journal(self.data_dir)
        counts = self.journal.recover()
        log.info("journal %s opened: %s", self.journal.location, _summary(counts))
        self.metrics.watch_queue(self.journal.queue_depth)
        self.sender = Sender(
            self.config, self.journal, poll_seconds=self._poll, metrics=self.metrics
        )
        self.assembler = Assembler(
            self.config,
            self.journal,
            grade_fn=self._grade_fn,
            on_result=self.sender.wake,
            poll_seconds=self._poll,
            metrics=self.metrics,
        )
        self.listener = Listener(
            self.config,
            self.journal,
            on_received=lambda _study: self.assembler.wake() if self.assembler else None,
            metrics=self.metrics,
        )
        self.sender.start()
        self.assembler.start()
        self._started_at = time.time()
        if not self._listen:
            return 0
        try:
            self.port = self.listener.start()
        except OSError as exc:
            self.stop()
            raise UserError(
                f"cannot listen on {self.config.node.bind or '*'}:{self.config.node.port}: "
                f"{exc.strerror or exc}"
            ) from None
        except UserError:
            self.stop()
            raise
        self._start_http()
        self._retention_thread = threading.Thread(
            target=self._retention_loop, name="retention", daemon=True
        )
        self._retention_thread.start()
        self._write_status()
        return self.port

    def _write_status(self) -> None:
        durable_write(
            status_path(self.data_dir),
            json.dumps(
                {
                    "pid": os.getpid(),
                    "ae_title": self.config.node.ae_title,
                    "bind": self.config.node.bind,
                    "port": self.port,
                    "http_port": self.http_port,
                    "config_digest": self.config.digest(),
                    "started_at": self._started_at,
                }
            ).encode(),
        )

    def _start_http(self) -> None:
        cfg = self.config.http
        if not cfg.enabled:
            return
        pages = {}
        if cfg.status_page:
            from service.observability.status_page import StatusPages

            self._pages = StatusPages(self)
            pages = self._pages.pages()
        try:
            self.http = HttpEndpoint(
                cfg.bind,
                cfg.port,
                health=self.health,
                metrics=self.metrics.exposition,
                pages=pages,
                auth=(cfg.username, cfg.password) if cfg.username else None,
            )
        except OSError as exc:
            # the DICOM service goes on; the missing endpoint shows in monitoring
            event(
                "http_unavailable",
                f"health and metrics endpoint not started on {cfg.bind}:{cfg.port}: "
                f"{exc.strerror or exc}",
                level=logging.ERROR,
                bind=cfg.bind,
                port=cfg.port,
            )
            return
        self.http_port = self.http.start()
        what = "status page, audit, health and metrics" if pages else "health and metrics"
        event(
            "http_listening",
            f"{what} on http://{cfg.bind}:{self.http_port}/"
            + (" (basic authentication)" if cfg.username else ""),
            bind=cfg.bind,
            port=self.http_port,
        )

    # -- health -------------------------------------------------------------------------------

    def health(self) -> dict[str, Any]:
        """The checks behind /healthz: listener up, journal writable, disk space."""
        checks: dict[str, dict[str, Any]] = {}
        up = self.listener is not None and self.listener.is_up() and not self._stopped.is_set()
        checks["listener"] = {"ok": up, "port": self.port}
        try:
            assert self.journal is not None
            self.journal.check_writable()
            checks["journal"] = {"ok": True}
        except Exception as exc:
            checks["journal"] = {"ok": False, "error": f"{type(exc).__name__}: {exc}"}
        need = self.config.http.min_free_disk_mb
        try:
            free = shutil.disk_usage(self.data_dir).free // (1024 * 1024)
            checks["disk"] = {"ok": free >= need, "free_mb": int(free), "min_free_mb": need}
        except OSError as exc:
            checks["disk"] = {"ok": False, "error": str(exc)}
        ok = all(c["ok"] for c in checks.values())
        return {"status": "ok" if ok else "fail", "checks": checks}

    # -- retention ----------------------------------------------------------------------------

    def purge_now(self, *, now: float | None = None) -> int:
        """Run the retention purge once; returns the number of studies purged."""
        if self.journal is None:
            return 0
        report = purge(self.journal, self.config.retention.days, now=now)
        if report.studies:
            event(
                "retention_purge",
                f"purged {report.studies} finished stud{'y' if report.studies == 1 else 'ies'} "
                f"({report.files} spooled files) older than {self.config.retention.days:g} days",
                studies=report.studies,
                files=report.files,
            )
        return report.studies

    def _retention_loop(self) -> None:
        while not self._retention_stop.is_set():
            try:
                self.purge_now()
            except Exception:
                log.exception("retention purge failed; retrying later")
            self._retention_stop.wait(self.config.retention.interval_hours * 3600)

    # -- reload -------------------------------------------------------------------------------

    def reload(self, new: Config) -> list[str]:
        """Put ``new`` in force (already validated and preflighted by the caller).  Returns the
        keys that changed but need a restart (they keep their running values)."""
        old = self.config
        kept = [key for key in RESTART_ONLY if _get(new, key) != _get(old, key)]
        effective = new.model_copy(
            update={
                "node": old.node,
                "limits": old.limits,
                "tls": old.tls,
                "http": old.http,
                "assembly": new.assembly.model_copy(update={"workers": old.assembly.workers}),
                "logging": new.logging.model_copy(update={"format": old.logging.format}),
            }
        )
        self.config = effective
        for part in (self.listener, self.assembler, self.sender):
            if part is not None:
                part.config = effective
        set_level(effective.logging.level)
        self._retention_stop.set()  # wake the purge loop: it may have a new interval
        if self._retention_thread is not None:
            self._retention_thread.join(5)
        self._retention_stop = threading.Event()
        self._retention_thread = threading.Thread(
            target=self._retention_loop, name="retention", daemon=True
        )
        self._retention_thread.start()
        if self.port is not None:
            self._write_status()
        return kept

    def stop(self) -> None:
        if self._stopped.is_set():
            return
        self._stopped.set()
        log.info("stopping: no new associations")
        if self.listener is not None and self.listener.server is not None:
            self.listener.stop_accepting()
            deadline = time.monotonic() + self.config.limits.shutdown_grace_seconds
            while self.listener.active_associations() and time.monotonic() < deadline:
                time.sleep(0.05)
            if self.listener.active_associations():
                log.warning("aborting associations still open after the grace period")
                self.listener.abort_all()
        self._retention_stop.set()
        if self._retention_thread is not None:
            self._retention_thread.join(30)
        if self.http is not None:
            self.http.stop()
        if self._pages is not None:
            self._pages.close()
        if self.assembler is not None:
            self.assembler.stop()
        if self.sender is not None:
            self.sender.stop()
        if self.journal is not None:
            try:
                log.info("stopped; journal: %s", _summary(self.journal.counts()))
            finally:
                self.journal.close()
        with contextlib.suppress(OSError):
            status_path(self.data_dir).unlink(missing_ok=True)
        if self._lock_file is not None:
            self._lock_file.close()
            self._lock_file = None

    def __enter__(self) -> Node:
        self.start()
        return self

    def __exit__(self, *exc: object) -> None:
        self.stop()


def _get(cfg: Config, key: str) -> Any:
    value: Any = cfg
    for part in key.split("."):
        value = getattr(value, part)
    return value


def _summary(counts: dict[str, int]) -> str:
    return ", ".join(f"{k}={v}" for k, v in sorted(counts.items())) or "empty"

"""The node's lifecycle: open the journal, resume pending work, start the roles, stop cleanly.

Roles: the receiver (pynetdicom listener: store durably, journal, acknowledge), the graders
(claim settled studies, grade, record results) and the sender (one worker per destination,
claims due deliveries).  They share nothing but the journal.  ``serve`` runs each role in a
process of its own under a supervisor (:mod:`service.network.supervisor`); :class:`Node` runs
them as threads of one process, for the tests and the demo.  What both have in common lives in
:class:`NodeBase`: the data directory's lock, the journal's recovery, the health and metrics
endpoint (``/healthz``, ``/metrics``), the retention purge, the status file and the reload.

Reload (SIGHUP): a new configuration that passes validation and the preflight checks is put in
force for new associations, new studies and new deliveries; open associations go on untouched.
Keys that need a restart (listening address, limits, TLS, the HTTP endpoint, worker count, log
format) keep their running values and are named in the log.

Stop (SIGTERM): close the listening socket, let open associations finish (bounded by
``limits.shutdown_grace_seconds``, then abort them: whatever they had not been acknowledged
stays with the sender), let the studies being graded finish, stop the sender after its current
C-STORE, close the journal.  Pending work stays in the journal and resumes on the next start.
"""

from __future__ import annotations

import contextlib
import fcntl
import json
import logging
import os
import shutil
import socket
import threading
import time
from pathlib import Path
from typing import IO, Any

from prometheus_client import CollectorRegistry

from service.config import RESTART_ONLY, Config
from service.errors import UserError
from service.network.grader import GradeFunction, Grader, LeaseKeeper
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


def node_identity(config: Config) -> str:
    """This node among the nodes that share a journal: its host and data directory.  Every
    claim it makes names it, so that on a restart it gives back its own earlier claims."""
    return f"{socket.gethostname()}:{config.data_dir.resolve()}"


def owner_name(node_id: str, role: str, pid: int | None = None) -> str:
    """The owner of a role's claims: node, role and process."""
    return f"{node_id}/{role}/{os.getpid() if pid is None else pid}"


def effective_reload(old: Config, new: Config) -> tuple[Config, list[str]]:
    """The configuration a reload puts in force: ``new``, with the keys that need a restart
    kept at their running values; and those keys' names, when they changed."""
    kept = [key for key in RESTART_ONLY if _get(new, key) != _get(old, key)]
    effective = new.model_copy(
        update={
            "node": old.node,
            "limits": old.limits,
            "tls": old.tls,
            "http": old.http,
            "journal": old.journal,
            "assembly": new.assembly.model_copy(
                update={
                    "workers": old.assembly.workers,
                    "spare_workers": old.assembly.spare_workers,
                }
            ),
            "logging": new.logging.model_copy(update={"format": old.logging.format}),
        }
    )
    return effective, kept


class NodeBase:
    """What the in-process node and the supervisor of ``serve`` share."""

    def __init__(
        self,
        config: Config,
        *,
        registry: CollectorRegistry | None = None,
        lease_seconds: float | None = None,
    ) -> None:
        self.config = config
        #: metrics of this node only (a registry per node: nodes in one process never mix)
        self.metrics = Metrics(registry)
        #: how long a claim holds without renewal (``journal.lease_seconds``)
        self.lease_seconds = (
            config.journal.lease_seconds if lease_seconds is None else lease_seconds
        )
        self.http: HttpEndpoint | None = None
        self.http_port: int | None = None
        self._retention_stop = threading.Event()
        self._retention_thread: threading.Thread | None = None
        self.data_dir = config.data_dir.resolve()
        self.node_id = node_identity(config)
        self._lock_file: IO[str] | None = None
        self.journal: Journal | None = None
        self.port: int | None = None
        self._started_at = time.time()
        self._stopped = threading.Event()
        self._pages: Any = None

    # -- start ----------------------------------------------------------------------------------

    def _lock_data_dir(self) -> None:
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

    def _open_journal(self, connections: int = 4) -> Journal:
        """The journal, with this node's earlier claims given back (``connections``: at most
        that many database connections at once, for a journal in a database server)."""
        journal = open_journal(self.config, max_connections=connections)
        counts = journal.recover(owner_prefix=self._recovery_prefix(journal))
        log.info("journal %s opened: %s", journal.location, _summary(counts))
        self.journal = journal
        self.metrics.watch_queue(journal.queue_depth)
        return journal

    def _recovery_prefix(self, journal: Journal) -> str:
        """Whose claims a start gives back: every claim in a journal of this node's own (the
        data directory's lock says no other process uses it), this node's in a shared one."""
        return f"{self.node_id}/" if journal.shared else ""

    def _start_services(self) -> None:
        self._start_http()
        self._start_retention()
        self._started_at = time.time()
        self._write_status()

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

    def listener_up(self) -> bool:
        raise NotImplementedError

    def extra_checks(self) -> dict[str, dict[str, Any]]:
        """More checks for /healthz (the supervisor's processes)."""
        return {}

    def health(self) -> dict[str, Any]:
        """The checks behind /healthz: listener up, journal writable, disk space."""
        checks: dict[str, dict[str, Any]] = {}
        up = self.listener_up() and not self._stopped.is_set()
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
        checks.update(self.extra_checks())
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
                f"({report.files} stored objects and results) older than "
                f"{self.config.retention.days:g} days",
                studies=report.studies,
                files=report.files,
            )
        return report.studies

    def _retention_loop(self, stop: threading.Event) -> None:
        while not stop.is_set():
            try:
                self.purge_now()
            except Exception:
                log.exception("retention purge failed; retrying later")
            stop.wait(self.config.retention.interval_hours * 3600)

    def _start_retention(self) -> None:
        self._retention_stop = stop = threading.Event()
        self._retention_thread = threading.Thread(
            target=self._retention_loop, args=(stop,), name="retention", daemon=True
        )
        self._retention_thread.start()

    def _stop_retention(self) -> None:
        self._retention_stop.set()
        if self._retention_thread is not None:
            self._retention_thread.join(30)

    # -- reload -------------------------------------------------------------------------------

    def reload(self, new: Config) -> list[str]:
        """Put ``new`` in force (already validated and preflighted by the caller).  Returns the
        keys that changed but need a restart (they keep their running values)."""
        effective, kept = effective_reload(self.config, new)
        self.config = effective
        self._apply(effective)
        set_level(effective.logging.level)
        self._stop_retention()  # the purge loop may have a new interval
        self._start_retention()
        if self.port is not None:
            self._write_status()
        return kept

    def _apply(self, config: Config) -> None:
        """Hand a reloaded configuration to the roles."""

    # -- stop ---------------------------------------------------------------------------------

    def _finish_stop(self) -> None:
        self._stop_retention()
        if self.http is not None:
            self.http.stop()
        if self._pages is not None:
            self._pages.close()
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


class Node(NodeBase):
    """The whole node in one process, its roles as threads (tests and the demo; ``serve`` runs
    them as processes): the listener, ``assembly.workers`` graders and the sender."""

    def __init__(
        self,
        config: Config,
        *,
        grade_fn: GradeFunction | None = None,
        poll_seconds: float = 0.5,
        registry: CollectorRegistry | None = None,
        lease_seconds: float | None = None,
        listen: bool = True,
    ) -> None:
        super().__init__(config, registry=registry, lease_seconds=lease_seconds)
        #: False: the grading and delivery roles only (no listener, no HTTP endpoint, no
        #: retention), for ``backfill`` when no node runs on the data directory
        self._listen = listen
        self._grade_fn = grade_fn
        self._poll = poll_seconds
        self.listener: Listener | None = None
        self.graders: list[Grader] = []
        self.sender: Sender | None = None
        self.leases: LeaseKeeper | None = None

    def start(self) -> int:
        """Open the store, resume pending work, start listening; returns the port."""
        self._lock_data_dir()
        cfg = self.config
        # every association may store at once, every grader and delivery worker may write
        journal = self._open_journal(
            cfg.limits.max_associations + cfg.assembly.workers + len(cfg.destinations) + 4
        )
        self.sender = Sender(
            self.config,
            journal,
            owner=owner_name(self.node_id, "sender"),
            poll_seconds=self._poll,
            lease_seconds=self.lease_seconds,
            metrics=self.metrics,
        )
        self.graders = [
            Grader(
                self.config,
                journal,
                owner=owner_name(self.node_id, f"grader-{i}"),
                grade_fn=self._grade_fn,
                poll_seconds=self._poll,
                lease_seconds=self.lease_seconds,
                metrics=self.metrics,
                on_result=self.sender.wake,
                name=f"grader-{i}",
            )
            for i in range(1, self.config.assembly.workers + 1)
        ]
        self.listener = Listener(
            self.config, journal, on_received=self.wake_graders, metrics=self.metrics
        )
        self.leases = LeaseKeeper(
            journal,
            lambda: [g.owner for g in self.graders] + [self.sender.owner],
            self.lease_seconds,
        )
        self.sender.start()
        for g in self.graders:
            g.start()
        self.leases.start()
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
        self._start_services()
        return self.port

    def wake_graders(self, _study_uid: str) -> None:
        for g in self.graders:
            g.wake()

    def listener_up(self) -> bool:
        return self.listener is not None and self.listener.is_up()

    def _apply(self, config: Config) -> None:
        for part in (self.listener, self.sender, *self.graders):
            if part is not None:
                part.config = config

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
        for g in self.graders:
            g.stop()
        if self.sender is not None:
            self.sender.stop()
        if self.leases is not None:
            self.leases.stop()
        self._finish_stop()

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

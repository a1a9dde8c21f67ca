"""The node's lifecycle: open the store, resume pending work, start the threads, stop cleanly.

Threads
-------
* pynetdicom's server thread and one thread per association (``listener``): receive, store
  durably, journal, acknowledge.
* ``assembler``: waits for settle windows, hands studies to the ``grade`` pool.
* ``sender``: delivers results from the journal's outbox, with back-off.

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
import threading
import time
from pathlib import Path
from typing import IO

from service.config import Config
from service.errors import UserError
from service.network.assembly import Assembler, GradeFunction
from service.network.listener import Listener
from service.network.sender import Sender
from service.store.journal import Journal
from service.store.spool import Spool, durable_write

log = logging.getLogger("diastolic_sr.service")

JOURNAL_NAME = "journal.sqlite3"


def journal_path(data_dir: Path) -> Path:
    return Path(data_dir) / JOURNAL_NAME


def status_path(data_dir: Path) -> Path:
    return Path(data_dir) / "run" / "listener.json"


class Node:
    def __init__(
        self,
        config: Config,
        *,
        grade_fn: GradeFunction | None = None,
        poll_seconds: float = 0.5,
    ) -> None:
        self.config = config
        self.data_dir = config.data_dir.resolve()
        self._grade_fn = grade_fn
        self._poll = poll_seconds
        self._lock_file: IO[str] | None = None
        self.journal: Journal | None = None
        self.spool: Spool | None = None
        self.listener: Listener | None = None
        self.assembler: Assembler | None = None
        self.sender: Sender | None = None
        self.port: int | None = None
        self._stopped = threading.Event()

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
        self.spool = Spool(self.data_dir / "spool")
        self.journal = Journal(journal_path(self.data_dir))
        counts = self.journal.recover()
        log.info("journal %s opened: %s", self.journal.path, _summary(counts))
        self.sender = Sender(self.config, self.journal, poll_seconds=self._poll)
        self.assembler = Assembler(
            self.config,
            self.journal,
            self.spool,
            grade_fn=self._grade_fn,
            on_result=self.sender.wake,
            poll_seconds=self._poll,
        )
        self.listener = Listener(
            self.config,
            self.journal,
            self.spool,
            on_received=lambda _study: self.assembler.wake() if self.assembler else None,
        )
        self.sender.start()
        self.assembler.start()
        try:
            self.port = self.listener.start()
        except OSError as exc:
            self.stop()
            raise UserError(
                f"cannot listen on {self.config.node.bind or '*'}:{self.config.node.port}: "
                f"{exc.strerror or exc}"
            ) from None
        durable_write(
            status_path(self.data_dir),
            json.dumps(
                {
                    "pid": os.getpid(),
                    "ae_title": self.config.node.ae_title,
                    "bind": self.config.node.bind,
                    "port": self.port,
                    "started_at": time.time(),
                }
            ).encode(),
        )
        return self.port

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


def _summary(counts: dict[str, int]) -> str:
    return ", ".join(f"{k}={v}" for k, v in sorted(counts.items())) or "empty"

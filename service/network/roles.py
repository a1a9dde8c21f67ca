"""One role of the node in a process of its own, as ``serve``'s supervisor starts it:
``python -m service.network.roles ROLE --run-dir DIR --node-id ID --name NAME --lifeline FD``.

* ``receiver``: the pynetdicom listener (store durably, journal, acknowledge; nothing else);
  it reports its port, or why it could not listen, in ``run/receiver.json``.
* ``grader``: one grading loop (:class:`service.network.grader.Grader`); with ``--spare``, one
  that grades only on CPU time nothing else wants (``assembly.spare_workers``).
* ``sender``: the delivery workers, one per destination (:class:`service.network.sender.Sender`).

Every role opens the journal itself and reads the configuration the supervisor wrote
(``run/config.json``: validated, restart-only keys kept); SIGHUP reads it again, SIGTERM stops
the role cleanly (the receiver after its open associations, within
``limits.shutdown_grace_seconds``; a grader after its study; the sender after its C-STORE).
SIGINT is left to the supervisor.  The role ends at once when the supervisor is gone (the
reading end of a pipe only the supervisor writes to closes), so no role outlives its node.
"""

from __future__ import annotations

import argparse
import contextlib
import json
import logging
import os
import signal
import sys
import threading
import time
from pathlib import Path
from typing import Any

from service.config import Config, config_from_dict
from service.errors import UserError

log = logging.getLogger("diastolic_sr.roles")

ROLES = ("receiver", "grader", "sender")

#: grading processes give way to the receiver when both want a core
GRADER_NICENESS = 5


def config_path(run_dir: Path) -> Path:
    return Path(run_dir) / "config.json"


def receiver_status_path(run_dir: Path) -> Path:
    return Path(run_dir) / "receiver.json"


def write_run_config(run_dir: Path, config: Config) -> None:
    """The configuration the roles run on (owner-only: it holds the configuration's
    secrets, as the configuration file does)."""
    from service.store.spool import durable_write

    data = {"config": config.model_dump(mode="json"), "base_dir": config.base_dir}
    durable_write(config_path(run_dir), json.dumps(data).encode())


def read_run_config(run_dir: Path) -> Config:
    data = json.loads(config_path(run_dir).read_text(encoding="utf-8"))
    return config_from_dict(data["config"], base_dir=data["base_dir"], source="(run)")


def _watch_lifeline(fd: int) -> None:
    """Block until the supervisor's end of the pipe closes, then end this process."""
    with contextlib.suppress(OSError):
        while os.read(fd, 4096):
            pass
    os._exit(0)


class _Signals:
    def __init__(self) -> None:
        self.stop = threading.Event()
        self.reload = threading.Event()
        self.wake = threading.Event()

    def install(self) -> None:
        signal.signal(signal.SIGINT, signal.SIG_IGN)  # the supervisor decides
        signal.signal(signal.SIGTERM, self._on)
        signal.signal(signal.SIGHUP, self._on)

    def _on(self, signum: int, _frame: Any) -> None:
        (self.reload if signum == signal.SIGHUP else self.stop).set()
        self.wake.set()


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(prog="diastolic-sr role")
    p.add_argument("role", choices=ROLES)
    p.add_argument("--run-dir", required=True)
    p.add_argument("--node-id", required=True)
    p.add_argument("--name", default="")
    p.add_argument("--lifeline", type=int)
    p.add_argument("--poll-seconds", type=float, default=0.5)
    p.add_argument("--spare", action="store_true", help="grader: grade on idle CPU time only")
    args = p.parse_args(argv)
    from service.network.service import owner_name

    #: whose claims this process's are (the supervisor names it the same way)
    args.owner = owner_name(args.node_id, args.name or args.role)
    signals = _Signals()
    signals.install()
    if args.lifeline is not None:
        threading.Thread(
            target=_watch_lifeline, args=(args.lifeline,), name="lifeline", daemon=True
        ).start()
    run_dir = Path(args.run_dir)
    config = read_run_config(run_dir)
    from service.observability.logs import configure_logging, set_process

    set_process(args.name or args.role)
    configure_logging(
        os.environ.get("DIASTOLIC_SR_LOG_FORMAT") or config.logging.format,
        os.environ.get("DIASTOLIC_SR_LOG_LEVEL") or config.logging.level,
    )
    try:
        return ROLE_MAIN[args.role](config, args, signals, run_dir)
    except UserError as exc:
        log.error("%s: %s", args.name or args.role, exc)
        return 2


def _open_journal(config: Config, connections: int) -> Any:
    """The journal, with at most ``connections`` database connections at once (for a
    journal in a database server)."""
    from service.store.journal import open_journal

    return open_journal(config, max_connections=connections)


def _serve_until_stopped(signals: _Signals, run_dir: Path, parts: list[Any]) -> None:
    """Wait for SIGTERM; on SIGHUP hand the roles the configuration the supervisor wrote."""
    from service.observability.logs import set_level

    while not signals.stop.is_set():
        signals.wake.wait(1.0)
        signals.wake.clear()
        if signals.reload.is_set() and not signals.stop.is_set():
            signals.reload.clear()
            try:
                config = read_run_config(run_dir)
            except Exception as exc:  # the supervisor checked it; keep what runs
                log.error("cannot read the reloaded configuration: %s", exc)
                continue
            for part in parts:
                part.config = config
            set_level(os.environ.get("DIASTOLIC_SR_LOG_LEVEL") or config.logging.level)


def run_receiver(config: Config, args: Any, signals: _Signals, run_dir: Path) -> int:
    from service.network.listener import Listener
    from service.observability.metrics import Metrics
    from service.store.spool import durable_write

    status = receiver_status_path(run_dir)
    # every open association may store an object at once
    journal = _open_journal(config, config.limits.max_associations + 2)
    listener = Listener(config, journal, metrics=Metrics())
    try:
        port = listener.start()
    except (OSError, UserError) as exc:
        why = (
            f"cannot listen on {config.node.bind or '*'}:{config.node.port}: "
            f"{getattr(exc, 'strerror', None) or exc}"
        )
        durable_write(status, json.dumps({"pid": os.getpid(), "error": why}).encode())
        journal.close()
        raise UserError(why) from None
    durable_write(status, json.dumps({"pid": os.getpid(), "port": port}).encode())
    _serve_until_stopped(signals, run_dir, [listener])
    listener.stop_accepting()
    deadline = time.monotonic() + listener.config.limits.shutdown_grace_seconds
    while listener.active_associations() and time.monotonic() < deadline:
        time.sleep(0.05)
    if listener.active_associations():
        log.warning("aborting associations still open after the grace period")
        listener.abort_all()
    journal.close()
    return 0


def run_grader(config: Config, args: Any, signals: _Signals, run_dir: Path) -> int:
    from service.network.grader import Grader
    from service.network.grading_worker import warm_up_pipeline
    from service.observability.metrics import Metrics

    with contextlib.suppress(OSError):
        os.nice(GRADER_NICENESS)
    warm_up_pipeline()  # data the pipeline loads on first use, loaded before the first study
    journal = _open_journal(config, 3)
    grader = Grader(
        config,
        journal,
        owner=args.owner,
        poll_seconds=args.poll_seconds,
        lease_seconds=config.journal.lease_seconds,
        metrics=Metrics(),
        name=args.name or "grader",
        spare=args.spare,
    )
    return _run_leased(grader, journal, config, signals, run_dir)


def run_sender(config: Config, args: Any, signals: _Signals, run_dir: Path) -> int:
    from service.network.sender import Sender
    from service.observability.metrics import Metrics

    journal = _open_journal(config, len(config.destinations) + 8)  # a worker per destination
    sender = Sender(
        config,
        journal,
        owner=args.owner,
        poll_seconds=args.poll_seconds,
        lease_seconds=config.journal.lease_seconds,
        metrics=Metrics(),
    )
    return _run_leased(sender, journal, config, signals, run_dir)


def _run_leased(worker: Any, journal: Any, config: Config, signals: _Signals, run_dir: Path) -> int:
    """Run a role that claims work (a grader, the sender) with its leases kept renewed, until
    the supervisor stops it; then stop it, let its leases go and close the journal."""
    from service.network.grader import LeaseKeeper

    leases = LeaseKeeper(journal, lambda: [worker.owner], config.journal.lease_seconds)
    worker.start()
    leases.start()
    _serve_until_stopped(signals, run_dir, [worker])
    worker.stop()
    leases.stop()
    journal.close()
    return 0


ROLE_MAIN = {"receiver": run_receiver, "grader": run_grader, "sender": run_sender}


if __name__ == "__main__":
    sys.exit(main())

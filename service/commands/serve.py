"""``diastolic-sr serve``: run the DICOM node until SIGTERM/SIGINT; SIGHUP reloads the
configuration file (a bad file is refused and the running configuration stays in force)."""

from __future__ import annotations

import argparse
import logging
import signal
import threading
from types import FrameType

from service.config import Config, apply_overrides, load_config
from service.errors import UserError
from service.observability.logs import configure_logging, event, set_level

log = logging.getLogger("diastolic_sr.serve")


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser(
        "serve",
        help="run the DICOM node (receive SRs, grade studies, send results)",
        description="Run the DICOM node: accept echo measurement SRs by C-STORE, grade each "
        "study after its settle window and send the result SR to the configured destinations. "
        "Flags override the configuration file; with neither, embedded defaults are used and "
        "results are written to a folder under the data directory. The receiver, the graders "
        "(assembly.workers) and the sender run as processes of their own, supervised by this "
        "one (a process that ends is restarted). SIGTERM stops cleanly; SIGHUP reloads the "
        "configuration file without dropping open associations.",
    )
    add_node_arguments(p)
    p.add_argument(
        "--log-level",
        choices=["DEBUG", "INFO", "WARNING", "ERROR"],
        help="log level (default: logging.level of the configuration, INFO)",
    )
    p.add_argument(
        "--log-format",
        choices=["json", "text"],
        help="json: one JSON object per line; text: readable lines (default: logging.format, json)",
    )
    p.add_argument(
        "--http-port",
        type=int,
        metavar="N",
        help="port of the /healthz and /metrics endpoint (0: any free; default 11180)",
    )
    p.add_argument(
        "--lease-seconds",
        type=float,
        metavar="S",
        help="a claim on a study or a delivery holds S seconds without renewal: work of a "
        "process or node that died is taken over after it (default: journal.lease_seconds, 30)",
    )
    p.set_defaults(func=run)


def add_node_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("--config", metavar="FILE", help="configuration file (TOML)")
    p.add_argument("--port", type=int, metavar="N", help="TCP port to listen on (0: any free)")
    p.add_argument("--ae-title", metavar="AET", help="our AE title (called AE must match)")
    p.add_argument(
        "--forward",
        action="append",
        default=[],
        metavar="AET@HOST:PORT",
        help="send results to this DICOM peer (repeatable; joins the default route)",
    )
    p.add_argument("--data-dir", metavar="DIR", help="the journal's folder")
    p.add_argument(
        "--settle-seconds",
        type=float,
        metavar="S",
        help="grade a study S seconds after its last object (default 10)",
    )
    p.add_argument("--bind", metavar="ADDRESS", help="address to listen on (default: all)")
    add_journal_argument(p)


def add_journal_argument(p: argparse.ArgumentParser) -> None:
    p.add_argument(
        "--journal",
        metavar="URL",
        help="share the journal with other nodes in this PostgreSQL database "
        "(postgresql://USER@HOST:PORT/DB; the password from journal.password, PGPASSWORD or "
        "~/.pgpass, never in the URL); default: journal.url, else SQLite in the data directory",
    )


def config_from_args(args: argparse.Namespace) -> Config:
    cfg = load_config(args.config)
    return apply_overrides(
        cfg,
        port=args.port,
        ae_title=args.ae_title,
        forward=args.forward,
        data_dir=args.data_dir,
        settle_seconds=args.settle_seconds,
        bind=args.bind,
        http_port=getattr(args, "http_port", None),
        lease_seconds=getattr(args, "lease_seconds", None),
        journal=getattr(args, "journal", None),
    )


def reload_config(node: object, args: argparse.Namespace) -> bool:
    """Read the configuration again and put it in force; False (old one kept) on any error."""
    from service.network.preflight import preflight

    try:
        new = config_from_args(args)
        preflight(new)
    except UserError as exc:
        event(
            "config_reload_refused",
            f"configuration reload refused, the running configuration stays in force: {exc}",
            level=logging.ERROR,
            reason=str(exc),
        )
        return False
    kept = node.reload(new)  # type: ignore[attr-defined]
    if getattr(args, "log_level", None):  # the command line beats the file, also on reload
        set_level(args.log_level)
    event(
        "config_reloaded",
        f"configuration reloaded (digest {node.config.digest()})"  # type: ignore[attr-defined]
        + (f"; needs a restart to change: {', '.join(kept)}" if kept else ""),
        digest=node.config.digest(),  # type: ignore[attr-defined]
        restart_needed=kept,
    )
    return True


def run(args: argparse.Namespace) -> int:
    from service.network.preflight import preflight
    from service.network.supervisor import Supervisor

    cfg = config_from_args(args)
    configure_logging(args.log_format or cfg.logging.format, args.log_level or cfg.logging.level)
    preflight(cfg)
    stop = threading.Event()
    wake = threading.Event()
    hup = threading.Event()
    received: list[str] = []

    def on_signal(signum: int, _frame: FrameType | None) -> None:
        if signum == signal.SIGHUP:
            hup.set()
        else:
            received.append(signal.Signals(signum).name)
            stop.set()
        wake.set()

    signal.signal(signal.SIGTERM, on_signal)
    signal.signal(signal.SIGINT, on_signal)
    signal.signal(signal.SIGHUP, on_signal)
    node = Supervisor(cfg, log_level=args.log_level, log_format=args.log_format)
    try:
        node.start()
        event(
            "node_ready",
            f"node {cfg.node.ae_title} ready (data directory {node.data_dir}, configuration "
            f"digest {cfg.digest()})",
            ae_title=cfg.node.ae_title,
            port=node.port,
            http_port=node.http_port,
            digest=cfg.digest(),
        )
        while not stop.is_set():
            wake.wait(0.2)
            wake.clear()
            node.watch()
            if hup.is_set() and not stop.is_set():
                hup.clear()
                event("signal", "SIGHUP received: reloading the configuration", signal="SIGHUP")
                reload_config(node, args)
        name = received[0] if received else "?"
        event("signal", f"signal {name} received: stopping", signal=name)
    finally:
        node.stop()
    return 0

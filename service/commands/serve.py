"""``diastolic-sr serve``: run the DICOM node until SIGTERM/SIGINT."""

from __future__ import annotations

import argparse
import logging
import signal
import threading
from types import FrameType

from service.config import Config, apply_overrides, load_config

log = logging.getLogger("diastolic_sr.serve")


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser(
        "serve",
        help="run the DICOM node (receive SRs, grade studies, send results)",
        description="Run the DICOM node: accept echo measurement SRs by C-STORE, grade each "
        "study after its settle window and send the result SR to the configured destinations. "
        "Flags override the configuration file; with neither, embedded defaults are used and "
        "results are written to a folder under the data directory. SIGTERM stops cleanly.",
    )
    add_node_arguments(p)
    p.add_argument(
        "--log-level",
        default="INFO",
        choices=["DEBUG", "INFO", "WARNING", "ERROR"],
        help="log level (default: %(default)s)",
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
    p.add_argument("--data-dir", metavar="DIR", help="spool and journal folder")
    p.add_argument(
        "--settle-seconds",
        type=float,
        metavar="S",
        help="grade a study S seconds after its last object (default 10)",
    )
    p.add_argument("--bind", metavar="ADDRESS", help="address to listen on (default: all)")


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
    )


def check_guideline(cfg: Config) -> None:
    from service.errors import UserError
    from service.grading import IMPLEMENTED_GUIDELINES

    if cfg.grading.guideline not in IMPLEMENTED_GUIDELINES:
        raise UserError(
            f'grading.guideline: "{cfg.grading.guideline.value}" is not implemented in full; '
            "available: " + ", ".join(g.value for g in IMPLEMENTED_GUIDELINES)
        )


def run(args: argparse.Namespace) -> int:
    from service.network.service import Node

    logging.basicConfig(
        level=getattr(logging, args.log_level),
        format="%(asctime)s %(levelname)s %(name)s: %(message)s",
    )
    for noisy in ("pynetdicom", "highdicom"):
        logging.getLogger(noisy).setLevel(logging.WARNING)
    cfg = config_from_args(args)
    check_guideline(cfg)
    stop = threading.Event()

    def on_signal(signum: int, _frame: FrameType | None) -> None:
        log.info("signal %s received", signal.Signals(signum).name)
        stop.set()

    signal.signal(signal.SIGTERM, on_signal)
    signal.signal(signal.SIGINT, on_signal)
    node = Node(cfg)
    try:
        node.start()
        log.info(
            "node %s ready (data directory %s, configuration digest %s)",
            cfg.node.ae_title,
            node.data_dir,
            cfg.digest(),
        )
        while not stop.wait(0.5):
            pass
    finally:
        node.stop()
    return 0

"""Regenerate the README's pictures of the status page and the audit from the demo data:
``python -m service.demo.screenshots [OUT_DIR]`` (default ``docs/``).

What it does, all on loopback and in a temporary folder: records an invented six-month history
of the fictional Harbour Vale Cardiac Centre's three scanners (:mod:`service.demo.history`),
starts a node with its status page on that journal and a loopback PACS, sends the demo SRs as
two of the scanners would, stops the PACS and sends one more study, whose delivery then fails,
and sends a last one that waits in its settle window (the queue); then opens ``/`` and
``/audit`` in headless Chromium and saves a screenshot of each.  Needs Playwright (the test
extra) and Chromium (``/usr/bin/chromium``, or ``CHROMIUM`` in the environment).
"""

from __future__ import annotations

import argparse
import os
import tempfile
import time
from pathlib import Path

from service.errors import UserError

CHROMIUM = os.environ.get("CHROMIUM", "/usr/bin/chromium")
#: Chromium switches for a headless run that talks to nothing but loopback
CHROMIUM_ARGS = (
    "--no-sandbox",
    "--disable-gpu",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
    "--no-first-run",
)
#: the two demo scanners the demo SRs are sent from
SENDERS = ("HV_ECHO_1", "HV_ECHO_2")


def _wait(condition, timeout: float, what: str):  # type: ignore[no-untyped-def]
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        value = condition()
        if value:
            return value
        time.sleep(0.1)
    raise UserError(f"timed out after {timeout:g} s waiting for {what}")


def browser_shots(pages: list[tuple[str, Path, int | None]], *, width: int = 1100) -> None:
    """Open each URL in headless Chromium and save a screenshot: the whole page, or its top
    ``height`` pixels."""
    try:
        from playwright.sync_api import sync_playwright
    except ImportError:
        raise UserError(
            "the screenshots need Playwright: pip install -e '.[test]' (and Chromium)"
        ) from None
    if not Path(CHROMIUM).exists():
        raise UserError(f"Chromium not found at {CHROMIUM} (set CHROMIUM)")
    with sync_playwright() as p:
        browser = p.chromium.launch(executable_path=CHROMIUM, args=list(CHROMIUM_ARGS))
        try:
            page = browser.new_page(viewport={"width": width, "height": 900})
            for url, out, height in pages:
                page.goto(url, wait_until="load")
                if height is None:
                    page.screenshot(path=str(out), full_page=True)
                else:
                    clip = {"x": 0, "y": 0, "width": width, "height": height}
                    page.screenshot(path=str(out), full_page=True, clip=clip)
        finally:
            browser.close()


def make_screenshots(out_dir: Path, *, history: int = 400) -> list[Path]:
    """The two README pictures, written to ``out_dir``."""
    from service.config import apply_overrides, config_from_dict
    from service.demo.history import SCANNERS, fill_history, invented_studies
    from service.demo.scenario import SITE_MAPPING, demo_datasets
    from service.network.demo_loop import LOOPBACK, ResultReceiver, send_datasets
    from service.network.service import Node

    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    with tempfile.TemporaryDirectory(prefix="diastolic-sr-shots-") as tmp:
        data_dir = Path(tmp) / "node"
        fill_history(data_dir, history, days=180)
        pacs = ResultReceiver("HV_PACS")
        pacs.start()
        cfg = apply_overrides(
            config_from_dict(
                {
                    "delivery": {
                        "max_attempts": 2,
                        "backoff_initial_seconds": 0.2,
                        "backoff_max_seconds": 0.5,
                    },
                    "grading": {"mapping_files": [str(SITE_MAPPING)]},
                    "http": {"port": 0},
                    "destinations": {
                        "PACS": {"ae_title": "HV_PACS", "host": LOOPBACK, "port": pacs.port}
                    },
                }
            ),
            port=0,
            bind=LOOPBACK,
            data_dir=str(data_dir),
            settle_seconds=2.0,
        )
        node = Node(cfg, poll_seconds=0.1)
        try:
            port = node.start()
            journal = node.journal
            assert journal is not None
            demo = demo_datasets()
            half = len(demo) // 2
            send_datasets(demo[:half], port, called_ae=cfg.node.ae_title, calling_ae=SENDERS[0])
            send_datasets(demo[half:], port, called_ae=cfg.node.ae_title, calling_ae=SENDERS[1])
            _wait(
                lambda: (
                    journal.queue_depth()
                    == {"studies_waiting": 0, "deliveries_pending": 0, "deliveries_failed": 0}
                ),
                90,
                "the demo studies to be delivered",
            )
            pacs.stop()
            late = list(invented_studies(2, days=1, seed=7))
            ae = SCANNERS[2].calling_ae
            send_datasets([late[0].dataset], port, called_ae=cfg.node.ae_title, calling_ae=ae)
            _wait(
                lambda: journal.queue_depth()["deliveries_failed"] >= 1,
                90,
                "the delivery to the stopped PACS to fail",
            )
            # the last study waits in its settle window while the pictures are taken
            data = node.config.model_dump(mode="json")
            data["assembly"]["settle_seconds"] = 3600
            node.reload(node.config.model_validate({**data, "base_dir": node.config.base_dir}))
            send_datasets([late[1].dataset], port, called_ae=cfg.node.ae_title, calling_ae=ae)
            _wait(lambda: journal.queue_depth()["studies_waiting"] == 1, 30, "the queue")
            base = f"http://{LOOPBACK}:{node.http_port}"
            shots = [
                (f"{base}/", out_dir / "status-page.png", None),
                # the top of the audit: key figures, outcomes, outcomes by pathway
                (f"{base}/audit?days=200", out_dir / "audit-page.png", 2300),
            ]
            browser_shots(shots)
        finally:
            node.stop()
            pacs.stop()
    return [p for _, p, _ in shots]


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(
        prog="python -m service.demo.screenshots",
        description="Regenerate the README pictures of the status page and the audit.",
    )
    parser.add_argument("out", nargs="?", type=Path, default=Path("docs"), help="output folder")
    parser.add_argument("--history", type=int, default=400, help="invented studies recorded")
    args = parser.parse_args(argv)
    try:
        for path in make_screenshots(args.out, history=args.history):
            print(path)
    except UserError as exc:
        print(f"error: {exc}")
        return 2
    return 0


if __name__ == "__main__":  # pragma: no cover
    raise SystemExit(main())

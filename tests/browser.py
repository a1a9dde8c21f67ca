"""Headless Chromium (Debian's ``chromium``) driven by Playwright, for the page tests: every
request the page makes is intercepted, and anything that would leave loopback (or the local
file the test opened) is refused and recorded; console errors and page errors are recorded."""

from __future__ import annotations

import contextlib
import os
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any
from urllib.parse import urlsplit

import pytest

CHROMIUM = "/usr/bin/chromium"
ARGS = [
    "--no-sandbox",
    "--disable-gpu",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
    "--no-first-run",
]
LOCAL_HOSTS = {"127.0.0.1", "localhost", "::1", "[::1]"}


def need_chromium() -> None:
    """Skip without Chromium or Playwright, except in CI, where that is a failure."""
    try:
        import playwright.sync_api  # noqa: F401
    except ImportError:
        reason = "playwright missing (pip install -e '.[test]')"
    else:
        if os.access(CHROMIUM, os.X_OK):
            return
        reason = f"Chromium missing at {CHROMIUM} (Debian package chromium; .ci/run installs it)"
    if os.environ.get("CI"):
        pytest.fail(reason)
    pytest.skip(reason)


@dataclass
class PageLog:
    requests: list[str] = field(default_factory=list)
    refused: list[str] = field(default_factory=list)
    console_errors: list[str] = field(default_factory=list)
    page_errors: list[str] = field(default_factory=list)


def _local(url: str) -> bool:
    parts = urlsplit(url)
    if parts.scheme in ("data", "file", "about"):
        return True
    return parts.scheme in ("http", "https") and (parts.hostname or "") in LOCAL_HOSTS


@contextlib.contextmanager
def chromium(*, javascript: bool = True, width: int = 1100) -> Iterator[tuple[Any, PageLog]]:
    """A page in a fresh headless Chromium, and what it asked for and complained about."""
    need_chromium()
    from playwright.sync_api import sync_playwright

    log = PageLog()
    with sync_playwright() as p:
        browser = p.chromium.launch(executable_path=CHROMIUM, args=ARGS)
        try:
            context = browser.new_context(
                java_script_enabled=javascript, viewport={"width": width, "height": 900}
            )
            page = context.new_page()

            def route(r: Any) -> None:
                url = r.request.url
                log.requests.append(url)
                if _local(url):
                    r.continue_()
                else:
                    log.refused.append(url)
                    r.abort()

            page.route("**/*", route)
            page.on(
                "console",
                lambda m: log.console_errors.append(m.text) if m.type == "error" else None,
            )
            page.on("pageerror", lambda e: log.page_errors.append(str(e)))
            yield page, log
        finally:
            browser.close()


def assert_clean(log: PageLog) -> None:
    """No request left loopback, no console or page error."""
    assert log.requests, "the page made no request at all"
    assert log.refused == []
    assert log.console_errors == []
    assert log.page_errors == []


def screenshot(page: Any, path: Path) -> Path:
    page.screenshot(path=str(path), full_page=True)
    assert path.stat().st_size > 10_000
    return path


def fits_the_width(page: Any) -> bool:
    """Nothing wider than the window: the page needs no sideways scrolling."""
    return bool(page.evaluate("document.documentElement.scrollWidth <= window.innerWidth + 1"))

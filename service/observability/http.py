"""The node's HTTP endpoint: a small stdlib HTTP server on a thread of its own.

* ``GET /healthz``: 200 with a JSON body when the listener is up, the journal takes a write
  and the data directory has enough free space; 503 with the failing check otherwise.
* ``GET /metrics``: Prometheus text exposition of the node's registry.
* ``GET /`` and ``GET /audit`` (when pages are given): the status page and the audit,
  server-rendered HTML with no script; the Content-Security-Policy lets a page load nothing
  from anywhere (styles inline, images as data only).

With a user name and password configured, every path but ``/healthz`` asks for HTTP basic
authentication (RFC 7617); the password is compared in constant time and never logged.
"""

from __future__ import annotations

import base64
import binascii
import hmac
import json
import logging
import threading
from collections.abc import Callable
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from typing import Any
from urllib.parse import parse_qs, urlsplit

from prometheus_client import CONTENT_TYPE_LATEST

log = logging.getLogger("diastolic_sr.http")

HealthFunction = Callable[[], dict[str, Any]]
#: a page: the query parameters in, (HTTP status, HTML) out
PageFunction = Callable[[dict[str, list[str]]], tuple[int, str]]

#: nothing but inline styles and data images; no script, no request to anywhere
PAGE_POLICY = (
    "default-src 'none'; style-src 'unsafe-inline'; img-src data:; base-uri 'none'; "
    "form-action 'self'; frame-ancestors 'none'"
)
REALM = "diastolic-sr"


class _Handler(BaseHTTPRequestHandler):
    server: _Server

    def do_GET(self) -> None:
        url = urlsplit(self.path)
        path = url.path
        if path == "/healthz":
            report = self.server.health()
            body = json.dumps(report, indent=1).encode()
            self._reply(200 if report.get("status") == "ok" else 503, body, "application/json")
            return
        if not self._authorised():
            self._reply(
                401,
                b"authentication required\n",
                "text/plain; charset=utf-8",
                {"WWW-Authenticate": f'Basic realm="{REALM}", charset="UTF-8"'},
            )
            return
        page = self.server.pages.get(path)
        if path == "/metrics":
            self._reply(200, self.server.metrics(), CONTENT_TYPE_LATEST)
        elif page is not None:
            try:
                code, html = page(parse_qs(url.query))
            except Exception:
                log.exception("page %s failed", path)
                code, html = 500, "<!DOCTYPE html><title>error</title><p>internal error; see log"
            self._reply(
                code,
                html.encode("utf-8"),
                "text/html; charset=utf-8",
                {
                    "Content-Security-Policy": PAGE_POLICY,
                    "X-Content-Type-Options": "nosniff",
                    "Referrer-Policy": "no-referrer",
                    "Cache-Control": "no-store",
                },
            )
        else:
            paths = ", ".join([*sorted(self.server.pages), "/healthz", "/metrics"])
            self._reply(404, f"not found: try {paths}\n".encode(), "text/plain; charset=utf-8")

    def _authorised(self) -> bool:
        expected = self.server.auth
        if expected is None:
            return True
        header = self.headers.get("Authorization", "")
        scheme, _, token = header.partition(" ")
        if scheme.lower() != "basic" or not token:
            return False
        try:
            user, sep, password = (
                base64.b64decode(token.strip(), validate=True).decode("utf-8").partition(":")
            )
        except (binascii.Error, UnicodeDecodeError, ValueError):
            return False
        ok_user = hmac.compare_digest(user.encode(), expected[0].encode())
        ok_password = hmac.compare_digest(password.encode(), expected[1].encode())
        return bool(sep) and ok_user and ok_password

    def _reply(
        self, code: int, body: bytes, ctype: str, headers: dict[str, str] | None = None
    ) -> None:
        self.send_response(code)
        self.send_header("Content-Type", ctype)
        self.send_header("Content-Length", str(len(body)))
        for name, value in (headers or {}).items():
            self.send_header(name, value)
        self.end_headers()
        self.wfile.write(body)

    def log_message(self, format: str, *args: Any) -> None:
        log.debug("http %s", format % args)


class _Server(ThreadingHTTPServer):
    daemon_threads = True

    def __init__(
        self,
        address: tuple[str, int],
        health: HealthFunction,
        metrics: Callable[[], bytes],
        pages: dict[str, PageFunction],
        auth: tuple[str, str] | None,
    ) -> None:
        super().__init__(address, _Handler)
        self.health = health
        self.metrics = metrics
        self.pages = pages
        self.auth = auth


class HttpEndpoint:
    def __init__(
        self,
        bind: str,
        port: int,
        *,
        health: HealthFunction,
        metrics: Callable[[], bytes],
        pages: dict[str, PageFunction] | None = None,
        auth: tuple[str, str] | None = None,
    ) -> None:
        """``pages``: path -> page function; ``auth``: (user name, password) for basic
        authentication of every path but /healthz, or None."""
        self._server = _Server((bind, port), health, metrics, dict(pages or {}), auth)
        self._thread = threading.Thread(
            target=self._server.serve_forever, name="http", kwargs={"poll_interval": 0.2}
        )
        self._thread.daemon = True

    @property
    def port(self) -> int:
        return int(self._server.server_address[1])

    def start(self) -> int:
        self._thread.start()
        return self.port

    def stop(self) -> None:
        self._server.shutdown()
        self._server.server_close()
        self._thread.join(5)

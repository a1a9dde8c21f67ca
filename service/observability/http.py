"""The health and metrics endpoint: a small stdlib HTTP server on a thread of its own.

* ``GET /healthz``: 200 with a JSON body when the listener is up, the journal takes a write
  and the data directory has enough free space; 503 with the failing check otherwise.
* ``GET /metrics``: Prometheus text exposition of the node's registry.
"""

from __future__ import annotations

import json
import logging
import threading
from collections.abc import Callable
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from typing import Any

from prometheus_client import CONTENT_TYPE_LATEST

log = logging.getLogger("diastolic_sr.http")

HealthFunction = Callable[[], dict[str, Any]]


class _Handler(BaseHTTPRequestHandler):
    server: _Server

    def do_GET(self) -> None:
        path = self.path.split("?", 1)[0]
        if path == "/healthz":
            report = self.server.health()
            body = json.dumps(report, indent=1).encode()
            self._reply(200 if report.get("status") == "ok" else 503, body, "application/json")
        elif path == "/metrics":
            self._reply(200, self.server.metrics(), CONTENT_TYPE_LATEST)
        else:
            self._reply(404, b"not found: try /healthz or /metrics\n", "text/plain")

    def _reply(self, code: int, body: bytes, ctype: str) -> None:
        self.send_response(code)
        self.send_header("Content-Type", ctype)
        self.send_header("Content-Length", str(len(body)))
        self.end_headers()
        self.wfile.write(body)

    def log_message(self, format: str, *args: Any) -> None:
        log.debug("http %s", format % args)


class _Server(ThreadingHTTPServer):
    daemon_threads = True

    def __init__(
        self, address: tuple[str, int], health: HealthFunction, metrics: Callable[[], bytes]
    ) -> None:
        super().__init__(address, _Handler)
        self.health = health
        self.metrics = metrics


class HttpEndpoint:
    def __init__(
        self, bind: str, port: int, *, health: HealthFunction, metrics: Callable[[], bytes]
    ) -> None:
        self._server = _Server((bind, port), health, metrics)
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

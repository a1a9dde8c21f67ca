"""The dicomweb-client of a configured DICOMweb peer (a destination or an archive): its
``requests`` session carries the authentication (HTTP basic, or a bearer token) and the TLS
verification settings, so no credential ever appears in a URL, a request's own headers or a
log line.

dicomweb-client's own retries are off: a failed request is reported to the caller, which
retries on its own terms (the sender's back-off in the journal, backfill's resumable state).
"""

from __future__ import annotations

import logging
import re
from typing import Any

import requests
from dicomweb_client.api import DICOMwebClient

from service.config import Config, WebPeer

#: dicomweb-client logs every request at INFO with its UIDs; the node logs its own events
logging.getLogger("dicomweb_client").setLevel(logging.WARNING)


class BearerToken(requests.auth.AuthBase):
    """``Authorization: Bearer <token>`` (RFC 6750 section 2.1) on every request; its repr
    never shows the token."""

    def __init__(self, token: str) -> None:
        self._token = token

    def __call__(self, request: requests.PreparedRequest) -> requests.PreparedRequest:
        request.headers["Authorization"] = f"Bearer {self._token}"
        return request

    def __repr__(self) -> str:
        return "BearerToken(********)"


def session_for(peer: WebPeer, config: Config | None = None) -> requests.Session:
    """A ``requests`` session with ``peer``'s authentication and TLS verification."""
    session = requests.Session()
    if peer.token:
        session.auth = BearerToken(peer.token)
    elif peer.username:
        session.auth = requests.auth.HTTPBasicAuth(peer.username, peer.password)
    verify: Any = peer.tls_verify
    if peer.tls_verify and peer.ca_bundle:
        verify = str(config.tls_path(peer.ca_bundle) if config else peer.ca_bundle)
    session.verify = verify
    session.trust_env = False  # no proxy or .netrc credentials from the environment
    return session


def client_for(peer: WebPeer, config: Config | None = None) -> DICOMwebClient:
    """A dicomweb-client for ``peer``: its session, its timeout, no retries of its own."""
    client = DICOMwebClient(
        peer.url,
        session=session_for(peer, config),
        timeout=(peer.timeout, peer.timeout),
    )
    client.set_http_retry_params(retry=False)
    return client


def http_failure(exc: BaseException, where: str) -> str:
    """A one-line reason for a failed request (never a credential: the session's
    authentication is not part of the text, and configured URLs hold none)."""
    if isinstance(exc, requests.HTTPError) and exc.response is not None:
        r = exc.response
        reason = f"HTTP {r.status_code} {r.reason or ''}".strip()
        if r.status_code in (401, 403):
            reason += " (check the username/password or token configured for it)"
        return f"{where}: {reason}"
    if isinstance(exc, requests.exceptions.SSLError):
        return f"{where}: TLS verification failed ({_first_line(exc)})"
    if isinstance(exc, requests.ConnectionError):
        return f"cannot connect to {where}: {_socket_error(exc)}"
    if isinstance(exc, requests.Timeout):
        return f"{where}: no answer in time ({_first_line(exc)})"
    return f"{where}: {type(exc).__name__}: {_first_line(exc)}"


def _socket_error(exc: BaseException) -> str:
    """The operating system's reason inside a connection error (``[Errno 111] Connection
    refused``), rather than the connection pool's whole account of it."""
    m = re.search(r"\[Errno -?\d+\] [^'\"()]+", str(exc))
    return m.group(0).strip() if m else _first_line(exc)


def _first_line(exc: BaseException) -> str:
    text = str(exc).strip().splitlines()
    return text[0][:300] if text else type(exc).__name__

"""TLS contexts (Python ``ssl``) for the listener and for destinations called over TLS.

The profile follows the spirit of DICOM PS3.15 Annex B (TLS secure transport connection
profiles): TLS 1.2 or later, certificate-based authentication of the peer; the listener can
demand client certificates signed by the configured CA bundle.  Errors name the key to fix.
"""

from __future__ import annotations

import ssl

from service.config import Config
from service.errors import UserError

_VERSIONS = {"1.2": ssl.TLSVersion.TLSv1_2, "1.3": ssl.TLSVersion.TLSv1_3}


def _load_chain(ctx: ssl.SSLContext, cfg: Config) -> None:
    tls = cfg.tls
    cert, key = cfg.tls_path(tls.certificate), cfg.tls_path(tls.private_key)
    if cert is None or key is None:
        return
    try:
        ctx.load_cert_chain(cert, key, password=tls.private_key_password or None)
    except ssl.SSLError as exc:
        raise UserError(
            f"tls.certificate / tls.private_key: cannot load {cert} with {key} "
            f"(wrong password, or key and certificate do not match?): {exc.reason or exc}"
        ) from None
    except OSError as exc:
        raise UserError(f"tls.certificate / tls.private_key: {exc}") from None


def _load_ca(ctx: ssl.SSLContext, cfg: Config) -> bool:
    ca = cfg.tls_path(cfg.tls.ca_bundle)
    if ca is None:
        return False
    try:
        ctx.load_verify_locations(cafile=str(ca))
    except (ssl.SSLError, OSError) as exc:
        raise UserError(f"tls.ca_bundle: cannot load {ca}: {exc}") from None
    return True


def server_context(cfg: Config) -> ssl.SSLContext | None:
    """The listener's context, or None when TLS is off."""
    if not cfg.tls.enabled:
        return None
    ctx = ssl.SSLContext(ssl.PROTOCOL_TLS_SERVER)
    ctx.minimum_version = _VERSIONS[cfg.tls.minimum_version]
    _load_chain(ctx, cfg)
    if cfg.tls.require_client_certificate:
        _load_ca(ctx, cfg)
        ctx.verify_mode = ssl.CERT_REQUIRED
    return ctx


def client_context(cfg: Config) -> ssl.SSLContext:
    """The context used to call a destination with ``tls = true``: the peer's certificate is
    verified (CA bundle, or the system's CAs) and its host name checked; our certificate, when
    configured, is presented as client certificate."""
    ctx = ssl.SSLContext(ssl.PROTOCOL_TLS_CLIENT)
    ctx.minimum_version = _VERSIONS[cfg.tls.minimum_version]
    if not _load_ca(ctx, cfg):
        ctx.load_default_certs()
    _load_chain(ctx, cfg)
    return ctx


def check(cfg: Config) -> None:
    """Build every context the configuration needs (raises UserError on a problem)."""
    server_context(cfg)
    peers = [*cfg.destinations.values(), *cfg.archives.values()]
    if any(getattr(p, "tls", False) for p in peers):  # DICOM peers over TLS
        client_context(cfg)

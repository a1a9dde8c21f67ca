"""Checks of a configuration beyond its schema: the files it names can be used.

Run by ``check-config``, at start and on every reload (SIGHUP): TLS certificates and keys load
(and match), the CA bundle loads, site mapping files parse."""

from __future__ import annotations

from service.config import Config
from service.errors import UserError


def preflight(cfg: Config) -> None:
    """Raise UserError (naming the key) when the configuration cannot be put in force."""
    from service.network import tls
    from service.vocabulary.mapper import load_mapping_table

    tls.check(cfg)
    try:
        load_mapping_table(cfg.mapping_paths)
    except UserError as exc:
        raise UserError(f"grading.mapping_files: {exc}") from None

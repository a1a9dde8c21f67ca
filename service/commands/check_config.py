"""``diastolic-sr check-config FILE``: validate a configuration file and print the effective
configuration (every default filled in, secrets masked).  Exit status 0 when the file can be
put in force, 2 with the reason (key path, bad value, what is allowed) when it cannot."""

from __future__ import annotations

import argparse
import json
from typing import Any

from service.config import Config, load_config


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser(
        "check-config",
        help="validate a configuration file and print the effective configuration",
        description="Validate a configuration file (schema, cross-references, TLS files, site "
        "mapping files) and print the effective configuration with every default filled in "
        "and secrets masked. Exits non-zero on the first problem, naming the key.",
    )
    p.add_argument("file", metavar="FILE", help="configuration file (TOML)")
    p.add_argument(
        "--journal",
        metavar="URL",
        help="the journal to check instead of journal.url (postgresql://USER@HOST:PORT/DB): "
        "it must accept the node's login",
    )
    p.add_argument("--json", action="store_true", help="print the configuration as JSON")
    p.add_argument("--quiet", "-q", action="store_true", help="print nothing when valid")
    p.set_defaults(func=run)


def run(args: argparse.Namespace) -> int:
    from service.config import apply_overrides
    from service.network.preflight import preflight

    cfg = load_config(args.file)
    if args.journal is not None:
        cfg = apply_overrides(cfg, journal=args.journal)
    preflight(cfg)
    journal_note = ""
    if cfg.journal.url:
        from service.store.postgres_journal import probe

        journal_note = probe(cfg.journal.url, password=cfg.journal.password)
    if args.quiet:
        return 0
    if args.json:
        print(json.dumps(cfg.masked(), indent=2))
        return 0
    print(effective_toml(cfg, source=args.file, journal=journal_note))
    return 0


def effective_toml(cfg: Config, *, source: str = "", journal: str = "") -> str:
    """The effective configuration as TOML (loadable again; secrets masked)."""
    head = [
        f"# {source}: valid" if source else "# valid",
        *([f"# journal: {journal}"] if journal else []),
        f"# configuration digest {cfg.digest()}",
        f"# data directory: {cfg.data_dir}",
        f"# results folder: {cfg.results_dir or '(none)'}",
    ]
    return "\n".join(head) + "\n" + to_toml(cfg.masked())


def to_toml(data: dict[str, Any]) -> str:
    """A small TOML writer for the configuration's shapes: tables, arrays of tables, scalars
    and arrays of scalars."""
    out: list[str] = []
    _table(out, [], data)
    return "\n".join(out).strip() + "\n"


def _key(k: str) -> str:
    bare = k.replace("_", "").replace("-", "").isalnum() and k.isascii()
    return k if bare else json.dumps(k)


def _value(v: Any) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, int | float):
        return repr(v)
    if isinstance(v, str):
        return json.dumps(v, ensure_ascii=False)
    if isinstance(v, list):
        return "[" + ", ".join(_value(x) for x in v) + "]"
    if isinstance(v, dict):  # inline table (only for empty ones)
        return "{" + ", ".join(f"{_key(k)} = {_value(x)}" for k, x in v.items()) + "}"
    raise TypeError(f"cannot write {type(v).__name__} as TOML")


def _is_table_array(v: Any) -> bool:
    return isinstance(v, list) and bool(v) and all(isinstance(x, dict) for x in v)


def _table(out: list[str], path: list[str], data: dict[str, Any]) -> None:
    scalars = {
        k: v for k, v in data.items() if not (isinstance(v, dict) and v) and not _is_table_array(v)
    }
    if path and (scalars or not data):
        out.append("")
        out.append("[" + ".".join(_key(p) for p in path) + "]")
    for k, v in scalars.items():
        out.append(f"{_key(k)} = {_value(v)}")
    for k, v in data.items():
        if isinstance(v, dict) and v:
            _table(out, [*path, k], v)
        elif _is_table_array(v):
            for item in v:
                out.append("")
                out.append("[[" + ".".join(_key(p) for p in [*path, k]) + "]]")
                for ik, iv in item.items():
                    out.append(f"{_key(ik)} = {_value(iv)}")

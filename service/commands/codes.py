"""``diastolic-sr codes``: the code-mapping table in effect (standard and site rules), with
the source of each standard code."""

from __future__ import annotations

import argparse
import json
from pathlib import Path


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser(
        "codes",
        help="list the code-mapping table in effect (standard and site rules)",
        description="List every mapping rule in effect, site rules first (they win), with the "
        "conditions on modifiers, the canonical measure and the source of each standard code.",
    )
    p.add_argument(
        "--mapping", action="append", type=Path, metavar="FILE", help="site mapping TOML file"
    )
    p.add_argument("--measure", help="only rules for this canonical measure")
    p.add_argument("--json", action="store_true", help="one JSON object per rule, per line")
    p.set_defaults(func=run)


def run(args: argparse.Namespace) -> int:
    from service.errors import UserError
    from service.model import Measure
    from service.vocabulary.mapper import load_mapping_table

    known = [m.value for m in Measure]
    if args.measure is not None and args.measure not in known:
        raise UserError(f"--measure {args.measure}: unknown measure; known: {', '.join(known)}")
    table = load_mapping_table(args.mapping or ())
    entries = [e for e in table.entries if not args.measure or e.measure == args.measure]
    if args.json:
        for e in entries:
            print(json.dumps(e.model_dump(mode="json"), ensure_ascii=False))
        return 0
    site = sum(1 for e in table.entries if e.origin == "site")
    print(
        f"{len(table.entries)} rules in effect ({site} site, {len(table.entries) - site} "
        f"standard); table digest {table.digest[:16]}"
    )
    for e in entries:
        cond = f" where {'; '.join(e.conditions)}" if e.conditions else ""
        memory = " [from memory]" if e.from_memory else ""
        print(f"[{e.origin}] {e.concept}{cond} -> {e.measure}")
        print(f"    source: {e.source or '-'}{memory}")
    return 0

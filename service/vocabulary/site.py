"""Site mapping files: TOML tables that map any (code value, coding scheme) pair, optionally
with modifier conditions, to a canonical quantity.  The format is documented with comments in
``config/mappings/example-site.toml``.
"""

from __future__ import annotations

import re
import tomllib
from collections.abc import Sequence
from pathlib import Path
from typing import Any

from service.errors import UserError
from service.model import Code
from service.vocabulary.measures import parse_quantity, quantity_names
from service.vocabulary.rules import MODIFIER_NAMES, Condition, Rule, RuleOrigin
from service.vocabulary.srt import normalise

RULE_KEYS = {"code", "scheme", "measure", "meaning", "source", "where", "where_not", "priority"}
TOP_KEYS = {"scheme", "rule"}
_CODE_RE = re.compile(r"^\s*(\S+)\s+(\S+)\s*$")
ANY = "*"


def _bad(path: Path, key: str, value: Any, allowed: str) -> UserError:
    return UserError(f"{path}: {key} = {value!r} is not valid; allowed: {allowed}")


def _parse_code(path: Path, key: str, text: Any) -> Code:
    m = _CODE_RE.match(text) if isinstance(text, str) else None
    if m is None:
        raise _bad(path, key, text, 'a string "CODEVALUE SCHEME", e.g. "91134007 SCT"')
    scheme, value = normalise(m.group(2), m.group(1))
    return Code(value=value, scheme=scheme)


def _conditions(path: Path, key: str, table: Any, negate: bool) -> list[Condition]:
    if not isinstance(table, dict):
        raise _bad(path, key, table, "a table of modifier = [values]")
    out: list[Condition] = []
    allowed_names = ", ".join(MODIFIER_NAMES) + ', or a quoted "CODEVALUE SCHEME"'
    for name, values in table.items():
        k = f"{key}.{name}"
        if name in MODIFIER_NAMES:
            names = MODIFIER_NAMES[name]
        elif _CODE_RE.match(name):
            names = (_parse_code(path, k, name),)
        else:
            raise _bad(path, k, name, f"modifier names {allowed_names}")
        if isinstance(values, str):
            values = [values]
        if not isinstance(values, list) or not values:
            raise _bad(path, k, values, 'a non-empty list of "CODEVALUE SCHEME" strings')
        absent = False
        codes: list[Code] = []
        for i, v in enumerate(values):
            if v == "absent" and not negate:
                absent = True
                continue
            codes.append(_parse_code(path, f"{k}[{i}]", v))
        out.append(
            Condition(
                key=name, names=names, values=tuple(codes), allow_absent=absent, negate=negate
            )
        )
    return out


def load_site_file(path: Path) -> list[Rule]:
    """Rules of one site TOML file; raises UserError naming file, key, value and what is allowed."""
    path = Path(path)
    try:
        with path.open("rb") as fh:
            data = tomllib.load(fh)
    except FileNotFoundError:
        raise UserError(f"{path}: mapping file not found") from None
    except tomllib.TOMLDecodeError as exc:
        raise UserError(f"{path}: not valid TOML ({exc})") from None
    except OSError as exc:
        raise UserError(f"{path}: cannot read mapping file ({exc.strerror})") from None
    for key in data:
        if key not in TOP_KEYS:
            raise _bad(path, key, data[key], "top-level keys " + ", ".join(sorted(TOP_KEYS)))
    rules_raw = data.get("rule", [])
    if not isinstance(rules_raw, list):
        raise _bad(path, "rule", rules_raw, "an array of tables [[rule]]")
    rules: list[Rule] = []
    for i, raw in enumerate(rules_raw):
        where = f"rule[{i}]"
        if not isinstance(raw, dict):
            raise _bad(path, where, raw, "a table")
        for key in raw:
            if key not in RULE_KEYS:
                raise _bad(path, f"{where}.{key}", raw[key], "keys " + ", ".join(sorted(RULE_KEYS)))
        for req in ("code", "scheme", "measure"):
            if req not in raw:
                raise _bad(path, f"{where}.{req}", None, f"a {req} is required in every rule")
        code_v, scheme = raw["code"], raw["scheme"]
        if not isinstance(code_v, str) or not code_v.strip():
            raise _bad(path, f"{where}.code", code_v, 'a non-empty code value string, or "*"')
        if not isinstance(scheme, str) or not scheme.strip() or " " in scheme:
            raise _bad(path, f"{where}.scheme", scheme, "a coding scheme designator, e.g. 99HVCC")
        try:
            quantity = parse_quantity(raw["measure"]) if isinstance(raw["measure"], str) else None
        except ValueError:
            quantity = None
        if quantity is None:
            raise _bad(path, f"{where}.measure", raw["measure"], ", ".join(quantity_names()))
        conds = _conditions(path, f"{where}.where", raw.get("where", {}), negate=False)
        conds += _conditions(path, f"{where}.where_not", raw.get("where_not", {}), negate=True)
        if code_v == ANY and not conds:
            raise _bad(path, f"{where}.code", code_v, '"*" only together with a where condition')
        priority = raw.get("priority", 0)
        if not isinstance(priority, int) or isinstance(priority, bool) or priority < 0:
            raise _bad(path, f"{where}.priority", priority, "an integer >= 0")
        meaning = raw.get("meaning", "")
        source = raw.get("source", "")
        if not isinstance(meaning, str) or not isinstance(source, str):
            raise _bad(path, f"{where}.meaning/source", (meaning, source), "strings")
        concept = None
        if code_v != ANY:
            s, v = normalise(scheme.strip(), code_v.strip())
            concept = Code(value=v, scheme=s, meaning=meaning)
        rules.append(
            Rule(
                id=f"site:{path.name}:{i}",
                concept=concept,
                quantity=quantity.value,
                conditions=tuple(conds),
                origin=RuleOrigin.site,
                priority=priority,
                source=f"{path.name} rule[{i}]" + (f": {source}" if source else ""),
            )
        )
    return rules


def load_site_files(paths: Sequence[Path]) -> list[Rule]:
    out: list[Rule] = []
    for p in paths:
        out.extend(load_site_file(Path(p)))
    return out

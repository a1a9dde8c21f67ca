"""``diastolic-sr inspect``: what diastolic-sr sees in an SR, for the administrator who maps
a scanner's codes.  For each file: the measurements recognised (canonical name, value, unit,
source code and content-item path), those excluded and why, and every numeric item nobody
recognised, with a ready-to-paste site mapping rule for each."""

from __future__ import annotations

import argparse
import json
from pathlib import Path

from service.errors import RejectedInput
from service.model import Measure, Measurements, Modifier, SourceDocument, Unrecognised
from service.vocabulary.rules import MODIFIER_NAMES

#: modifiers worth copying into a suggested rule, in this order
_RULE_MODIFIERS = ("finding_site", "image_mode", "flow_direction", "cardiac_phase", "stage")


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser(
        "inspect",
        help="show the measurements recognised, excluded and unrecognised in SR files",
        description="For each SR: the measurements recognised (canonical name, value, unit, "
        "source code and path in the content tree), those excluded and why, and every "
        "numeric item not recognised, with a ready-to-paste mapping rule for each.",
    )
    p.add_argument(
        "files", nargs="+", metavar="PATH", help="SR file or folder (searched recursively)"
    )
    p.add_argument(
        "--mapping", action="append", type=Path, metavar="FILE", help="site mapping TOML file"
    )
    p.add_argument("--json", action="store_true", help="one JSON object per file, per line")
    p.set_defaults(func=run)


def run(args: argparse.Namespace) -> int:
    from service.commands.grade import iter_inputs, not_regular
    from service.sr.provenance import IGNORED_OWN_RESULT, own_result_reason
    from service.sr.read import read_path
    from service.vocabulary.mapper import build_measurements, load_mapping_table

    table = load_mapping_table(args.mapping or ())
    status = 0
    for path in (entry.path for entry in iter_inputs(args.files)):
        why = not_regular(path)
        if why is not None:
            if args.json:
                print(json.dumps({"input": str(path), "skipped": why}))
            else:
                print(f"== {path}\nskipped: {why}\n")
            continue
        try:
            ds, doc = read_path(path)
        except RejectedInput as exc:
            status = 1
            if args.json:
                print(json.dumps({"input": str(path), "rejected": str(exc)}))
            else:
                print(f"== {path}\nrejected: {exc}\n")
            continue
        own = own_result_reason(ds)
        if own is not None:  # never graded: nothing to map
            why = f"{IGNORED_OWN_RESULT}: {own}"
            if args.json:
                print(json.dumps({"input": str(path), "skipped": why}))
            else:
                print(f"== {path}\nskipped: {why}\n")
            continue
        m = build_measurements([doc], table)
        if args.json:
            print(json.dumps(inspect_json(path, doc, m), ensure_ascii=False))
        else:
            print(inspect_text(path, doc, m))
    return status


def inspect_json(path: Path, doc: SourceDocument, m: Measurements) -> dict:
    return {
        "input": str(path),
        "sop_instance_uid": doc.sop_instance_uid,
        "template": doc.template,
        "recognised": {k.value: v.model_dump(mode="json") for k, v in m.values.items()},
        "excluded": [e.model_dump(mode="json") for e in m.excluded],
        "unrecognised": [
            {**u.model_dump(mode="json"), "suggested_rule": suggested_rule(u, path)}
            for u in m.unrecognised
        ],
        "notes": list(m.notes),
        "warnings": list(doc.warnings),
    }


def inspect_text(path: Path, doc: SourceDocument, m: Measurements) -> str:
    out = [f"== {path}", f"SOP Instance UID {doc.sop_instance_uid}; template {doc.template or '?'}"]
    out.append(f"\nRecognised ({len(m.values)}):")
    for name, mv in m.values.items():
        codes = ", ".join(mv.codes) or mv.origin.value
        paths = ", ".join(mv.paths) or "-"
        how = mv.detail or mv.origin.value
        out.append(
            f"  {name.value:<22} {mv.value:>9g} {mv.unit:<8} {how}; code {codes}; item {paths}"
        )
    out.append(f"\nExcluded ({len(m.excluded)}):")
    for e in m.excluded:
        value = "" if e.value is None else f" {e.value:g} {e.unit or ''}"
        out.append(
            f"  item {e.path}: {e.concept.value} {e.concept.scheme} "
            f'"{e.concept.meaning}"{value}: {e.reason}'
        )
    out.append(f"\nNot recognised ({len(m.unrecognised)}):")
    for u in m.unrecognised:
        value = "" if u.value is None else f" = {u.value:g} {u.unit or ''}"
        out.append(
            f'  item {u.path}: {u.concept.value} {u.concept.scheme} "{u.concept.meaning}"{value}'
        )
    if m.unrecognised:
        out.append(
            "\nSuggested site mapping rules (paste into a TOML file under config/mappings/, "
            "set `measure`, then pass it with --mapping or list it in the configuration):\n"
        )
        for u in m.unrecognised:
            out.append(suggested_rule(u, path))
    for note in (*m.notes, *doc.warnings):
        out.append(f"note: {note}")
    return "\n".join(out) + "\n"


def _modifier_key(mod: Modifier) -> str:
    for key, names in MODIFIER_NAMES.items():
        if mod.name in names:
            return key
    return f'"{mod.name.value} {mod.name.scheme}"'


def _toml_str(text: str) -> str:
    return json.dumps(text, ensure_ascii=False)  # a JSON string is a valid TOML basic string


def suggested_rule(u: Unrecognised, path: Path) -> str:
    lines = [
        "[[rule]]",
        f"code = {_toml_str(u.concept.value)}",
        f"scheme = {_toml_str(u.concept.scheme)}",
        'measure = "?"  # set one of: ' + ", ".join(m.value for m in Measure),
        f"meaning = {_toml_str(u.concept.meaning)}",
        f"source = {_toml_str(f'inspect of {path.name}, item {u.path}')}",
    ]
    where: dict[str, list[str]] = {}
    for mod in u.modifiers:
        key = _modifier_key(mod)
        if key in _RULE_MODIFIERS and key not in where:
            where[key] = [f"{mod.value.value} {mod.value.scheme}"]
    if where:
        lines.append("[rule.where]  # delete conditions that do not matter for this code")
        for key, values in where.items():
            lines.append(f"{key} = {json.dumps(values)}")
    return "\n".join(lines) + "\n"

"""Command-line options that decide how a study is graded, shared by ``grade`` and ``demo``."""

from __future__ import annotations

import argparse
from pathlib import Path

from service.model import SETTABLE_RHYTHMS, Context, Guideline, Rhythm, SpecialSituation
from service.pipeline import GradeOptions


def add_grading_arguments(p: argparse.ArgumentParser) -> None:
    g = p.add_argument_group("grading")
    g.add_argument(
        "--guideline",
        choices=[x.value for x in Guideline],
        default=Guideline.ase_eacvi_2016.value,
        help="rule set (default: %(default)s); a rule set not implemented in full is refused",
    )
    g.add_argument(
        "--myocardial-disease",
        action="store_true",
        help="known myocardial disease with normal LVEF (use the reduced-LVEF pathway)",
    )
    g.add_argument(
        "--rhythm",
        choices=[x.value for x in SETTABLE_RHYTHMS],
        default=Rhythm.unknown.value,
        help="rhythm when the SR does not state it (a coded Cardiac Rhythm item wins)",
    )
    g.add_argument(
        "--situation",
        action="append",
        default=[],
        choices=[x.value for x in SpecialSituation],
        metavar="NAME",
        help="flag a special situation (repeatable): "
        + ", ".join(x.value for x in SpecialSituation),
    )
    g.add_argument(
        "--lvef-reduced-below",
        type=float,
        default=50.0,
        metavar="PCT",
        help="LVEF below this is reduced (default: %(default)s %%)",
    )
    g.add_argument(
        "--compare", action="store_true", help="also evaluate every other implemented guideline"
    )
    g.add_argument(
        "--mapping",
        action="append",
        type=Path,
        metavar="FILE",
        help="site code-mapping TOML file (repeatable)",
    )
    g.add_argument("--uid-root", metavar="ROOT", help="UID root for result UIDs (default 2.25)")


#: command-line option of each key of the configuration's [grading] table it sets
OPTION_OF_KEY = {
    "guideline": "--guideline",
    "lvef_reduced_below": "--lvef-reduced-below",
    "uid_root": "--uid-root",
    "compare": "--compare",
}


def check_grading_options(args: argparse.Namespace) -> None:
    """Check the grading options with the configuration's own model
    (:class:`service.config.GradingConfig`), so that the command line and the configuration
    file accept exactly the same values; a refused value is a :class:`UserError` (exit status
    2) naming the option, the value and what is allowed, raised before any file is read."""
    from pydantic import ValidationError

    from service.config import GradingConfig
    from service.errors import UserError
    from service.wording import in_sentence

    given = {
        "guideline": args.guideline,
        "lvef_reduced_below": args.lvef_reduced_below,
        "uid_root": args.uid_root if args.uid_root is not None else "",
        "compare": args.compare,
    }
    try:
        GradingConfig.model_validate(given)
    except ValidationError as exc:
        err = exc.errors()[0]
        key = str(err["loc"][0]) if err["loc"] else ""
        option = OPTION_OF_KEY.get(key, key)
        value = given.get(key, err.get("input"))
        shown = f"{value:g}" if isinstance(value, float) else str(value)
        allowed = str(err["msg"]).removeprefix("Value error, ")
        allowed = in_sentence(allowed)  # a pydantic message, now inside the sentence
        raise UserError(f"{option} {shown}: not allowed; {allowed}") from None


def grade_options_from_args(args: argparse.Namespace) -> GradeOptions:
    from service.errors import UserError
    from service.grading import IMPLEMENTED_GUIDELINES, NOT_AVAILABLE

    check_grading_options(args)
    guideline = Guideline(args.guideline)
    if guideline not in IMPLEMENTED_GUIDELINES:
        why = NOT_AVAILABLE.get(guideline, f"guideline {guideline.value} is not implemented")
        available = ", ".join(g.value for g in IMPLEMENTED_GUIDELINES)
        raise UserError(f"{why} (available: {available})")
    rhythm = Rhythm(args.rhythm)
    context = Context(
        rhythm=rhythm,
        rhythm_source="" if rhythm is Rhythm.unknown else "set on the command line",
        myocardial_disease=args.myocardial_disease,
        lvef_reduced_below=args.lvef_reduced_below,
        special_situations=frozenset(SpecialSituation(s) for s in args.situation),
    )
    return GradeOptions(
        guideline=guideline, context=context, compare=args.compare, uid_root=args.uid_root
    )

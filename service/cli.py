"""Command-line front: a thin wrapper that hands each sub-command to its module.

Each module in ``service.commands`` exposes ``register(subparsers)`` which adds its parser and
sets ``func`` (``args -> int`` exit status).  Errors that are the user's to fix are printed as
one line on stderr; nothing here prints a traceback unless ``--debug`` is given.
"""

from __future__ import annotations

import argparse
import importlib
import sys

from service import SOFTWARE_NAME, __version__
from service.errors import UserError

#: sub-command modules, in the order shown by --help
COMMAND_MODULES = (
    "grade",
    "inspect",
    "codes",
    "demo",
    "serve",
    "queue",
    "backfill",
    "audit",
    "check_config",
)


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog=SOFTWARE_NAME,
        description="Grade LV diastolic function from echo measurement DICOM SRs. "
        "Decision support only: results must be confirmed by a qualified reader.",
    )
    parser.add_argument("--version", action="version", version=f"{SOFTWARE_NAME} {__version__}")
    parser.add_argument("--debug", action="store_true", help="show tracebacks for internal errors")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    for name in COMMAND_MODULES:
        importlib.import_module(f"service.commands.{name}").register(sub)
    return parser


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if not getattr(args, "func", None):
        parser.print_help()
        return 2
    try:
        return int(args.func(args))
    except UserError as exc:
        print(f"{SOFTWARE_NAME}: error: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        return 130
    except BrokenPipeError:  # e.g. piped into `head`: not an error of ours
        import os

        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
        return 0
    except Exception as exc:  # last line of defence: one line, not a traceback
        if args.debug:
            raise
        print(
            f"{SOFTWARE_NAME}: internal error: {type(exc).__name__}: {exc} "
            "(run with --debug for details)",
            file=sys.stderr,
        )
        return 3


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())

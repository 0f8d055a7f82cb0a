"""The ``halfwatch`` command line.

Each module in this package that defines ``register(subparsers)`` adds its own subcommands; the
module is found automatically, so adding a command never means editing this file. A registered
subcommand sets ``func`` (called with the parsed namespace, returns an exit code). Modules must be
cheap to import: heavy imports (numpy, FastAPI, SQLAlchemy) belong inside the command functions.

Exit codes: 0 success, 1 runtime failure, 2 bad input or usage (argparse uses 2 as well).
"""

from __future__ import annotations

import argparse
import importlib
import pkgutil
import sys


class UsageError(Exception):
    """Bad input given on the command line or in a file it names; printed as one line, exit code 2."""


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="halfwatch",
        description="Condition monitoring for subharmonic (0.5X) onset in rotating and reciprocating "
        "machines.",
    )
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")
    for info in sorted(pkgutil.iter_modules(__path__), key=lambda m: m.name):
        module = importlib.import_module(f"{__name__}.{info.name}")
        register = getattr(module, "register", None)
        if register is not None:
            register(sub)
    return parser


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        return int(args.func(args) or 0)
    except UsageError as exc:
        print(f"halfwatch {args.command}: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        return 130

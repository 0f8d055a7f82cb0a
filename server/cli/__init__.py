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


#: ``halfwatch --help`` lists the commands by the job they serve; a command missing here is listed
#: under "other" (so a new command is never hidden).
JOBS = (
    ("analyse readings and the physics", ("analyze", "simulate", "stability", "window", "trend")),
    ("run the service", ("serve", "worker", "mailer", "mqtt-bridge", "demo", "mail-sink")),
    ("keep the data", ("reanalyze", "retention", "waveforms", "db")),
    ("people, keys and settings", ("user", "apikey", "email-test", "config-table")),
)


def _grouped(choices: list) -> str:
    """The command list, one heading per job, in JOBS order."""
    helps = {a.dest: a.help or "" for a in choices}
    width = max(map(len, helps), default=0) + 2
    lines, seen = ["commands:"], set()
    for title, names in (*JOBS, ("other", tuple(sorted(helps)))):
        rows = [n for n in names if n in helps and n not in seen]
        if rows:
            lines.append(f"  {title}:")
            lines += [f"    {n:<{width}}{helps[n]}" for n in rows]
            seen.update(rows)
    return "\n".join(lines) + "\n\nRun 'halfwatch COMMAND --help' for the options of a command."


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="halfwatch",
        description="Condition monitoring for subharmonic (0.5X) onset in rotating and reciprocating "
        "machines.",
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND",
                                help="one of the commands below")
    for info in sorted(pkgutil.iter_modules(__path__), key=lambda m: m.name):
        module = importlib.import_module(f"{__name__}.{info.name}")
        register = getattr(module, "register", None)
        if register is not None:
            register(sub)
    parser.epilog = _grouped(list(sub._choices_actions))
    sub._choices_actions.clear()  # listed once, grouped, in the epilog
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

"""The ``tracker`` command line: one sub-command per module of this package.

Each module named in :data:`COMMANDS` has ``register(subparsers)``, which adds its parser and sets
``handler`` to a function ``(args) -> int``. Errors in what the user gave us (:class:`InputError`)
and a valid problem the solver could not solve (:class:`SolveError`) become one line on stderr and
exit code 2; nothing else is caught here, so a bug shows its traceback.
"""

from __future__ import annotations

import argparse
import importlib
import sys
from collections.abc import Sequence

from tracker.errors import InputError, SolveError

#: Sub-command modules, in the order ``--help`` lists them.
COMMANDS: tuple[str, ...] = (
    "plan",
    "replay",
    "report",
    "calibrate",
    "simulate",
    "evaluate",
    "run",
    "watch",
    "journal",
    "demo",
    "schema",
)

CAUTION = (
    "Caution: tracker advises; it does not place orders. Its output is meant for supervised use by "
    "an execution desk and its order router. It is not investment advice. Trading can lose money: "
    "the firm's own risk controls and the local market regulation come first."
)


def build_parser() -> argparse.ArgumentParser:
    """The top-level parser with every sub-command registered."""
    parser = argparse.ArgumentParser(
        prog="tracker",
        description="Track parent orders against their optimal execution schedule, re-plan the "
        "remaining horizon every bin, publish targets, status and alerts; replay recorded days.",
        epilog=CAUTION,
    )
    subparsers = parser.add_subparsers(dest="command", metavar="COMMAND", required=True)
    for name in COMMANDS:
        importlib.import_module(f"tracker.cli.{name}").register(subparsers)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    """Run the command line; return the process exit code."""
    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        code: int = args.handler(args)
    except InputError as exc:
        print(f"tracker {args.command}: error: {exc}", file=sys.stderr)
        return 2
    except SolveError as exc:  # a valid input we could not solve: said in one line, not a trace
        print(f"tracker {args.command}: error: could not solve: {exc}", file=sys.stderr)
        return 2
    return code

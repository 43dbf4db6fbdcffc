"""``tracker simulate day``: run the invented closed-loop day and record it as a replay file.

The ``simulate`` command's module adds this action with :func:`add_day_parser`.
"""

from __future__ import annotations

import argparse
from datetime import date
from pathlib import Path

from tracker.core.topics import DEFAULT_ROOT
from tracker.errors import InputError

DESCRIPTION = """\
Run the engine through an invented trading day and record every inbound message as a replay file.

Everything is made up: the symbols X_ZEPH, X_KALO and X_MIRA, the venue Harbour Lane Exchange
(X_HLX), the market (from the invented generator), four parent orders, a simple router that works
each target over its bin in a few child slices, and a fill model with misses and partial fills. At
midday X_ZEPH's liquidity collapses for 45 minutes; one order is amended and one cancelled; a few
malformed messages and one redelivered fill are mixed in. The loop is closed: the router acts on the
engine's targets as they come.

FILE is a JSON Lines recording for `tracker replay FILE --out DIR`, which reproduces the engine's
outputs of this run byte for byte (--outputs DIR writes them here too).
"""


def add_day_parser(actions: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    """Add the ``day`` action to the ``simulate`` command's actions."""
    from tracker.cli import CAUTION
    from tracker.sim.scenario import DAY

    parser = actions.add_parser(
        "day",
        help="run the invented closed-loop demo day and record it as a replay file",
        description=DESCRIPTION,
        epilog=CAUTION,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    parser.add_argument(
        "--seed", type=int, default=7, help="seed of the market and fill model (default: 7)"
    )
    parser.add_argument(
        "--date",
        default=DAY.isoformat(),
        metavar="YYYY-MM-DD",
        help=f"the trading day, a weekday (default: {DAY.isoformat()})",
    )
    parser.add_argument(
        "-o",
        "--output",
        metavar="FILE",
        help="the replay file to write (default: day-DATE-seedK.jsonl in the current folder)",
    )
    parser.add_argument(
        "--outputs",
        metavar="DIR",
        help="also write the engine's outputs of the run (as `tracker replay --out` does)",
    )
    parser.add_argument(
        "--root",
        default=DEFAULT_ROOT,
        help=f"MQTT topic root of the messages (default: {DEFAULT_ROOT})",
    )
    parser.set_defaults(handler=run)


def run(args: argparse.Namespace) -> int:
    """Run the day, write the recording (and the outputs if asked); print a one-line account."""
    from tracker.shell.config import validate_root
    from tracker.shell.replay import write_outputs
    from tracker.shell.simulated_day import run_day, write_day

    try:
        day = date.fromisoformat(args.date)
    except ValueError as exc:
        raise InputError(f"must be a date YYYY-MM-DD; got {args.date!r}", field="--date") from exc
    root = validate_root(args.root, field="--root")
    path = Path(args.output or f"day-{day.isoformat()}-seed{args.seed}.jsonl")
    result = run_day(args.seed, day=day, root=root)
    write_day(result, path)
    if args.outputs:
        write_outputs(result.result, Path(args.outputs))
    orders = result.result.summary.get("orders", [])
    print(
        f"recorded {len(result.lines)} messages of the invented day {day} (seed {args.seed}) to "
        f"{path}: {len(orders)} orders, {len(result.result.targets)} targets, "
        f"{len(result.result.alerts)} alerts, {len(result.result.errors)} errors"
    )
    return 0

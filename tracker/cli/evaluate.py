"""``tracker evaluate``: paired Monte-Carlo of the re-planning engine against simple policies.

The shell around :mod:`tracker.sim.evaluation`: it reads the scenario file (and a history when
asked), runs the evaluation with a progress bar, prints the tables and writes JSON and a chart.
"""

from __future__ import annotations

import argparse
import sys
from dataclasses import replace
from pathlib import Path

from tracker.errors import InputError

DESCRIPTION = """\
Does re-planning pay? Work the same days with four policies and compare them, day by day:

  replan         the engine as it runs live (real Engine, fed wire messages), the router working
                 each target it publishes
  opening-plan   the plan made at the start, never re-solved; each bin the planned cumulative
                 minus what filled (catch-up)
  twap           an even split over the order's bins, with the same catch-up
  constant-rate  a fixed share of each bin's real volume (order / forecast volume)

Every policy meets the same market path, order and router draws (paired). The router fills a
share of each target (the scenario's fill range) and never more than the participation cap times
the volume that really trades. Each share pays half the spread and square-root impact
(Y sigma_day sqrt(v / V) of the price) over the bin's VWAP; our trades move the price for good by
the permanent impact. The shortfall is against the arrival price, in bps of the order's value,
with each unfinished share valued at --penalty-bps (also shown at 0 and 3x).

Scenarios come from a TOML or JSON file (--scenarios; default: the shipped file, which
--write-scenarios copies out with every key explained): [market], [orders] (or [[order]] lists),
[costs] and [[scenario]] tables with name, day_volume, [[scenario.window]] (start, end, volume,
spread), fill = [low, high], impact, volatility, exact.

With --history FILE (the output of `tracker simulate history`, or real bins with the columns
start, symbol, volume, vwap, open, high, low, close, spread) the full days of the file are
replayed as the market instead: each day is planned with a profile calibrated on the
--calibration-days full days before it (tracker calibrate's method), and the scenario's volume,
spread, fill and impact settings apply to it.

Everything simulated is invented (an invented stock on an invented venue).
"""


def register(subparsers: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    """Add the ``evaluate`` sub-command."""
    from tracker.cli import CAUTION

    parser = subparsers.add_parser(
        "evaluate",
        help="paired Monte-Carlo: does re-planning beat the opening plan?",
        description=DESCRIPTION,
        epilog=CAUTION,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    parser.add_argument(
        "--scenarios",
        type=Path,
        metavar="FILE",
        help="scenario file, TOML or JSON (default: shipped)",
    )
    parser.add_argument(
        "--scenario",
        action="append",
        metavar="NAME",
        help="run only this scenario (repeat for several; default: every one in the file)",
    )
    parser.add_argument("--days", type=int, default=300, help="days per scenario (default: 300)")
    parser.add_argument("--seed", type=int, default=1, help="random seed (default: 1)")
    parser.add_argument(
        "--policy",
        action="append",
        metavar="NAME",
        help="run only this policy (repeat; default: replan, opening-plan, twap, constant-rate)",
    )
    parser.add_argument(
        "--penalty-bps",
        type=float,
        metavar="BPS",
        help="value of an unfinished share, bps of arrival (default: the file's, 50)",
    )
    parser.add_argument(
        "--history", type=Path, metavar="FILE", help="replay recorded bins (CSV/Parquet)"
    )
    parser.add_argument(
        "--symbol", help="the symbol of --history (default: the file's market symbol)"
    )
    parser.add_argument(
        "--calibration-days",
        type=int,
        default=20,
        metavar="D",
        help="with --history: full days before each day its profile is calibrated on (default: 20)",
    )
    parser.add_argument("--json", type=Path, metavar="FILE", help="write every number as JSON")
    parser.add_argument(
        "--chart", type=Path, metavar="FILE", help="write a chart (.svg, .png or .pdf)"
    )
    parser.add_argument(
        "--markdown", type=Path, metavar="FILE", help="write the main table as Markdown"
    )
    parser.add_argument(
        "--write-scenarios",
        type=Path,
        metavar="FILE",
        help="write the shipped scenario file (to edit) and exit",
    )
    parser.add_argument("--quiet", action="store_true", help="no progress bar and no tables")
    parser.set_defaults(handler=run)


def run(args: argparse.Namespace) -> int:
    """Run the evaluation and report it."""
    from importlib import resources

    from tracker.sim.evaluation.config import DEFAULT_FILE, load_config
    from tracker.sim.evaluation.report import (
        CHART_FORMATS,
        markdown,
        tables,
        write_chart,
        write_json,
    )
    from tracker.sim.evaluation.runner import check_policies, evaluate, results_of

    if args.write_scenarios is not None:
        text = resources.files("tracker.sim.evaluation").joinpath(DEFAULT_FILE).read_text("utf-8")
        try:
            args.write_scenarios.write_text(text, encoding="utf-8")
        except OSError as exc:
            raise InputError(
                f"cannot write {str(args.write_scenarios)!r}: {exc.strerror or exc}",
                field="--write-scenarios",
            ) from exc
        print(f"wrote the default scenario file to {args.write_scenarios}")
        return 0
    if args.chart is not None and args.chart.suffix.lower() not in CHART_FORMATS:
        raise InputError(
            f"must end in {', '.join(CHART_FORMATS)}; got {args.chart.name!r}", field="--chart"
        )
    config = load_config(args.scenarios).only(args.scenario).with_penalty(args.penalty_bps)
    policies = check_policies(args.policy)
    recorded = None
    if args.history is not None:
        from tracker.cli.calibrate import read_history
        from tracker.sim.evaluation.market_day import read_recorded

        if not args.history.exists():
            raise InputError(
                f"history file {str(args.history)!r} does not exist", field="--history"
            )
        if args.symbol:
            config = replace(config, market=replace(config.market, symbol=args.symbol))
        recorded = read_recorded(read_history(args.history), config.market.symbol, config.session)
        days = min(args.days, max(len(recorded.days) - args.calibration_days, 0))
    else:
        days = args.days
    total = max(days, 1) * len(config.scenarios)

    from rich.console import Console
    from rich.progress import BarColumn, MofNCompleteColumn, Progress, TimeRemainingColumn

    with Progress(
        "[progress.description]{task.description}",
        BarColumn(),
        MofNCompleteColumn(),
        TimeRemainingColumn(),
        console=Console(stderr=True),
        disable=args.quiet,
        transient=True,
    ) as bar:
        task = bar.add_task("evaluating (days x scenarios)", total=total)
        evaluation = evaluate(
            config,
            days=args.days,
            seed=args.seed,
            policies=policies,
            recorded=recorded,
            calibration_days=args.calibration_days,
            progress=lambda done: bar.advance(task, done),
        )
    results = results_of(evaluation)
    if not args.quiet:
        # Piped output gets room for the tables' columns (a terminal keeps its own width).
        console = Console(width=None if sys.stdout.isatty() else 132)
        for table in tables(results):
            console.print(table)
        for note in results["notes"]:
            console.print(note)
    if args.json is not None:
        write_json(results, args.json)
    if args.markdown is not None:
        try:
            args.markdown.write_text(markdown(results), encoding="utf-8")
        except OSError as exc:
            raise InputError(
                f"cannot write {str(args.markdown)!r}: {exc}", field="--markdown"
            ) from exc
    if args.chart is not None:
        write_chart(evaluation, args.chart)
    return 0

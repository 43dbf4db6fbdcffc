"""``tracker report``: the end-of-day review of a day as one self-contained HTML file."""

from __future__ import annotations

import argparse
from pathlib import Path

DESCRIPTION = """\
Write the end-of-day review of a day: DIR/report.html (one self-contained file: CSS and charts
inline, no script, nothing fetched when it is opened) and the charts as DIR/charts/*.svg.

INPUT is a replay output folder (`tracker replay DAY --out FOLDER`), a JSON Lines recording or a
daemon journal. A recording or journal is replayed first (--keep-replay also writes the replay's
files to DIR/replay/), which adds what an output folder lacks: the market bins, the fills, every
plan version and the cost attribution; for an output folder those parts say "not available".

The first section lists every order, problems first (a residual, a critical alert, a cost far
above the plan's expected cost, rejected messages), linked to its section: plan against realized
(every re-plan faint), target and filled per bin, participation against the cap, the market's
volume against the forecast, fills against the bin VWAP, the alert timeline, the errors, the
cost in parts (spread, impact, timing, opportunity) that add up to the shortfall against
arrival, and a list of what happened. Times are the venue's local time (the zone of the
symbol's profile; the default session is America/New_York).
"""


def register(subparsers: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    """Add the ``report`` sub-command."""
    from tracker.cli import CAUTION

    parser = subparsers.add_parser(
        "report",
        help="write the end-of-day review of a replayed day (one HTML file and SVG charts)",
        description=DESCRIPTION,
        epilog=CAUTION,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    parser.add_argument(
        "input", metavar="INPUT", help="replay output folder, JSON Lines recording or journal"
    )
    parser.add_argument(
        "--out", "-o", metavar="DIR", required=True, help="folder for report.html and charts/"
    )
    parser.add_argument(
        "--profiles",
        metavar="DIR",
        help="folder of liquidity profiles (SYMBOL.json), as for `tracker replay`; their sessions "
        "give the venue's timezone",
    )
    parser.add_argument(
        "--config",
        metavar="FILE",
        help="engine thresholds for the replay of a recording (TOML or JSON), as for "
        "`tracker replay`",
    )
    parser.add_argument("--root", help="MQTT topic root of the recording (default: tracker)")
    parser.add_argument(
        "--keep-replay",
        action="store_true",
        help="for a recording or journal, also write the replay's output files (as `tracker "
        "replay` does) to DIR/replay/",
    )
    parser.set_defaults(handler=run)


def run(args: argparse.Namespace) -> int:
    """Build the report; print where it is and what needs a look."""
    from tracker.core.topics import DEFAULT_ROOT
    from tracker.report.review import build_report
    from tracker.shell.config import validate_root
    from tracker.shell.files import load_engine_config, load_profiles

    config, config_root = load_engine_config(Path(args.config)) if args.config else (None, None)
    root = validate_root(args.root or config_root or DEFAULT_ROOT, field="--root")
    profiles = load_profiles(Path(args.profiles)) if args.profiles else {}
    report = build_report(
        Path(args.input),
        Path(args.out),
        profiles=profiles,
        config=config,
        root=root,
        keep_replay=args.keep_replay,
    )
    flagged = [r for r in report.orders if r.problems]
    print(
        f"{len(report.orders)} orders, {len(flagged)} with problems; wrote {report.html} and "
        f"{len(report.charts)} charts"
    )
    for review in flagged[:10]:
        print(f"  {review.order_id}: {', '.join(review.problems)}")
    return 0

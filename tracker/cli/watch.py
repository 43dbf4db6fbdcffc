"""``tracker watch``: the desk's live view of the orders a running daemon tracks, from the bus."""

from __future__ import annotations

import argparse
import asyncio
import os
import sys
from datetime import UTC, datetime
from typing import Any
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

from tracker.errors import InputError

DESCRIPTION = """\
Watch the parent orders a running tracker daemon follows, live in the terminal, from what it
publishes on the MQTT broker (retained status, targets, alerts, health; see the README's wire
contract): it needs no access to the daemon's journal or machine, and shows every daemon instance
on the root.

The screen: the orders, one row each, those needing attention first (a raised critical alert,
behind plan, shares left on a halted or expired order): state, filled of quantity, behind or ahead
of the baseline plan in shares and %, this bin's target and how much of it is filled, the last
bin's participation in the market's volume against the cap, the expected cost to go and the cost
so far in basis points of the arrival price, the last alert. Below: the alerts as they are raised
and cleared (critical ones highlighted), and each daemon online or OFFLINE with its last
heartbeat. Banners say when the bus is down (the view reconnects by itself), a daemon is offline,
or no status or market bin arrived for more than two bins (--stale-after). Times are in the
venue's zone (--timezone). Press ? for the keys.

Sending: h / r halt / resume the selected order, H / R every order, each after a y. Off unless
started with --allow-control; the result (applied, refused with the daemon's reason, or no
answer) is shown.

--once prints one snapshot of the retained statuses and health and exits (--format table|json).

The broker settings are those of tracker run: --broker, --username, --password-file, --ca, --cert,
--key, --root, --config, and the same environment variables (TRACKER_BROKER, TRACKER_ROOT,
TRACKER_BROKER_USERNAME, TRACKER_BROKER_PASSWORD, TRACKER_BROKER_PASSWORD_FILE, TRACKER_BROKER_CA,
TRACKER_BROKER_CERT, TRACKER_BROKER_KEY, TRACKER_CONFIG). Flags win over the environment, which
wins over the file. Passwords are never shown.
"""

#: Flag destination -> dotted setting name of :func:`tracker.shell.config.load_settings`.
FLAGS = {
    "broker": "broker.url",
    "username": "broker.username",
    "password_file": "broker.password_file",
    "ca": "broker.ca",
    "cert": "broker.cert",
    "key": "broker.key",
    "root": "daemon.root",
}

#: load_settings requires a journal (the daemon's); the view never opens one.
_NO_JOURNAL = os.devnull


def register(subparsers: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    """Add the ``watch`` sub-command."""
    from tracker.cli import CAUTION

    parser = subparsers.add_parser(
        "watch",
        help="watch the orders of a running daemon live, from the broker",
        description=DESCRIPTION,
        epilog=CAUTION,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    from tracker.cli.run import add_broker_arguments

    broker = parser.add_argument_group("broker (as tracker run)")
    add_broker_arguments(broker)
    broker.add_argument("--root", metavar="ROOT", help="MQTT topic root (default tracker)")
    broker.add_argument(
        "--config", metavar="FILE", help="the TOML file of tracker run ([broker], [daemon] root)"
    )
    view = parser.add_argument_group("view")
    view.add_argument(
        "--timezone",
        metavar="ZONE",
        default="America/New_York",
        help="the venue's time zone for every time shown (IANA name; default America/New_York)",
    )
    view.add_argument(
        "--allow-control",
        action="store_true",
        help="allow sending halt / resume to ROOT/control (each after a confirmation)",
    )
    view.add_argument(
        "--stale-after",
        metavar="S",
        type=float,
        help="seconds without a status or market bin before the NO DATA banner (default: two "
        "bins, the bin length as seen on the bus; give it for a daemon on a fast simulated clock)",
    )
    view.add_argument(
        "--refresh",
        metavar="HZ",
        type=float,
        default=2.0,
        help="most screen updates per second for new data (default 2; keys redraw at once)",
    )
    once = parser.add_argument_group("one snapshot")
    once.add_argument(
        "--once", action="store_true", help="print the retained statuses and health once and exit"
    )
    once.add_argument(
        "--format",
        choices=("table", "json"),
        default="table",
        help="with --once: a plain table, or JSON with the status objects as the broker holds them",
    )
    once.add_argument(
        "--timeout",
        metavar="S",
        type=float,
        default=10.0,
        help="with --once: seconds to wait for the broker (default 10)",
    )
    parser.set_defaults(handler=watch)


def settings_from_args(args: argparse.Namespace, environ: dict[str, str] | None = None) -> Any:
    """The broker settings and root, loaded exactly as ``tracker run`` loads them."""
    from tracker.shell.config import load_settings

    flags: dict[str, Any] = {name: getattr(args, dest, None) for dest, name in FLAGS.items()}
    flags["daemon.journal"] = _NO_JOURNAL
    return load_settings(flags, os.environ if environ is None else environ, args.config)


def _zone(name: str) -> ZoneInfo:
    try:
        return ZoneInfo(name)
    except (ZoneInfoNotFoundError, ValueError):
        raise InputError(
            f"unknown time zone {name!r}; give an IANA name such as America/New_York or "
            "Europe/London",
            field="timezone",
        ) from None


def watch(args: argparse.Namespace) -> int:
    """Run the view (or print one snapshot with --once)."""
    settings = settings_from_args(args)
    zone = _zone(args.timezone)
    if args.refresh is not None and not 0.2 <= args.refresh <= 30:
        raise InputError(f"must be between 0.2 and 30; got {args.refresh}", field="refresh")
    if args.stale_after is not None and args.stale_after <= 0:
        raise InputError(
            f"must be more than 0 seconds; got {args.stale_after}", field="stale-after"
        )
    if args.once:
        return asyncio.run(_once(settings, zone, args.format, args.timeout))
    if not sys.stdout.isatty():
        raise InputError(
            "the live view needs a terminal; use --once (with --format json for scripts)",
            field="once",
        )
    from tracker.watch.app import Watch

    view = Watch(
        settings.broker,
        settings.root,
        zone=zone,
        allow_control=args.allow_control,
        stale_after=args.stale_after,
        refresh=args.refresh,
        input_fd=sys.stdin.fileno(),
        output_fd=sys.stdout.fileno(),
    )
    return asyncio.run(view.run())


async def _once(settings: Any, zone: ZoneInfo, form: str, timeout: float) -> int:
    from rich.console import Console

    from tracker.watch.snapshot import dumps, health_lines, once_json, once_table, take_snapshot

    board = await take_snapshot(settings.broker, settings.root, timeout=timeout)
    if form == "json":
        print(dumps(once_json(board, settings.broker, datetime.now(UTC))))
        return 0
    table = once_table(board, zone)
    console = Console(highlight=False)
    # Never cut a column: a pipe or a narrow terminal gets the table's natural width.
    console.width = max(console.width, console.measure(table).maximum)
    console.print(table)
    for line in health_lines(board, zone):
        console.print(line)
    return 0

"""``tracker demo``: one invented trading day, live over MQTT, with no outside service.

The demo starts an embedded MQTT broker (:mod:`tracker.shell.broker`, pure Python) on a free
loopback port -- or uses ``--broker URL`` -- and on it:

* the daemon (:class:`tracker.shell.daemon.Daemon`), exactly as ``tracker run`` runs it,
  journaling into ``OUT/journal.sqlite``, on a simulated clock that runs ``--speed`` times real
  time;
* the scripted market and order router of :mod:`tracker.sim.scenario` (invented symbols X_ZEPH,
  X_KALO and X_MIRA on the invented venue Harbour Lane Exchange, X_HLX): it publishes bins, orders
  and fills when they fall due on that clock, and works the targets the daemon publishes (it reads
  them from the broker like any router would).

While the day runs, a table of the working orders is shown. At the end the daemon stops as on
SIGTERM, the journal is replayed into ``OUT/replay/`` (targets, alerts, status, errors and
``summary.json``), the replay is compared with what the daemon published, and the paths are
printed.
"""

from __future__ import annotations

import argparse
import asyncio
import contextlib
import shutil
import sys
import time as _time
from collections.abc import Callable
from dataclasses import dataclass, field
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any

from tracker.core.topics import DEFAULT_ROOT, Topics
from tracker.edge.records import payload_bytes
from tracker.errors import InputError

DESCRIPTION = """\
Play one invented trading day (symbols X_ZEPH, X_KALO, X_MIRA on the invented venue Harbour Lane
Exchange, X_HLX) through the live daemon over MQTT, at --speed times real time (default 390: the
6.5-hour day in about a minute). Needs no outside service: an embedded MQTT broker is started on a
free loopback port unless --broker names one.

Writes OUT/journal.sqlite (the daemon's journal) and OUT/replay/ (targets.jsonl, alerts.jsonl,
status.jsonl, errors.jsonl, summary.json: the journal replayed), replacing those of an earlier demo
in OUT, and checks that the replay matches what the daemon published. Everything in it is made up.
"""

#: Ticks of the demo's daemon, in simulated seconds (30 s: 780 ticks for the day).
DEMO_TICK_SECONDS = 30.0
#: Simulated minutes the day runs on after the close, so orders reach their end and expire.
AFTER_CLOSE_MINUTES = 5.0
#: Order states after which the table shows no next-bin target.
_FINAL = frozenset({"done", "cancelled", "expired"})
#: Wall-clock seconds without any message before the day is judged quiet.
QUIET_SECONDS = 0.3


def register(subparsers: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    """Add the ``demo`` sub-command."""
    from tracker.cli import CAUTION

    parser = subparsers.add_parser(
        "demo",
        help="play an invented day through the live daemon (embedded broker, no setup)",
        description=DESCRIPTION,
        epilog=CAUTION,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    parser.add_argument(
        "--speed",
        type=float,
        default=390.0,
        metavar="X",
        help="simulated seconds per real second (default 390: the day in about a minute)",
    )
    parser.add_argument(
        "--out", "-o", default="demo-out", metavar="DIR", help="output folder (default demo-out)"
    )
    parser.add_argument(
        "--broker",
        metavar="URL",
        help="use this MQTT broker (mqtt://HOST:PORT) instead of starting the embedded one",
    )
    parser.add_argument(
        "--root", default=DEFAULT_ROOT, help=f"MQTT topic root (default {DEFAULT_ROOT})"
    )
    parser.add_argument("--seed", type=int, default=7, help="seed of the invented day (default 7)")
    parser.add_argument(
        "--table",
        action=argparse.BooleanOptionalAction,
        default=None,
        help="show the live table of working orders (default: when stdout is a terminal)",
    )
    parser.set_defaults(handler=run)


@dataclass
class DemoResult:
    """What a demo run produced.

    Attributes:
        journal: The daemon's journal.
        replay_dir: Where the replay of the journal was written.
        published: Every output the daemon queued for publication, encoded, by kind.
        replayed: The same from the replay of the journal.
        summary: The replay's summary.
        broker_url: The broker used.
        wall_seconds: How long the day took.
    """

    journal: Path
    replay_dir: Path
    published: dict[str, list[bytes]]
    replayed: dict[str, list[bytes]]
    summary: dict[str, Any]
    broker_url: str
    wall_seconds: float

    @property
    def matches(self) -> bool:
        """The replay of the journal reproduced what the daemon published, message for message."""
        return self.published == self.replayed


def run(args: argparse.Namespace) -> int:
    """Run the demo day; print where the outputs are; 0 when the replay matches the live run."""
    from tracker.cli.run import configure_logging

    if not (args.speed > 0):
        raise InputError(f"must be a positive number; got {args.speed}", field="--speed")
    show = sys.stdout.isatty() if args.table is None else bool(args.table)
    configure_logging("auto", "warning")
    result = asyncio.run(
        play_day(
            speed=args.speed,
            out=Path(args.out),
            broker_url=args.broker,
            root=args.root,
            seed=args.seed,
            show_table=show,
        )
    )
    orders = result.summary.get("orders", [])
    print(f"demo day done in {result.wall_seconds:.1f} s on {result.broker_url}")
    for order in orders:
        print(
            f"  {order.get('order_id')}: {order.get('state')}, filled {order.get('filled'):,} of "
            f"{order.get('quantity'):,}, shortfall {_bps(order.get('shortfall_bps'))}, "
            f"vs VWAP {_bps(order.get('vwap_bps'))}"
        )
    print(f"journal:  {result.journal}")
    print(f"replay:   {result.replay_dir} (summary.json, targets/alerts/status/errors .jsonl)")
    verdict = "matches" if result.matches else "DOES NOT match"
    print(f"the replay of the journal {verdict} what the daemon published")
    return 0 if result.matches else 1


def _bps(value: Any) -> str:
    return "n/a" if value is None else f"{value:+.1f} bps"


def _kind(message: Any) -> str:
    return str(message.type)


async def play_day(
    *,
    speed: float = 390.0,
    out: Path,
    broker_url: str | None = None,
    root: str = DEFAULT_ROOT,
    seed: int = 7,
    show_table: bool = False,
) -> DemoResult:
    """Play the invented day through the daemon over MQTT (see the module docstring).

    Args:
        speed: Simulated seconds per real second.
        out: Output folder (its journal and replay folder are replaced).
        broker_url: An existing broker, or ``None`` for the embedded one.
        root: MQTT topic root.
        seed: Seed of the invented day.
        show_table: Show the live table of working orders.

    Returns:
        Where the outputs are, and the comparison of the live run with its replay.
    """
    from tracker.shell.broker import EmbeddedBroker
    from tracker.shell.config import Settings, parse_broker_url, validate_root

    validate_root(root, field="--root")
    out.mkdir(parents=True, exist_ok=True)
    journal = out / "journal.sqlite"
    for stale in (journal, Path(f"{journal}-wal"), Path(f"{journal}-shm")):
        stale.unlink(missing_ok=True)
    replay_dir = out / "replay"
    if replay_dir.exists():
        shutil.rmtree(replay_dir)

    embedded: EmbeddedBroker | None = None
    if broker_url is None:
        embedded = EmbeddedBroker()
        await embedded.start()
        broker_url = embedded.url
    try:
        broker, username, password = parse_broker_url(broker_url, field="--broker")
        broker = type(broker)(
            host=broker.host,
            port=broker.port,
            tls=broker.tls,
            username=username or "demo",
            password=password,
        )
        from tracker.sim.scenario import Scenario

        scenario = Scenario(seed, root=root)
        first = scenario.next_time()
        assert first is not None
        instance = f"demo-{seed}"
        settings = Settings(
            journal=journal,
            broker=broker,
            root=root,
            instance=instance,
            tick_seconds=DEMO_TICK_SECONDS,
            heartbeat_seconds=2.0,
            clock_start=first - timedelta(seconds=1),
            clock_speed=speed,
            durability="normal",
        )
        await _forget_session(broker, settings.client_id)
        started = _time.monotonic()
        clock = _SimClock(first - timedelta(seconds=1), speed)
        published = await _run_live(settings, scenario, clock, show_table)
        wall = _time.monotonic() - started
        await _forget_session(broker, settings.client_id)
    finally:
        if embedded is not None:
            await embedded.stop()

    replayed, summary = _replay(journal, replay_dir, root)
    return DemoResult(
        journal=journal,
        replay_dir=replay_dir,
        published=published,
        replayed=replayed,
        summary=summary,
        broker_url=broker_url,
        wall_seconds=wall,
    )


async def _forget_session(broker: Any, client_id: str) -> None:
    """Drop the broker's stored session of ``client_id`` (a clean-session connect does that)."""
    import aiomqtt

    async with aiomqtt.Client(
        broker.host,
        broker.port,
        identifier=client_id,
        clean_session=True,
        username=broker.username,
        password=broker.password.reveal() if broker.password else None,
        timeout=10,
    ):
        pass


async def _run_live(
    settings: Any, scenario: Any, clock: _SimClock, show_table: bool
) -> dict[str, list[bytes]]:
    """Daemon + scripted market/router until the day is over; the daemon's outputs by kind."""
    from tracker.edge.wire import encode
    from tracker.shell.daemon import Daemon

    published: dict[str, list[bytes]] = {}
    table = _OrderTable()

    def on_output(message: Any) -> None:
        published.setdefault(_kind(message), []).append(encode(message))
        table.see(message)

    async with Daemon(settings, on_output=on_output, clock=clock) as daemon:
        runner = asyncio.create_task(daemon.run(), name="demo.daemon")
        try:
            await asyncio.wait_for(daemon.bus.connected.wait(), 30)
            with _live(table, show_table) as refresh:
                await _drive(settings, scenario, clock, daemon, refresh)
        finally:
            daemon.stop()
            await asyncio.wait_for(runner, 60)
    return published


async def _drive(
    settings: Any, scenario: Any, clock: _SimClock, daemon: Any, refresh: Callable[[], None]
) -> None:
    """Publish the scenario's messages as they fall due; feed the daemon's targets to its router."""
    import aiomqtt

    from tracker.edge.wire import decode_output
    from tracker.shell.bus import topic_matches

    broker = settings.broker
    root = settings.root
    topics = Topics(root)
    watched = (topics.targets(), topics.status())
    close = scenario.session.bins(scenario.day)[-1][1]
    finish = close.astimezone(UTC) + timedelta(minutes=AFTER_CLOSE_MINUTES)
    heard = [_time.monotonic()]
    woken = asyncio.Event()  # the router got work: look at the queue again now

    async with aiomqtt.Client(
        broker.host,
        broker.port,
        identifier=f"{settings.client_id}-market",
        username=broker.username,
        password=broker.password.reveal() if broker.password else None,
        timeout=30,
    ) as client:
        await client.subscribe([(topic, 1) for topic in watched])

        async def listen() -> None:
            async for message in client.messages:
                topic = message.topic.value
                # Retained messages are old news (a status of an earlier run); amqtt may also
                # send retained messages of other subscriptions: keep live targets/status only.
                if message.retain or not any(topic_matches(topic, w) for w in watched):
                    continue
                heard[0] = _time.monotonic()
                payload = message.payload
                assert isinstance(payload, bytes | bytearray)
                if not payload:
                    continue  # a retained target cleared (the order has ended)
                if topic.startswith(topics.targets("")):
                    scenario.on_output(decode_output(bytes(payload)))
                    woken.set()
                else:
                    scenario.on_output(decode_output(bytes(payload)))

        listener = asyncio.create_task(listen(), name="demo.router")
        try:
            while True:
                due = scenario.next_time()
                clock.ceiling = finish if due is None else due
                now = clock()
                if due is not None and due <= now:
                    for record in scenario.inbound_until(now):
                        await client.publish(record.topic, payload_bytes(record.payload), qos=1)
                        heard[0] = _time.monotonic()
                    continue
                refresh()
                if due is None and now >= finish and await _quiet(daemon, heard):
                    if scenario.next_time() is None:
                        return
                    continue
                wait = 0.05 if due is None else (due - now).total_seconds() / clock.speed
                woken.clear()
                with contextlib.suppress(TimeoutError):
                    await asyncio.wait_for(woken.wait(), min(max(wait, 0.0), 0.25))
        finally:
            listener.cancel()
            with _suppress_cancel():
                await listener


class _suppress_cancel:
    def __enter__(self) -> None:
        return None

    def __exit__(self, exc_type: Any, exc: Any, tb: Any) -> bool:
        return exc_type is asyncio.CancelledError


async def _quiet(daemon: Any, heard: list[float]) -> bool:
    """The daemon has nothing in hand and nothing was heard for a moment."""
    busy = daemon.inbox.qsize() or len(daemon.outbox)
    return not busy and _time.monotonic() - heard[0] >= QUIET_SECONDS


class _SimClock:
    """Simulated time at ``speed`` times real time that never passes ``ceiling``.

    The driver keeps the ceiling at the next message of the script that is not yet published,
    so at any speed the daemon's clock (and its ticks) never runs ahead of the script: time waits
    for the publisher instead of skipping over its messages.
    """

    def __init__(self, start: datetime, speed: float) -> None:
        self.speed = speed
        self.ceiling = start
        self._now = start
        self._last = _time.monotonic()

    def __call__(self) -> datetime:
        now = _time.monotonic()
        advanced = self._now + timedelta(seconds=(now - self._last) * self.speed)
        self._last = now
        self._now = max(self._now, min(advanced, self.ceiling))
        return self._now


def _replay(journal: Path, out: Path, root: str) -> tuple[dict[str, list[bytes]], dict[str, Any]]:
    from tracker.core.engine import Engine
    from tracker.edge.wire import encode
    from tracker.shell.journal import read_journal
    from tracker.shell.replay import replay, write_outputs

    result = replay(read_journal(journal), Engine(root=root), root)
    write_outputs(result, out)
    replayed: dict[str, list[bytes]] = {}
    for kind, messages in (
        ("target", result.targets),
        ("alert", result.alerts),
        ("status", result.status),
        ("error", result.errors),
        ("ack", result.acks),
    ):
        if messages:
            replayed[kind] = [encode(m) for m in messages]
    return replayed, result.summary


# ------------------------------------------------------------------------------------------------
# The live table


@dataclass
class _Row:
    symbol: str = ""
    side: str = ""
    state: str = ""
    quantity: int = 0
    filled: int = 0
    deviation_pct: float = 0.0
    next_target: int | None = None
    last_alert: str = ""
    ts: str = ""


@dataclass
class _OrderTable:
    rows: dict[str, _Row] = field(default_factory=dict)
    errors: int = 0
    clock: str = ""

    def see(self, message: Any) -> None:
        kind = message.type
        if kind == "error":
            self.errors += 1
            return
        order_id = getattr(message, "order_id", None)
        if order_id is None:
            return
        row = self.rows.setdefault(order_id, _Row())
        if message.ts is not None:
            self.clock = message.ts.astimezone(UTC).strftime("%H:%M:%S UTC")
        if kind == "status":
            row.symbol, row.side, row.state = message.symbol, message.side, message.state
            row.quantity, row.filled = message.quantity, message.filled
            row.deviation_pct = message.deviation_pct
        elif kind == "target":
            row.next_target = message.quantity
        elif kind == "alert":
            row.last_alert = f"{message.severity}: {message.code}"

    def render(self) -> Any:
        from rich.table import Table

        table = Table(
            title=f"tracker demo -- invented day on X_HLX (made up) -- {self.clock}",
            caption=f"{self.errors} messages rejected to the errors topic",
        )
        for name, justify in (
            ("order", "left"),
            ("sym", "left"),
            ("side", "left"),
            ("state", "left"),
            ("filled", "right"),
            ("done %", "right"),
            ("vs plan %", "right"),
            ("next bin", "right"),
            ("last alert", "left"),
        ):
            table.add_column(name, justify=justify, no_wrap=True)  # type: ignore[arg-type]
        for order_id in sorted(self.rows):
            row = self.rows[order_id]
            if not row.symbol:
                continue  # alerts about an order the engine does not know (no status)
            done = 100.0 * row.filled / row.quantity if row.quantity else 0.0
            table.add_row(
                order_id,
                row.symbol,
                row.side,
                row.state,
                f"{row.filled:,} / {row.quantity:,}",
                f"{done:.1f}",
                f"{row.deviation_pct:+.1f}",
                "" if row.next_target is None or row.state in _FINAL else f"{row.next_target:,}",
                row.last_alert,
            )
        return table


class _live:
    """rich.live.Live around the table, or nothing when the table is not shown."""

    def __init__(self, table: _OrderTable, show: bool) -> None:
        self._table = table
        self._show = show
        self._live: Any = None

    def __enter__(self) -> Callable[[], None]:
        if not self._show:
            return lambda: None
        from rich.live import Live

        self._live = Live(self._table.render(), refresh_per_second=4, transient=False)
        self._live.__enter__()
        last = [0.0]

        def refresh() -> None:
            now = _time.monotonic()
            if now - last[0] >= 0.25:
                last[0] = now
                self._live.update(self._table.render())

        return refresh

    def __exit__(self, exc_type: Any, exc: Any, tb: Any) -> None:
        if self._live is not None:
            self._live.update(self._table.render())
            self._live.__exit__(exc_type, exc, tb)
            self._live.console.print()

"""Benchmark of ``tracker watch``: the view's CPU while 1,000 orders update every bin.

Everything runs on this machine, with invented data: a private Mosquitto on a free 127.0.0.1 port,
the daemon as ``python -m tracker run`` in its own process, and the view as ``python -m tracker
watch`` in a tmux pane (a real terminal, 200 x 60, on a private tmux server), drawing at its
default pace. 1,000 made-up parent orders on 50 made-up symbols (X_HX00..X_HX49, the made-up venue
Harbour Lane Exchange) start at the open; then every ``--bin-seconds`` of wall time one 5-minute
bin of the day passes: one fill per order (the status of each order changes), then the bin of
every symbol (the daemon re-plans all 1,000 orders and publishes a target and a status for each).
So the view reads about 3,050 messages per bin: 50 bins, 1,000 targets, 2,000 statuses (one per
fill, one per re-plan) and the alerts (it does not read the fills in bulk, only those of an open
detail).

Figures: the CPU time (user + system, from /proc) of the view and of the daemon over the same
window, each as % of one core, and their ratio; the daemon, which does the work the view shows,
is the same-run reference. The target: the view under 20 % of one core.

    .venv/bin/python benchmarks/bench_watch.py                 # 24 bins, 3 s each: about 2 minutes
    .venv/bin/python benchmarks/bench_watch.py --bin-seconds 1 # a harder pace
"""

from __future__ import annotations

import argparse
import asyncio
import contextlib
import json
import os
import shutil
import signal
import subprocess
import sys
import tempfile
import time
import uuid
from collections.abc import Sequence
from datetime import UTC, datetime, timedelta
from pathlib import Path

import aiomqtt

REPO = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(REPO))

from tests.brokers import PrivateMosquitto  # noqa: E402 -- after the path set-up

DAY = datetime(2026, 3, 10, 13, 30, tzinfo=UTC)  # 09:30 New York on an invented day
ROOT = "bench"
WINDOW = 256  # publications in flight at once


def iso(moment: datetime) -> str:
    return moment.astimezone(UTC).isoformat().replace("+00:00", "Z")


def dumps(payload: dict[str, object]) -> bytes:
    return json.dumps(payload, separators=(",", ":")).encode()


def symbols(count: int) -> list[str]:
    return [f"X_HX{i:02d}" for i in range(count)]


def orders(count: int) -> list[str]:
    return [f"X_HLX-{i:04d}" for i in range(count)]


def order_message(order_id: str, symbol: str) -> tuple[str, bytes]:
    payload = {
        "type": "order",
        "action": "new",
        "order_id": order_id,
        "symbol": symbol,
        "side": "buy",
        "quantity": 2_000_000,
        "start": iso(DAY),
        "end": iso(DAY + timedelta(hours=6, minutes=30)),
        "max_participation": 0.5,
        "ts": iso(DAY - timedelta(minutes=1)),
    }
    return f"{ROOT}/orders/{order_id}", dumps(payload)


def bin_message(symbol: str, index: int) -> tuple[str, bytes]:
    """Bin ``index`` of the day (1: 09:30-09:35, whose close makes the orders' first plans)."""
    start = DAY + timedelta(minutes=5 * (index - 1))
    price = 20.0 + 0.01 * index
    payload = {
        "type": "bin",
        "symbol": symbol,
        "start": iso(start),
        "end": iso(start + timedelta(minutes=5)),
        "volume": 400_000,
        "vwap": price,
        "open": price,
        "high": price + 0.05,
        "low": price - 0.05,
        "close": price,
        "spread": 0.02,
        "ts": iso(start + timedelta(minutes=5, seconds=1)),
    }
    return f"{ROOT}/bins/{symbol}", dumps(payload)


def fill_message(order_id: str, index: int) -> tuple[str, bytes]:
    """One fill of 10 shares in bin ``index``."""
    payload = {
        "type": "fill",
        "fill_id": f"{order_id}-{index:03d}",
        "order_id": order_id,
        "quantity": 10,
        "price": 20.0,
        "ts": iso(DAY + timedelta(minutes=5 * (index - 1) + 2)),
    }
    return f"{ROOT}/fills/{order_id}", dumps(payload)


async def blast(client: aiomqtt.Client, messages: Sequence[tuple[str, bytes]]) -> None:
    """Publish at QoS 1 with up to WINDOW in flight."""
    gate = asyncio.Semaphore(WINDOW)

    async def one(topic: str, payload: bytes) -> None:
        async with gate:
            await client.publish(topic, payload, qos=1)

    await asyncio.gather(*(one(topic, payload) for topic, payload in messages))


def cpu_seconds(pid: int) -> float:
    """User + system CPU time of a process so far."""
    fields = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()
    return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")


class Counter:
    """Counts the daemon's targets (how far it got)."""

    def __init__(self) -> None:
        self.targets = 0
        self.last: object = None

    async def listen(self, port: int) -> None:
        async with aiomqtt.Client("127.0.0.1", port, identifier="bench-counter") as client:
            await client.subscribe(f"{ROOT}/targets/+", qos=1)
            async for message in client.messages:
                self.targets += 1
                self.last = message.payload


async def wait_for(predicate: object, timeout: float, what: str) -> None:
    deadline = time.monotonic() + timeout
    while not predicate():  # type: ignore[operator]
        if time.monotonic() > deadline:
            raise SystemExit(f"timed out after {timeout} s waiting for {what}")
        await asyncio.sleep(0.1)


class Tmux:
    """A private tmux server (``-L``) with one pane running the view."""

    def __init__(self, command: list[str], width: int = 200, height: int = 60) -> None:
        self.socket = f"bench-watch-{uuid.uuid4().hex[:8]}"
        line = "exec " + " ".join(f"'{part}'" for part in command)
        self._tmux("new-session", "-d", "-s", "view", "-x", str(width), "-y", str(height), line)

    def _tmux(self, *args: str) -> str:
        return subprocess.run(
            ["tmux", "-L", self.socket, *args], capture_output=True, text=True, check=True
        ).stdout

    def pid(self) -> int:
        return int(self._tmux("display-message", "-p", "-t", "view", "#{pane_pid}").strip())

    def screen(self) -> str:
        return self._tmux("capture-pane", "-p", "-t", "view")

    def close(self) -> None:
        """Quit the view with its key (so a profile is written), then end the tmux server."""
        subprocess.run(["tmux", "-L", self.socket, "send-keys", "-t", "view", "q"], check=False)
        time.sleep(2.0)
        subprocess.run(["tmux", "-L", self.socket, "kill-server"], capture_output=True, check=False)


async def run(args: argparse.Namespace) -> None:
    folder = Path(tempfile.mkdtemp(prefix="bench-watch-"))
    names = symbols(args.symbols)
    ids = orders(args.orders)
    symbol_of = {order_id: names[n % len(names)] for n, order_id in enumerate(ids)}
    with PrivateMosquitto(folder / "mosquitto", max_inflight=WINDOW) as broker:
        log = open(folder / "daemon.log", "wb")  # noqa: SIM115 -- closed below
        daemon = subprocess.Popen(
            [
                sys.executable,
                "-m",
                "tracker",
                "run",
                "--broker",
                broker.url,
                "--root",
                ROOT,
                "--journal",
                str(folder / "journal.sqlite"),
                "--instance",
                "bench",
                "--clock-start",
                iso(DAY - timedelta(minutes=2)),
                "--durability",
                "normal",
                "--log-format",
                "json",
                "--log-level",
                "warning",
            ],
            stdout=log,
            stderr=subprocess.STDOUT,
            cwd=REPO,
        )
        counter = Counter()
        listener = asyncio.create_task(counter.listen(broker.port))
        view: Tmux | None = None
        try:
            async with aiomqtt.Client(
                "127.0.0.1", broker.port, identifier="bench-publisher", timeout=120
            ) as client:
                client.pending_calls_threshold = WINDOW + 16  # many in flight, on purpose
                await asyncio.sleep(2.0)  # the daemon connects and subscribes
                await blast(client, [order_message(o, symbol_of[o]) for o in ids])
                await blast(client, [bin_message(s, 1) for s in names])
                await wait_for(lambda: counter.targets >= len(ids), 120, "the first targets")
                # --profile FILE runs the view under cProfile (where does its time go?).
                profile = ["-m", "cProfile", "-o", args.profile] if args.profile else []
                command = [sys.executable, *profile, "-m", "tracker", "watch"]
                view = Tmux(
                    [*command, "--broker", broker.url, "--root", ROOT, "--stale-after", "3600"]
                )
                await asyncio.sleep(4.0)  # the view starts and takes the retained statuses
                view_pid = view.pid()
                start_view, start_daemon = cpu_seconds(view_pid), cpu_seconds(daemon.pid)
                started = time.monotonic()
                for index in range(2, args.bins + 2):
                    due = started + (index - 2) * args.bin_seconds
                    await asyncio.sleep(max(0.0, due - time.monotonic()))
                    await blast(client, [fill_message(o, index) for o in ids])
                    await blast(client, [bin_message(s, index) for s in names])
                expected = len(ids) * (args.bins + 1)
                await wait_for(lambda: counter.targets >= expected, 300, "the last targets")
                await asyncio.sleep(
                    max(0.0, started + args.bins * args.bin_seconds - time.monotonic())
                )
                wall = time.monotonic() - started
                view_cpu = cpu_seconds(view_pid) - start_view
                daemon_cpu = cpu_seconds(daemon.pid) - start_daemon
                screen = view.screen()
        finally:
            listener.cancel()
            with contextlib.suppress(asyncio.CancelledError, aiomqtt.MqttError):
                await listener
            if view is not None:
                view.close()
            daemon.send_signal(signal.SIGTERM)
            daemon.wait(timeout=120)
            log.close()
    shutil.rmtree(folder, ignore_errors=True)
    per_bin = len(ids) * 3 + len(names)
    print(
        f"orders {len(ids)} on {len(names)} symbols; {args.bins} bins, one every "
        f"{args.bin_seconds:g} s of wall time; about {per_bin:,} messages to the view per bin "
        f"({per_bin / args.bin_seconds:,.0f}/s)"
    )
    print(f"window {wall:.1f} s wall")
    print(
        f"view   CPU {view_cpu:6.2f} s = {100 * view_cpu / wall:5.1f} % of one core (target < 20 %)"
    )
    print(
        f"daemon CPU {daemon_cpu:6.2f} s = {100 * daemon_cpu / wall:5.1f} % of one core "
        "(same-run reference)"
    )
    print(f"view / daemon = {view_cpu / daemon_cpu:.2f}")
    print("the view's screen at the end (first 8 lines):")
    for line in screen.splitlines()[:8]:
        print("  " + line.rstrip())


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--orders", type=int, default=1_000)
    parser.add_argument("--symbols", type=int, default=50)
    parser.add_argument("--bins", type=int, default=24)
    parser.add_argument("--bin-seconds", type=float, default=3.0)
    parser.add_argument("--profile", metavar="FILE", help="run the view under cProfile")
    args = parser.parse_args()
    if shutil.which("tmux") is None:
        raise SystemExit("tmux is needed (apt-get install tmux)")
    asyncio.run(run(args))


if __name__ == "__main__":
    main()

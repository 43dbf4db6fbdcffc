"""Benchmark of fill ingestion and of what the broker keeps for the daemon (invented data).

Everything runs on this machine: private Mosquittos on free 127.0.0.1 ports, the daemon as
``python -m tracker run`` in its own process, and the publishers and subscribers (aiomqtt) here.
Invented data: 1,000 made-up parent orders on 50 made-up symbols X_HX00..X_HX49 of the made-up
venue Harbour Lane Exchange (X_HLX), as in ``bench_daemon.py``.

Parts (each prints its figures beside a reference taken in the same run):

``rate``: a burst of ``--fills`` fills (default 20,000) published by one aiomqtt client as fast as
it goes, with the broker of the shipped configuration (``deploy/mosquitto.conf``'s contract
lines); the daemon's rate (fills until the last fill's status is back) against the *raw rate*:
the same client publishing the same messages through the same broker to a plain subscriber that
does nothing, measured just before and just after the daemon's burst.

``loss``: for the shipped configuration and for a stock one (Mosquitto's defaults: at most 1,000
messages queued per client, no persistence), (a) the burst while the daemon is connected and
(b) a kill -9 of the daemon, 5 s down while 5,000 fills are published at 1,000/s, then a restart.
Lost fills = fills published - fills counted in the summary the daemon writes at its orderly
stop. When the daemon's health carries a ``gaps`` field (per-source sequence numbers), it and the
number of alerts whose code names a gap are printed too; ``--sequence SOURCE`` stamps every fill
with ``source`` and ``seq`` fields for that, and the source sends one heartbeat (the next ``seq``)
once its fills are out and the daemon has gone quiet, as a source with nothing more to say does.

    .venv/bin/python benchmarks/bench_ingest.py                # both parts, about 4 minutes
    .venv/bin/python benchmarks/bench_ingest.py --only rate
    .venv/bin/python benchmarks/bench_ingest.py --only loss --fills 20000
"""

from __future__ import annotations

import argparse
import asyncio
import json
import os
import shutil
import signal
import subprocess
import sys
import tempfile
import time
from collections.abc import Sequence
from datetime import timedelta
from pathlib import Path
from typing import Any

import aiomqtt

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))
sys.path.insert(0, str(HERE.parent))

from bench_daemon import (  # noqa: E402 -- after the path set-up
    DAY,
    RAW_ROOT,
    ROOT,
    Counter,
    bin_message,
    blast,
    ceiling_library,
    fill_messages,
    iso,
    order_ids,
    order_message,
)

from tests.brokers import PrivateMosquitto, contract_lines  # noqa: E402

BURST_AT = DAY + timedelta(minutes=1)


def shipped(args: argparse.Namespace) -> list[str]:
    """The contract lines of the daemon's own tree (``--repo``): its broker as it ships it."""
    return contract_lines(args.repo / "deploy" / "mosquitto.conf")


class Daemon:
    """``python -m tracker run`` from a given source tree, in its own process."""

    def __init__(self, folder: Path, url: str, repo: Path, durability: str = "full") -> None:
        self.folder = folder
        self.journal = folder / "journal.sqlite"
        self.summary = folder / "summary.json"
        self.url = url
        self.repo = repo
        self.durability = durability
        self.process: subprocess.Popen[bytes] | None = None
        self.starts = 0

    def start(self) -> None:
        self.starts += 1
        log = open(self.folder / f"daemon-{self.starts}.log", "wb")  # noqa: SIM115
        profile = os.environ.get("BENCH_PROFILE")
        prefix = ["-m", "cProfile", "-o", f"{profile}.{self.starts}"] if profile else []
        self.process = subprocess.Popen(
            [
                sys.executable,
                *prefix,
                "-m",
                "tracker",
                "run",
                "--broker",
                self.url,
                "--root",
                ROOT,
                "--journal",
                str(self.journal),
                "--summary",
                str(self.summary),
                "--instance",
                "bench",
                "--clock-start",
                iso(BURST_AT),  # the orders are working from the start; fills are stamped now
                "--log-format",
                "json",
                "--log-level",
                "warning",
                "--durability",
                self.durability,
            ],
            stdout=log,
            stderr=subprocess.STDOUT,
            cwd=self.repo,
            env={**os.environ, "PYTHONPATH": self.python_path()},
        )
        log.close()

    def python_path(self) -> str:
        """The daemon's tree first; BENCH_PYTHONPATH after it (e.g. a sitecustomize that counts
        garbage collections and prints a GCSTATS line at exit)."""
        extra = os.environ.get("BENCH_PYTHONPATH")
        return os.pathsep.join([str(self.repo), *([extra] if extra else [])])

    def status_file(self, key: str) -> int:
        """A field of /proc/PID/status in KiB (VmRSS, VmHWM)."""
        assert self.process is not None
        for line in Path(f"/proc/{self.process.pid}/status").read_text().splitlines():
            name, _, value = line.partition(":")
            if name == key:
                return int(value.split()[0])
        raise KeyError(key)

    def cpu_seconds(self) -> float:
        assert self.process is not None
        fields = Path(f"/proc/{self.process.pid}/stat").read_text().rsplit(")", 1)[1].split()
        return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")

    def log_text(self) -> str:
        return "".join(
            (self.folder / f"daemon-{n}.log").read_text(errors="replace")
            for n in range(1, self.starts + 1)
        )

    def kill(self) -> None:
        assert self.process is not None
        self.process.kill()
        self.process.wait(timeout=60)

    def stop(self) -> int:
        assert self.process is not None
        self.process.send_signal(signal.SIGTERM)
        return self.process.wait(timeout=300)

    def filled_shares(self) -> int:
        summary = json.loads(self.summary.read_text())
        return int(sum(o["filled"] for o in summary["orders"]))


async def health(port: int, timeout: float = 120.0) -> dict[str, Any]:
    """The daemon's retained health document once it says online."""
    async with aiomqtt.Client("127.0.0.1", port, identifier="health-watch", timeout=60) as client:
        await client.subscribe(f"{ROOT}/health/bench", qos=1)
        async with asyncio.timeout(timeout):
            async for message in client.messages:
                assert isinstance(message.payload, bytes)
                document: dict[str, Any] = json.loads(message.payload)
                if document.get("status") == "online":
                    return document
    raise TimeoutError


async def wait_online(port: int) -> None:
    await health(port)


async def fresh_health(port: int) -> dict[str, Any]:
    """A health document published after now (the next heartbeat)."""
    async with aiomqtt.Client("127.0.0.1", port, identifier="health-fresh", timeout=60) as client:
        await client.subscribe(f"{ROOT}/health/bench", qos=1)
        async with asyncio.timeout(60):
            async for message in client.messages:
                assert isinstance(message.payload, bytes)
                if not message.retain:
                    document: dict[str, Any] = json.loads(message.payload)
                    return document
    raise TimeoutError


async def prepare(port: int, orders: Sequence[str]) -> None:
    """Every order in, then bin 0 closed for every symbol (the orders start working)."""
    async with Counter(port, [f"{ROOT}/status/+"], "prepare-status") as status:
        await blast(port, [order_message(o) for o in orders], "orders-pub")
        await status.wait_count(len(orders), 300)
    symbols = sorted({json.loads(order_message(o)[1])["symbol"] for o in orders})
    await blast(port, [bin_message(s, 0) for s in symbols], "bins-pub")


def stamped(
    messages: list[tuple[str, bytes]], source: str | None, first: int = 1
) -> list[tuple[str, bytes]]:
    """The fills with ``source`` and ``seq`` fields (for gap detection), or as they are."""
    if source is None:
        return messages
    out = []
    for n, (topic, payload) in enumerate(messages, start=first):
        document = json.loads(payload)
        document.update(source=source, seq=n)
        out.append((topic, json.dumps(document, separators=(",", ":")).encode()))
    return out


def heartbeats(source: str | None, seq: int) -> list[tuple[str, bytes]]:
    """A source's heartbeat numbered ``seq`` (what it sends when it has had nothing else to say
    for a while), or nothing when fills are not stamped."""
    if source is None:
        return []
    document = {"type": "heartbeat", "source": source, "seq": seq}
    return [(f"{ROOT}/control", json.dumps(document, separators=(",", ":")).encode())]


async def settle(counter: Counter, target: int, quiet: float, timeout: float) -> None:
    """Until ``target`` messages came, or none for ``quiet`` seconds."""
    deadline = time.monotonic() + timeout
    last, seen = time.monotonic(), len(counter.times)
    while len(counter.times) < target and time.monotonic() < deadline:
        await asyncio.sleep(0.2)
        if len(counter.times) != seen:
            last, seen = time.monotonic(), len(counter.times)
        elif time.monotonic() - last > quiet:
            return


# ------------------------------------------------------------------------------------------------
# rate


async def part_rate(args: argparse.Namespace, folder: Path) -> dict[str, float]:
    orders = order_ids(args.orders)
    raw = fill_messages(orders, args.fills, 0, BURST_AT, root=RAW_ROOT)
    fills = stamped(fill_messages(orders, args.fills, 0, BURST_AT), args.sequence)
    figures: dict[str, float] = {}
    with PrivateMosquitto(
        folder / "mosquitto-rate", max_inflight=args.inflight, contract=shipped(args)
    ) as broker:
        daemon = Daemon(folder, broker.url, args.repo, args.durability)
        daemon.start()
        try:
            await wait_online(broker.port)
            await prepare(broker.port, orders)
            await asyncio.sleep(2.0)  # the first plans are published
            figures["raw_before"] = await ceiling_library(broker.port, raw, "raw-1")
            async with Counter(broker.port, [f"{ROOT}/status/+"], "burst-status") as status:
                cpu = daemon.cpu_seconds()
                started = await blast(broker.port, fills, "fills-pub")
                published = time.monotonic()
                await status.wait_count(len(fills), 600)
                took = status.times[-1] - started
            figures["rate"] = len(fills) / took
            figures["publisher"] = len(fills) / (published - started)
            figures["cpu"] = (daemon.cpu_seconds() - cpu) / took
            figures["cpu_us"] = 1e6 * (daemon.cpu_seconds() - cpu) / len(fills)
            figures["raw_after"] = await ceiling_library(broker.port, raw, "raw-2")
        finally:
            code = daemon.stop()
    for line in daemon.log_text().splitlines():
        if line.startswith("GCSTATS"):
            print(line)
    best = max(figures["raw_before"], figures["raw_after"])
    figures["ratio"] = figures["rate"] / best
    print(
        f"raw rate (same aiomqtt client -> same broker -> subscriber doing nothing): "
        f"{figures['raw_before']:,.0f} msg/s before, {figures['raw_after']:,.0f} msg/s after",
        flush=True,
    )
    print(
        f"daemon, burst of {len(fills):,} fills: {figures['rate']:,.0f} fills/s = "
        f"{100 * figures['ratio']:.0f} % of the better raw rate "
        f"(publisher alone {figures['publisher']:,.0f} msg/s; daemon at "
        f"{100 * figures['cpu']:.0f} % of a core, {figures['cpu_us']:.0f} us of CPU per fill; "
        f"exit code {code})",
        flush=True,
    )
    return figures


# ------------------------------------------------------------------------------------------------
# loss


async def gap_report(port: int, alerts: Counter) -> str:
    """The daemon's gap figures, when it has any (health ``gaps``; alerts naming a gap)."""
    document = await fresh_health(port)
    if "gaps" not in document:
        return ""
    codes = [json.loads(payload).get("code", "") for _, _, payload in alerts.messages]
    gap_alerts = sum(1 for code in codes if "gap" in code)
    return f"; daemon health gaps: {document['gaps']}, gap alerts: {gap_alerts}"


async def burst_loss(args: argparse.Namespace, folder: Path, contract: list[str] | None) -> str:
    orders = order_ids(args.orders)
    fills = stamped(fill_messages(orders, args.fills, 0, BURST_AT), args.sequence)
    with PrivateMosquitto(folder / "mosquitto", contract=contract) as broker:
        daemon = Daemon(folder, broker.url, args.repo, args.durability)
        daemon.start()
        try:
            await wait_online(broker.port)
            await prepare(broker.port, orders)
            async with (
                Counter(broker.port, [f"{ROOT}/status/+"], "loss-status") as status,
                Counter(broker.port, [f"{ROOT}/alerts/#"], "loss-alerts") as alerts,
            ):
                alerts.keep = True
                await asyncio.sleep(2.0)
                status.reset()
                await blast(broker.port, fills, "fills-pub")
                await settle(status, len(fills), quiet=5.0, timeout=600)
                beat = heartbeats(args.sequence, len(fills) + 1)
                if beat:
                    await blast(broker.port, beat, "beat-pub")
                    await asyncio.sleep(2.0)
                gaps = await gap_report(broker.port, alerts)
        finally:
            daemon.stop()
    lost = len(fills) - daemon.filled_shares() // 10
    return f"burst of {len(fills):,} fills while connected: {lost:,} lost{gaps}"


async def paced(port: int, messages: Sequence[tuple[str, bytes]], rate: float) -> None:
    """Publish at about ``rate`` messages/s (chunks every 0.1 s), QoS 1."""
    chunk = max(1, int(rate / 10))
    started = time.monotonic()
    for index in range(0, len(messages), chunk):
        await blast(port, messages[index : index + chunk], f"paced-{index}")
        ahead = started + (index + chunk) / rate - time.monotonic()
        if ahead > 0:
            await asyncio.sleep(ahead)


async def kill_loss(args: argparse.Namespace, folder: Path, contract: list[str] | None) -> str:
    orders = order_ids(args.orders)
    fills = stamped(fill_messages(orders, args.kill_fills, 0, BURST_AT), args.sequence)
    with PrivateMosquitto(folder / "mosquitto", contract=contract) as broker:
        daemon = Daemon(folder, broker.url, args.repo, args.durability)
        daemon.start()
        try:
            await wait_online(broker.port)
            await prepare(broker.port, orders)
            await asyncio.sleep(2.0)
            publishing = asyncio.create_task(paced(broker.port, fills, args.kill_rate))
            await asyncio.sleep(0.5)
            daemon.kill()
            killed = time.monotonic()
            await asyncio.sleep(max(0.0, args.down - (time.monotonic() - killed)))
            daemon.start()
            await publishing
            async with (
                Counter(broker.port, [f"{ROOT}/status/+"], "kill-status") as status,
                Counter(broker.port, [f"{ROOT}/alerts/#"], "kill-alerts") as alerts,
            ):
                alerts.keep = True
                await settle(status, 10**9, quiet=5.0, timeout=600)
                beat = heartbeats(args.sequence, len(fills) + 1)
                if beat:
                    await blast(broker.port, beat, "beat-pub")
                    await asyncio.sleep(2.0)
                gaps = await gap_report(broker.port, alerts)
        finally:
            daemon.stop()
    lost = len(fills) - daemon.filled_shares() // 10
    return (
        f"kill -9, {args.down:g} s down, {len(fills):,} fills at {args.kill_rate:,.0f}/s: "
        f"{lost:,} lost{gaps}"
    )


async def part_loss(args: argparse.Namespace, folder: Path) -> None:
    for name, contract in (("shipped", shipped(args)), ("stock", [])):
        for what in (burst_loss, kill_loss):
            sub = folder / f"{name}-{what.__name__}"
            sub.mkdir()
            line = await what(args, sub, contract)
            print(f"{name} configuration: {line}", flush=True)


async def run(args: argparse.Namespace) -> None:
    folder = Path(tempfile.mkdtemp(prefix="bench-ingest-"))
    try:
        if args.only in (None, "rate"):
            await part_rate(args, folder)
        if args.only in (None, "loss"):
            await part_loss(args, folder)
    finally:
        shutil.rmtree(folder, ignore_errors=True)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--only", choices=("rate", "loss"))
    parser.add_argument("--orders", type=int, default=1000)
    parser.add_argument("--fills", type=int, default=20_000, help="fills in the burst")
    parser.add_argument("--kill-fills", type=int, default=5_000)
    parser.add_argument("--kill-rate", type=float, default=1_000.0, help="fills/s meanwhile")
    parser.add_argument("--down", type=float, default=5.0, help="seconds the daemon is down")
    parser.add_argument("--durability", choices=("full", "normal"), default="full")
    parser.add_argument(
        "--inflight", type=int, help="Mosquitto max_inflight_messages (default: the shipped one)"
    )
    parser.add_argument("--sequence", metavar="SOURCE", help="stamp fills with source and seq")
    parser.add_argument(
        "--repo", type=Path, default=HERE.parent, help="source tree of the daemon to run"
    )
    args = parser.parse_args()
    asyncio.run(run(args))


if __name__ == "__main__":
    main()

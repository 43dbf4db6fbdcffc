"""Benchmark of fairness under a flood of bad messages, and of memory with a huge payload.

Everything runs on this machine: a private Mosquitto on a free 127.0.0.1 port, the daemon as
``python -m tracker run`` in its own process, the publishers and subscribers (aiomqtt) here.
Invented data: 200 made-up parent orders on 50 made-up symbols X_HX00..X_HX49 of the made-up
venue Harbour Lane Exchange (X_HLX), as in ``bench_daemon.py``.

Parts (each with its reference from the same run):

``flood``: one client publishes good fills, one every 20 ms, each to another order; the latency
of a good fill is the time from its publication to its order's status message. First without a
flood (the reference), then while another client publishes ``--flood`` (default 10,000)
malformed fill messages as fast as it goes. Printed: p50 and p99 of both, how long the flood
took to publish, and how many error records the daemon published for it.

``memory``: the daemon's resident set before a payload of ``--payload-mb`` (default 100) MB is
published to it, its peak (VmHWM) and its resident set 5 s after. The broker of this part has
the shipped configuration *without* its ``max_packet_size`` (which would refuse the payload
before it reaches the daemon): it measures the daemon's own guard.

    .venv/bin/python benchmarks/bench_flood.py                  # about 1.5 minutes
    .venv/bin/python benchmarks/bench_flood.py --repo /tmp/old   # the daemon of another tree
"""

from __future__ import annotations

import argparse
import asyncio
import json
import shutil
import sys
import tempfile
import time
from pathlib import Path

import aiomqtt

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))
sys.path.insert(0, str(HERE.parent))

from bench_daemon import ROOT, Counter, blast, iso, order_ids, pct  # noqa: E402
from bench_ingest import BURST_AT, Daemon, prepare, shipped, wait_online  # noqa: E402

from tests.brokers import PrivateMosquitto  # noqa: E402

GOOD_EVERY = 0.020  # seconds between good fills


def good_fill(order_id: str, n: int) -> tuple[str, bytes]:
    payload = {
        "type": "fill",
        "fill_id": f"G{n:06d}",
        "order_id": order_id,
        "quantity": 10,
        "price": 20.0,
        "ts": iso(BURST_AT),
    }
    return f"{ROOT}/fills/{order_id}", json.dumps(payload, separators=(",", ":")).encode()


def bad_fill(n: int) -> tuple[str, bytes]:
    """A fill the edge refuses (negative shares), on a topic of its own made-up order."""
    payload = {
        "type": "fill",
        "fill_id": f"B{n:06d}",
        "order_id": "X_HLX-BAD",
        "quantity": -10,
        "price": 20.0,
        "ts": iso(BURST_AT),
    }
    return f"{ROOT}/fills/X_HLX-BAD", json.dumps(payload, separators=(",", ":")).encode()


async def good_stream(
    port: int, orders: list[str], first: int, stop: asyncio.Event, sent: dict[str, float]
) -> int:
    """Publish good fills every GOOD_EVERY s, one order each, until ``stop``; return how many."""
    n = 0
    async with aiomqtt.Client("127.0.0.1", port, identifier=f"good-{first}", timeout=60) as client:
        started = time.monotonic()
        while not stop.is_set() and n < len(orders):
            order_id = orders[n]
            topic, payload = good_fill(order_id, first + n)
            sent[order_id] = time.monotonic()
            await client.publish(topic, payload, qos=1)
            n += 1
            ahead = started + n * GOOD_EVERY - time.monotonic()
            if ahead > 0:
                await asyncio.sleep(ahead)
    return n


def latencies(status: Counter, sent: dict[str, float]) -> list[float]:
    """Per good fill (in the order sent): from its publication to its order's next status."""
    out: dict[str, float] = {}
    for at, topic, _ in status.messages:
        order_id = topic.rsplit("/", 1)[1]
        if order_id in sent and order_id not in out and at >= sent[order_id]:
            out[order_id] = at - sent[order_id]
    return [out[o] for o in sorted(out, key=lambda o: sent[o])]


async def phase(
    port: int, status: Counter, orders: list[str], first: int, flood: int
) -> tuple[list[float], int, float]:
    """One phase: good fills (with a flood from another client when ``flood``)."""
    status.reset()
    sent: dict[str, float] = {}
    stop = asyncio.Event()
    good = asyncio.create_task(good_stream(port, orders, first, stop, sent))
    flood_took = 0.0
    if flood:
        await asyncio.sleep(0.2)
        started = time.monotonic()
        await blast(port, [bad_fill(n) for n in range(flood)], "flood-pub")
        flood_took = time.monotonic() - started
        await asyncio.sleep(1.0)  # good fills go on a while after the flood
    else:
        await asyncio.sleep(3.0)
    stop.set()
    count = await good
    deadline = time.monotonic() + 120
    while len(latencies(status, sent)) < count and time.monotonic() < deadline:
        await asyncio.sleep(0.1)
    return latencies(status, sent), count, flood_took


async def part_flood(args: argparse.Namespace, folder: Path) -> None:
    orders = order_ids(args.orders)
    with PrivateMosquitto(
        folder / "mosquitto-flood", max_inflight=args.inflight, contract=shipped(args)
    ) as broker:
        daemon = Daemon(folder, broker.url, args.repo)
        daemon.start()
        try:
            await wait_online(broker.port)
            await prepare(broker.port, orders)
            await asyncio.sleep(2.0)
            async with (
                Counter(broker.port, [f"{ROOT}/status/+"], "flood-status") as status,
                Counter(broker.port, [f"{ROOT}/errors"], "flood-errors") as errors,
            ):
                status.keep = True
                half = len(orders) // 2
                calm, calm_count, _ = await phase(broker.port, status, orders[:half], 0, 0)
                errors.reset()
                stormy, stormy_count, took = await phase(
                    broker.port, status, orders[half:], 100_000, args.flood
                )
                await asyncio.sleep(12.0)  # the digest's interval closes at the next message
                await blast(broker.port, [good_fill(orders[0], 999_999)], "closer-pub")
                await asyncio.sleep(1.0)
                published_errors = len(errors.times)
        finally:
            daemon.stop()
    if args.verbose:
        print("no flood, ms:", " ".join(f"{1e3 * x:.0f}" for x in calm))
        print("flood, ms:", " ".join(f"{1e3 * x:.0f}" for x in stormy))
    print(
        f"good fills, no flood: p50 {1e3 * pct(calm, 0.5):.0f} ms, p99 "
        f"{1e3 * pct(calm, 0.99):.0f} ms ({len(calm)} of {calm_count} fills)",
        flush=True,
    )
    print(
        f"good fills during a flood of {args.flood:,} malformed messages from another client "
        f"(published in {took:.1f} s): p50 {1e3 * pct(stormy, 0.5):.0f} ms, p99 "
        f"{1e3 * pct(stormy, 0.99):.0f} ms ({len(stormy)} of {stormy_count} fills); "
        f"{published_errors:,} error records published for the flood",
        flush=True,
    )


async def part_memory(args: argparse.Namespace, folder: Path) -> None:
    contract = [line for line in shipped(args) if not line.startswith("max_packet_size")]
    with PrivateMosquitto(folder / "mosquitto-memory", contract=contract) as broker:
        daemon = Daemon(folder, broker.url, args.repo)
        daemon.start()
        try:
            await wait_online(broker.port)
            await prepare(broker.port, order_ids(50))
            await asyncio.sleep(2.0)
            before = daemon.status_file("VmRSS")
            peak_before = daemon.status_file("VmHWM")
            payload = b'{"type":"fill","pad":"' + b"x" * (args.payload_mb * 10**6) + b'"}'
            async with Counter(broker.port, [f"{ROOT}/errors"], "memory-errors") as errors:
                await blast(broker.port, [(f"{ROOT}/fills/X_HLX-0000", payload)], "big-pub")
                await errors.wait_count(1, 120)
            del payload
            await asyncio.sleep(5.0)
            after = daemon.status_file("VmRSS")
            peak = daemon.status_file("VmHWM")
        finally:
            daemon.stop()
    print(
        f"a {args.payload_mb} MB payload: resident {before / 1024:.0f} MiB before (peak "
        f"{peak_before / 1024:.0f} MiB), peak {peak / 1024:.0f} MiB, {after / 1024:.0f} MiB "
        "5 s after",
        flush=True,
    )


async def run(args: argparse.Namespace) -> None:
    folder = Path(tempfile.mkdtemp(prefix="bench-flood-"))
    try:
        if args.only in (None, "flood"):
            await part_flood(args, folder / "flood")
        if args.only in (None, "memory"):
            await part_memory(args, folder / "memory")
    finally:
        shutil.rmtree(folder, ignore_errors=True)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--only", choices=("flood", "memory"))
    parser.add_argument("--orders", type=int, default=400, help="good fills go one per order")
    parser.add_argument("--flood", type=int, default=10_000)
    parser.add_argument("--payload-mb", type=int, default=100)
    parser.add_argument("--verbose", action="store_true", help="print every latency")
    parser.add_argument(
        "--inflight", type=int, help="Mosquitto max_inflight_messages (default: the shipped one)"
    )
    parser.add_argument(
        "--repo", type=Path, default=HERE.parent, help="source tree of the daemon to run"
    )
    args = parser.parse_args()
    asyncio.run(run(args))


if __name__ == "__main__":
    main()

"""Replay throughput and the cost of one bin close, with references measured in the same run.

Invented data only: 50 made-up symbols (X_HX00..X_HX49) on the made-up venue Harbour Lane Exchange
(X_HLX), 500 parent orders (10 per symbol, the whole 09:30-16:00 session), one bin message per
symbol and 5-minute bin, and about 200,000 fills spread over each order's day.

Figures printed:

1. Replay throughput, messages per second, over the whole day from the JSON Lines file
   (``read_jsonl`` + ``replay``, ticks derived every second as in live), against two references
   on the same lines: ``json.loads`` + :func:`tracker.edge.wire.decode` alone (parse and pydantic
   validation: the floor any replay pays), and the whole replay shell on a null engine. The
   difference is the engine's share. Target: >= 20,000 messages/s.
2. One bin close that re-plans 1,000 working orders on one symbol: the time of
   ``Engine.handle(bin)``, p50 and p99 over several bin closes, against the reference
   :func:`tracker.solve_batch` of the same 1,000 remaining-horizon problems. Target: <= 250 ms.

Times are CPU time of this process (``time.process_time``): the machine may be shared, and wall
time then measures the neighbours too (the replay's wall time is printed beside it).

Run: ``.venv/bin/python benchmarks/bench_replay.py [--fills 200000] [--closes 12] [--profile]
[--only replay|close]``. ``--profile`` prints the top functions of the replay (cProfile).
"""

from __future__ import annotations

import argparse
import cProfile
import io
import json
import pstats
import statistics
import sys
import tempfile
import time
from datetime import UTC, date, datetime, timedelta
from pathlib import Path
from typing import Any

import numpy as np

from tracker.core.formats import utc_text
from tracker.core.session import Session
from tracker.core.topics import DEFAULT_ROOT, Topics
from tracker.edge.recordings import read_jsonl
from tracker.edge.wire import decode
from tracker.shell.replay import replay

DAY = date(2026, 3, 10)
ROOT = DEFAULT_ROOT
TOPICS = Topics(ROOT)


def _iso(ts: datetime) -> str:
    return utc_text(ts, "milliseconds")


def make_day(symbols: int, orders_per_symbol: int, fills: int, seed: int = 1) -> list[str]:
    """The invented benchmark day as JSON Lines text lines, in time order."""
    rng = np.random.default_rng(seed)
    session = Session()
    bins = session.bins(DAY)
    open_, close = bins[0][0].astimezone(UTC), bins[-1][1].astimezone(UTC)
    events: list[tuple[datetime, int, str, dict[str, Any]]] = []
    seq = 0

    def add(ts: datetime, topic: str, payload: dict[str, Any]) -> None:
        nonlocal seq
        seq += 1
        events.append((ts, seq, topic, payload))

    n_orders = symbols * orders_per_symbol
    per_order = fills // n_orders
    for s in range(symbols):
        symbol = f"X_HX{s:02d}"
        price = float(rng.uniform(10, 90))
        adv = float(rng.uniform(2e6, 8e6))
        for j in range(orders_per_symbol):
            order_id = f"{symbol}-{j:03d}"
            quantity = int(rng.integers(20_000, 80_000))
            submit = open_ - timedelta(minutes=1)
            add(
                submit,
                TOPICS.orders(order_id),
                {
                    "type": "order",
                    "action": "new",
                    "order_id": order_id,
                    "symbol": symbol,
                    "side": "buy" if j % 2 == 0 else "sell",
                    "quantity": quantity,
                    "start": _iso(open_),
                    "end": _iso(close),
                    "urgency": "medium",
                    "max_participation": 0.2,
                    "arrival_price": round(price, 2),
                    "ts": _iso(submit),
                },
            )
            sizes = rng.multinomial(int(quantity * 0.9), np.ones(per_order) / per_order)
            offsets = np.sort(rng.uniform(0, (close - open_).total_seconds() - 1, per_order))
            for k, (size, offset) in enumerate(zip(sizes, offsets, strict=True)):
                if size <= 0:
                    continue
                ts = open_ + timedelta(milliseconds=int(offset * 1000))
                add(
                    ts,
                    TOPICS.fills(order_id),
                    {
                        "type": "fill",
                        "fill_id": f"{order_id}-{k:05d}",
                        "order_id": order_id,
                        "quantity": int(size),
                        "price": round(price * (1 + float(rng.normal(0, 0.002))), 2),
                        "ts": _iso(ts),
                    },
                )
        for start, end in bins:
            volume = int(adv / len(bins) * rng.lognormal(0, 0.3))
            high, low = price * 1.002, price * 0.998
            ts = end.astimezone(UTC) + timedelta(seconds=1)
            add(
                ts,
                TOPICS.bins(symbol),
                {
                    "type": "bin",
                    "symbol": symbol,
                    "start": _iso(start),
                    "end": _iso(end),
                    "volume": volume,
                    "vwap": round(price, 4),
                    "open": round(price, 4),
                    "high": round(high, 4),
                    "low": round(low, 4),
                    "close": round(price, 4),
                    "spread": 0.02,
                    "ts": _iso(ts),
                },
            )
    events.sort(key=lambda e: (e[0], e[1]))
    return [
        json.dumps({"topic": t, "payload": p, "ts": p["ts"]}, separators=(",", ":"))
        for _, _, t, p in events
    ]


def reference_rate(lines: list[str]) -> tuple[float, float]:
    """CPU seconds to json.loads + wire.decode every line, and the rate in lines per second."""
    started = time.process_time()
    for text in lines:
        obj = json.loads(text)
        decode(obj["topic"], obj["payload"], root=ROOT)
    elapsed = time.process_time() - started
    return elapsed, len(lines) / elapsed


class NullEngine:
    """An engine that takes everything and says nothing: the replay shell's own cost."""

    def handle(self, event: Any) -> list[Any]:
        return []

    def reject(self, topic: str, payload: Any, reason: str, ts: Any) -> Any:
        raise AssertionError("the benchmark day has no bad line")

    def summary(self) -> dict[str, Any]:
        return {"orders": []}


def shell_rate(path: Path) -> tuple[float, float]:
    """CPU seconds and lines per CPU second of the replay shell alone (read, decode, order
    checks, redelivery check, derived ticks) on a null engine."""
    started = time.process_time()
    result = replay(read_jsonl(path), NullEngine(), ROOT)
    elapsed = time.process_time() - started
    return elapsed, result.summary["replay"]["lines"] / elapsed


def replay_rate(path: Path, profile: bool) -> tuple[float, float, float, dict[str, Any]]:
    """CPU seconds and wall seconds to read and replay the file on a fresh engine, the rate
    (lines per CPU second), and the replay counts."""
    from tracker.core.engine import Engine

    engine = Engine()
    profiler = cProfile.Profile() if profile else None
    started, wall = time.process_time(), time.perf_counter()
    if profiler is not None:
        profiler.enable()
    result = replay(read_jsonl(path), engine, ROOT)
    if profiler is not None:
        profiler.disable()
    elapsed, wall = time.process_time() - started, time.perf_counter() - wall
    counts = result.summary["replay"]
    if profiler is not None:
        out = io.StringIO()
        pstats.Stats(profiler, stream=out).sort_stats("cumulative").print_stats(25)
        print(out.getvalue())
    return elapsed, wall, counts["lines"] / elapsed, counts


def bin_close_times(orders: int, closes: int) -> tuple[list[float], list[float], float]:
    """Bin closes re-planning ``orders`` working orders on one symbol.

    Returns:
        Per close, the CPU time of ``Engine.handle(bin)`` (ms) and the part of it spent in the
        engine's :func:`tracker.solve_batch` calls (ms); and the CPU time (ms, median of three) of
        the reference ``solve_batch`` of the last close's problems, called on its own.
    """
    import tracker.core.engine.planning as engine_module
    from tracker import solve_batch
    from tracker.core.engine import Engine
    from tracker.edge.wire import BinMessage, OrderMessage

    captured: dict[str, Any] = {"seconds": 0.0, "problems": []}

    def timed_solve_batch(problems: Any) -> Any:
        started = time.process_time()
        schedules = solve_batch(problems)
        captured["seconds"] += time.process_time() - started
        captured["problems"] = list(problems)
        return schedules

    session = Session()
    bins = session.bins(DAY)
    open_, close = bins[0][0].astimezone(UTC), bins[-1][1].astimezone(UTC)
    engine = Engine()
    rng = np.random.default_rng(2)
    for j in range(orders):
        engine.handle(
            OrderMessage(
                action="new",
                order_id=f"X_HX00-{j:04d}",
                symbol="X_HX00",
                side="buy" if j % 2 == 0 else "sell",
                quantity=int(rng.integers(2_000, 8_000)),
                start=open_,
                end=close,
                urgency=("low", "medium", "high")[j % 3],
                max_participation=0.2,
                arrival_price=40.0,
                ts=open_ - timedelta(minutes=1),
            )
        )
    times: list[float] = []
    solving: list[float] = []
    engine_module.solve_batch = timed_solve_batch  # type: ignore[assignment]
    try:
        for n in range(closes):
            start, end = bins[n]
            message = BinMessage(
                symbol="X_HX00",
                start=start,
                end=end,
                volume=int(60_000 * rng.lognormal(0, 0.3)),
                vwap=40.0,
                open=40.0,
                high=40.1,
                low=39.9,
                close=40.0,
                spread=0.02,
                ts=end + timedelta(seconds=1),
            )
            captured["seconds"] = 0.0
            started = time.process_time()
            engine.handle(message)
            times.append((time.process_time() - started) * 1000)
            solving.append(captured["seconds"] * 1000)
    finally:
        engine_module.solve_batch = solve_batch
    problems = captured["problems"]
    reference = []
    for _ in range(3):
        started = time.process_time()
        solve_batch(problems)
        reference.append((time.process_time() - started) * 1000)
    return times, solving, statistics.median(reference)


def percentile(values: list[float], q: float) -> float:
    """The q-th percentile (linear interpolation)."""
    return float(np.percentile(np.array(values), q))


def main(argv: list[str] | None = None) -> int:
    """Build the invented day, time the replay and the bin closes, print the figures."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--symbols", type=int, default=50)
    parser.add_argument("--orders-per-symbol", type=int, default=10)
    parser.add_argument("--fills", type=int, default=200_000)
    parser.add_argument("--close-orders", type=int, default=1_000)
    parser.add_argument("--closes", type=int, default=12)
    parser.add_argument("--profile", action="store_true", help="print a cProfile of the replay")
    parser.add_argument(
        "--only", choices=("replay", "close"), help="run only the replay or the bin-close part"
    )
    args = parser.parse_args(argv)
    if args.only != "close":
        run_replay(args)
    if args.only != "replay":
        run_close(args)
    return 0


def run_replay(args: argparse.Namespace) -> None:
    """Part 1: replay throughput against the decode reference."""

    lines = make_day(args.symbols, args.orders_per_symbol, args.fills)
    with tempfile.TemporaryDirectory() as folder:
        path = Path(folder) / "bench-day.jsonl"
        path.write_text("\n".join(lines) + "\n", encoding="utf-8")
        ref_seconds, ref_rate = reference_rate(lines)
        shell_seconds, shell = shell_rate(path)
        seconds, wall, rate, counts = replay_rate(path, args.profile)
    print(
        f"replay: {counts['lines']:,} lines ({args.symbols} symbols, "
        f"{args.symbols * args.orders_per_symbol} orders), {counts['ticks_derived']:,} ticks "
        f"derived: {seconds:.2f} s CPU ({wall:.2f} s wall) = {rate:,.0f} messages per CPU "
        "second (target >= 20,000)"
    )
    print(
        f"reference json.loads + wire.decode of the same lines: {ref_seconds:.2f} s = "
        f"{ref_rate:,.0f} lines/s; replay takes {seconds / ref_seconds:.1f}x the reference "
        f"(engine and replay bookkeeping: {100 * (1 - ref_seconds / seconds):.0f} % of the time)"
    )
    print(
        f"reference: the replay shell alone (file reading, decode, checks, derived ticks) on a "
        f"null engine: {shell_seconds:.2f} s = {shell:,.0f} lines/s; the engine takes "
        f"{100 * (1 - shell_seconds / seconds):.0f} % of the replay"
    )


def run_close(args: argparse.Namespace) -> None:
    """Part 2: bin close time against the solver reference and the machine's decode speed."""
    # The machine's speed in the same minutes (shared machines drift by 1.5x within an hour):
    # the replay part's decode reference on a small day, before and after the closes.
    sample = make_day(5, 2, 20_000)
    _, before = reference_rate(sample)
    times, solving, reference = bin_close_times(args.close_orders, args.closes)
    _, after = reference_rate(sample)
    decode_rate = 0.5 * (before + after)
    share = 100 * statistics.median(solving) / statistics.median(times)
    print(
        f"bin close re-planning {args.close_orders:,} working orders ({len(times)} closes), CPU "
        f"time: p50 {percentile(times, 50):.1f} ms, p99 {percentile(times, 99):.1f} ms, max "
        f"{max(times):.1f} ms (target <= 250 ms); in solve_batch: p50 "
        f"{percentile(solving, 50):.1f} ms ({share:.0f} % of the close)"
    )
    print(
        f"reference: solve_batch alone on the same {args.close_orders:,} problems: "
        f"{reference:.1f} ms CPU; a bin close costs {percentile(times, 50) / reference:.1f}x that"
    )
    print(
        f"reference: json.loads + wire.decode here: {decode_rate:,.0f} lines/s ({before:,.0f} "
        f"before the closes, {after:,.0f} after); the p50 close takes as long as decoding "
        f"{percentile(times, 50) / 1000 * decode_rate:,.0f} lines"
    )


if __name__ == "__main__":
    sys.exit(main())

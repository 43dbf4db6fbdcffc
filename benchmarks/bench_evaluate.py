"""How long `tracker evaluate` takes (300 days x 4 policies x 1 scenario), with a reference.

Invented data only: the simulated stock of the shipped scenario file (an invented stock on the
invented venue Harbour Lane Exchange, X_HLX).

Figures printed:

1. The evaluation: days x policies x scenarios in CPU seconds (``time.process_time``; wall time
   beside it), days per second, and the wire messages the re-planning policy fed the engine per
   second of the whole run. Target: under 3 minutes for 300 days x 4 policies x 1 scenario.
2. The reference, measured in the same run: the engine's replay rate, messages per second through
   :func:`tracker.shell.replay.replay` on the golden recording
   ``replay_data/day-2026-03-10-seed7.jsonl`` (repeated to last about a second), so that the
   evaluation's speed can be read as a ratio that does not depend on the machine.

Run: ``.venv/bin/python benchmarks/bench_evaluate.py [--days 300] [--scenario normal] [--seed 1]``.
"""

from __future__ import annotations

import argparse
import time
from pathlib import Path

from tracker.core.engine import Engine
from tracker.shell.replay import read_input, replay
from tracker.sim.evaluation import POLICIES, evaluate, load_config

GOLDEN = Path(__file__).resolve().parent.parent / "replay_data" / "day-2026-03-10-seed7.jsonl"


def replay_rate(min_seconds: float = 1.0) -> tuple[float, int]:
    """Messages per CPU second of the engine replaying the golden recording, and the lines."""
    lines = list(read_input(GOLDEN))
    runs = 0
    spent = 0.0
    while spent < min_seconds or runs < 3:
        started = time.process_time()
        replay(lines, Engine())
        spent += time.process_time() - started
        runs += 1
    return runs * len(lines) / spent, len(lines)


def main() -> None:
    """Run the benchmark and print its figures."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--days", type=int, default=300)
    parser.add_argument("--scenario", default="normal")
    parser.add_argument("--seed", type=int, default=1)
    args = parser.parse_args()

    rate, lines = replay_rate()
    config = load_config().only([args.scenario])
    cpu, wall = time.process_time(), time.perf_counter()
    evaluation = evaluate(config, days=args.days, seed=args.seed)
    cpu, wall = time.process_time() - cpu, time.perf_counter() - wall
    messages = sum(d.engine_messages for d in evaluation.runs[0].samples["replan"].days)
    print(
        f"evaluate: {args.days} days x {len(POLICIES)} policies x 1 scenario ({args.scenario}): "
        f"{cpu:.1f} s CPU ({wall:.1f} s wall), {args.days / cpu:.1f} days/s; target < 180 s"
    )
    print(
        f"  engine policy: {messages:,} wire messages fed, {messages / cpu:,.0f} per second of "
        "the whole run (all four policies, the simulator and the statistics included)"
    )
    print(f"reference: engine replay of {GOLDEN.name} ({lines} lines): {rate:,.0f} messages/s CPU")
    print(
        f"  the evaluation runs at {messages / cpu / rate:.2f} x the replay's message rate "
        f"(one day of one order every {cpu / args.days * 1000:.0f} ms)"
    )


if __name__ == "__main__":
    main()

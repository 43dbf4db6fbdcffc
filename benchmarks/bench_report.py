"""The end-of-day review of a 1,000-order day, against the replay of the same day in the same run.

Invented data only: the benchmark day of ``bench_replay.py`` (made-up symbols X_HX00..X_HX49 on the
made-up venue Harbour Lane Exchange), here with 50 symbols x 20 orders = 1,000 parent orders over
the whole session, a bin per symbol and 5-minute bin, and about 200,000 fills.

Figures printed (CPU time of this process, wall time beside it):

1. reference: ``tracker replay`` of the recording (read, replay on a fresh engine, write the five
   output files);
2. ``tracker report`` of the recording: its own replay (with the observer that keeps the market,
   the fills and every plan version), the analysis of every order, the charts and the HTML;
   the ratio to the reference; target: under 30 s;
3. ``tracker report`` of the replay's output folder (no replay: what the report adds alone).

Run: ``.venv/bin/python benchmarks/bench_report.py [--orders-per-symbol 20] [--fills 200000]``.
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import time
from pathlib import Path

from bench_replay import ROOT, make_day

from tracker.core.engine import Engine
from tracker.report.review import build_report
from tracker.shell.replay import read_input, replay, write_outputs


def timed(label: str, work: object) -> tuple[float, float]:
    """Run ``work()``; print and return (CPU seconds, wall seconds)."""
    cpu, wall = time.process_time(), time.perf_counter()
    work()  # type: ignore[operator]
    cpu, wall = time.process_time() - cpu, time.perf_counter() - wall
    print(f"{label:<44} {cpu:8.2f} s CPU  {wall:8.2f} s wall")
    return cpu, wall


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--symbols", type=int, default=50)
    parser.add_argument("--orders-per-symbol", type=int, default=20)
    parser.add_argument("--fills", type=int, default=200_000)
    args = parser.parse_args(argv)
    orders = args.symbols * args.orders_per_symbol
    lines = make_day(args.symbols, args.orders_per_symbol, args.fills)
    with tempfile.TemporaryDirectory() as folder:
        work = Path(folder)
        day = work / "day.jsonl"
        day.write_text("\n".join(lines) + "\n", encoding="utf-8")
        print(f"invented day: {orders:,} orders, {len(lines):,} lines, {args.symbols} symbols")

        def reference() -> None:
            result = replay(list(read_input(day)), Engine(), ROOT)
            write_outputs(result, work / "replay")

        def report_recording() -> None:
            build_report(day, work / "report")

        def report_outputs() -> None:
            build_report(work / "replay", work / "report-outputs")

        ref_cpu, ref_wall = timed("reference: replay of the recording", reference)
        cpu, wall = timed("report of the recording (replay included)", report_recording)
        out_cpu, out_wall = timed("report of the replay's output folder", report_outputs)
        html = work / "report" / "report.html"
        charts = len(list((work / "report" / "charts").glob("*.svg")))
        print(
            f"report of the recording / replay: {cpu / ref_cpu:.2f} (CPU), {wall / ref_wall:.2f} "
            f"(wall); what the report adds to its replay: {cpu - ref_cpu:.1f} s CPU"
        )
        print(
            f"report of the output folder / replay: {out_cpu / ref_cpu:.2f} (CPU), "
            f"{out_wall / ref_wall:.2f} (wall)"
        )
        for label, seconds in (("recording", wall), ("output folder", out_wall)):
            verdict = "within" if seconds < 30 else "OVER"
            print(f"report of the {label}: {seconds:.1f} s wall, {verdict} the 30 s target")
        print(f"report.html {html.stat().st_size / 1e6:,.1f} MB, {charts:,} SVG charts")
    return 0


if __name__ == "__main__":
    sys.exit(main())

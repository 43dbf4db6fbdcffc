"""Speed of the liquidity layer: calibration at scale, and one bin close for 1,000 orders.

Run: ``.venv/bin/python benchmarks/bench_liquidity.py [--symbols 50] [--days 504] [--orders 1000]``

Prints figures and ratios against references measured in the same run (no timed assertions):

* calibration of 2 years x 78 bins x 50 invented symbols, against a plain pandas per-bin median
  of the same rows (the least any per-bin profile costs);
* for 1,000 working orders at one bin close (50 symbols x 20 orders, bin 30 of 78): one forecast
  per symbol, one problem per order, one batched solve; build time against the solve time.

All data is invented (market generator, made-up symbols on the invented X_HLX venue).
"""

from __future__ import annotations

import argparse
import time
from datetime import date

import numpy as np
import pandas as pd

from tracker import solve_batch
from tracker.core.calibration import calibrate
from tracker.core.forecast import ObservedBin, forecast
from tracker.core.formulation import build_problem, preferences
from tracker.core.profiles import Profile
from tracker.core.session import Session
from tracker.sim.market import MarketParameters, simulate_days, trading_days


def _history(symbols: int, days: int) -> pd.DataFrame:
    rng = np.random.default_rng(7)
    calendar = trading_days(date(2024, 1, 1), days)
    frames = []
    for index in range(symbols):
        params = MarketParameters(
            price=float(rng.uniform(10, 200)), average_daily_volume=float(rng.uniform(2e5, 2e7))
        )
        frames.append(simulate_days(f"SYM{index:03d}", calendar, rng, params=params))
    return pd.concat(frames, ignore_index=True)


def bench_calibration(symbols: int, days: int) -> dict[str, Profile]:
    """Calibrate every symbol of an invented history; print the figures."""
    started = time.perf_counter()
    history = _history(symbols, days)
    print(
        f"generated {len(history):,} rows ({symbols} symbols x {days} days x 78 bins, "
        f"half days included) in {time.perf_counter() - started:.1f} s"
    )
    session = Session()

    started = time.perf_counter()
    clock = history.start.dt.hour * 60 + history.start.dt.minute
    reference = history.groupby(["symbol", clock]).volume.median()
    reference_s = time.perf_counter() - started
    del reference

    started = time.perf_counter()
    profiles = {
        str(symbol): calibrate(group, str(symbol), session)
        for symbol, group in history.groupby("symbol", sort=True)
    }
    calibrate_s = time.perf_counter() - started

    one = history[history.symbol == "SYM000"].copy()
    one["start"] = [stamp.isoformat() for stamp in one.start]
    started = time.perf_counter()
    calibrate(one, "SYM000", session)
    text_s = time.perf_counter() - started

    print(
        f"calibrate, {symbols} symbols: {calibrate_s:.2f} s "
        f"({len(history) / calibrate_s:,.0f} rows/s, {1e3 * calibrate_s / symbols:.0f} ms per "
        f"symbol); reference per-bin pandas median of the same rows {reference_s:.2f} s; "
        f"ratio {calibrate_s / reference_s:.1f}"
    )
    print(
        f"calibrate, one symbol from ISO 8601 text starts ({len(one):,} rows): "
        f"{1e3 * text_s:.0f} ms"
    )
    return profiles


def bench_bin_close(profiles: dict[str, Profile], orders: int, law: str) -> None:
    """Forecast + build + batched solve for ``orders`` orders at bin 30; print the figures."""
    rng = np.random.default_rng(11)
    seen = 30
    symbols = sorted(profiles)
    per_symbol = max(orders // len(symbols), 1)
    observed = {
        symbol: {
            i: ObservedBin(float(v) * 1.2, spread=float(s), high=101.0, low=100.0)
            for i, (v, s) in enumerate(
                zip(profile.expected_volume[:seen], profile.spread[:seen], strict=True)
            )
        }
        for symbol, profile in profiles.items()
    }
    prefs = preferences("medium", {"impact_law": law})

    started = time.perf_counter()
    forecasts = {symbol: forecast(profiles[symbol], observed[symbol]) for symbol in symbols}
    forecast_s = time.perf_counter() - started

    started = time.perf_counter()
    problems = []
    for symbol in symbols:
        today = forecasts[symbol]
        adv = profiles[symbol].average_daily_volume
        for _ in range(per_symbol):
            problems.append(
                build_problem(
                    quantity=float(rng.uniform(0.001, 0.05) * adv),
                    first_bin=seen,
                    end_bin=int(rng.integers(seen + 6, 79)),
                    forecast=today,
                    preferences=prefs,
                    max_participation=0.2,
                    price=100.0,
                )
            )
    build_s = time.perf_counter() - started

    started = time.perf_counter()
    schedules = solve_batch(problems)
    solve_s = time.perf_counter() - started
    statuses = {s.status for s in schedules}
    count = len(problems)
    total = forecast_s + build_s + solve_s
    print(
        f"bin close, {count} orders on {len(symbols)} symbols, {law} impact: forecast "
        f"{1e3 * forecast_s:.1f} ms ({1e6 * forecast_s / len(symbols):.0f} us per symbol), "
        f"build {1e3 * build_s:.1f} ms ({1e6 * build_s / count:.0f} us per order), solve_batch "
        f"{1e3 * solve_s:.1f} ms ({1e6 * solve_s / count:.0f} us per order); total "
        f"{1e3 * total:.0f} ms; build / solve = {build_s / solve_s:.2f}; statuses {statuses}"
    )


def main() -> None:
    """Run both benchmarks."""
    parser = argparse.ArgumentParser(
        description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter
    )
    parser.add_argument("--symbols", type=int, default=50)
    parser.add_argument("--days", type=int, default=504, help="trading days (504: 2 years)")
    parser.add_argument("--orders", type=int, default=1000)
    args = parser.parse_args()
    profiles = bench_calibration(args.symbols, args.days)
    for law in ("linear", "sqrt"):
        bench_bin_close(profiles, args.orders, law)


if __name__ == "__main__":
    main()

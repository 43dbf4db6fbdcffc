"""One evaluated day of the market: what really traded, bin by bin, and the order of the day.

Theory of operation
-------------------
A :class:`MarketDay` is what every policy of a day faces: per bin of the session, the volume that
really traded (ours included), the quoted spread, the price path's open, high, low, close and
time-averaged price (the VWAP of the market without us), the true per-bin volatility, and the
router's fill draws. All policies of a day see the same one (paired comparison).

:func:`simulated_day` draws it from the simulated stock (:class:`~.config.MarketSpec`), with the
random numbers of day ``i`` from ``numpy.random.default_rng([seed, i])`` drawn in a fixed order
whatever the scenario, so that every scenario sees the same base days (common random numbers):

* volume ``V_n = ADV x S x share_n x e_n x day_volume x window_n``: the day scale
  ``S = exp(sigma_S t)`` with ``t`` a unit-variance Student-t (median one, heavy-tailed), the
  profile's share ``share_n``, mean-one log-normal noise ``e_n``, AR(1) across bins, as
  :mod:`tracker.sim.market` draws it;
* spread = the profile's spread x a per-day and a per-bin mean-one log-normal factor x window;
* the log price is Brownian with the profile's per-bin variance (times ``volatility^2``), on
  ``substeps`` steps per bin, the high and low of each step drawn exactly from the Brownian
  bridge (as :mod:`tracker.sim.market` does), the VWAP the time average of the path;
* ``exact`` scenarios have no noise at all: volume is the forecast rounded to shares, the spread
  is the profile's, the price stays at the open, and the high and low are set so that the
  Parkinson (1980) estimate of each bin's volatility is exactly the profile's, so the engine's
  intraday forecast learns nothing new.

The order of the day comes from its own stream (``[seed, i, 1]``), the router's fill fractions
from another (``[seed, i, 2]``): changing the market's parameters never changes the orders.

:func:`history_days` instead replays recorded bins (``tracker simulate history`` output or real
bins with the same columns) as the market, one full day at a time.
"""

from __future__ import annotations

import math
from collections.abc import Iterator
from dataclasses import dataclass
from datetime import date, datetime
from typing import Any

import numpy as np
import numpy.typing as npt

from tracker.core.calibration import calibrate
from tracker.core.profiles import Profile
from tracker.core.session import Session
from tracker.errors import InputError
from tracker.sim.evaluation.config import EvaluationConfig, OrderSpec, Scenario
from tracker.sim.market import TICK, trading_days

FloatArray = npt.NDArray[np.float64]
IntArray = npt.NDArray[np.int64]

#: First calendar day of the simulated days.
FIRST_DAY = date(2026, 1, 5)


@dataclass(frozen=True, slots=True)
class DayOrder:
    """The parent order of one day: side, shares, the participation cap, urgency and window.

    ``first`` and ``end`` are bin indexes of the session (``end`` exclusive).
    """

    side: str
    quantity: int
    max_participation: float
    urgency: str
    first: int
    end: int

    @property
    def sign(self) -> float:
        """+1 for a buy, -1 for a sell."""
        return 1.0 if self.side == "buy" else -1.0


@dataclass(frozen=True, eq=False)
class MarketDay:
    """What the market did on one day (see the module docstring).

    Attributes:
        index: The day's number in the run (0, 1, ...).
        day: The local trading date.
        symbol: The symbol.
        session: The session; every array has one value per bin of it.
        bins: ``(start, end)`` of each bin, tz-aware.
        volume: Shares that really traded per bin (ours included).
        spread: Quoted spread per bin, currency.
        open, high, low, close: The price path per bin, without our impact.
        vwap: Time-averaged price per bin without our impact (what a share costs before spread
            and impact).
        volatility: True standard deviation of each bin's log return (for the impact law).
        fill_draws: Per bin a uniform number in [0, 1) for the router's fill fraction.
        profile: The profile the planner uses on this day.
        order: The day's parent order.
        day_scale: The day's true volume scale on the profile outside any scenario window (the
            day's draw times the scenario's ``day_volume``); nan for a recorded day.
    """

    index: int
    day: date
    symbol: str
    session: Session
    bins: list[tuple[datetime, datetime]]
    volume: IntArray
    spread: FloatArray
    open: FloatArray
    high: FloatArray
    low: FloatArray
    close: FloatArray
    vwap: FloatArray
    volatility: FloatArray
    fill_draws: FloatArray
    profile: Profile
    order: DayOrder
    day_scale: float = math.nan

    @property
    def arrival_price(self) -> float:
        """The price when the order arrives: the open of its first bin."""
        return float(self.open[self.order.first])


# --------------------------------------------------------------------------------------------
# Orders


def draw_order(config: EvaluationConfig, index: int, seed: int, adv: float) -> DayOrder:
    """The order of day ``index``: listed (day i takes order i modulo the list) or drawn."""
    session = config.session
    rng = np.random.default_rng([seed, index, 1])
    size_draw, side_draw = rng.random(2)
    if config.orders:
        spec: OrderSpec = config.orders[index % len(config.orders)]
        quantity = spec.quantity if spec.quantity is not None else round((spec.size or 0) * adv)
        side, cap, urgency = spec.side, spec.max_participation, spec.urgency
        start, end = spec.start, spec.end
    else:
        draws = config.draws
        low, high = draws.size
        quantity = round((low + (high - low) * size_draw) * adv)
        side = draws.sides[min(int(side_draw * len(draws.sides)), len(draws.sides) - 1)]
        cap, urgency, start, end = draws.max_participation, draws.urgency, draws.start, draws.end
    first = session.index_of_clock(start)
    last = session.n_bins if end == session.end else session.index_of_clock(end)
    assert first is not None and last is not None  # checked when the file was read
    return DayOrder(side, max(int(quantity), 1), cap, urgency, first, last)


# --------------------------------------------------------------------------------------------
# Simulated days


def _window_factors(session: Session, scenario: Scenario) -> tuple[FloatArray, FloatArray]:
    volume = np.full(session.n_bins, scenario.day_volume)
    spread = np.ones(session.n_bins)
    for window in scenario.windows:
        first = session.index_of_clock(window.start)
        last = session.n_bins if window.end == session.end else session.index_of_clock(window.end)
        assert first is not None and last is not None  # checked when the file was read
        volume[first:last] *= window.volume
        spread[first:last] *= window.spread
    return volume, spread


def simulated_day(
    config: EvaluationConfig, scenario: Scenario, index: int, seed: int, profile: Profile
) -> MarketDay:
    """Day ``index`` of ``scenario`` for ``seed`` (see the module docstring).

    Args:
        config: The evaluation's configuration (market, orders, session).
        scenario: The scenario family.
        index: The day's number (0, 1, ...).
        seed: The run's seed.
        profile: The simulated stock's profile (``config.market.profile(config.session)``).
    """
    market, session = config.market, config.session
    n, k = session.n_bins, market.substeps
    rng = np.random.default_rng([seed, index])
    # Every draw is made, in this order, whatever the scenario (common random numbers).
    df = market.day_volume_df
    day_t = float(rng.standard_t(df)) * math.sqrt((df - 2.0) / df)
    first_noise = rng.standard_normal()
    innovations = rng.standard_normal(n)
    day_spread_z = rng.standard_normal()
    bin_spread_z = rng.standard_normal(n)
    steps_z = rng.standard_normal((n, k))
    bridge_u = rng.random((2, n, k))
    fill_draws = np.random.default_rng([seed, index, 2]).random(n)

    volume_factor, spread_factor = _window_factors(session, scenario)
    sigma = profile.volatility * scenario.volatility
    price = market.price
    day_scale = scenario.day_volume
    if scenario.exact:
        volume = np.round(profile.expected_volume * volume_factor)
        spread = profile.spread * spread_factor
        half_range = sigma * math.sqrt(math.log(2.0))  # ln(H/L)^2 / (4 ln 2) = sigma^2
        flat = np.full(n, price)
        high, low = price * np.exp(half_range), price * np.exp(-half_range)
        open_, close, vwap = flat, flat.copy(), flat.copy()
    else:
        s, phi = market.bin_volume_sigma, market.bin_volume_phi
        log_noise = np.empty(n)
        log_noise[0] = first_noise * s
        shocks = innovations * s * math.sqrt(1.0 - phi * phi)
        for j in range(1, n):
            log_noise[j] = phi * log_noise[j - 1] + shocks[j]
        scale = math.exp(market.day_volume_sigma * day_t)
        day_scale = scale * scenario.day_volume
        volume = np.round(
            profile.expected_volume * scale * np.exp(log_noise - 0.5 * s * s) * volume_factor
        )
        ds, bs = market.day_spread_sigma, market.bin_spread_sigma
        spread = profile.spread * spread_factor
        spread = spread * math.exp(ds * day_spread_z - 0.5 * ds * ds)
        spread = np.maximum(spread * np.exp(bs * bin_spread_z - 0.5 * bs * bs), TICK)
        step_sd = sigma / math.sqrt(k)
        path = math.log(price) + np.cumsum((steps_z * step_sd[:, None]).ravel())
        before = np.concatenate([[math.log(price)], path[:-1]])
        variance = np.repeat(step_sd**2, k)
        jump = path - before
        top = 0.5 * (
            before + path + np.sqrt(jump**2 - 2.0 * variance * np.log(bridge_u[0].ravel()))
        )
        bottom = 0.5 * (
            before + path - np.sqrt(jump**2 - 2.0 * variance * np.log(bridge_u[1].ravel()))
        )
        high = np.exp(top.reshape(n, k).max(axis=1))
        low = np.exp(bottom.reshape(n, k).min(axis=1))
        open_ = np.exp(before.reshape(n, k)[:, 0])
        close = np.exp(path.reshape(n, k)[:, -1])
        vwap = np.exp(0.5 * (before + path)).reshape(n, k).mean(axis=1)
    day = trading_days(FIRST_DAY, index + 1)[-1]
    return MarketDay(
        index=index,
        day=day,
        symbol=market.symbol,
        session=session,
        bins=session.bins(day),
        volume=np.maximum(volume, 0.0).astype(np.int64),
        spread=np.asarray(spread, dtype=np.float64),
        open=open_,
        high=high,
        low=low,
        close=close,
        vwap=vwap,
        volatility=sigma,
        fill_draws=fill_draws,
        profile=profile,
        order=draw_order(config, index, seed, profile.average_daily_volume),
        day_scale=day_scale,
    )


# --------------------------------------------------------------------------------------------
# Recorded days


@dataclass(frozen=True, eq=False)
class RecordedDays:
    """Full days of a recorded history, parsed, with the rows each came from.

    Attributes:
        days: Local dates of the full days, in order.
        values: Per column (volume, vwap, open, high, low, close, spread), a days x bins matrix.
        skipped: Dates left out, with the reason (short day, missing or bad bins).
        frame: The rows of the symbol (for calibration on the days before each day).
        local_day: The local date of every row of ``frame``.
    """

    days: list[date]
    values: dict[str, FloatArray]
    skipped: list[dict[str, str]]
    frame: Any
    local_day: Any


def read_recorded(history: Any, symbol: str, session: Session) -> RecordedDays:
    """Parse recorded bins (the columns of ``tracker simulate history``) into full days.

    Days that lack a bin of the session or have a value that is not a positive number (volume
    and spread may be zero; a missing VWAP with zero volume takes the bin's mid of open and
    close) are skipped and listed: a day replayed as the market must be whole.

    Raises:
        InputError: a column is missing or the symbol has no full day.
    """
    import pandas as pd

    columns = ("start", "symbol", "volume", "vwap", "open", "high", "low", "close", "spread")
    frame = history.rename(columns=lambda c: str(c).strip().lower())
    missing = [c for c in columns if c not in frame.columns]
    if missing:
        raise InputError(
            f"is missing from the history; the columns are {', '.join(columns)}", field=missing[0]
        )
    frame = frame.loc[(frame["symbol"].astype("string").str.strip() == symbol).fillna(False)]
    if frame.empty:
        raise InputError(f"the history has no row for {symbol!r}", field="--symbol")
    starts = pd.to_datetime(frame["start"], format="ISO8601", utc=True, errors="coerce")
    local = starts.dt.tz_convert(session.timezone)
    minutes = (local.dt.hour * 60 + local.dt.minute).to_numpy(np.float64, na_value=np.nan)
    offset = minutes - (session.start.hour * 60 + session.start.minute)
    position = offset / session.bin_minutes
    local_day = local.dt.date
    n = session.n_bins
    numbers = {
        name: pd.to_numeric(frame[name], errors="coerce").to_numpy(np.float64, na_value=np.nan)
        for name in columns[2:]
    }
    good_row = np.isfinite(position) & (position >= 0) & (position < n) & (position % 1 == 0)
    by_day: dict[date, list[int]] = {}
    for row, (when, ok) in enumerate(zip(local_day, good_row, strict=True)):
        if ok:
            by_day.setdefault(when, []).append(row)
    days: list[date] = []
    values: dict[str, list[FloatArray]] = {name: [] for name in columns[2:]}
    skipped: list[dict[str, str]] = []
    for when in sorted(by_day):
        rows = np.array(by_day[when])
        index = position[rows].astype(np.int64)
        if len(set(index.tolist())) != n or rows.size != n:
            skipped.append({"date": when.isoformat(), "reason": "not a full day of the session"})
            continue
        ordered = rows[np.argsort(index)]
        day_values = {name: numbers[name][ordered] for name in columns[2:]}
        vwap = day_values["vwap"]
        mid = 0.5 * (day_values["open"] + day_values["close"])
        day_values["vwap"] = np.where(np.isfinite(vwap), vwap, mid)
        prices_ok = all(
            bool(np.all(np.isfinite(day_values[p]) & (day_values[p] > 0)))
            for p in ("vwap", "open", "high", "low", "close")
        )
        rest_ok = all(
            bool(np.all(np.isfinite(day_values[p]) & (day_values[p] >= 0)))
            for p in ("volume", "spread")
        )
        if not (prices_ok and rest_ok):
            skipped.append({"date": when.isoformat(), "reason": "a bin has a bad or missing value"})
            continue
        days.append(when)
        for name in columns[2:]:
            values[name].append(day_values[name])
    if not days:
        raise InputError(f"the history has no full day of {symbol!r}", field="history")
    return RecordedDays(
        days=days,
        values={name: np.array(rows) for name, rows in values.items()},
        skipped=skipped,
        frame=frame,
        local_day=np.array(list(local_day)),
    )


def history_days(
    config: EvaluationConfig,
    scenario: Scenario,
    recorded: RecordedDays,
    *,
    days: int,
    seed: int,
    calibration_days: int,
) -> Iterator[MarketDay]:
    """Recorded days replayed as the market, each with a profile calibrated on the days before.

    Day ``j`` (from the ``calibration_days``-th full day on) is planned with the profile that
    :func:`tracker.core.calibration.calibrate` estimates from the rows of the
    ``calibration_days`` full days before it (a rolling window; the day itself is never seen).
    The scenario's volume and spread multipliers apply to the recorded bins; its impact and fill
    settings to the router. The true per-bin volatility of the impact law is the calibrated
    profile's.

    Raises:
        InputError: the scenario is ``exact`` or changes the volatility (a recording has its own
            path), or there are not enough days.
    """
    if scenario.exact or scenario.volatility != 1.0:
        raise InputError(
            f"scenario {scenario.name!r} changes the price path (exact or volatility), which a "
            "recorded day cannot do; choose another scenario",
            field="--scenario",
        )
    session = config.session
    if calibration_days < 1:
        raise InputError(f"must be at least 1; got {calibration_days}", field="--calibration-days")
    available = len(recorded.days) - calibration_days
    if available < 1:
        raise InputError(
            f"the history has {len(recorded.days)} full days; it needs more than "
            f"--calibration-days ({calibration_days}) to replay any",
            field="history",
        )
    volume_factor, spread_factor = _window_factors(session, scenario)
    for index in range(min(days, available)):
        j = calibration_days + index
        window = set(recorded.days[j - calibration_days : j])
        rows = recorded.frame.loc[[d in window for d in recorded.local_day]]
        profile = calibrate(rows, config.market.symbol, session)
        v = recorded.values
        when = recorded.days[j]
        order = draw_order(config, index, seed, profile.average_daily_volume)
        yield MarketDay(
            index=index,
            day=when,
            symbol=config.market.symbol,
            session=session,
            bins=session.bins(when),
            volume=np.round(v["volume"][j] * volume_factor).astype(np.int64),
            spread=v["spread"][j] * spread_factor,
            open=v["open"][j],
            high=v["high"][j],
            low=v["low"][j],
            close=v["close"][j],
            vwap=v["vwap"][j],
            volatility=np.asarray(profile.volatility, dtype=np.float64),
            fill_draws=np.random.default_rng([seed, index, 2]).random(session.n_bins),
            profile=profile,
            order=order,
        )

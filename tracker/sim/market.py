"""An invented market for demos and tests: bin-by-bin history of made-up stocks.

Everything this module produces is invented. The default stock trades on an invented venue, the
Harbour Lane Exchange (X_HLX); symbols such as X_ZEPH, X_KALO or X_MIRA are made up. Nothing here is
estimated from any real market.

Theory of operation
-------------------
A day of symbol ``s`` on the bins ``n`` of a :class:`~tracker.core.session.Session`:

* volume ``V_dn = ADV * S_d * share_n * e_dn``: the day's scale ``S_d = exp(x_d)`` follows an
  AR(1) on the log scale with Student-t innovations (heavy-tailed, autocorrelated daily volume);
  ``share_n`` is a U shape (:func:`tracker.core.profiles.intraday_shape`); ``e_dn`` is mean-one
  log-normal noise, AR(1) across the bins of a day;
* spread ``s_dn = spread_n * g_d * z_dn``: a per-bin curve widest at the open, a per-day factor and
  per-bin noise, both mean-one log-normal, floored at one tick (0.01);
* prices: a driftless Brownian log price with per-bin variance ``sigma_n^2`` (higher at the open
  and a little at the close), simulated on ``substeps`` steps per bin. The high and low of each
  step are drawn exactly from the Brownian bridge between its end points (the maximum of a bridge
  from a to b over a step of variance v is ``(a + b + sqrt((b - a)^2 - 2 v ln U)) / 2``), so the
  range carries no discretisation bias and the Parkinson (1980) estimator recovers sigma_n;
* occasional half days (close at 13:00) and late opens (10:30): their missing bins are simply
  absent, the others keep their regular clock time.

:func:`true_profile` is the profile the generator draws from; a calibration on enough simulated
days should recover it. All randomness comes from one seeded :class:`numpy.random.Generator`.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass
from datetime import date, time, timedelta

import numpy as np
import numpy.typing as npt
import pandas as pd

from tracker.core.profiles import Profile, shaped_profile
from tracker.core.session import Session
from tracker.errors import InputError

FloatArray = npt.NDArray[np.float64]

#: The invented venue of the demo data.
VENUE = "Harbour Lane Exchange (X_HLX), an invented venue"
#: Smallest spread (one tick), currency.
TICK = 0.01


@dataclass(frozen=True)
class MarketParameters:
    """The invented stock's true liquidity and the noise around it.

    Args:
        price: Starting price, currency.
        average_daily_volume: Shares on a day of median scale (S_d = 1).
        daily_volatility: Standard deviation of the daily log return.
        midday_spread: Spread at the flat middle of the day, currency.
        volume_shape: ``(open_weight, open_decay, close_weight, close_decay)`` of the volume U.
        spread_shape: The same for the spread (widest at the open).
        variance_shape: The same for the per-bin variance of returns.
        day_volume_sigma: Standard deviation of the log day-scale innovations.
        day_volume_phi: AR(1) coefficient of the log day scale.
        day_volume_df: Degrees of freedom of the Student-t innovations (> 2).
        bin_volume_sigma: Standard deviation of the per-bin log volume noise.
        bin_volume_phi: AR(1) coefficient of that noise across the bins of a day.
        day_spread_sigma: Standard deviation of the per-day log spread factor.
        bin_spread_sigma: Standard deviation of the per-bin log spread noise.
        half_day_probability: Chance that a day closes early at ``half_day_close``.
        late_open_probability: Chance that a day opens late at ``late_open``.
        half_day_close: Early close time (local).
        late_open: Late open time (local).
        substeps: Brownian steps per bin for the price path.
    """

    price: float = 42.0
    average_daily_volume: float = 2_000_000.0
    daily_volatility: float = 0.018
    midday_spread: float = 0.015
    volume_shape: tuple[float, float, float, float] = (1.8, 0.07, 1.5, 0.04)
    spread_shape: tuple[float, float, float, float] = (2.0, 0.05, 0.0, 1.0)
    variance_shape: tuple[float, float, float, float] = (2.0, 0.08, 0.5, 0.05)
    day_volume_sigma: float = 0.2
    day_volume_phi: float = 0.5
    day_volume_df: float = 4.0
    bin_volume_sigma: float = 0.3
    bin_volume_phi: float = 0.3
    day_spread_sigma: float = 0.1
    bin_spread_sigma: float = 0.15
    half_day_probability: float = 0.02
    late_open_probability: float = 0.01
    half_day_close: time = time(13, 0)
    late_open: time = time(10, 30)
    substeps: int = 16


def true_profile(
    symbol: str, session: Session | None = None, params: MarketParameters | None = None
) -> Profile:
    """The profile the generator draws from (the truth a calibration should recover)."""
    session = session or Session()
    params = params or MarketParameters()
    return shaped_profile(
        symbol,
        session,
        volume_shape=params.volume_shape,
        spread_shape=params.spread_shape,
        variance_shape=params.variance_shape,
        midday_spread=params.midday_spread,
        daily_volatility=params.daily_volatility,
        average_daily_volume=params.average_daily_volume,
        quality={"source": "generator truth", "note": f"invented stock on the {VENUE}"},
    )


def check_symbol(symbol: str) -> str:
    """Return ``symbol`` if it is 1-64 characters of A-Z, a-z, 0-9, '.', '_', '-'.

    Raises:
        InputError: naming ``symbol`` otherwise.
    """
    if not isinstance(symbol, str) or not re.fullmatch(r"[A-Za-z0-9._-]{1,64}", symbol):
        raise InputError(
            f"must be 1-64 characters of letters, digits, '.', '_' or '-'; got {symbol!r}",
            field="symbol",
        )
    return symbol


def trading_days(first: date, count: int) -> list[date]:
    """``count`` weekdays from ``first`` on (the invented venue has no holidays)."""
    days: list[date] = []
    day = first
    while len(days) < count:
        if day.weekday() < 5:
            days.append(day)
        day += timedelta(days=1)
    return days


def _student_t(rng: np.random.Generator, df: float, size: int) -> FloatArray:
    """Student-t draws scaled to unit variance."""
    return rng.standard_t(df, size) * math.sqrt((df - 2.0) / df)


def simulate_days(
    symbol: str,
    days: list[date],
    rng: np.random.Generator,
    session: Session | None = None,
    params: MarketParameters | None = None,
    *,
    volume_scales: FloatArray | None = None,
    open_bins: list[tuple[int, int]] | None = None,
    first_price: float | None = None,
) -> pd.DataFrame:
    """Bins of ``symbol`` on the given days (the building block of the other generators).

    Args:
        symbol: The invented symbol.
        days: Local trading dates, in order.
        rng: The random generator (seeded by the caller).
        session: The regular session (default 09:30-16:00 America/New_York, 5-minute bins).
        params: The stock's parameters.
        volume_scales: The day scales S_d; drawn from the AR(1) when ``None``.
        open_bins: Per day, the ``(first, end)`` regular bin indexes that trade; drawn (half days,
            late opens) when ``None``.
        first_price: Price at the first open; ``params.price`` when ``None``.

    Returns:
        One row per day and bin with the columns of
        :data:`~tracker.core.calibration.HISTORY_COLUMNS`; ``start`` is tz-aware.
    """
    session = session or Session()
    params = params or MarketParameters()
    truth = true_profile(symbol, session, params)
    n, d, k = session.n_bins, len(days), params.substeps
    if d == 0:
        raise InputError("must be at least 1", field="days")
    if volume_scales is None:
        shocks = _student_t(rng, params.day_volume_df, d) * params.day_volume_sigma
        x = np.empty(d)
        level = shocks[0] / math.sqrt(1.0 - params.day_volume_phi**2)
        for i in range(d):
            level = level if i == 0 else params.day_volume_phi * level + shocks[i]
            x[i] = level
        volume_scales = np.exp(x)
    if open_bins is None:
        early = session.index_of_clock(params.half_day_close)
        late = session.index_of_clock(params.late_open)
        draws = rng.random((d, 2))
        open_bins = [
            (
                late if (late is not None and u_late < params.late_open_probability) else 0,
                early if (early is not None and u_half < params.half_day_probability) else n,
            )
            for u_half, u_late in draws
        ]
    # Per-bin volume noise: AR(1) across bins with stationary log-variance bin_volume_sigma^2.
    phi, sigma = params.bin_volume_phi, params.bin_volume_sigma
    innovations = rng.standard_normal((d, n)) * sigma * math.sqrt(1.0 - phi**2)
    log_noise = np.empty((d, n))
    log_noise[:, 0] = rng.standard_normal(d) * sigma
    for j in range(1, n):
        log_noise[:, j] = phi * log_noise[:, j - 1] + innovations[:, j]
    volume = (
        params.average_daily_volume
        * volume_scales[:, None]
        * truth.volume_share[None, :]
        * np.exp(log_noise - 0.5 * sigma**2)
    )
    volume = np.maximum(np.round(volume), 0.0)
    day_spread = np.exp(
        rng.standard_normal(d) * params.day_spread_sigma - 0.5 * params.day_spread_sigma**2
    )
    bin_spread = np.exp(
        rng.standard_normal((d, n)) * params.bin_spread_sigma - 0.5 * params.bin_spread_sigma**2
    )
    spread = np.maximum(truth.spread[None, :] * day_spread[:, None] * bin_spread, TICK)

    # Log price path: overnight gap, then `k` Brownian steps per bin.
    step_sd = truth.volatility / math.sqrt(k)
    steps = rng.standard_normal((d, n, k)) * step_sd[None, :, None]
    gaps = rng.standard_normal(d) * 0.5 * params.daily_volatility
    start = math.log(first_price if first_price is not None else params.price)
    day_open = (
        start + np.cumsum(gaps) + np.concatenate([[0.0], np.cumsum(steps.sum(axis=(1, 2)))[:-1]])
    )
    path = day_open[:, None] + np.cumsum(steps.reshape(d, n * k), axis=1)
    before = np.concatenate([day_open[:, None], path[:, :-1]], axis=1)
    variance = (step_sd**2)[None, :].repeat(k, axis=1).reshape(1, n * k)
    jump = path - before
    top = 0.5 * (before + path + np.sqrt(jump**2 - 2.0 * variance * np.log(rng.random((d, n * k)))))
    bottom = 0.5 * (
        before + path - np.sqrt(jump**2 - 2.0 * variance * np.log(rng.random((d, n * k))))
    )
    high = np.exp(top.reshape(d, n, k).max(axis=2))
    low = np.exp(bottom.reshape(d, n, k).min(axis=2))
    open_ = np.exp(before.reshape(d, n, k)[:, :, 0])
    close = np.exp(path.reshape(d, n, k)[:, :, -1])
    vwap = np.exp(0.5 * (before + path)).reshape(d, n, k).mean(axis=2)

    mask = np.zeros((d, n), dtype=bool)
    for i, (first, end) in enumerate(open_bins):
        mask[i, first:end] = True
    starts = np.array(
        [[session_start(session, day) + j * session.bin_minutes for j in range(n)] for day in days]
    )
    local = pd.to_datetime(starts[mask], unit="m")
    frame = pd.DataFrame(
        {
            "start": local.tz_localize(session.timezone),
            "symbol": symbol,
            "volume": volume[mask].astype(np.int64),
            "vwap": np.round(vwap[mask], 4),
            "open": np.round(open_[mask], 4),
            "high": np.round(high[mask], 4),
            "low": np.round(low[mask], 4),
            "close": np.round(close[mask], 4),
            "spread": np.round(spread[mask], 5),
        }
    )
    return frame


def session_start(session: Session, day: date) -> int:
    """Minutes from 1970-01-01 00:00 to the local open of ``day`` (a naive local clock)."""
    return (day - date(1970, 1, 1)).days * 1440 + session.start.hour * 60 + session.start.minute


def simulate_history(
    symbol: str,
    days: int,
    seed: int,
    session: Session | None = None,
    params: MarketParameters | None = None,
    first_day: date = date(2026, 1, 5),
) -> pd.DataFrame:
    """A synthetic history of an invented stock: ``days`` weekdays from ``first_day``.

    Args:
        symbol: The invented symbol (e.g. ``"X_ZEPH"``).
        days: Number of trading days (>= 1).
        seed: Seed of the random generator; the same seed gives the same history.
        session: The regular session.
        params: The stock's parameters (:class:`MarketParameters`).
        first_day: The first calendar day considered.

    Returns:
        The columns of :data:`~tracker.core.calibration.HISTORY_COLUMNS`, one row per day and bin;
        ``start`` is tz-aware local time.

    Raises:
        InputError: ``days`` < 1.
    """
    if isinstance(days, bool) or not isinstance(days, int) or days < 1:
        raise InputError(f"must be a whole number of days >= 1; got {days!r}", field="days")
    check_symbol(symbol)
    if isinstance(seed, bool) or not isinstance(seed, int) or seed < 0:
        raise InputError(f"must be a whole number >= 0; got {seed!r}", field="seed")
    rng = np.random.default_rng(seed)
    return simulate_days(symbol, trading_days(first_day, days), rng, session, params)


def simulate_day(
    symbol: str,
    day: date,
    seed: int,
    session: Session | None = None,
    params: MarketParameters | None = None,
    *,
    volume_scale: float = 1.0,
    first_price: float | None = None,
    open_at: time | None = None,
    close_at: time | None = None,
) -> pd.DataFrame:
    """One invented day of bins, e.g. for a closed-loop demo or a volume-shock scenario.

    Args:
        symbol: The invented symbol.
        day: The local date.
        seed: Seed of the random generator.
        session: The regular session.
        params: The stock's parameters.
        volume_scale: The day's volume scale S_d (1 = a median day; 2 = a volume shock).
        first_price: Price at the open; ``params.price`` when ``None``.
        open_at: A late open (bin boundary), or ``None``.
        close_at: An early close (bin boundary), or ``None``.

    Returns:
        The bins of the day in order (columns of :data:`~tracker.core.calibration.HISTORY_COLUMNS`).
    """
    session = session or Session()
    if not (volume_scale > 0 and math.isfinite(volume_scale)):
        raise InputError(f"must be a number > 0; got {volume_scale!r}", field="volume_scale")
    bins = session.bins(day, open_at=open_at, close_at=close_at)
    first_index = session.bin_index(bins[0][0])
    last_index = session.bin_index(bins[-1][0])
    assert first_index is not None and last_index is not None  # bins() returns session bins
    return simulate_days(
        symbol,
        [day],
        np.random.default_rng(seed),
        session,
        params,
        volume_scales=np.array([volume_scale]),
        open_bins=[(first_index, last_index + 1)],
        first_price=first_price,
    )

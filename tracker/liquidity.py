"""Liquidity profiles of a symbol, their calibration from history, and the intraday forecast.

Theory of operation
-------------------
A :class:`Profile` is the seasonal shape of a symbol's trading day on the bins of its
:class:`~tracker.session.Session`: per bin the expected share of the day's volume, the expected
time-averaged quoted spread (currency) and the volatility (standard deviation of the log return over
the bin, dimensionless), plus the average daily volume (shares).

* :func:`calibrate` estimates a profile from one row per day and bin of history (a DataFrame; the
  command line reads the file). Statistics are robust: a per-bin outlier screen on the log scale
  (robust z-score from the median absolute deviation, threshold :data:`OUTLIER_Z`), then a 10 %
  trimmed mean for volume shares and spreads. Volatility uses the Parkinson (1980) range estimator
  per bin, sigma^2 = ln(H/L)^2 / (4 ln 2), averaged over days after the outlier screen (a trimmed
  mean would bias a squared range downward), and is cross-checked against close-to-close returns.
  Volume shares come from full days only; half days, late opens and days with gaps still feed the
  spread and volatility of the bins they have, and are listed in the quality report.
* :func:`forecast` updates a profile with the bins observed so far today. The day's volume scale
  is the ratio r of cumulated observed to cumulated expected volume, shrunk toward 1 on the log
  scale: ``log s = w log r`` with ``w = f / (f + f0)``, where f is the fraction of the day's
  expected volume already seen and f0 (``prior_fraction``, default 0.05) the fraction at which
  observation and prior weigh the same. This is the posterior mean of a normal prior on the log
  scale whose observation noise falls like 1/f. Spread and volatility ratios use the last
  ``recent_bins`` observed bins the same way with ``w = m / (m + m0)``. All three are bounded.

Everything here is pure: no files, no clock. :func:`default_profile` is an invented, stated default
for a symbol that has no calibrated profile.
"""

from __future__ import annotations

import math
import warnings
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import numpy.typing as npt

from tracker.errors import InputError
from tracker.session import Session

FloatArray = npt.NDArray[np.float64]

#: Robust z-score beyond which a per-bin observation is treated as an outlier and removed.
OUTLIER_Z = 5.0
#: Fraction trimmed from each tail by the trimmed means of calibration.
TRIM = 0.10
#: 4 ln 2, the Parkinson (1980) constant: E[ln(H/L)^2] = 4 ln 2 sigma^2 for a Brownian path.
PARKINSON = 4.0 * math.log(2.0)

#: Bounds on the intraday ratios (volume scale, spread ratio, volatility ratio).
VOLUME_SCALE_BOUNDS = (0.25, 4.0)
SPREAD_RATIO_BOUNDS = (0.5, 4.0)
VOLATILITY_RATIO_BOUNDS = (0.5, 4.0)

#: The invented default (see :func:`default_profile`): shares per day, midday spread in currency,
#: daily volatility of the log price.
DEFAULT_ADV = 1_000_000.0
DEFAULT_MIDDAY_SPREAD = 0.02
DEFAULT_DAILY_VOLATILITY = 0.02


def intraday_shape(
    session: Session, open_weight: float, open_decay: float, close_weight: float, close_decay: float
) -> FloatArray:
    """A U shape over the bins: ``1 + a exp(-x / d_open) + b exp(-(1 - x) / d_close)``.

    ``x`` is the bin midpoint as a fraction of the session (0 at the open, 1 at the close), so the
    same parameters give the same shape for any bin length.
    """
    n = session.n_bins
    x = (np.arange(n) + 0.5) / n
    return (
        1.0
        + open_weight * np.exp(-x / open_decay)
        + close_weight * np.exp(-(1.0 - x) / close_decay)
    )


def _readonly(array: Any, name: str, n: int, *, positive: bool) -> FloatArray:
    try:
        values = np.array(array, dtype=np.float64)
    except (TypeError, ValueError) as exc:
        raise InputError(f"must be {n} numbers, one per bin; got {array!r}", field=name) from exc
    if values.shape != (n,):
        raise InputError(
            f"must have one value per bin of the session ({n}); got shape {values.shape}",
            field=name,
        )
    bad = ~np.isfinite(values) | (values <= 0 if positive else values < 0)
    if bad.any():
        index = int(np.flatnonzero(bad)[0])
        raise InputError(
            f"must be finite and {'> 0' if positive else '>= 0'}; got "
            f"{values[index]!r} at bin {index}",
            field=name,
        )
    values.setflags(write=False)
    return values


@dataclass(frozen=True, eq=False)
class Profile:
    """The seasonal liquidity of one symbol over the bins of its session.

    Args:
        symbol: The symbol.
        session: The session whose bins the arrays follow.
        volume_share: Expected fraction of the day's volume per bin (>= 0, normalised to sum 1).
        spread: Expected time-averaged quoted spread per bin, currency (>= 0).
        volatility: Standard deviation of the log return over each bin, dimensionless (> 0).
        average_daily_volume: Shares in a regular full day (> 0).
        days: Number of days the profile was calibrated on (0 for a default).
        quality: The calibration's quality report (free-form, JSON-serialisable).

    Raises:
        InputError: an array has the wrong length or a value out of range.
    """

    symbol: str
    session: Session
    volume_share: FloatArray
    spread: FloatArray
    volatility: FloatArray
    average_daily_volume: float
    days: int = 0
    quality: Mapping[str, Any] = field(default_factory=dict)

    def __post_init__(self) -> None:
        put = object.__setattr__
        n = self.session.n_bins
        share = _readonly(self.volume_share, "volume_share", n, positive=False)
        total = float(share.sum())
        if total <= 0:
            raise InputError(
                "must have a positive sum (the day's volume has to go somewhere)",
                field="volume_share",
            )
        if abs(total - 1.0) > 1e-12:
            share = share / total
            share.setflags(write=False)
        put(self, "volume_share", share)
        put(self, "spread", _readonly(self.spread, "spread", n, positive=False))
        put(self, "volatility", _readonly(self.volatility, "volatility", n, positive=True))
        adv = self.average_daily_volume
        if (
            isinstance(adv, bool)
            or not isinstance(adv, int | float)
            or not (math.isfinite(adv) and adv > 0)
        ):
            raise InputError(
                f"must be a number of shares > 0; got {adv!r}", field="average_daily_volume"
            )
        put(self, "average_daily_volume", float(adv))

    @property
    def expected_volume(self) -> FloatArray:
        """Expected shares per bin on a regular day: ``average_daily_volume * volume_share``."""
        return self.average_daily_volume * self.volume_share

    def to_mapping(self) -> dict[str, Any]:
        """The PROFILE.json object written by ``tracker calibrate``."""
        labels = self.session.bin_labels()
        return {
            "symbol": self.symbol,
            "session": self.session.to_mapping(),
            "units": {
                "volume_share": "fraction of the day's volume",
                "spread": "time-averaged quoted spread, currency",
                "volatility": "standard deviation of the log return over one bin",
                "average_daily_volume": "shares",
            },
            "average_daily_volume": self.average_daily_volume,
            "days": self.days,
            "bins": [
                {
                    "start": label,
                    "volume_share": float(share),
                    "spread": float(spread),
                    "volatility": float(vol),
                }
                for label, share, spread, vol in zip(
                    labels, self.volume_share, self.spread, self.volatility, strict=True
                )
            ],
            "quality": dict(self.quality),
        }

    @classmethod
    def from_mapping(cls, data: Any) -> Profile:
        """Read a PROFILE.json object (as written by :meth:`to_mapping`).

        Raises:
            InputError: naming the missing or malformed key.
        """
        if not isinstance(data, dict):
            raise InputError(f"a profile must be a JSON object; got {type(data).__name__}")
        for key in ("symbol", "session", "bins", "average_daily_volume"):
            if key not in data:
                raise InputError(
                    "is missing; a profile needs symbol, session, bins and average_daily_volume",
                    field=key,
                )
        symbol = data["symbol"]
        if not isinstance(symbol, str) or not symbol:
            raise InputError(f"must be a non-empty string; got {symbol!r}", field="symbol")
        session = Session.from_mapping(data["session"])
        bins = data["bins"]
        if not isinstance(bins, list) or len(bins) != session.n_bins:
            got = len(bins) if isinstance(bins, list) else type(bins).__name__
            raise InputError(
                f"must be a list of {session.n_bins} bin objects, one per bin of the "
                f"session; got {got}",
                field="bins",
            )
        labels = session.bin_labels()
        columns: dict[str, list[float]] = {"volume_share": [], "spread": [], "volatility": []}
        for index, (item, label) in enumerate(zip(bins, labels, strict=True)):
            where = f"bins[{index}]"
            if not isinstance(item, dict):
                raise InputError(
                    "must be an object with start, volume_share, spread, volatility", field=where
                )
            if item.get("start") != label:
                raise InputError(
                    f"start must be {label} (bin {index} of the session); got "
                    f"{item.get('start')!r}",
                    field=f"{where}.start",
                )
            for key, values in columns.items():
                value = item.get(key)
                if isinstance(value, bool) or not isinstance(value, int | float):
                    raise InputError(f"must be a number; got {value!r}", field=f"{where}.{key}")
                values.append(float(value))
        days = data.get("days", 0)
        if isinstance(days, bool) or not isinstance(days, int) or days < 0:
            raise InputError(f"must be a whole number >= 0; got {days!r}", field="days")
        quality = data.get("quality", {})
        if not isinstance(quality, dict):
            raise InputError(f"must be an object; got {type(quality).__name__}", field="quality")
        return cls(
            symbol=symbol,
            session=session,
            volume_share=np.array(columns["volume_share"]),
            spread=np.array(columns["spread"]),
            volatility=np.array(columns["volatility"]),
            average_daily_volume=data["average_daily_volume"],
            days=days,
            quality=quality,
        )


Shape = tuple[float, float, float, float]


def shaped_profile(
    symbol: str,
    session: Session,
    *,
    volume_shape: Shape,
    spread_shape: Shape,
    variance_shape: Shape,
    midday_spread: float,
    daily_volatility: float,
    average_daily_volume: float,
    quality: Mapping[str, Any],
) -> Profile:
    """A profile drawn from :func:`intraday_shape` U curves (invented defaults, demo market truth).

    Args:
        symbol: The symbol.
        session: Its session.
        volume_shape: ``intraday_shape`` parameters of the volume curve (normalised to shares).
        spread_shape: The same for the spread, scaled to ``midday_spread`` where flat.
        variance_shape: The same for the per-bin return variance, scaled so the day's variance is
            ``daily_volatility`` squared.
        midday_spread: Spread at the flat middle of the day, currency.
        daily_volatility: Standard deviation of the day's log return.
        average_daily_volume: Shares a day.
        quality: Where the profile comes from.
    """
    share = intraday_shape(session, *volume_shape)
    spread = midday_spread * intraday_shape(session, *spread_shape)
    variance = intraday_shape(session, *variance_shape)
    variance *= daily_volatility**2 / variance.sum()
    return Profile(
        symbol=symbol,
        session=session,
        volume_share=share / share.sum(),
        spread=spread,
        volatility=np.sqrt(variance),
        average_daily_volume=average_daily_volume,
        days=0,
        quality=dict(quality),
    )


def default_profile(symbol: str, session: Session | None = None) -> Profile:
    """An invented, stated default for a symbol without a calibrated profile.

    1,000,000 shares a day; a U-shaped volume curve (the first bin about 2.4 times the midday
    level, the last about 2.2 times); a spread of 0.02 (currency) at midday, 2.5 times wider at the
    open; 2 % daily volatility, higher at the open. The shapes are invented to look like a liquid
    stock (common practice: U-shaped volume, spreads widest at the open); use a calibrated profile
    for real decisions.
    """
    return shaped_profile(
        symbol,
        session or Session(),
        volume_shape=(1.5, 0.08, 1.2, 0.04),
        spread_shape=(1.5, 0.05, 0.0, 1.0),
        variance_shape=(1.5, 0.08, 0.4, 0.04),
        midday_spread=DEFAULT_MIDDAY_SPREAD,
        daily_volatility=DEFAULT_DAILY_VOLATILITY,
        average_daily_volume=DEFAULT_ADV,
        quality={
            "source": "default",
            "note": "invented default profile, not calibrated on any data",
        },
    )


@dataclass(frozen=True, slots=True)
class ObservedBin:
    """What the market did in one bin today (from a bin message).

    Args:
        volume: Shares traded in the bin (>= 0).
        spread: Time-averaged quoted spread, currency, if known.
        high: Highest trade price in the bin, if known.
        low: Lowest trade price in the bin, if known.
    """

    volume: float
    spread: float | None = None
    high: float | None = None
    low: float | None = None

    @property
    def variance(self) -> float | None:
        """Parkinson (1980) variance of the bin's log return, ``ln(H/L)^2 / (4 ln 2)``."""
        if self.high is None or self.low is None or self.low <= 0 or self.high < self.low:
            return None
        return math.log(self.high / self.low) ** 2 / PARKINSON


@dataclass(frozen=True, eq=False)
class Forecast:
    """Today's liquidity over every bin of the session.

    Observed bins hold what was observed (volume always; spread and volatility when the bin had
    them); the other bins hold the profile times today's ratios.

    Attributes:
        session: The session the arrays follow.
        volume: Shares per bin.
        spread: Quoted spread per bin, currency.
        volatility: Standard deviation of the log return per bin.
        volume_scale: Today's day-volume multiplier on the profile (1 = a normal day).
        spread_ratio: Today's spread multiplier.
        volatility_ratio: Today's volatility multiplier.
        average_daily_volume: The profile's average daily volume (shares), unscaled.
        observed: Indexes of the bins observed so far, sorted.
        fraction_seen: Fraction of the day's expected volume in the observed bins.
    """

    session: Session
    volume: FloatArray
    spread: FloatArray
    volatility: FloatArray
    volume_scale: float = 1.0
    spread_ratio: float = 1.0
    volatility_ratio: float = 1.0
    average_daily_volume: float = DEFAULT_ADV
    observed: tuple[int, ...] = ()
    fraction_seen: float = 0.0

    @property
    def n_bins(self) -> int:
        """Number of bins of the session."""
        return self.session.n_bins


def _shrunk_ratio(log_ratio: float, weight: float, bounds: tuple[float, float]) -> float:
    return float(np.clip(math.exp(weight * log_ratio), *bounds))


def forecast(
    profile: Profile,
    observed: Mapping[int, ObservedBin],
    *,
    prior_fraction: float = 0.05,
    recent_bins: int = 12,
    prior_bins: float = 6.0,
) -> Forecast:
    """Forecast volume, spread and volatility for the rest of the day (pure).

    Args:
        profile: The symbol's profile (or :func:`default_profile`).
        observed: Bins observed so far today, by index into the session's bins.
        prior_fraction: f0 of the volume shrinkage: the fraction of the day's expected volume at
            which the observed ratio gets half the weight (0.05: after about 5 % of the day).
        recent_bins: How many of the latest observed bins set the spread and volatility ratios.
        prior_bins: m0 of the spread/volatility shrinkage: with m recent bins the weight is
            m / (m + m0).

    Returns:
        A :class:`Forecast` over all bins.

    Raises:
        InputError: an observed bin index is outside the session or a value is negative.
    """
    n = profile.session.n_bins
    volume = profile.expected_volume.copy()
    spread = profile.spread.copy()
    volatility = profile.volatility.copy()
    indexes = sorted(observed)
    for index in indexes:
        if (
            isinstance(index, bool)
            or not isinstance(index, int | np.integer)
            or not (0 <= index < n)
        ):
            raise InputError(
                f"must be a bin index from 0 to {n - 1}; got {index!r}", field="observed"
            )
        if not (observed[index].volume >= 0 and math.isfinite(observed[index].volume)):
            raise InputError(
                f"must be a finite number of shares >= 0; got "
                f"{observed[index].volume!r} in bin {index}",
                field="volume",
            )
    observed = {int(i): observed[i] for i in indexes}
    indexes = [int(i) for i in indexes]
    seen = np.array(indexes, dtype=np.intp)  # typed: may be empty before the first bin
    observed_volume = np.array([observed[i].volume for i in indexes])
    fraction = float(profile.volume_share[seen].sum())
    expected = fraction * profile.average_daily_volume
    scale = 1.0
    if expected > 0:
        weight = fraction / (fraction + prior_fraction)
        ratio = max(float(observed_volume.sum()) / expected, 1e-12)
        scale = _shrunk_ratio(math.log(ratio), weight, VOLUME_SCALE_BOUNDS)

    recent = indexes[-recent_bins:]
    seen_spread = expected_spread = 0.0
    spread_bins = 0
    seen_variance = expected_variance = 0.0
    variance_bins = 0
    for i in recent:
        spread_i = observed[i].spread
        if spread_i is not None and spread_i >= 0:
            seen_spread += spread_i
            expected_spread += float(profile.spread[i])
            spread_bins += 1
        variance_i = observed[i].variance
        if variance_i is not None:
            seen_variance += variance_i
            expected_variance += float(profile.volatility[i]) ** 2
            variance_bins += 1
    spread_ratio = 1.0
    if spread_bins and expected_spread > 0:
        log_ratio = math.log(max(seen_spread / expected_spread, 1e-12))
        spread_ratio = _shrunk_ratio(
            log_ratio, spread_bins / (spread_bins + prior_bins), SPREAD_RATIO_BOUNDS
        )
    volatility_ratio = 1.0
    if variance_bins and expected_variance > 0:
        log_ratio = 0.5 * math.log(max(seen_variance / expected_variance, 1e-12))
        volatility_ratio = _shrunk_ratio(
            log_ratio, variance_bins / (variance_bins + prior_bins), VOLATILITY_RATIO_BOUNDS
        )

    volume *= scale
    spread *= spread_ratio
    volatility *= volatility_ratio
    volume[seen] = observed_volume
    for i in indexes:
        bin_ = observed[i]
        if bin_.spread is not None and bin_.spread >= 0:
            spread[i] = bin_.spread
        variance = bin_.variance
        if variance is not None and variance > 0:
            volatility[i] = math.sqrt(variance)
    for array in (volume, spread, volatility):
        array.setflags(write=False)
    return Forecast(
        session=profile.session,
        volume=volume,
        spread=spread,
        volatility=volatility,
        volume_scale=scale,
        spread_ratio=spread_ratio,
        volatility_ratio=volatility_ratio,
        average_daily_volume=profile.average_daily_volume,
        observed=tuple(indexes),
        fraction_seen=fraction,
    )


ProgressCallback = Callable[[str, float], None]


# --------------------------------------------------------------------------- calibration

#: Columns a history must have (any order; extra columns are ignored, ``line`` is used if present).
HISTORY_COLUMNS = ("start", "symbol", "volume", "vwap", "open", "high", "low", "close", "spread")
#: At most this many rejected rows are listed in the quality report (all are counted).
REJECTED_LISTED = 100


@dataclass(frozen=True, slots=True)
class RejectedRow:
    """A history row that calibration could not use, and why."""

    line: int
    field: str
    reason: str

    def to_mapping(self) -> dict[str, Any]:
        """The row as a JSON object of the quality report."""
        return {"line": self.line, "field": self.field, "reason": self.reason}


@dataclass(frozen=True, eq=False)
class _Prepared:
    """Validated history rows of one symbol on the session grid."""

    day: npt.NDArray[np.int64]  # local date, days since 1970-01-01
    bin: npt.NDArray[np.int64]
    values: dict[str, FloatArray]
    rejected: list[RejectedRow]
    rows: int


def _quiet(function: Callable[..., Any], *args: Any, **kwargs: Any) -> Any:
    """Call a numpy nan-function; an all-NaN column gives NaN without a RuntimeWarning."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        return function(*args, **kwargs)


def _screen(matrix: FloatArray, *, upper_only: bool = False) -> tuple[FloatArray, int]:
    """Per-column outlier screen on the log scale: NaN out |log x - median| > OUTLIER_Z robust sd.

    Zeros and NaN are left alone (a zero cannot be judged on the log scale). ``upper_only`` keeps
    small values (for squared returns, whose log has a long left tail by nature).
    """
    positive = matrix > 0
    logs = np.where(positive, np.log(np.where(positive, matrix, 1.0)), np.nan)
    median = _quiet(np.nanmedian, logs, axis=0)
    mad = _quiet(np.nanmedian, np.abs(logs - median), axis=0) * 1.4826
    with np.errstate(invalid="ignore", divide="ignore"):
        z = (logs - median) / mad
    if not upper_only:
        z = np.abs(z)
    outlier = positive & (z > OUTLIER_Z) & (mad > 0)
    cleaned = matrix.copy()
    cleaned[outlier] = np.nan
    return cleaned, int(outlier.sum())


def _trimmed_mean(matrix: FloatArray, trim: float = TRIM) -> FloatArray:
    """Per-column mean after dropping NaN and ``trim`` of each tail; NaN for an empty column."""
    ordered = np.sort(matrix, axis=0)  # NaN sort last
    counts = np.isfinite(matrix).sum(axis=0)
    result = np.full(matrix.shape[1], np.nan)
    for j, count in enumerate(counts):
        if count:
            cut = math.floor(trim * count)
            result[j] = float(ordered[cut : count - cut, j].mean())
    return result


def _parse_start(column: Any, session: Session) -> tuple[Any, Any]:
    """Parse ``start`` into the session's local time; return it and the unparseable rows' mask.

    Strings with an offset (or Z) are converted to the session's zone; strings without one are
    taken as the session's local time (a local time that does not exist that day is unparseable).
    """
    import pandas as pd

    zone = session.timezone
    if isinstance(column.dtype, pd.DatetimeTZDtype):
        local = column.dt.tz_convert(zone)
    elif pd.api.types.is_datetime64_dtype(column.dtype):
        local = column.dt.tz_localize(zone, ambiguous="NaT", nonexistent="NaT")
    else:
        text = column.astype("string").str.strip()
        has_offset = text.str.contains(r"(?:Z|[+-]\d{2}:?\d{2})$", regex=True).fillna(False)
        aware = pd.to_datetime(text.where(has_offset), format="ISO8601", utc=True, errors="coerce")
        naive = pd.to_datetime(text.where(~has_offset), format="ISO8601", errors="coerce")
        local = aware.dt.tz_convert(zone)
        local_naive = naive.dt.tz_localize(zone, ambiguous="NaT", nonexistent="NaT")
        local = local.where(has_offset.to_numpy(), local_naive)
    return local, local.isna().to_numpy()


def _prepare(
    history: Any, symbol: str, session: Session, progress: ProgressCallback | None
) -> _Prepared:
    import pandas as pd

    if not isinstance(history, pd.DataFrame):
        raise InputError(
            f"must be a pandas DataFrame; got {type(history).__name__}", field="history"
        )
    frame = history.rename(columns=lambda c: str(c).strip().lower())
    missing = [c for c in HISTORY_COLUMNS if c not in frame.columns]
    if missing:
        raise InputError(
            f"is missing from the history; the columns are "
            f"{', '.join(HISTORY_COLUMNS)} (any order)",
            field=missing[0],
        )
    if "line" in frame.columns:
        lines = pd.to_numeric(frame["line"], errors="coerce").fillna(-1).to_numpy(np.int64)
    else:
        lines = np.arange(len(frame), dtype=np.int64) + 2  # a CSV with one header line
    symbols = frame["symbol"].astype("string").str.strip()
    blank = symbols.isna() | (symbols == "")
    rejected = [
        RejectedRow(int(line), "symbol", "is empty; every row needs its symbol")
        for line in lines[blank.to_numpy()]
    ]
    mine = (symbols == symbol).fillna(False).to_numpy()
    if not mine.any():
        found = sorted(set(symbols[~blank].unique().tolist()))
        shown = ", ".join(found[:20]) + (" ..." if len(found) > 20 else "")
        raise InputError(
            f"has no row for symbol {symbol!r}; the history has: {shown or 'no symbol at all'}",
            field="symbol",
        )
    frame = frame.loc[mine]
    lines = lines[mine]
    if progress:
        progress("parse", 0.1)
    local, bad_start = _parse_start(frame["start"], session)
    reasons = np.full(len(frame), "", dtype=object)
    fields_ = np.full(len(frame), "", dtype=object)

    def flag(mask: Any, field_: str, reason: str) -> None:
        new = np.asarray(mask, dtype=bool) & (reasons == "")
        reasons[new] = reason
        fields_[new] = field_

    flag(
        bad_start,
        "start",
        "is not an ISO 8601 time (e.g. 2026-01-05T09:30:00-05:00); a time "
        f"without an offset is taken in {session.timezone}, and must exist on that day",
    )
    safe = local.where(~bad_start, pd.Timestamp("2000-01-03 12:00", tz=session.timezone))
    minute = (safe.dt.hour * 60 + safe.dt.minute).to_numpy(np.int64)
    second = (safe.dt.second * 1_000_000 + safe.dt.microsecond).to_numpy(np.int64)
    day = safe.dt.tz_localize(None).to_numpy().astype("datetime64[D]").astype(np.int64)
    offset = minute - (session.start.hour * 60 + session.start.minute)
    on_grid = (
        (second == 0)
        & (offset % session.bin_minutes == 0)
        & (offset >= 0)
        & (offset < session.minutes)
    )
    flag(
        ~on_grid,
        "start",
        f"is not the start of a bin of the session {session.start:%H:%M}-"
        f"{session.end:%H:%M} {session.timezone} ({session.bin_minutes}-minute bins)",
    )
    bin_ = np.where(on_grid, offset // session.bin_minutes, 0)

    values: dict[str, FloatArray] = {}
    for name in ("volume", "vwap", "open", "high", "low", "close", "spread"):
        number = pd.to_numeric(frame[name], errors="coerce").to_numpy(np.float64, na_value=np.nan)
        flag(~np.isfinite(number), name, "is not a number")
        values[name] = number
    with np.errstate(invalid="ignore"):
        flag(values["volume"] < 0, "volume", "must be >= 0 shares")
        flag(values["spread"] < 0, "spread", "must be >= 0 (currency)")
        for name in ("open", "high", "low", "close", "vwap"):
            flag(values[name] <= 0, name, "must be a price > 0")
        flag(values["high"] < values["low"], "high", "is below low")
        tolerance = 1e-9 + 1e-6 * values["high"]
        for name in ("open", "close", "vwap"):
            flag(
                (values[name] > values["high"] + tolerance)
                | (values[name] < values["low"] - tolerance),
                name,
                "is outside the bin's low-high range",
            )
    good = reasons == ""
    # Duplicates: the same day and bin twice; the first row is kept.
    key = day * 10_000 + bin_
    order = np.argsort(np.where(good, key, np.iinfo(np.int64).max), kind="stable")
    sorted_key = key[order]
    repeat = np.zeros(len(key), dtype=bool)
    repeat[order[1:]] = (sorted_key[1:] == sorted_key[:-1]) & good[order[1:]] & good[order[:-1]]
    flag(repeat, "start", "repeats a day and bin already given by an earlier row")
    good = reasons == ""
    for index in np.flatnonzero(~good):
        rejected.append(RejectedRow(int(lines[index]), str(fields_[index]), str(reasons[index])))
    rejected.sort(key=lambda r: r.line)
    if not good.any():
        raise InputError(
            f"no usable row for symbol {symbol!r}; first problem: line "
            f"{rejected[0].line}: {rejected[0].field} {rejected[0].reason}",
            field="history",
        )
    if progress:
        progress("validate", 0.4)
    return _Prepared(
        day=day[good],
        bin=bin_[good],
        values={k: v[good] for k, v in values.items()},
        rejected=rejected,
        rows=len(frame),
    )


def calibrate(
    history: Any,
    symbol: str,
    session: Session | None = None,
    *,
    progress: ProgressCallback | None = None,
) -> Profile:
    """Estimate a symbol's profile from one row per day and bin of history.

    Args:
        history: A pandas DataFrame with the columns of :data:`HISTORY_COLUMNS` (any order,
            names case-insensitive) and optionally ``line``, the row's line in the source file
            for the report (default: row position + 2, a CSV with one header line). ``start`` is
            the bin start, ISO 8601 with an offset or in the session's timezone, or datetimes.
        symbol: The symbol to calibrate; rows of other symbols are ignored.
        session: The regular session (default 09:30-16:00 America/New_York, 5-minute bins).
        progress: Called with a stage name and the fraction done, for a progress bar.

    Returns:
        The :class:`Profile`; its ``quality`` reports the rows rejected (with their line and
        reason), short days, missing bins, outliers removed and how, and the volatility
        cross-check.

    Raises:
        InputError: a column is missing, the symbol has no usable row, there is no full day to
            estimate volume shares from, or a bin has no data on any day.
    """
    session = session or Session()
    prepared = _prepare(history, symbol, session, progress)
    n = session.n_bins
    days, day_index = np.unique(prepared.day, return_inverse=True)
    count = days.shape[0]

    def matrix(name: str) -> FloatArray:
        out = np.full((count, n), np.nan)
        out[day_index, prepared.bin] = prepared.values[name]
        return out

    volume = matrix("volume")
    present = np.isfinite(volume)
    labels = session.bin_labels()
    ends = [*labels[1:], f"{session.end:%H:%M}"]
    full = present.all(axis=1)
    short_days: list[dict[str, Any]] = []
    gap_days: list[dict[str, Any]] = []
    missing_bins = 0
    for i in np.flatnonzero(~full):
        have = np.flatnonzero(present[i])
        first, last = int(have[0]), int(have[-1])
        inside_gaps = [labels[j] for j in range(first, last + 1) if not present[i, j]]
        missing_bins += n - have.size
        when = str(days[i].astype("datetime64[D]"))
        if first > 0 or last < n - 1:
            kind = " and ".join(
                k for k, on in (("late open", first > 0), ("early close", last < n - 1)) if on
            )
            short_days.append(
                {"date": when, "kind": kind, "start": labels[first], "end": ends[last]}
            )
        if inside_gaps:
            gap_days.append(
                {"date": when, "missing": inside_gaps[:20], "missing_count": len(inside_gaps)}
            )
    if not full.any():
        raise InputError(
            f"no full day ({n} bins of {session.start:%H:%M}-{session.end:%H:%M}) "
            f"for {symbol!r}: volume shares need at least one; check the session "
            "(--session-start/--session-end/--bin-minutes) or the history",
            field="history",
        )
    if progress:
        progress("aggregate", 0.6)

    totals = volume[full].sum(axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        shares = volume[full] / totals[:, None]
    shares[~np.isfinite(shares)] = np.nan
    shares, share_outliers = _screen(shares)
    volume_share = _trimmed_mean(shares)
    volume_share = np.where(np.isfinite(volume_share), volume_share, 0.0)
    adv = float(_trimmed_mean(totals[:, None])[0])

    spread_matrix, spread_outliers = _screen(matrix("spread"))
    spread = _trimmed_mean(spread_matrix)
    high, low = matrix("high"), matrix("low")
    with np.errstate(invalid="ignore", divide="ignore"):
        ranges = np.log(high / low)
    ranges, range_outliers = _screen(ranges)
    variance = _quiet(np.nanmean, ranges**2, axis=0) / PARKINSON
    empty = [
        labels[j] for j in range(n) if not np.isfinite(spread[j]) or not np.isfinite(variance[j])
    ]
    if empty:
        raise InputError(
            f"bin {empty[0]} has no usable data on any day; a profile needs every "
            "bin of the session at least once",
            field="history",
        )
    floor = 1e-8
    floored = int((variance <= floor**2).sum())
    volatility = np.sqrt(np.maximum(variance, floor**2))

    close, open_ = matrix("close"), matrix("open")
    previous = np.concatenate([open_[:, :1], close[:, :-1]], axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        returns = np.log(close / previous)
    squared, return_outliers = _screen(returns**2, upper_only=True)
    cc_variance = _quiet(np.nanmean, squared, axis=0)
    parkinson_daily = float(math.sqrt(variance.sum()))
    cc_daily = float(math.sqrt(np.nansum(cc_variance)))
    ratio = cc_daily / parkinson_daily if parkinson_daily > 0 else math.nan
    if progress:
        progress("done", 1.0)
    quality = {
        "rows": prepared.rows,
        "rows_used": int(prepared.day.shape[0]),
        "rows_rejected": len(prepared.rejected),
        "rejected": [r.to_mapping() for r in prepared.rejected[:REJECTED_LISTED]],
        "days": int(count),
        "full_days": int(full.sum()),
        "short_days": short_days,
        "days_with_gaps": gap_days,
        "missing_bins": int(missing_bins),
        "outliers_removed": {
            "volume_share": share_outliers,
            "spread": spread_outliers,
            "range": range_outliers,
            "close_to_close": return_outliers,
        },
        "volatility_floored_bins": floored,
        "volatility_check": {
            "parkinson_daily": parkinson_daily,
            "close_to_close_daily": cc_daily,
            "ratio": ratio,
            "consistent": bool(0.8 <= ratio <= 1.25),
        },
        "method": (
            f"per bin, observations more than {OUTLIER_Z:g} robust standard deviations "
            "(1.4826 x median absolute deviation, log scale) from the median are removed; "
            f"volume shares (full days only) and spreads are {TRIM:.0%} trimmed means; "
            "average_daily_volume is the trimmed mean of full-day totals; volatility is the "
            "Parkinson (1980) range estimator sqrt(mean ln(H/L)^2 / (4 ln 2)) over all days "
            "with the bin, cross-checked against close-to-close returns"
        ),
    }
    return Profile(
        symbol=symbol,
        session=session,
        volume_share=volume_share,
        spread=spread,
        volatility=volatility,
        average_daily_volume=adv,
        days=int(count),
        quality=quality,
    )

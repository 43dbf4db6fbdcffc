"""Calibration of a liquidity profile from history (one row per day and bin).

Theory of operation
-------------------
:func:`calibrate` estimates a profile from one row per day and bin of history (a DataFrame; the
command line reads the file). Statistics are robust: a per-bin outlier screen on the log scale
(robust z-score from the median absolute deviation, threshold :data:`OUTLIER_Z`), then a 10 %
trimmed mean for volume shares and spreads. Volatility uses the Parkinson (1980) range estimator
per bin, sigma^2 = ln(H/L)^2 / (4 ln 2), averaged over days after the outlier screen (a trimmed
mean would bias a squared range downward), and is cross-checked against close-to-close returns.
Volume shares come from full days only; half days, late opens and days with gaps still feed the
spread and volatility of the bins they have, and are listed in the quality report.

Pure computation on a DataFrame: the command line reads the file.
"""

from __future__ import annotations

import math
import warnings
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np
import numpy.typing as npt

from tracker.core.profiles import Profile
from tracker.core.session import Session
from tracker.errors import InputError

FloatArray = npt.NDArray[np.float64]

#: Robust z-score beyond which a per-bin observation is treated as an outlier and removed.
OUTLIER_Z = 5.0
#: Fraction trimmed from each tail by the trimmed means of calibration.
TRIM = 0.10
#: 4 ln 2, the Parkinson (1980) constant: E[ln(H/L)^2] = 4 ln 2 sigma^2 for a Brownian path.
PARKINSON = 4.0 * math.log(2.0)


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
    for name in HISTORY_COLUMNS[2:]:  # the numeric columns
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

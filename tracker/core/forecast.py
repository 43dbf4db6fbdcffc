"""The intraday liquidity forecast: a profile updated with the bins observed so far today.

Theory of operation
-------------------
:func:`forecast` updates a profile with the bins observed so far today. The day's volume scale
is the ratio r of cumulated observed to cumulated expected volume, shrunk toward 1 on the log
scale: ``log s = w log r`` with ``w = f / (f + f0)``, where f is the fraction of the day's
expected volume already seen and f0 (``prior_fraction``, default 0.05) the fraction at which
observation and prior weigh the same. This is the posterior mean of a normal prior on the log
scale whose observation noise falls like 1/f. Spread and volatility ratios use the last
``recent_bins`` observed bins the same way with ``w = m / (m + m0)``. All three are bounded.

Everything here is pure: no files, no clock.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass

import numpy as np
import numpy.typing as npt

from tracker.core.profiles import DEFAULT_ADV, Profile
from tracker.core.session import Session
from tracker.errors import InputError

FloatArray = npt.NDArray[np.float64]


#: 4 ln 2, the Parkinson (1980) constant: E[ln(H/L)^2] = 4 ln 2 sigma^2 for a Brownian path.
PARKINSON = 4.0 * math.log(2.0)

#: Bounds on the intraday ratios (volume scale, spread ratio, volatility ratio).
VOLUME_SCALE_BOUNDS = (0.25, 4.0)
SPREAD_RATIO_BOUNDS = (0.5, 4.0)
VOLATILITY_RATIO_BOUNDS = (0.5, 4.0)


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
    )

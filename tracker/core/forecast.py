"""The intraday liquidity forecast: a profile updated with the bins observed so far today.

Theory of operation
-------------------
:func:`forecast` updates a profile with the bins observed so far today.

The day's volume scale s comes from the ratio r of cumulated observed to cumulated expected
volume. Two things keep it honest:

* A transient shock (a midday collapse, a spike on news) is kept out of it. With at least
  :data:`SHOCK_MIN_BINS` bins seen, a bin whose log ratio to the profile lies further than
  :data:`SHOCK_MADS` robust standard deviations (1.4826 x the median absolute deviation, at least
  :data:`SHOCK_FLOOR` in log terms) from the median bin is a shock: it keeps its observed volume
  but does not count toward r or toward the evidence f. The median and the spread are taken
  again without the shocks found (:data:`SHOCK_PASSES`), since an hour-long shock inflates the
  first spread enough to hide itself. A whole day off its profile moves every
  bin alike and so has no such outliers.
* r is shrunk toward 1 on the log scale as the posterior mean of a Student-t prior (scale
  ``prior_sd``, ``prior_df`` degrees of freedom) given ``log r`` observed with variance
  ``prior_sd^2 f0 / f``, where f is the fraction of the day's expected volume seen (shocks
  excluded) and f0 (``prior_fraction``, default 0.05) the fraction at which the observation and
  the prior weigh the same. Near the profile this is the normal-prior weight ``w = f / (f + f0)``
  (``log s = w log r``); a day clearly off its profile sits in the heavy tail, where the prior
  pulls less, so the scale moves faster to it (the Student-t prior's property; day volumes of a
  stock are heavy-tailed -- common practice). ``prior_df = inf`` gives the normal prior exactly.

The forecast also states how sure it is of the scale: ``volume_scale_sd``, the standard deviation
of ``log s`` under the normal prior of the same scale, ``prior_sd sqrt(f0 / (f0 + f))`` (the
conjugate normal posterior; ``prior_sd`` before the first bin). The engine judges with it whether
an order could still complete on a day below the forecast
(:func:`tracker.core.engine.planning.short_on_low_day`).

Spread and volatility ratios use the last ``recent_bins`` observed bins with the normal-prior
weight ``w = m / (m + m0)``. All three are bounded.

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

#: The prior of the log day-volume scale: a Student-t with this scale and these degrees of
#: freedom (a liquid stock's day volume has a log standard deviation of about 0.2 with heavy
#: tails: common practice, from memory).
PRIOR_SD = 0.2
PRIOR_DF = 4.0

#: Transient shocks: with at least this many bins seen, a bin further than SHOCK_MADS robust
#: standard deviations (and at least SHOCK_FLOOR in log terms, a factor of 2) from the median bin
#: is a shock and stays out of the day's scale.
SHOCK_MIN_BINS = 6
SHOCK_MADS = 2.5
SHOCK_FLOOR = math.log(2.0)
#: The median and its spread are taken again without the shocks found, up to this many times
#: (a long shock inflates the first spread and hides itself).
SHOCK_PASSES = 3

#: Points of the grid on which the posterior mean of the log scale is integrated.
_GRID = 401


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
        volume_scale_sd: Standard deviation of the log of ``volume_scale`` given the bins seen
            (module docstring).
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
    volume_scale_sd: float = PRIOR_SD

    @property
    def n_bins(self) -> int:
        """Number of bins of the session."""
        return self.session.n_bins


def _shrunk_ratio(log_ratio: float, weight: float, bounds: tuple[float, float]) -> float:
    return float(np.clip(math.exp(weight * log_ratio), *bounds))


def shrunk_log_scale(log_ratio: float, variance: float, prior_sd: float, prior_df: float) -> float:
    """Posterior mean of a log scale mu given ``log_ratio ~ N(mu, variance)`` and a Student-t
    prior on mu (scale ``prior_sd``, ``prior_df`` degrees of freedom; ``inf``: normal).

    The normal prior has the closed form ``w log_ratio`` with ``w = prior_sd^2 / (prior_sd^2 +
    variance)``; the Student-t one is integrated on a grid spanning 0 and ``log_ratio`` +- 8
    standard deviations, where all of the posterior's mass lies.
    """
    tau2 = prior_sd * prior_sd
    if math.isinf(prior_df):
        return tau2 / (tau2 + variance) * log_ratio
    sd = math.sqrt(variance)
    low = min(0.0, log_ratio) - 8.0 * sd
    high = max(0.0, log_ratio) + 8.0 * sd
    mu = np.linspace(low, high, _GRID)
    log_post = (
        -0.5 * (prior_df + 1.0) * np.log1p(mu * mu / (tau2 * prior_df))
        - 0.5 * (log_ratio - mu) ** 2 / variance
    )
    weight = np.exp(log_post - log_post.max())
    return float(np.dot(mu, weight) / weight.sum())


def shocks(log_ratios: FloatArray) -> npt.NDArray[np.bool_]:
    """Which bins are transient shocks, from their log ratios to the profile (module docstring).

    Returns all False with fewer than :data:`SHOCK_MIN_BINS` bins.
    """
    outside = np.zeros(log_ratios.size, dtype=bool)
    if log_ratios.size < SHOCK_MIN_BINS:
        return outside
    for _ in range(SHOCK_PASSES):
        kept = log_ratios[~outside]
        centre = float(np.median(kept))
        spread = 1.4826 * float(np.median(np.abs(kept - centre)))
        now = np.abs(log_ratios - centre) > max(SHOCK_MADS * spread, SHOCK_FLOOR)
        if (now == outside).all():
            break
        outside = now
    return outside


def forecast(
    profile: Profile,
    observed: Mapping[int, ObservedBin],
    *,
    prior_fraction: float = 0.05,
    recent_bins: int = 12,
    prior_bins: float = 6.0,
    prior_sd: float = PRIOR_SD,
    prior_df: float = PRIOR_DF,
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
        prior_sd: Scale of the Student-t prior of the log day-volume scale.
        prior_df: Its degrees of freedom (``math.inf``: a normal prior, ``w = f / (f + f0)``).

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
    expected_volume = profile.expected_volume[seen]
    log_ratios = np.log(np.maximum(observed_volume, 1.0) / np.maximum(expected_volume, 1.0))
    steady = ~shocks(log_ratios)
    fraction = float(profile.volume_share[seen][steady].sum())
    expected = fraction * profile.average_daily_volume
    scale = 1.0
    scale_sd = prior_sd
    if expected > 0:
        scale_sd = prior_sd * math.sqrt(prior_fraction / (prior_fraction + fraction))
        ratio = max(float(observed_volume[steady].sum()) / expected, 1e-12)
        noise = prior_sd * prior_sd * prior_fraction / fraction
        log_scale = shrunk_log_scale(math.log(ratio), noise, prior_sd, prior_df)
        scale = float(np.clip(math.exp(log_scale), *VOLUME_SCALE_BOUNDS))

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
        volume_scale_sd=scale_sd,
    )

"""The intraday forecast: volume scale with shrinkage, spread and volatility ratios."""

from __future__ import annotations

import math
from datetime import date

import numpy as np
import pytest

from tracker.core.forecast import VOLUME_SCALE_BOUNDS, ObservedBin, forecast, shrunk_log_scale
from tracker.core.profiles import Profile, default_profile
from tracker.core.session import Session
from tracker.errors import InputError
from tracker.sim.market import simulate_days, trading_days, true_profile

DAYS = 200
CHECKPOINTS = (0, 6, 12, 24, 39)


def _days(scales: np.ndarray, seed: int) -> np.ndarray:
    """Per-bin volumes (days x 78) of invented full days with the given day scales (the truth)."""
    count = scales.shape[0]
    frame = simulate_days(
        "X_ZEPH",
        trading_days(date(2026, 1, 5), count),
        np.random.default_rng(seed),
        volume_scales=scales,
        open_bins=[(0, 78)] * count,
    )
    return frame.volume.to_numpy(np.float64).reshape(count, 78)


def _remaining_errors(volumes: np.ndarray, profile: Profile, seen: int) -> tuple[float, float]:
    """Mean absolute relative error of remaining-day volume: (forecast, unadjusted profile)."""
    adjusted, unadjusted = [], []
    for day in volumes:
        today = forecast(profile, {i: ObservedBin(float(day[i])) for i in range(seen)})
        actual = day[seen:].sum()
        adjusted.append(abs(today.volume[seen:].sum() / actual - 1.0))
        unadjusted.append(abs(profile.expected_volume[seen:].sum() / actual - 1.0))
    return float(np.mean(adjusted)), float(np.mean(unadjusted))


@pytest.fixture(scope="module")
def normal_days() -> np.ndarray:
    """Invented days whose volume scale is log-normal (sd 0.3) around the profile."""
    scales = np.exp(np.random.default_rng(3).standard_normal(DAYS) * 0.3)
    return _days(scales, seed=4)


def test_remaining_volume_error_falls_through_the_morning(normal_days: np.ndarray) -> None:
    """The error of the remaining-day volume forecast falls as bins are observed (to midday)."""
    # After midday the remaining volume is the sum of few noisy bins and its relative error grows
    # again whatever the scale estimate; the day scale itself is learnt by then.
    errors = [_remaining_errors(normal_days, true_profile("X_ZEPH"), k)[0] for k in CHECKPOINTS]
    assert sorted(errors, reverse=True) == errors


def test_day_volume_error_falls_all_day(normal_days: np.ndarray) -> None:
    """The error of the whole day's volume (observed + forecast) falls at every checkpoint."""
    profile = true_profile("X_ZEPH")
    errors = []
    for seen in (0, 6, 12, 24, 39, 52, 66, 72):
        errors.append(
            np.mean(
                [
                    abs(
                        forecast(
                            profile, {i: ObservedBin(float(d[i])) for i in range(seen)}
                        ).volume.sum()
                        / d.sum()
                        - 1.0
                    )
                    for d in normal_days
                ]
            )
        )
    assert sorted(errors, reverse=True) == errors


@pytest.mark.parametrize("shock", [2.0, 0.5], ids=["double-volume", "half-volume"])
@pytest.mark.parametrize("seen", [6, 12, 39, 66], ids=lambda k: f"after-{k}-bins")
def test_forecast_beats_unadjusted_profile_on_shock_days(shock: float, seen: int) -> None:
    """On days with a volume shock the forecast beats the unadjusted profile."""
    volumes = _days(np.full(60, shock), seed=int(shock * 10) + seen)
    adjusted, unadjusted = _remaining_errors(volumes, true_profile("X_ZEPH"), seen)
    assert adjusted < unadjusted


def test_no_observation_is_the_profile() -> None:
    """With nothing observed the forecast is the profile's expected volume."""
    profile = default_profile("X_ZEPH")
    np.testing.assert_array_equal(profile.expected_volume, forecast(profile, {}).volume)


def test_scale_is_shrunk_toward_one_early() -> None:
    """With a normal prior, double volume in the first bin gives log s = w log 2 with
    w = f / (f + 0.05) (the normal-normal posterior mean)."""
    profile = default_profile("X_ZEPH")
    first = float(profile.expected_volume[0])
    today = forecast(profile, {0: ObservedBin(2 * first)}, prior_df=math.inf)
    fraction = float(profile.volume_share[0])
    expected = 2.0 ** (fraction / (fraction + 0.05))
    assert expected == pytest.approx(today.volume_scale)


@pytest.mark.parametrize("seen", [0, 1, 12, 60], ids=["open", "one-bin", "an-hour", "afternoon"])
def test_the_scale_s_sd_is_the_normal_posterior_s(seen: int) -> None:
    """volume_scale_sd is the sd of log s under the normal prior (sd 0.2) given log r observed with
    variance 0.2^2 x 0.05 / f: the posterior precision is the sum of the two precisions (the
    normal-normal posterior, from memory); the prior's sd before any bin."""
    profile = default_profile("X_ZEPH")
    volumes = profile.expected_volume[:seen]
    observed = {i: ObservedBin(0.6 * float(v)) for i, v in enumerate(volumes)}
    fraction = float(profile.volume_share[:seen].sum())
    precision = 1.0 / 0.2**2 + (fraction / (0.2**2 * 0.05) if seen else 0.0)
    assert 1.0 / math.sqrt(precision) == pytest.approx(forecast(profile, observed).volume_scale_sd)


def test_scale_follows_the_observed_ratio_late() -> None:
    """After most of the day the scale is close to the observed ratio."""
    profile = default_profile("X_ZEPH")
    observed = {i: ObservedBin(1.5 * float(v)) for i, v in enumerate(profile.expected_volume[:60])}
    assert 1.5 == pytest.approx(forecast(profile, observed).volume_scale, rel=0.05)


def test_scale_is_bounded() -> None:
    """A day with 100 times the volume is capped at the upper bound."""
    profile = default_profile("X_ZEPH")
    observed = {i: ObservedBin(100 * float(v)) for i, v in enumerate(profile.expected_volume[:40])}
    assert VOLUME_SCALE_BOUNDS[1] == forecast(profile, observed).volume_scale


def test_observed_bins_keep_what_was_seen() -> None:
    """Observed bins hold the observed volume and spread."""
    today = forecast(default_profile("X_ZEPH"), {0: ObservedBin(12_345.0, spread=0.07)})
    assert (12_345.0, 0.07) == (today.volume[0], today.spread[0])


def test_wide_spreads_raise_the_spread_forecast() -> None:
    """Spreads twice the profile in recent bins raise the forecast spread, shrunk: 1 < r < 2."""
    profile = default_profile("X_ZEPH")
    observed = {
        i: ObservedBin(float(profile.expected_volume[i]), spread=2 * float(profile.spread[i]))
        for i in range(12)
    }
    ratio = forecast(profile, observed).spread_ratio
    expected = 2.0 ** (12 / (12 + 6))
    assert expected == pytest.approx(ratio)


def test_volatility_ratio_from_ranges() -> None:
    """High-low ranges implying twice the profile volatility give a shrunk ratio 2^(m/(m+m0))."""
    profile = default_profile("X_ZEPH")
    observed = {}
    for i in range(12):
        # Parkinson: ln(H/L) = sigma * sqrt(4 ln 2) makes the bin's estimate exactly sigma.
        log_range = 2 * float(profile.volatility[i]) * np.sqrt(4 * np.log(2))
        observed[i] = ObservedBin(1000.0, high=50.0 * np.exp(log_range), low=50.0)
    expected = 2.0 ** (12 / (12 + 6))
    assert expected == pytest.approx(forecast(profile, observed).volatility_ratio)


def test_forecast_mid_session_for_symbol_without_profile() -> None:
    """A symbol without a profile forecasts from the default, from any bin of the day."""
    session = Session()
    today = forecast(default_profile("NEWCO", session), {30: ObservedBin(5_000.0)})
    assert (78, (30,)) == (today.volume.shape[0], today.observed)


def test_observed_index_outside_session_is_rejected() -> None:
    """An observed bin index outside the session raises InputError."""
    with pytest.raises(InputError):
        forecast(default_profile("X_ZEPH"), {78: ObservedBin(1.0)})


def test_a_midday_collapse_stays_out_of_the_day_scale() -> None:
    """An hour at a fifth of the profile's volume (12 bins) does not move the day's scale: it is
    the scale of the same day without those bins (a transient shock, not a smaller day)."""
    profile = true_profile("X_ZEPH")
    noise = np.exp(np.random.default_rng(8).standard_normal(42) * 0.1)
    steady = {i: ObservedBin(1.1 * float(profile.expected_volume[i]) * noise[i]) for i in range(42)}
    collapsed = dict(steady)
    for i in range(30, 42):
        collapsed[i] = ObservedBin(0.2 * steady[i].volume)
    without = {i: steady[i] for i in range(30)}
    assert forecast(profile, without).volume_scale == forecast(profile, collapsed).volume_scale


def test_a_day_off_its_profile_is_followed_faster_than_with_a_normal_prior() -> None:
    """Half the volume all morning: the Student-t prior's scale is nearer the observed half
    than the normal prior's (a heavy-tailed prior pulls less on large deviations; from memory)."""
    profile = true_profile("X_ZEPH")
    half = {i: ObservedBin(0.5 * float(v)) for i, v in enumerate(profile.expected_volume[:12])}
    heavy = forecast(profile, half).volume_scale
    normal = forecast(profile, half, prior_df=math.inf).volume_scale
    assert 0.5 < heavy < normal


def test_the_student_t_posterior_mean_matches_scipy_quadrature() -> None:
    """The posterior mean of the log scale under a Student-t prior and a normal observation
    equals SciPy's numerical integral of mu x prior x likelihood over the prior x likelihood."""
    from scipy import integrate, stats

    y, variance, tau, df = -0.6, 0.01, 0.2, 4.0

    def density(mu: float) -> float:
        return float(stats.t.pdf(mu / tau, df) * stats.norm.pdf(y, mu, math.sqrt(variance)))

    top = integrate.quad(lambda mu: mu * density(mu), -3, 3, points=[y, 0.0])[0]
    bottom = integrate.quad(density, -3, 3, points=[y, 0.0])[0]
    assert top / bottom == pytest.approx(shrunk_log_scale(y, variance, tau, df), abs=1e-4)

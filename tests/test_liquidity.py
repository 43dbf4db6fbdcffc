"""Profiles and their calibration from per-bin history."""

from __future__ import annotations

import math
from datetime import date, time

import numpy as np
import pandas as pd
import pytest

from tracker.core.calibration import calibrate
from tracker.core.profiles import Profile, default_profile
from tracker.core.session import Session
from tracker.errors import InputError
from tracker.sim.market import MarketParameters, simulate_days, simulate_history, true_profile

SESSION = Session()


@pytest.fixture(scope="module")
def history() -> pd.DataFrame:
    """250 invented days of X_ZEPH (about one year)."""
    return simulate_history("X_ZEPH", 250, seed=11)


@pytest.fixture(scope="module")
def calibrated(history: pd.DataFrame) -> Profile:
    """The profile calibrated on the invented year."""
    return calibrate(history, "X_ZEPH", SESSION)


# Tolerances of the recovery test, stated: with 250 days, per-bin volume noise of 30 % and spread
# noise of 18 % (day and bin), the standard error of a per-bin mean is about 2 %; 6 % is three of
# them. The daily scale is heavy-tailed, so the average daily volume gets 15 %.
RECOVERY = {"volume_share": 0.06, "spread": 0.06, "volatility": 0.06}


@pytest.mark.parametrize("name", sorted(RECOVERY), ids=sorted(RECOVERY))
def test_calibration_recovers_generator_truth(calibrated: Profile, name: str) -> None:
    """Each per-bin curve is within the stated relative tolerance of the generator's truth."""
    truth = getattr(true_profile("X_ZEPH"), name)
    worst = float(np.max(np.abs(getattr(calibrated, name) / truth - 1.0)))
    assert worst < RECOVERY[name]


def test_calibration_recovers_average_daily_volume(calibrated: Profile) -> None:
    """The average daily volume is within 15 % of the generator's median-day volume."""
    expected = MarketParameters().average_daily_volume
    assert expected == pytest.approx(calibrated.average_daily_volume, rel=0.15)


def test_parkinson_matches_known_brownian_volatility() -> None:
    """Parkinson (1980): E[ln(H/L)^2] = 4 ln 2 sigma^2 recovers sigma of a fine random walk."""
    # The reference is the estimator's published identity applied to paths simulated here with a
    # plain numpy random walk (2,000 steps per bin; the discrete range is ~1.5 % short).
    rng = np.random.default_rng(5)
    sigma, days, steps = 0.004, 400, 2000
    rows = []
    for d in range(days):
        for n in range(SESSION.n_bins):
            path = 50.0 * np.exp(np.cumsum(rng.standard_normal(steps) * sigma / math.sqrt(steps)))
            rows.append((d, n, path[0], path.max(), path.min(), path[-1]))
        if d >= 60:  # enough bins (60 x 78 per bin position pooled below)
            break
    frame = pd.DataFrame(rows, columns=["d", "n", "open", "high", "low", "close"])
    frame["start"] = [
        f"{date(2026, 1, 5) + pd.Timedelta(days=int(d))}T{label}:00"
        for d, label in zip(frame.d, np.array(SESSION.bin_labels())[frame.n], strict=True)
    ]
    frame["symbol"], frame["volume"], frame["spread"] = "X_KALO", 1000, 0.01
    frame["vwap"] = frame[["open", "close"]].mean(axis=1)
    profile = calibrate(frame, "X_KALO", SESSION)
    assert sigma == pytest.approx(float(np.sqrt(np.mean(profile.volatility**2))), rel=0.05)


def test_close_to_close_cross_check_agrees(calibrated: Profile) -> None:
    """On Brownian prices the Parkinson and close-to-close daily volatility agree within 10 %."""
    check = calibrated.quality["volatility_check"]
    assert check["parkinson_daily"] == pytest.approx(check["close_to_close_daily"], rel=0.10)


def test_half_days_and_late_opens_are_listed(history: pd.DataFrame, calibrated: Profile) -> None:
    """Every day with fewer than 78 bins is listed as an early close or late open."""
    per_day = history.groupby(history.start.dt.date).size()
    assert int((per_day < 78).sum()) == len(calibrated.quality["short_days"])


def _one_day(day: date, seed: int, close_at: time | None = None) -> pd.DataFrame:
    session = SESSION
    bins = session.bins(day, close_at=close_at)
    last = session.bin_index(bins[-1][0])
    assert last is not None
    return simulate_days(
        "X_MIRA", [day], np.random.default_rng(seed), session, open_bins=[(0, last + 1)]
    )


def test_half_day_is_not_rebinned() -> None:
    """A 13:00 close keeps its bins at their clock time: a 09:30 row stays in the 09:30 bin."""
    full = _one_day(date(2026, 3, 2), 1)
    half = _one_day(date(2026, 3, 3), 2, close_at=time(13, 0))
    half.loc[half.index[0], "spread"] = 0.5  # mark the half day's 09:30 bin
    profile = calibrate(pd.concat([full, half], ignore_index=True), "X_MIRA", SESSION)
    expected = (full.spread.iloc[0] + 0.5) / 2
    assert expected == pytest.approx(profile.spread[0])


def test_half_day_volume_not_used_for_shares() -> None:
    """Volume shares come from full days only, so a half day does not inflate the morning."""
    full = _one_day(date(2026, 3, 2), 1)
    half = _one_day(date(2026, 3, 3), 2, close_at=time(13, 0))
    profile = calibrate(pd.concat([full, half], ignore_index=True), "X_MIRA", SESSION)
    expected = (full.volume / full.volume.sum()).to_numpy()
    np.testing.assert_allclose(expected, profile.volume_share, rtol=1e-12)


def test_bad_rows_reported_with_their_line(history: pd.DataFrame) -> None:
    """Bad rows are skipped and reported with their line, field and reason, never silently."""
    frame = history.head(78 * 3).astype({"volume": object}).copy()
    frame.loc[4, "high"] = 1.0
    frame.loc[9, "volume"] = "lots"
    frame.loc[20, "start"] = pd.Timestamp("2026-01-05 09:31", tz=SESSION.timezone)
    profile = calibrate(frame, "X_ZEPH", SESSION)
    expected = [(6, "high"), (11, "volume"), (22, "start")]  # row + 2: a CSV with a header
    assert expected == [(r["line"], r["field"]) for r in profile.quality["rejected"]]


def _full_days(history: pd.DataFrame, count: int = 1) -> pd.DataFrame:
    """The rows of the first ``count`` full (78-bin) days, re-indexed from 0."""
    days = history.start.dt.date
    counts = days.value_counts()
    chosen = sorted(day for day, rows in counts.items() if rows == SESSION.n_bins)[:count]
    return history[days.isin(chosen)].reset_index(drop=True)


def test_line_column_is_used_for_reports(history: pd.DataFrame) -> None:
    """A ``line`` column (set by the file reader) is what the report quotes."""
    frame = _full_days(history, 2)
    frame["line"] = np.arange(len(frame)) + 100
    frame.loc[3, "spread"] = -0.01
    profile = calibrate(frame, "X_ZEPH", SESSION)
    expected = [{"line": 103, "field": "spread", "reason": "must be >= 0 (currency)"}]
    assert expected == profile.quality["rejected"]


def test_duplicate_bin_is_rejected(history: pd.DataFrame) -> None:
    """A second row for the same day and bin is rejected, the first is kept."""
    day = _full_days(history)
    frame = pd.concat([day, day.head(1)], ignore_index=True)
    profile = calibrate(frame, "X_ZEPH", SESSION)
    expected = [80]
    assert expected == [r["line"] for r in profile.quality["rejected"]]


def test_offsets_and_local_times_give_the_same_profile(history: pd.DataFrame) -> None:
    """Starts in UTC with an offset and naive local starts calibrate to the same profile."""
    frame = history.head(78 * 10)
    utc = frame.assign(start=[s.tz_convert("UTC").isoformat() for s in frame.start])
    naive = frame.assign(start=[s.tz_localize(None).isoformat() for s in frame.start])
    a, b = calibrate(utc, "X_ZEPH", SESSION), calibrate(naive, "X_ZEPH", SESSION)
    np.testing.assert_array_equal(a.volume_share, b.volume_share)


def test_spread_outlier_removed(history: pd.DataFrame) -> None:
    """A spread 100 times its usual level is screened out and counted."""
    frame = history.head(78 * 40).copy()
    clean = calibrate(frame, "X_ZEPH", SESSION)
    frame.loc[78 * 5 + 40, "spread"] *= 100
    dirty = calibrate(frame, "X_ZEPH", SESSION)
    removed = (
        dirty.quality["outliers_removed"]["spread"] - clean.quality["outliers_removed"]["spread"]
    )
    expected = (1, pytest.approx(clean.spread[40], rel=0.05))
    assert expected == (removed, dirty.spread[40])


@pytest.mark.parametrize(
    ("change", "field"),
    [
        (lambda f: f.drop(columns=["spread"]), "spread"),
        (lambda f: f.assign(symbol="OTHER"), "symbol"),
        (lambda f: f[f.start.dt.hour < 13], "history"),
    ],
    ids=["missing-column", "no-row-for-symbol", "no-full-day"],
)
def test_unusable_history_names_the_problem(history: pd.DataFrame, change, field: str) -> None:  # type: ignore[no-untyped-def]
    """A history that cannot give a profile raises InputError naming what to fix."""
    with pytest.raises(InputError) as info:
        calibrate(change(history.head(78 * 2)), "X_ZEPH", SESSION)
    assert field == info.value.field


def test_profile_mapping_round_trip(calibrated: Profile) -> None:
    """PROFILE.json written and read back gives the same arrays."""
    again = Profile.from_mapping(calibrated.to_mapping())
    np.testing.assert_array_equal(calibrated.volatility, again.volatility)


def test_profile_mapping_names_bad_bin() -> None:
    """A bin with a non-numeric spread is named with its index."""
    data = default_profile("X_ZEPH").to_mapping()
    data["bins"][3]["spread"] = "wide"
    with pytest.raises(InputError) as info:
        Profile.from_mapping(data)
    assert "bins[3].spread" == info.value.field


def test_default_profile_is_u_shaped() -> None:
    """The default volume curve is U-shaped: open and close above midday (common practice)."""
    share = default_profile("X_ZEPH").volume_share
    middle = share[30:48].mean()
    assert (share[0] > 2 * middle, share[-1] > 2 * middle) == (True, True)


def test_default_profile_spreads_widest_at_open() -> None:
    """The default spread is widest in the first bin (common practice)."""
    spread = default_profile("X_ZEPH").spread
    assert int(np.argmax(spread)) == 0

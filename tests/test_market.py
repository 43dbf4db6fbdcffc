"""The invented market generator: shapes, calendar, daily volume, determinism."""

from __future__ import annotations

from datetime import date, time

import numpy as np
import pandas as pd
import pytest

from tracker.core.calibration import HISTORY_COLUMNS
from tracker.core.session import Session
from tracker.errors import InputError
from tracker.sim.market import MarketParameters, simulate_day, simulate_history


@pytest.fixture(scope="module")
def long_history() -> pd.DataFrame:
    """600 invented days of X_KALO."""
    return simulate_history("X_KALO", 600, seed=21)


def _daily(history: pd.DataFrame) -> pd.Series:
    full = history.groupby(history.start.dt.date).filter(lambda g: len(g) == 78)
    return full.groupby(full.start.dt.date).volume.sum()


def test_same_seed_same_history() -> None:
    """The same seed gives the same rows."""
    pd.testing.assert_frame_equal(
        simulate_history("X_ZEPH", 3, 9), simulate_history("X_ZEPH", 3, 9)
    )


def test_columns_are_the_calibrate_input() -> None:
    """The columns are those `tracker calibrate` reads."""
    assert list(HISTORY_COLUMNS) == list(simulate_history("X_ZEPH", 1, 1).columns)


def test_prices_are_consistent(long_history: pd.DataFrame) -> None:
    """Every bin has low <= open, close, vwap <= high and a spread of at least one tick."""
    h = long_history
    inside = (
        (h.low <= h[["open", "close", "vwap"]].min(axis=1))
        & (h[["open", "close", "vwap"]].max(axis=1) <= h.high)
        & (h.spread >= 0.01)
    )
    assert bool(inside.all())


def test_volume_is_u_shaped(long_history: pd.DataFrame) -> None:
    """Median volume in the first and last bins exceeds midday's (common practice)."""
    by_bin = long_history.groupby(long_history.start.dt.strftime("%H:%M")).volume.median()
    midday = by_bin["12:00":"13:30"].mean()
    assert (by_bin["09:30"] > 1.5 * midday, by_bin["15:55"] > 1.5 * midday) == (True, True)


def test_spread_is_widest_at_the_open(long_history: pd.DataFrame) -> None:
    """The median spread is highest in the 09:30 bin (common practice)."""
    by_bin = long_history.groupby(long_history.start.dt.strftime("%H:%M")).spread.median()
    assert "09:30" == by_bin.idxmax()


def test_daily_volume_is_autocorrelated(long_history: pd.DataFrame) -> None:
    """Log daily volume has lag-1 autocorrelation well above zero (AR(1) with phi = 0.5)."""
    logs = np.log(_daily(long_history).to_numpy())
    correlation = np.corrcoef(logs[:-1], logs[1:])[0, 1]
    assert correlation > 0.3


def test_daily_volume_is_heavy_tailed() -> None:
    """Log day-scale innovations have excess kurtosis (Student-t, 4 degrees of freedom)."""
    params = MarketParameters(day_volume_phi=0.0, bin_volume_sigma=0.01)
    logs = np.log(_daily(simulate_history("X_MIRA", 2000, 3, params=params)).to_numpy())
    centred = logs - logs.mean()
    kurtosis = np.mean(centred**4) / np.mean(centred**2) ** 2
    assert kurtosis > 3.5


def test_half_days_close_at_13(long_history: pd.DataFrame) -> None:
    """Short days end at 12:55 (a 13:00 close) or start at 10:30 (a late open)."""
    ends = {
        (day.start.min().strftime("%H:%M"), day.start.max().strftime("%H:%M"))
        for _, day in long_history.groupby(long_history.start.dt.date)
        if len(day) < 78
    }
    assert ends <= {("09:30", "12:55"), ("10:30", "15:55")} and len(ends) >= 1


def test_volume_shock_day_scales_volume() -> None:
    """A day simulated at twice the volume scale trades about twice the shares."""
    day = date(2026, 3, 2)
    normal = simulate_day("X_ZEPH", day, 5).volume.sum()
    shocked = simulate_day("X_ZEPH", day, 5, volume_scale=2.0).volume.sum()
    assert 2.0 == pytest.approx(shocked / normal, rel=1e-3)


def test_simulated_half_day_has_42_bins() -> None:
    """simulate_day with a 13:00 close gives the 42 bins from 09:30 to 12:55."""
    frame = simulate_day("X_ZEPH", date(2026, 11, 27), 1, close_at=time(13, 0))
    assert (42, "12:55") == (len(frame), frame.start.iloc[-1].strftime("%H:%M"))


def test_other_session_and_zone() -> None:
    """An invented venue day 08:00-16:30 London in 10-minute bins has 51 bins in that zone."""
    session = Session(time(8, 0), time(16, 30), "Europe/London", 10)
    frame = simulate_day("X_MIRA", date(2026, 6, 1), 2, session)
    assert (51, "+01:00") == (len(frame), frame.start.iloc[0].isoformat()[-6:])


@pytest.mark.parametrize(
    ("kwargs", "field"),
    [({"days": 0}, "days"), ({"symbol": "ZE/PH"}, "symbol")],
    ids=["no-days", "bad-symbol"],
)
def test_bad_arguments_name_the_field(kwargs: dict[str, object], field: str) -> None:
    """Bad generator arguments raise InputError naming the field."""
    arguments: dict[str, object] = {"symbol": "X_ZEPH", "days": 1, "seed": 1, **kwargs}
    with pytest.raises(InputError) as info:
        simulate_history(**arguments)  # type: ignore[arg-type]
    assert field == info.value.field

"""Costs that mean one thing: the plan's expected cost, its risk penalty and its sd, apart.

Prices and volumes are invented test values (a made-up venue, Harbour Lane Exchange, X_HLX), on the
default session (09:30-16:00 America/New_York, 5-minute bins: common practice).
"""

from __future__ import annotations

import math
from datetime import UTC, datetime, timedelta

import numpy as np
import pytest

from tracker.core.engine import Engine
from tracker.core.forecast import forecast
from tracker.core.formulation import (
    PERMANENT_IMPACT,
    build_problem,
    own_permanent_impact,
    preferences,
    timing_cost_sd,
)
from tracker.core.profiles import default_profile
from tracker.core.solve import cost_breakdown, solve
from tracker.edge.wire import StatusMessage
from tracker.testing import Recorder, order, tick

OPEN = datetime(2026, 3, 2, 14, 30, tzinfo=UTC)


def _at(minutes: float) -> str:
    return (OPEN + timedelta(minutes=minutes)).isoformat().replace("+00:00", "Z")


def test_own_permanent_impact_is_what_each_share_pays_for_the_shares_before_it() -> None:
    """Linear permanent impact (Almgren and Chriss 2000): each bin's shares pay b times the
    shares of the earlier bins; the closed form (b/2)((sum v)^2 - sum v^2) is that sum."""
    trades = np.array([1_000.0, 3_000.0, 0.0, 2_500.0, 500.0])
    b = PERMANENT_IMPACT * 0.02 * 40.0 / 1_000_000.0
    direct = sum(trades[n] * b * trades[:n].sum() for n in range(trades.size))
    computed = own_permanent_impact(
        trades, daily_volatility=0.02, price=40.0, average_daily_volume=1_000_000.0
    )
    assert direct == pytest.approx(computed)


def test_a_single_bin_s_timing_risk_is_that_of_a_brownian_average() -> None:
    """Everything bought over one bin at its time-averaged price: the variance of the average of
    a Brownian motion over the bin is sigma^2 / 3 (from memory), so the sd is P v sigma / sqrt 3."""
    assert 40.0 * 1_000.0 * 0.01 / math.sqrt(3.0) == pytest.approx(
        timing_cost_sd([1_000.0], [0.01], 40.0)
    )


def test_the_status_states_cost_risk_and_sd_apart() -> None:
    """The first status's expected cost is the plan's spread + impact plus its own permanent
    impact, the risk penalty is the objective's risk terms, and the sd the schedule's timing
    risk -- for the same problem solved outside the engine."""
    engine = Engine()
    recorder = Recorder(engine)
    recorder.feed(
        order("A", "X_ZEPH", "buy", 50_000, _at(0), _at(390), ts=_at(-30), arrival_price=20.0)
    )
    recorder.feed(tick(_at(0)))
    status = [m for m in recorder.outputs if isinstance(m, StatusMessage)][-1]
    profile = default_profile("X_ZEPH")
    today = forecast(profile, {})
    problem = build_problem(
        quantity=50_000.0,
        first_bin=0,
        end_bin=78,
        forecast=today,
        preferences=preferences(None),
        max_participation=None,
        price=20.0,
        reference_quantity=50_000.0,
    )
    schedule = solve(problem)
    terms = cost_breakdown(problem, schedule.trades)
    sigma_day = math.sqrt(float(np.dot(today.volatility, today.volatility)))
    permanent = own_permanent_impact(
        schedule.trades,
        daily_volatility=sigma_day,
        price=20.0,
        average_daily_volume=profile.average_daily_volume,
    )
    expected = terms["fixed_cost"] + terms["temporary_impact"] + permanent
    assert expected == pytest.approx(status.expected_cost, rel=1e-6)
    assert terms["inventory_penalty"] + terms["terminal_penalty"] == pytest.approx(
        status.risk_penalty, rel=1e-6
    )
    sd = timing_cost_sd(schedule.trades, today.volatility, 20.0)
    assert sd == pytest.approx(status.cost_sd, rel=1e-6)
    assert status.cost_sd_bps == pytest.approx(sd / (50_000 * 20.0) * 1e4, rel=1e-6)

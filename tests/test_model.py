"""From an order and liquidity to the canonical problem, and order plans."""

from __future__ import annotations

import math
from datetime import datetime

import numpy as np
import pytest

from tracker import solve
from tracker.core.forecast import forecast
from tracker.core.formulation import (
    IMPACT_LAWS,
    OrderPlan,
    build_problem,
    plan_order,
    preferences,
)
from tracker.core.profiles import Profile, default_profile
from tracker.core.session import Session
from tracker.errors import InputError

SESSION = Session()
N = SESSION.n_bins
PRICE = 50.0
OPEN = datetime.fromisoformat("2026-03-02T09:30:00-05:00")
CLOSE = datetime.fromisoformat("2026-03-02T16:00:00-05:00")


def flat_profile(
    symbol: str = "FLAT",
    *,
    adv: float = 1_000_000.0,
    spread: float = 0.02,
    daily_volatility: float = 0.02,
) -> Profile:
    """Invented flat liquidity: equal volume, spread and volatility in every bin."""
    return Profile(
        symbol=symbol,
        session=SESSION,
        volume_share=np.full(N, 1.0 / N),
        spread=np.full(N, spread),
        volatility=np.full(N, daily_volatility / math.sqrt(N)),
        average_daily_volume=adv,
    )


def _problem(profile: Profile, quantity: float = 50_000.0, **prefs: object):  # type: ignore[no-untyped-def]
    return build_problem(
        quantity=quantity,
        first_bin=0,
        end_bin=N,
        forecast=forecast(profile, {}),
        preferences=preferences("low", prefs),
        max_participation=None,
        price=PRICE,
    )


def test_fixed_cost_is_half_spread_plus_fees() -> None:
    """h_n is half the bin's spread plus the fee in bps of price."""
    problem = _problem(default_profile("X_ZEPH"), fee_bps=1.0)
    expected = default_profile("X_ZEPH").spread * 0.5 + 1e-4 * PRICE
    np.testing.assert_allclose(expected, problem.fixed_cost, rtol=1e-12)


def test_square_root_law_cost() -> None:
    """Trading v shares costs Y sigma_D P sqrt(v / V_D) per share on flat liquidity."""
    # Toth et al. (2011), Phys. Rev. X 1, 021006: impact I(Q) = Y sigma_D sqrt(Q / V_D) for a
    # metaorder of Q shares; a whole-day order at constant participation spreads Q over the bins.
    profile = flat_profile(daily_volatility=0.02)
    problem = _problem(profile, impact_law="sqrt")
    per_bin = 100_000.0 / N
    cost = float(np.sum(problem.temporary_impact * per_bin**1.5))
    expected = 0.5 * 0.02 * PRICE * math.sqrt(100_000.0 / 1_000_000.0) * 100_000.0
    assert expected == pytest.approx(cost, rel=1e-12)


def test_power_law_exponent_is_three_fifths() -> None:
    """The power law uses beta = 3/5 (Almgren, Thum, Hauptmann and Li 2005)."""
    assert 0.6 == _problem(default_profile("X_ZEPH"), impact_law="power").impact_exponent


def test_caps_are_participation_times_forecast_volume() -> None:
    """u_n = max_participation x V_n."""
    profile = default_profile("X_ZEPH")
    problem = build_problem(
        quantity=1.0,
        first_bin=10,
        end_bin=20,
        forecast=forecast(profile, {}),
        preferences=preferences(),
        max_participation=0.1,
        price=PRICE,
    )
    np.testing.assert_allclose(0.1 * profile.expected_volume[10:20], problem.cap_array)


def test_mid_bin_start_scales_first_bin_volume() -> None:
    """An order with 40 % of its first bin ahead gets 40 % of that bin's cap."""
    profile = default_profile("X_ZEPH")
    problem = build_problem(
        quantity=1.0,
        first_bin=5,
        end_bin=10,
        forecast=forecast(profile, {}),
        preferences=preferences(),
        max_participation=0.2,
        price=PRICE,
        first_fraction=0.4,
    )
    assert 0.2 * 0.4 * profile.expected_volume[5] == pytest.approx(problem.cap_array[0])


def test_the_last_bin_s_cap_can_be_kept_in_reserve() -> None:
    """last_bin_cap = 0.5 halves the horizon's last cap and leaves the others as they are."""
    profile = default_profile("X_ZEPH")
    problem = build_problem(
        quantity=1.0,
        first_bin=70,
        end_bin=78,
        forecast=forecast(profile, {}),
        preferences=preferences(),
        max_participation=0.2,
        price=PRICE,
        last_bin_cap=0.5,
    )
    expected = 0.2 * profile.expected_volume[70:78]
    expected[-1] *= 0.5
    np.testing.assert_allclose(expected, problem.cap_array)


@pytest.mark.parametrize(
    "bad", [0.0, -0.5, 1.5, math.nan], ids=["zero", "negative", "above-one", "nan"]
)
def test_a_last_bin_cap_outside_zero_to_one_is_refused_by_name(bad: float) -> None:
    """last_bin_cap outside (0, 1] raises an InputError naming the field."""
    with pytest.raises(InputError, match="in \\(0, 1\\]") as caught:
        build_problem(
            quantity=1.0,
            first_bin=70,
            end_bin=78,
            forecast=forecast(default_profile("X_ZEPH"), {}),
            preferences=preferences(),
            max_participation=0.2,
            price=PRICE,
            last_bin_cap=bad,
        )
    assert "last_bin_cap" == caught.value.field


def test_linear_law_on_flat_liquidity_is_almgren_chriss() -> None:
    """Linear impact, flat liquidity, no spread: the plan is x_j = X sinh(k(N-j)) / sinh(kN)."""
    # Almgren and Chriss (2000), J. Risk 3(2): discrete optimal trajectory with
    # 2 (cosh(kappa tau) - 1) = tau^2 lambda sigma^2 / eta~; here per bin, c_n / k_n.
    profile = flat_profile(spread=0.0)
    problem = _problem(profile, 200_000.0, impact_law="linear", risk_aversion=300.0)
    ratio = float(problem.inventory_penalty[0] / problem.temporary_impact[0])
    kappa = math.acosh(1.0 + ratio / 2.0)
    j = np.arange(N + 1)
    expected = 200_000.0 * np.sinh(kappa * (N - j)) / math.sinh(kappa * N)
    np.testing.assert_allclose(expected, solve(problem).trajectory, rtol=1e-6, atol=1e-6)


def _first_last_half_hour(profile: Profile, urgency: str) -> tuple[float, float]:
    plan = plan_order(
        symbol=profile.symbol,
        side="buy",
        quantity=50_000,
        start=OPEN,
        end=CLOSE,
        liquidity=profile,
        preferences=preferences(urgency),
        max_participation=0.25,
        arrival_price=PRICE,
    )
    trades = np.array([b.quantity for b in plan.bins], dtype=float)
    assert plan.schedule.status == "optimal"
    assert not np.isclose(plan.schedule.trades, plan.problem.cap_array).any()  # not at its cap
    return trades[:6].sum() / trades.sum(), trades[-6:].sum() / trades.sum()


def test_u_shaped_liquidity_moves_low_urgency_trading_from_the_open_to_the_close() -> None:
    """Low urgency on U-shaped volume, widest spreads at the open: less first, more last 30 min."""
    # Common practice: schedules avoid the wide, volatile open and lean on the closing volume.
    u_first, u_last = _first_last_half_hour(default_profile("U"), "low")
    f_first, f_last = _first_last_half_hour(flat_profile("U"), "low")
    assert (u_first < f_first, u_last > f_last) == (True, True)


def _shape(urgency: str) -> np.ndarray:
    profile = default_profile("X_ZEPH")
    plan = plan_order(
        symbol="X_ZEPH",
        side="buy",
        quantity=50_000,
        start=OPEN,
        end=CLOSE,
        liquidity=profile,
        preferences=preferences(urgency),
        max_participation=None,
        arrival_price=PRICE,
    )
    trades = np.array([b.quantity for b in plan.bins], dtype=float)
    return trades / trades.sum()


def test_low_urgency_follows_the_volume_curve() -> None:
    """Low urgency stays close to the volume curve: total variation distance below 0.12."""
    distance = 0.5 * np.abs(_shape("low") - default_profile("X_ZEPH").volume_share).sum()
    assert distance < 0.12


def test_high_urgency_front_loads() -> None:
    """High urgency does more than 65 % of the order in the first half of the day."""
    assert _shape("high")[: N // 2].sum() > 0.65


def test_medium_urgency_sits_between() -> None:
    """The first hour's share rises from low to medium to high urgency."""
    first_hour = [_shape(u)[:12].sum() for u in ("low", "medium", "high")]
    assert sorted(first_hour) == first_hour


def test_sell_is_never_turned_into_buying() -> None:
    """A sell's plan only sells: every bin >= 0 shares, inventory falls to 0, sums to the order."""
    plan = plan_order(
        symbol="X_ZEPH",
        side="sell",
        quantity=123_457,
        start=OPEN,
        end=CLOSE,
        liquidity=default_profile("X_ZEPH"),
        preferences=preferences("high"),
        max_participation=0.3,
        arrival_price=PRICE,
    )
    quantities = [b.quantity for b in plan.bins]
    expected = (True, 0, 123_457)
    assert expected == (min(quantities) >= 0, plan.bins[-1].inventory_after, sum(quantities))


def test_buy_and_sell_cost_the_same() -> None:
    """The problem is side-free: a buy and a sell of the same size have the same expected cost."""
    costs = [
        plan_order(
            symbol="X_ZEPH",
            side=side,
            quantity=80_000,
            start=OPEN,
            end=CLOSE,
            liquidity=default_profile("X_ZEPH"),
            preferences=preferences(),
            max_participation=None,
            arrival_price=PRICE,
        ).cost["total"]
        for side in ("buy", "sell")
    ]
    assert costs[0] == costs[1]


def test_cost_in_bps_of_arrival_value() -> None:
    """bps = currency cost / (quantity x arrival price) x 10,000."""
    plan = plan_order(
        symbol="X_ZEPH",
        side="buy",
        quantity=80_000,
        start=OPEN,
        end=CLOSE,
        liquidity=default_profile("X_ZEPH"),
        preferences=preferences(),
        max_participation=None,
        arrival_price=PRICE,
    )
    expected = plan.cost["total"] / (80_000 * PRICE) * 1e4
    assert expected == pytest.approx(plan.cost_bps["total"])


def test_cap_too_tight_reports_shortfall() -> None:
    """An order the caps cannot complete trades at the caps and reports what is left."""
    plan = plan_order(
        symbol="X_ZEPH",
        side="buy",
        quantity=900_000,
        start=OPEN,
        end=CLOSE,
        liquidity=default_profile("X_ZEPH"),
        preferences=preferences(),
        max_participation=0.1,
        arrival_price=PRICE,
    )
    expected = ("capped_shortfall", pytest.approx(800_000, rel=1e-6))
    assert expected == (plan.schedule.status, plan.schedule.shortfall)


@pytest.mark.parametrize(
    ("urgency", "overrides", "field"),
    [
        ("urgent", None, "urgency"),
        (None, {"colour": 1}, "preferences.colour"),
        (None, {"risk_aversion": -1.0}, "preferences.risk_aversion"),
        (None, {"penalty_exponent": 5.0}, "preferences.penalty_exponent"),
        (None, {"impact_law": "cubic"}, "preferences.impact_law"),
        (None, {"completion_penalty": "soon"}, "preferences.completion_penalty"),
    ],
    ids=["urgency", "unknown-key", "negative-aversion", "exponent", "law", "completion"],
)
def test_bad_preferences_name_the_field(
    urgency: str | None, overrides: dict[str, object] | None, field: str
) -> None:
    """A bad preference raises InputError naming the field."""
    with pytest.raises(InputError) as info:
        preferences(urgency, overrides)
    assert field == info.value.field


def test_explicit_value_overrides_the_preset() -> None:
    """An explicit risk_aversion wins over the preset's."""
    assert 7.0 == preferences("high", {"risk_aversion": 7.0}).risk_aversion


def test_bad_bin_range_is_rejected() -> None:
    """end_bin beyond the session raises InputError."""
    with pytest.raises(InputError):
        build_problem(
            quantity=1.0,
            first_bin=0,
            end_bin=N + 1,
            forecast=forecast(default_profile("X_ZEPH"), {}),
            preferences=preferences(),
            max_participation=None,
            price=PRICE,
        )


def test_every_impact_law_builds_a_solvable_problem() -> None:
    """Each impact law gives a problem the solver completes."""
    statuses = {
        name: solve(_problem(default_profile("X_ZEPH"), impact_law=name)).status
        for name in IMPACT_LAWS
    }
    assert {name: "optimal" for name in IMPACT_LAWS} == statuses


def _plan(urgency: str = "medium", cap: float | None = 0.2) -> OrderPlan:
    return plan_order(
        symbol="X_ZEPH",
        side="buy",
        quantity=120_000,
        start=OPEN,
        end=CLOSE,
        liquidity=default_profile("X_ZEPH"),
        preferences=preferences(urgency),
        max_participation=cap,
        arrival_price=PRICE,
    )


def test_risk_term_is_risk_aversion_times_the_variance_of_the_cost() -> None:
    """With p = 2 the risk term is lambda x Var[cost] (Almgren and Chriss 2000: E + lambda V)."""
    plan = _plan()
    adv = default_profile("X_ZEPH").average_daily_volume
    lam = preferences("medium").risk_aversion / (PRICE * adv)
    assert plan.cost["risk"] == pytest.approx(lam * plan.cost_std**2, rel=1e-9)


def test_standard_deviation_by_hand_on_two_bins() -> None:
    """Two flat bins, 1,000 then 0 shares left: sd = sigma P x 1,000 (arithmetic in the test)."""
    session = Session(start="09:30", end="09:40", bin_minutes=5)  # type: ignore[arg-type]
    profile = Profile(
        symbol="TWO",
        session=session,
        volume_share=np.full(2, 0.5),
        spread=np.full(2, 0.02),
        volatility=np.full(2, 0.01),
        average_daily_volume=1_000_000.0,
    )
    plan = plan_order(
        symbol="TWO",
        side="sell",
        quantity=2_000,
        start=datetime.fromisoformat("2026-03-02T09:30:00-05:00"),
        end=datetime.fromisoformat("2026-03-02T09:40:00-05:00"),
        liquidity=profile,
        preferences=preferences("low"),
        max_participation=None,
        arrival_price=PRICE,
    )
    # Equal bins and a small risk aversion: 1,000 shares a bin, so q_1 = 1,000 (after bin 0)
    # and q_2 = 0. Var = (0.01 x 50)^2 x 1,000^2 + 0 = 250,000; sd = 500.
    left = plan.bins[0].inventory_after
    assert left == pytest.approx(1_000, abs=5)
    assert plan.cost_std == pytest.approx(0.01 * PRICE * float(plan.schedule.trajectory[1]))


def test_expected_cost_is_spread_plus_impact_without_the_risk_term() -> None:
    """Expected cost = spread + impact (the engine's status meaning); the total adds risk."""
    plan = _plan()
    expected = (
        plan.cost["spread"] + plan.cost["impact"],
        plan.cost["expected"] + plan.cost["risk"] + plan.cost["completion"],
    )
    assert expected == (plan.cost["expected"], plan.cost["total"])


def test_milestones_are_the_bins_where_the_plan_crosses_each_quarter() -> None:
    """25/50/75 % are the ends of the first bins whose cumulative planned shares reach them."""
    plan = _plan()
    done = np.cumsum([b.quantity for b in plan.bins])
    expected = {
        f: plan.bins[int(np.argmax(done >= f * 120_000 - 0.5))].end for f in (0.25, 0.5, 0.75)
    }
    assert expected == plan.milestones()


def test_volume_share_and_participation() -> None:
    """Quantity over window volume; peak = the largest bin share; the cap bounds the peak."""
    plan = _plan()
    volume = sum(b.forecast_volume for b in plan.bins)
    expected = (pytest.approx(120_000 / volume), True)
    actual = (plan.volume_share, plan.peak_participation <= 0.2 + 1e-4)
    assert expected == actual


@pytest.mark.parametrize("cap", [None, 0.2], ids=["uncapped", "capped-at-20-percent"])
def test_efficient_frontier_more_urgency_costs_more_and_risks_less(cap: float | None) -> None:
    """low < medium < high: expected cost rises, its sd falls (Almgren and Chriss 2000, sec. 3)."""
    plans = [_plan(u, cap) for u in ("low", "medium", "high")]
    costs = [p.cost["expected"] for p in plans]
    stds = [p.cost_std for p in plans]
    assert (costs == sorted(costs), stds == sorted(stds, reverse=True)) == (True, True)

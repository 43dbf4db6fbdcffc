"""Properties every schedule from the solver must have, on generated problems (hypothesis).

The generated problems are invented and scale-free: costs are set relative to a cost per share
``UNIT`` and to the even (TWAP) trade size, so that every term matters for some examples whatever
the quantity. Exponents cover the whole accepted range (beta in (0, 2], p in [1, 4]); permanent
impact stays below the convexity bound of :func:`tracker.check_convex` (the non-convex side is
tested in test_solve_references.py).
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
import numpy.typing as npt
import pytest
from hypothesis import HealthCheck, assume, given, settings
from hypothesis import strategies as st
from test_solve_references import cvxpy_reference, reference_objective

from tracker import Problem, Schedule, objective_value, solve, solve_batch

FloatArray = npt.NDArray[np.float64]

UNIT = 0.02  # currency per share: a typical half spread (invented scale)

PROPERTY_SETTINGS = settings(
    max_examples=60,
    deadline=None,
    database=None,
    suppress_health_check=[HealthCheck.too_slow],
)


def _per_bin(draw: st.DrawFn, bins: int, low: float, high: float, *, zero: bool) -> FloatArray:
    """A positive scale times per-bin factors in [low, high] (log-uniform), sometimes constant."""
    values = st.floats(math.log(low), math.log(high)).map(math.exp)
    if zero:
        values = st.one_of(st.just(0.0), values)
    if draw(st.booleans()):
        return np.full(bins, draw(values))
    return np.array(draw(st.lists(values, min_size=bins, max_size=bins)))


@st.composite
def problems(draw: st.DrawFn) -> Problem:
    """A convex execution problem with every field exercised (invented values)."""
    bins = draw(st.integers(1, 40))
    quantity = draw(st.one_of(st.just(0.0), st.floats(1.0, 1e7)))
    even = max(quantity / bins, 1.0)  # the TWAP trade size
    beta = draw(st.sampled_from([0.25, 0.5, 0.6, 1.0, 1.0, 1.5, 2.0]))
    p = draw(st.sampled_from([1.0, 1.5, 2.0, 2.0, 3.0, 4.0]))
    fixed = UNIT * _per_bin(draw, bins, 1e-2, 2.0, zero=True)
    # k v^(1 + beta) at the TWAP size costs between 0.001 and 10 UNIT per share.
    impact = UNIT * _per_bin(draw, bins, 1e-3, 10.0, zero=False) / even**beta
    # c q^p at q = Q costs between 0 and 10 UNIT per share of a TWAP trade.
    risk = UNIT * even * _per_bin(draw, bins, 1e-3, 10.0, zero=True) / max(quantity, 1.0) ** p
    terminal: float | str = draw(
        st.one_of(
            st.just("force"),
            st.floats(0.0, 1e3).map(lambda a: UNIT * a * even / max(quantity, 1.0) ** p),
        )
    )
    caps: list[float | None] | None = None
    if draw(st.booleans()):
        factors = st.one_of(st.none(), st.just(0.0), st.floats(0.1, 5.0))
        caps = [
            None if f is None else f * even
            for f in draw(st.lists(factors, min_size=bins, max_size=bins))
        ]
    permanent = 0.0
    if draw(st.booleans()) and beta <= 1.0 and quantity > 0.0:
        # Largest convex b per bin (check_convex): k (1 + beta) beta m^(beta - 1), m = min(cap, Q).
        reach = np.full(bins, quantity)
        if caps is not None:
            reach = np.minimum(reach, [math.inf if u is None else u for u in caps])
        trading = reach > 0.0
        assume(trading.any())
        bound = impact[trading] * (1.0 + beta) * beta * reach[trading] ** (beta - 1.0)
        permanent = draw(st.floats(0.0, 0.99)) * float(bound.min())
    return Problem(
        quantity=quantity,
        bins=bins,
        fixed_cost=fixed,
        temporary_impact=impact,
        impact_exponent=beta,
        permanent_impact=permanent,
        inventory_penalty=risk,
        penalty_exponent=p,
        terminal_penalty=terminal,
        caps=caps,
    )


def tolerance(problem: Problem) -> float:
    """Constraint tolerance in shares: 1e-9 of the quantity (the issue's figure)."""
    return 1e-9 * max(problem.quantity, 1.0)


def twap_feasible(problem: Problem) -> bool:
    """Whether trading Q / N in every bin respects every cap."""
    return bool(np.all(problem.cap_array >= problem.quantity / problem.bins))


@PROPERTY_SETTINGS
@given(problems())
def test_trajectory_starts_at_the_quantity(problem: Problem) -> None:
    """trajectory[0] is exactly the quantity."""
    assert problem.quantity == solve(problem).trajectory[0]


@PROPERTY_SETTINGS
@given(problems())
def test_inventory_never_increases(problem: Problem) -> None:
    """Inventory is non-increasing: no trade buys back."""
    schedule = solve(problem)
    assert np.all(np.diff(schedule.trajectory) <= tolerance(problem))
    assert np.all(schedule.trades >= -tolerance(problem))


@PROPERTY_SETTINGS
@given(problems())
def test_inventory_never_goes_negative(problem: Problem) -> None:
    """Inventory never goes below zero: the order is never overshot."""
    assert np.all(solve(problem).trajectory >= -tolerance(problem))


@PROPERTY_SETTINGS
@given(problems())
def test_trades_follow_the_trajectory(problem: Problem) -> None:
    """trades[n] = trajectory[n] - trajectory[n + 1]."""
    schedule = solve(problem)
    np.testing.assert_allclose(
        schedule.trades, -np.diff(schedule.trajectory), rtol=0.0, atol=tolerance(problem)
    )


@PROPERTY_SETTINGS
@given(problems())
def test_caps_hold(problem: Problem) -> None:
    """No bin trades more than its cap."""
    assert np.all(solve(problem).trades <= problem.cap_array + tolerance(problem))


@PROPERTY_SETTINGS
@given(problems())
def test_forced_completion_when_caps_allow(problem: Problem) -> None:
    """With completion forced and caps adding up to the quantity or more, nothing is left."""
    assume(problem.forced and float(problem.cap_array.sum()) >= problem.quantity)
    assert abs(solve(problem).shortfall) <= tolerance(problem)


@PROPERTY_SETTINGS
@given(problems())
def test_shortfall_status_when_caps_fall_short(problem: Problem) -> None:
    """Status is "capped_shortfall" exactly when the caps add up to less than the quantity."""
    short = float(problem.cap_array.sum()) < problem.quantity
    expected = "capped_shortfall" if short else "optimal"
    assert expected == solve(problem).status


@PROPERTY_SETTINGS
@given(problems())
def test_never_worse_than_twap(problem: Problem) -> None:
    """The objective is never above the even (TWAP) schedule's, when TWAP is feasible."""
    assume(twap_feasible(problem))
    even = objective_value(problem, np.full(problem.bins, problem.quantity / problem.bins))
    actual = solve(problem).objective
    assert actual <= even + 1e-9 * abs(even) + 1e-12


@PROPERTY_SETTINGS
@given(problems())
def test_cost_breakdown_sums_to_objective(problem: Problem) -> None:
    """The cost terms add up to the objective."""
    schedule = solve(problem)
    assert math.fsum(schedule.cost.values()) == pytest.approx(schedule.objective, rel=1e-12)


@PROPERTY_SETTINGS
@given(problems())
def test_objective_is_the_value_of_the_trades(problem: Problem) -> None:
    """The reported objective is objective_value of the reported trades."""
    schedule = solve(problem)
    expected = objective_value(problem, schedule.trades)
    assert expected == pytest.approx(schedule.objective, rel=1e-12, abs=1e-12)


@PROPERTY_SETTINGS
@given(problems(), st.data())
def test_objective_value_follows_the_formula(problem: Problem, data: st.DataObject) -> None:
    """objective_value of any schedule is the canonical formula evaluated term by term."""
    weights = np.array(data.draw(st.lists(st.floats(0.0, 1.0), min_size=problem.bins,
                                          max_size=problem.bins)))  # fmt: skip
    assume(weights.sum() > 0.0)
    # The formula does not price forced completion, so such a schedule completes the order.
    done = 1.0 if problem.forced else data.draw(st.floats(0.0, 1.0))
    trades = problem.quantity * done * weights / weights.sum()
    # The definition (tracker/core/problem.py) written out with plain numpy in
    # test_solve_references.
    expected = reference_objective(problem, trades)
    actual = objective_value(problem, trades)
    assert expected == pytest.approx(actual, rel=1e-10, abs=1e-9)


def _same(expected: Schedule, actual: Schedule, problem: Problem) -> dict[str, Any]:
    """The fields of two schedules that differ beyond rounding (empty when they agree)."""
    diff: dict[str, Any] = {}
    for name in ("status", "method"):
        if getattr(expected, name) != getattr(actual, name):
            diff[name] = (getattr(expected, name), getattr(actual, name))
    if not np.allclose(expected.trajectory, actual.trajectory, rtol=0.0, atol=tolerance(problem)):
        diff["trajectory"] = (expected.trajectory, actual.trajectory)
    if expected.objective != pytest.approx(actual.objective, rel=1e-9, abs=1e-12):
        diff["objective"] = (expected.objective, actual.objective)
    return diff


@settings(max_examples=25, deadline=None, database=None)
@given(st.lists(problems(), min_size=2, max_size=8))
def test_solve_batch_equals_solve_one_by_one(batch: list[Problem]) -> None:
    """solve_batch gives the same schedules as solve on each problem."""
    together = solve_batch(batch)
    alone = [solve(problem) for problem in batch]
    expected: list[dict[str, Any]] = [{} for _ in batch]
    assert expected == [_same(a, t, p) for a, t, p in zip(alone, together, batch, strict=True)]


# Cases the property tests found, kept as fixed examples. The expected values are worked by hand
# from the optimality (KKT) conditions of the canonical problem.

IDLE_BIN_CASES = [
    # Q = 1, k = 0.02, beta = 0.25: bins 1-4 at v = 1/4 have marginal cost 1.25 k v^0.25 = 0.0177
    # < h_0 = 0.02, so bin 0 stays idle and the objective is 4 k (1/4)^1.25 = 0.02 / 4^0.25.
    pytest.param(1.0, 0.02, 0.02 / 4**0.25, id="Q=1"),
    # Q = 1e5, k = 1e-3: marginal cost 1.25e-3 * 25000^0.25 = 0.0157 < 0.02;
    # objective 4 k 25000^1.25.
    pytest.param(1e5, 1e-3, 4e-3 * 25_000**1.25, id="Q=1e5"),
]


@pytest.mark.parametrize(("quantity", "impact", "expected"), IDLE_BIN_CASES)
def test_low_impact_exponent_with_an_idle_bin(
    quantity: float, impact: float, expected: float
) -> None:
    """beta = 0.25 with one bin too dear to trade in converges to the hand-worked optimum."""
    problem = Problem(
        quantity=quantity,
        bins=5,
        fixed_cost=[0.02, 0.0, 0.0, 0.0, 0.0],
        temporary_impact=impact,
        impact_exponent=0.25,
    )
    assert expected == pytest.approx(solve(problem).objective, rel=1e-9)


@pytest.mark.parametrize("beta", [0.25, 1.5], ids=["beta=0.25", "beta=1.5"])
def test_zero_cap_in_the_last_bin_keeps_the_objective_finite(beta: float) -> None:
    """A forced order whose last bin may not trade gets a finite objective and no trade there."""
    problem = Problem(
        quantity=1.0,
        bins=10,
        temporary_impact=0.02,
        impact_exponent=beta,
        penalty_exponent=1.0,
        caps=[None] * 9 + [0.0],
    )
    schedule = solve(problem)
    # Even over the nine tradeable bins is optimal (identical convex costs): 9 k (1/9)^(1 + beta).
    assert 9 * 0.02 * (1 / 9) ** (1 + beta) == pytest.approx(schedule.objective, rel=1e-9)
    assert 0.0 == schedule.trades[-1]


@settings(max_examples=40, deadline=None, database=None)
@given(problems())
def test_objective_matches_cvxpy_on_generated_problems(problem: Problem) -> None:
    """On generated problems the objective is never worse than cvxpy + Clarabel's (when sure)."""
    # cvxpy's DCP rules admit permanent impact only with linear impact (see test_solve_references).
    assume(problem.permanent_impact == 0.0 or problem.impact_exponent == 1.0)
    assume(problem.quantity > 0.0 and float(problem.cap_array.sum()) > 0.0)
    scale = reference_objective(problem, np.full(problem.bins, problem.quantity / problem.bins))
    assume(scale > 0.0)
    reference = cvxpy_reference(problem)
    assume(reference.status == "optimal")
    actual = solve(problem).objective
    # Never worse than the reference (1e-7 relative, plus 1e-9 of the even schedule's cost for
    # optima near zero). Better is allowed: on near-degenerate problems Clarabel's "optimal" can be
    # 1e-8 of the scale above the optimum (e.g. a zero terminal penalty: trade nothing).
    tol = 1e-7 * abs(reference.objective) + 1e-9 * scale
    assert actual <= reference.objective + tol


@pytest.mark.parametrize("beta", [1.0, 1.5, 2.0], ids=["beta=1", "beta=1.5", "beta=2"])
def test_nothing_to_gain_trades_nothing(beta: float) -> None:
    """With no risk and no terminal penalty every trade only costs, so none is made."""
    problem = Problem(
        quantity=1.0,
        bins=5,
        fixed_cost=[0.0, 0.0, 0.0, 0.02, 0.0],
        temporary_impact=0.02,
        impact_exponent=beta,
        penalty_exponent=1.0,
        terminal_penalty=0.0,
    )
    # Every term is >= 0 and zero trades make them all 0 (by hand from the formula). Near v = 0
    # the objective is flat: trading d in a bin costs k d^(1 + beta), so an objective accurate to
    # 1e-9 of the even schedule's cost S pins each trade only to (1e-9 S / k)^(1 / (1 + beta)).
    schedule = solve(problem)
    scale = objective_value(problem, np.full(5, 0.2))
    slack = 5 * (1e-9 * scale / 0.02) ** (1.0 / (1.0 + beta))
    assert 0.0 == pytest.approx(schedule.objective, abs=1e-9 * scale)
    assert 1.0 == pytest.approx(schedule.shortfall, abs=slack)


# Batches found by test_solve_batch_equals_solve_one_by_one when a batch shared one vectorised
# Newton system, where a problem's schedule depended on its neighbours (degenerate problems: idle
# bins, beta = 0.25, so last bits decide the path). Each problem now runs on its own; these stay
# as regression cases.
BATCH_CASES = {
    # The first problem took 18 iterations alone and 22 next to the second (trajectories 2e-8 of
    # Q apart): the batch's Newton system fell back to another LAPACK routine for everyone.
    "newton-fallback": [
        {
            "quantity": 1.0,
            "bins": 15,
            "temporary_impact": [0.02] * 14 + [0.00036631277777468356],
            "impact_exponent": 0.25,
            "penalty_exponent": 1.0,
        },
        {
            "quantity": 1.0,
            "bins": 25,
            "fixed_cost": [0.0] * 23 + [0.02, 0.0],
            "temporary_impact": [0.02] * 21
            + [0.18975471672717054, 0.000995741367357279, 0.02, 0.007357588823428847],
            "impact_exponent": 1.5,
            "penalty_exponent": 1.0,
        },
    ],
    # The second problem took 23 iterations alone and 25 behind the first (1.5e-5 of Q apart):
    # its starting point came from a cumulative sum over the whole batch minus the first
    # problem's total, which rounds differently from its own cumulative sum.
    "start-point": [
        {
            "quantity": 1.0,
            "bins": 31,
            "temporary_impact": 0.02,
            "impact_exponent": 0.25,
            "penalty_exponent": 1.5,
        },
        {
            "quantity": 1.0,
            "bins": 31,
            "fixed_cost": [0.0] * 29 + [0.02, 0.0],
            "temporary_impact": [0.02] * 28 + [0.000995741367357279, 0.02, 0.000995741367357279],
            "impact_exponent": 0.25,
            "penalty_exponent": 1.5,
            "terminal_penalty": 0.02,
        },
    ],
}


@pytest.mark.parametrize("fields", list(BATCH_CASES.values()), ids=list(BATCH_CASES))
def test_batch_neighbours_do_not_change_a_schedule(fields: list[dict[str, Any]]) -> None:
    """Each problem of the batch gets the same trajectory as when solved alone."""
    batch = [Problem(**problem) for problem in fields]
    for alone, together in zip([solve(p) for p in batch], solve_batch(batch), strict=True):
        np.testing.assert_allclose(together.trajectory, alone.trajectory, rtol=0.0, atol=1e-12)

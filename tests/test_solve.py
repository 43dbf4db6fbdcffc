"""Behaviour of the solver's paths: closed forms, caps, shortfall, convexity, batches.

The numbers themselves are checked against outside references in test_solve_references.py.
"""

import math
import sys
from typing import Any

import numpy as np
import pytest
from scipy.linalg import solve_banded

from tracker import (
    CAPPED_SHORTFALL,
    OPTIMAL,
    Problem,
    ProblemError,
    SolveError,
    solve,
    solve_batch,
)
from tracker.core import _kernel, kernel, kernel_numpy

# The compiled kernel and its numpy twin: the checks of the kernel itself run on both.
KERNELS = {"compiled": _kernel, "numpy": kernel_numpy}


def test_nothing_to_do() -> None:
    """A zero quantity gives zero trades and zero cost."""
    schedule = solve(Problem(quantity=0, bins=5, fixed_cost=0.01))
    assert (schedule.status, schedule.objective, schedule.trades.tolist()) == (
        OPTIMAL,
        0.0,
        [0.0] * 5,
    )


def test_forced_with_short_caps_trades_every_cap() -> None:
    """When the caps cannot complete a forced order, it trades the caps and reports the rest."""
    schedule = solve(Problem(quantity=1000, bins=3, caps=[100, 200, 300]))
    assert (schedule.status, schedule.trades.tolist(), schedule.shortfall) == (
        CAPPED_SHORTFALL,
        [100.0, 200.0, 300.0],
        400.0,
    )


def test_finite_terminal_with_short_caps_reports_shortfall() -> None:
    """Caps that cannot complete the order give capped_shortfall under a finite penalty too."""
    problem = Problem(quantity=1000, bins=3, temporary_impact=1e-3, caps=300, terminal_penalty=1.0)
    schedule = solve(problem)
    assert schedule.status == CAPPED_SHORTFALL
    assert schedule.shortfall == pytest.approx(100.0, rel=1e-6)


def test_zero_cap_bins_do_not_trade() -> None:
    """A bin with a zero cap trades nothing; the others absorb the quantity."""
    problem = Problem(
        quantity=1000,
        bins=5,
        temporary_impact=1e-3,
        impact_exponent=0.5,
        inventory_penalty=1e-4,
        caps=[500, 0, 500, 0, 500],
    )
    schedule = solve(problem)
    assert (schedule.trades[1], schedule.trades[3]) == (0.0, 0.0)
    assert pytest.approx(schedule.trades.sum(), rel=1e-12) == 1000.0


def test_single_tradeable_bin_takes_everything() -> None:
    """With one bin able to trade and completion forced, that bin trades the whole order."""
    schedule = solve(Problem(quantity=700, bins=3, impact_exponent=0.5, caps=[0, 1000, 0]))
    assert schedule.trades.tolist() == [0.0, 700.0, 0.0]


def test_linear_quadratic_uses_riccati() -> None:
    """Linear impact and quadratic risk with no binding cap take the exact path."""
    problem = Problem(quantity=1e5, bins=10, temporary_impact=1e-4, inventory_penalty=1e-7)
    assert solve(problem).method == "riccati"


def test_binding_cap_leaves_riccati() -> None:
    """When the closed form would break a cap, the general path answers and the cap holds."""
    problem = Problem(
        quantity=1e5, bins=10, temporary_impact=1e-4, inventory_penalty=1e-5, caps=15_000
    )
    schedule = solve(problem)
    assert schedule.method == "interior_point"
    assert schedule.trades.max() <= 15_000 * (1 + 1e-9)


def test_cost_breakdown_adds_up() -> None:
    """The cost terms add up to the objective."""
    problem = Problem(
        quantity=5e4,
        bins=12,
        fixed_cost=0.02,
        temporary_impact=1e-3,
        impact_exponent=0.5,
        permanent_impact=1e-7,
        inventory_penalty=1e-6,
        penalty_exponent=1.5,
        terminal_penalty=1e-2,
    )
    schedule = solve(problem)
    assert schedule.objective == pytest.approx(math.fsum(schedule.cost.values()), rel=1e-14)


def test_too_much_permanent_impact_is_rejected() -> None:
    """A permanent impact larger than twice the linear temporary impact makes it non-convex."""
    with pytest.raises(ProblemError, match="non-convex") as info:
        solve(Problem(quantity=1e4, bins=5, temporary_impact=1e-4, permanent_impact=3e-4))
    assert info.value.field == "permanent_impact"


def test_batch_of_mixed_sizes_matches_single_solves() -> None:
    """solve_batch gives the same schedules as solving one at a time, whatever the sizes."""
    problems = [
        Problem(
            quantity=1e4 * (i + 1),
            bins=5 + 7 * i,
            temporary_impact=1e-3,
            impact_exponent=0.5,
            inventory_penalty=1e-6,
            penalty_exponent=1.5,
            terminal_penalty="force" if i % 2 else 1e-2,
            caps=4e3 if i == 2 else None,
        )
        for i in range(4)
    ]
    batch = solve_batch(problems)
    for problem, together in zip(problems, batch, strict=True):
        alone = solve(problem)
        np.testing.assert_allclose(
            alone.trades, together.trades, rtol=1e-6, atol=1e-6 * problem.quantity
        )


def test_one_bin_matches_scipy_scalar_minimiser() -> None:
    """With one bin the problem is one-dimensional: SciPy's bounded scalar minimiser agrees."""
    from scipy.optimize import minimize_scalar

    problem = Problem(
        quantity=1e5,
        bins=1,
        fixed_cost=0.01,
        temporary_impact=1e-3,
        impact_exponent=0.5,
        inventory_penalty=1e-7,
        penalty_exponent=1.5,
        terminal_penalty=1e-3,
    )

    def cost(v: float) -> float:
        left = 1e5 - v
        return 0.01 * v + 1e-3 * v**1.5 + (1e-7 + 1e-3) * left**1.5

    # Reference: scipy.optimize.minimize_scalar (bounded Brent), an outside general-purpose solver.
    reference = minimize_scalar(cost, bounds=(0.0, 1e5), method="bounded", options={"xatol": 1e-9})
    schedule = solve(problem)
    assert schedule.trades[0] == pytest.approx(reference.x, rel=1e-6)
    assert schedule.objective == pytest.approx(reference.fun, rel=1e-10)


@pytest.mark.parametrize("bins", [400, 1000], ids=["400-bins", "1000-bins"])
def test_long_horizons_complete(bins: int) -> None:
    """Horizons of hundreds of bins solve, complete the order and respect the caps."""
    problem = Problem(
        quantity=1e5,
        bins=bins,
        fixed_cost=0.01,
        temporary_impact=1e-3,
        impact_exponent=0.5,
        inventory_penalty=1e-7,
        penalty_exponent=1.5,
        caps=3e5 / bins,
    )
    schedule = solve(problem)
    assert (OPTIMAL, 0.0) == (schedule.status, schedule.shortfall)
    assert schedule.trades.max() <= 3e5 / bins * (1 + 1e-9)


def test_iteration_limit_raises_solve_error(monkeypatch: pytest.MonkeyPatch) -> None:
    """A run that needs more Newton iterations than allowed is an error, never a partial answer."""
    monkeypatch.setattr(sys.modules["tracker.core.solve"], "_MAX_ITERATIONS", 2)
    general = Problem(
        quantity=5e4,
        bins=20,
        temporary_impact=1e-3,
        impact_exponent=0.5,
        inventory_penalty=1e-6,
        penalty_exponent=1.5,
    )
    with pytest.raises(SolveError, match=r"did not converge in 2 iterations$"):
        solve(general)
    riccati = Problem(quantity=5e4, bins=20, temporary_impact=1e-3, inventory_penalty=1e-6)
    with pytest.raises(SolveError, match=r"in 2 iterations \(problem 1 of the batch\)"):
        solve_batch([riccati, general])


@pytest.mark.parametrize("module", KERNELS.values(), ids=KERNELS.keys())
def test_kernel_rejects_vectors_of_the_wrong_kind(module: kernel.Kernel) -> None:
    """The kernel refuses integer or mismatched vectors instead of reading past them."""
    four, one = np.ones(4), np.ones(1)
    sizes, iterations = np.array([4]), np.empty(1, dtype=np.int64)

    def interior_point(caps: Any, out: Any, sizes: Any) -> None:
        module.interior_point(
            four, four, four, caps, out, sizes, iterations, one, one, one, one, one, 1e-10, 10
        )

    with pytest.raises(ValueError, match="caps must be a contiguous float64 vector"):
        interior_point(np.ones(4, dtype=np.int64), np.empty(4), sizes)
    with pytest.raises(ValueError, match="out must be a contiguous float64 vector"):
        interior_point(four, np.empty(3), sizes)
    with pytest.raises(ValueError, match="sizes must be a contiguous int64 vector"):
        interior_point(four, np.empty(4), np.array([4.0]))
    with pytest.raises(ValueError, match="not C-contiguous"):
        module.riccati(four, four[::2], four, np.empty(4), 1.0, 0.0, False, 1e4)
    frozen = np.ones(4)
    frozen.setflags(write=False)  # costs writes the clipped trades back
    with pytest.raises(ValueError, match="read-only"):
        module.costs(four, four, four, frozen, np.empty(5), 4.0, 1.0, 0.0, 2.0, 0.0, False)


@pytest.mark.parametrize("module", KERNELS.values(), ids=KERNELS.keys())
@pytest.mark.parametrize(
    "diagonal",
    [
        [4.0, 4.0, 4.0, 4.0, 4.0],  # positive definite: the L D L^T route
        [1.0, -3.0, 2.0, 0.5, -1.0],  # indefinite: the pivoting route
        [0.0, -3.0, 2.0, 0.5, -1.0],  # a zero first pivot
    ],
    ids=["positive-definite", "indefinite", "zero-pivot"],
)
def test_newton_solve_matches_scipy(diagonal: list[float], module: kernel.Kernel) -> None:
    """The kernel's tridiagonal solve agrees with SciPy's solve_banded (reference library)."""
    d = np.array(diagonal)
    e = np.array([2.0, 1.0, -1.0, 3.0])
    b = np.array([1.0, 2.0, 3.0, 4.0, 5.0])
    expected = solve_banded((1, 1), np.vstack([np.r_[0.0, e], d, np.r_[e, 0.0]]), b)
    actual = b.copy()
    module.tridiagonal(d, e, actual)
    np.testing.assert_allclose(actual, expected, rtol=1e-13, atol=1e-13)


def test_quantity_a_few_ulps_below_the_caps_is_traded_at_the_caps() -> None:
    """Forced completion with no room left (capacity = quantity up to rounding) trades every cap.

    0.55 x 400,000 is 219,999.99999999997 in binary floating point: eleven caps of 20,000 hold it
    with 3e-11 shares to spare, an interior the interior-point method cannot start from.
    """
    quantity = float(np.linspace(0.05, 1.0, 20)[10] * 400_000)
    problem = Problem(
        quantity=quantity,
        bins=11,
        fixed_cost=0.01,
        temporary_impact=2e-6,
        impact_exponent=0.5,
        inventory_penalty=1e-9,
        penalty_exponent=1.5,
        terminal_penalty="force",
        caps=20_000,
    )
    schedule = solve(problem)
    assert (OPTIMAL, "at_caps") == (schedule.status, schedule.method)
    assert quantity == pytest.approx(float(schedule.trades.sum()), rel=1e-15)
    np.testing.assert_allclose(schedule.trades, quantity / 11, rtol=1e-15)


def test_explain_solves_the_readme_example() -> None:
    """The README's example: explain() solves every (bin, inventory) problem it builds."""
    from tracker import explain

    problem = Problem(
        quantity=400_000,
        bins=78,
        fixed_cost=0.01,
        temporary_impact=2e-6,
        impact_exponent=0.5,
        inventory_penalty=1e-9,
        penalty_exponent=1.5,
        terminal_penalty="force",
        caps=20_000,
    )
    policy = explain(problem)
    assert (78, 20) == policy.trades.shape
    assert np.isfinite(policy.trades).all()
    # The grid's fractions x 400,000 meet the remaining capacity exactly at some bins: there the
    # first trade is the cap (nothing else completes the order).
    assert 20_000 == pytest.approx(float(policy.trades[67, 10]), rel=1e-12)


@pytest.mark.parametrize(
    ("beta", "p", "caps", "terminal"),
    [
        (0.5, 1.5, 20_000, "force"),
        (0.5, 2.0, 20_000, "force"),
        (1.0, 1.5, 20_000, "force"),
        (0.6, 3.0, 20_000, "force"),
        (0.5, 1.5, 5_000, "force"),
        (0.5, 1.5, 20_000, 1e-6),
        (1.0, 2.0, None, "force"),
    ],
    ids=["sqrt-1.5", "sqrt-2", "linear-1.5", "power-3", "caps-short", "soft-end", "riccati"],
)
def test_explain_family_never_fails(
    beta: float, p: float, caps: float | None, terminal: float | str
) -> None:
    """Every problem explain() builds (every bin, every grid inventory) is solved, with or
    without caps that meet the inventory exactly, forced or not."""
    from tracker import explain

    problem = Problem(
        quantity=400_000,
        bins=78,
        fixed_cost=0.01,
        temporary_impact=2e-6,
        impact_exponent=beta,
        inventory_penalty=1e-9,
        penalty_exponent=p,
        terminal_penalty=terminal,
        caps=caps,
    )
    assert np.isfinite(explain(problem).trades).all()

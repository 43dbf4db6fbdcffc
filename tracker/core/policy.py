"""How far a schedule's feedback policy departs from the classic linear rule.

The classic closed-form answer (linear impact, quadratic risk, no caps) trades, in each bin, a
fixed fraction of the inventory still held: ``v_n = a_n q``. With fixed costs, caps, square-root
impact or a non-quadratic risk penalty the optimal trade is no longer proportional to inventory.
:func:`explain` measures by how much: for every bin ``n`` of the horizon and every starting
inventory ``q`` on a grid, it solves the problem from bin ``n`` onwards holding ``q`` and records
the first trade ``v_n(q)`` (the feedback policy). Per bin it fits ``v_n = a_n q`` by least squares
through the origin and reports the slope, the coefficient of determination and the relative size of
what the line leaves unexplained.
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np

from tracker.core.problem import FloatArray, Problem
from tracker.core.solve import solve_batch

#: Default grid of starting inventories, as fractions of the order's quantity.
DEFAULT_GRID = np.linspace(0.05, 1.0, 20)


@dataclass(frozen=True, eq=False)
class Policy:
    """The feedback policy of a problem and its per-bin fit to the linear rule ``v = a q``.

    Attributes:
        grid: Starting inventories as fractions of the quantity (``G`` values).
        inventories: The same in shares.
        trades: ``N x G``: shares the optimal schedule trades in bin ``n`` when it holds
            ``inventories[g]`` at the start of that bin.
        slope: ``N`` fitted fractions ``a_n`` (least squares through the origin).
        r2: ``N`` coefficients of determination, ``1 - SS_res / SS_tot`` with ``SS_tot`` taken
            about the mean trade (1 for an exactly linear policy; below 0 when the line through
            the origin fits worse than a constant). 1 when the policy is constant and fitted
            exactly.
        relative_deviation: ``N`` values ``||v - a q|| / ||v||`` (0 for an exactly linear policy).
    """

    grid: FloatArray
    inventories: FloatArray
    trades: FloatArray
    slope: FloatArray
    r2: FloatArray
    relative_deviation: FloatArray

    def to_mapping(self) -> dict[str, list[float]]:
        """JSON-ready values (``policy`` section of ``tracker plan --explain``)."""
        return {
            "grid": self.grid.tolist(),
            "slope": self.slope.tolist(),
            "r2": self.r2.tolist(),
            "relative_deviation": self.relative_deviation.tolist(),
        }


def remaining_problem(problem: Problem, first_bin: int, inventory: float) -> Problem:
    """The problem from bin ``first_bin`` on, holding ``inventory`` shares at its start.

    Permanent impact of trades already done is sunk, so the remaining problem's permanent term
    counts only its own trades: its quantity is the inventory held.
    """

    return replace(
        problem,
        quantity=inventory,
        bins=problem.bins - first_bin,
        fixed_cost=problem.fixed_cost[first_bin:],
        temporary_impact=problem.temporary_impact[first_bin:],
        inventory_penalty=problem.inventory_penalty[first_bin:],
        caps=None if problem.caps is None else problem.caps[first_bin:],
    )


def explain(problem: Problem, grid: FloatArray | None = None) -> Policy:
    """Compute the feedback policy of ``problem`` and its fit to the linear rule.

    Args:
        problem: The problem (its quantity sets the scale of the grid).
        grid: Starting inventories as fractions of the quantity, all > 0; default 5% to 100%.

    Returns:
        The policy and the per-bin fit.
    """
    fractions = DEFAULT_GRID if grid is None else np.asarray(grid, dtype=np.float64)
    inventories = fractions * problem.quantity
    subproblems = [
        remaining_problem(problem, n, float(q)) for n in range(problem.bins) for q in inventories
    ]
    schedules = solve_batch(subproblems)
    trades = np.array([s.trades[0] for s in schedules]).reshape(problem.bins, fractions.size)
    q = inventories[None, :]
    denominator = float((inventories**2).sum())
    slope = (trades * q).sum(axis=1) / denominator if denominator > 0 else np.zeros(problem.bins)
    residual = trades - slope[:, None] * q
    ss_res = (residual**2).sum(axis=1)
    ss_tot = ((trades - trades.mean(axis=1, keepdims=True)) ** 2).sum(axis=1)
    scale = (trades**2).sum(axis=1)
    tiny = 1e-24 * max(problem.quantity, 1.0) ** 2
    with np.errstate(divide="ignore", invalid="ignore"):
        r2 = np.where(ss_tot > tiny, 1.0 - ss_res / ss_tot, np.where(ss_res <= tiny, 1.0, 0.0))
        deviation = np.where(scale > tiny, np.sqrt(ss_res / scale), 0.0)
    return Policy(
        grid=fractions,
        inventories=inventories,
        trades=trades,
        slope=slope,
        r2=r2,
        relative_deviation=deviation,
    )

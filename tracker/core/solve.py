"""Solve the canonical execution problem (see :mod:`tracker.core.problem` for the formula).

Theory of operation
-------------------
Write the problem in inventories ``q_1 .. q_N`` (``q_0 = Q`` is given). Every term couples at most
two neighbouring inventories: the per-bin costs depend on ``v_n = q_n - q_{n+1}``, the risk terms on
one ``q_n``, and the permanent-impact term ``(b/2)[(Q - q_N)^2 - sum v_n^2]`` splits into a term in
``q_N`` alone and per-bin terms ``-(b/2) v_n^2``. So the Hessian in ``q`` is tridiagonal, and so is
every Newton system we solve.

Three paths, chosen per problem:

* **at_caps / trivial**: nothing to optimise. ``Q = 0``, or completion is required and the caps add
  up to no more than ``Q`` (then trading at the caps is the only feasible or the least-bad schedule:
  status ``capped_shortfall`` when they fall short).
* **riccati** (beta = 1, p = 2): the cost-to-go is an exact quadratic ``a_n q^2 + d_n q + e_n``; a
  backward recursion gives ``a_n, d_n`` in O(N) and a forward pass gives the trajectory. The linear
  term ``d_n`` carries time-varying fixed costs ``h_n`` and the permanent impact. The recursion
  ignores the bounds ``0 <= v_n <= u_n``; if its answer breaks one, the general path takes over.
* **interior_point**: everything else. A primal-dual interior-point method on the inequality
  constraints ``v_n >= 0``, ``v_n <= u_n`` (only where a cap is below ``Q``) and ``q_N >= 0``.
  Each iteration solves one symmetric tridiagonal Newton system in O(N) (``L D L^T``; with
  pivoting, then a tiny diagonal shift, should a pivot not be positive). Inside, inventories are
  fractions of ``Q`` and costs are divided by the cost of a schedule that completes the order in
  proportion to the caps, so tolerances are relative. Steps are accepted when they reduce the KKT
  residual or satisfy Armijo's condition on the barrier function. The run ends when the duality
  gap and the dual residual are small; where a trade is pinned at 0 under a term steep there
  (small beta, p near 1), the dual residual has a floating-point floor (a trade is a difference
  of numbers near 1), so a gap within the tolerance and a residual that has stopped improving
  end it too. The method, with its scaling and starting point, is compiled
  (``tracker/core/_kernel.c``, whose comments describe it in full): at N = 78 an iteration is a few
  thousand flops, which numpy spent mostly in call overhead. The general problems of a batch go
  to it in one call, laid end to end, each solved on its own (so a problem's answer never depends
  on the others). The recursion of the riccati path and the costing of a final schedule are
  compiled there too; the choice of path and the :class:`Schedule` are made here.

The compiled kernel is optional: where it was not built (no C compiler at install time), its numpy
twin (:mod:`tracker.core.kernel_numpy`) runs the same steps, slower. :mod:`tracker.core.kernel`
chooses; the calls below go to ``kernel.KERNEL``, whichever it is.

Bins whose cap is zero cannot trade: they are taken out before solving (their risk weights are
folded into the neighbouring inventory they share) and put back as zero trades.

The objective and its breakdown are always recomputed from the final trades on the original
problem (:func:`cost_breakdown`), whatever path produced them.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Final, NamedTuple

import numpy as np
import numpy.typing as npt

from tracker.core import kernel
from tracker.core.problem import FloatArray, Problem
from tracker.errors import ProblemError, SolveError

OPTIMAL: Final = "optimal"
CAPPED_SHORTFALL: Final = "capped_shortfall"

#: Names of the cost terms, in the order of the objective.
COST_TERMS: Final = (
    "fixed_cost",
    "temporary_impact",
    "permanent_impact",
    "inventory_penalty",
    "terminal_penalty",
)

#: Default stopping tolerance of the interior-point path (relative to the objective).
TOLERANCE: Final = 1e-10

#: When completion is forced and the caps exceed the quantity by no more than this fraction of it,
#: the caps decide the schedule alone (see ``_closed_form``).
AT_CAPS_TOLERANCE: Final = 1e-12

_MAX_ITERATIONS: Final = 200


@dataclass(frozen=True, eq=False)
class Schedule:
    """The solution of one :class:`~tracker.core.problem.Problem`.

    Attributes:
        status: ``"optimal"``, or ``"capped_shortfall"`` when the caps cannot complete the order
            (the schedule then trades at the caps, or as well as it can under a finite terminal
            penalty, and ``shortfall`` says how much is left).
        objective: Value of the canonical objective, every term and constant included (currency).
        trajectory: ``N + 1`` inventories in shares, ``trajectory[0] == quantity``.
        trades: ``N`` shares per bin, ``trades[n] = trajectory[n] - trajectory[n + 1]``.
        cost: The objective by term (:data:`COST_TERMS`); the values add up to ``objective``.
        shortfall: Shares left at the end of the horizon (``trajectory[-1]``).
        method: ``"riccati"``, ``"interior_point"``, ``"at_caps"`` or ``"trivial"``.
        iterations: Newton iterations taken (0 for the closed-form paths).
    """

    status: str
    objective: float
    trajectory: FloatArray
    trades: FloatArray
    cost: Mapping[str, float]
    shortfall: float
    method: str
    iterations: int

    def to_mapping(self) -> dict[str, object]:
        """The schedule as JSON-ready values.

        A forced order that the caps cannot complete has an infinite objective (its terminal
        term); JSON has no infinity, so such values are written as ``null``, and the status
        ``capped_shortfall`` and ``shortfall`` say why.
        """

        def finite(value: float) -> float | None:
            return value if math.isfinite(value) else None

        return {
            "status": self.status,
            "objective": finite(self.objective),
            "trajectory": self.trajectory.tolist(),
            "trades": self.trades.tolist(),
            "cost": {name: finite(value) for name, value in self.cost.items()},
            "shortfall": self.shortfall,
            "method": self.method,
            "iterations": self.iterations,
        }


# --------------------------------------------------------------------------------------------
# Evaluating a schedule


def cost_breakdown(problem: Problem, trades: Sequence[float] | FloatArray) -> dict[str, float]:
    """The canonical objective of ``trades`` on ``problem``, term by term (currency).

    Args:
        problem: The problem.
        trades: ``problem.bins`` shares per bin (any schedule, optimal or not).

    Raises:
        ProblemError: ``trades`` has the wrong length, a trade that is not a finite number, a
            negative trade, or sells more than the quantity.
    """
    v = np.asarray(trades, dtype=np.float64)
    if v.shape != (problem.bins,):
        raise ProblemError(f"need {problem.bins} trades, got shape {v.shape}", field="trades")
    finite = np.isfinite(v)
    if not finite.all():
        bad = int(np.flatnonzero(~finite)[0])
        raise ProblemError(
            f"trades must be finite numbers; bin {bad} is {float(v[bad])!r}", field="trades"
        )
    quantity = problem.quantity
    slack = 1e-9 * max(quantity, 1.0)
    if (v < -slack).any():
        raise ProblemError("trades must be >= 0 (no buying back)", field="trades")
    v = np.maximum(v, 0.0)  # a copy: _costed works in place
    if quantity - float(v.sum()) < -slack:
        raise ProblemError(f"trades add up to more than the quantity {quantity}", field="trades")
    _, cost = _costed(problem, v, settle=False)
    return cost


def _costed(
    problem: Problem, trades: FloatArray, *, settle: bool
) -> tuple[FloatArray, dict[str, float]]:
    """The trajectory and cost terms of ``trades`` (float64, changed in place: clipped at 0).

    With ``settle``, a schedule that completes the order up to rounding has its last trade take
    the rounding, so that the trajectory ends at exactly zero and never below. The objective's
    terms are summed in the kernel (``costs``; compiled in ``tracker/core/_kernel.c``): a loop over
    the bins that ran for every order of every bin close.
    """
    trajectory = np.empty(problem.bins + 1)
    terms = kernel.KERNEL.costs(
        problem.fixed_cost,
        problem.temporary_impact,
        problem.inventory_penalty,
        trades,
        trajectory,
        problem.quantity,
        problem.impact_exponent,
        problem.permanent_impact,
        problem.penalty_exponent,
        problem.terminal_penalty,
        settle,
    )
    return trajectory, dict(zip(COST_TERMS, terms, strict=True))


def objective_value(problem: Problem, trades: Sequence[float] | FloatArray) -> float:
    """The canonical objective of any schedule ``trades`` on ``problem`` (currency)."""
    return math.fsum(cost_breakdown(problem, trades).values())


# --------------------------------------------------------------------------------------------
# Convexity


def check_convex(problem: Problem) -> None:
    """Raise :class:`ProblemError` unless the problem is convex on its feasible set.

    Per bin the trade cost ``k v^(1+beta) - (b/2) v^2`` must be convex for ``0 <= v <= m`` with
    ``m = min(u_n, Q)`` (the rest of the objective is convex). Its curvature is smallest at
    ``v = m`` for ``beta < 1`` and at ``v = 0`` for ``beta > 1``, so the test is exact per bin:
    ``b <= k (1 + beta) beta m^(beta - 1)`` (for ``beta = 1``: ``b <= 2 k``).

    Bins that cannot trade (cap 0) are exempt.
    """
    b = problem.permanent_impact
    if b == 0.0 or problem.quantity == 0.0:
        return
    beta = problem.impact_exponent
    k = problem.temporary_impact
    if beta == 1.0 and 2.0 * float(k.min()) >= b:
        return  # the usual case, settled in one pass: every bin's curvature 2k covers b
    reach = np.minimum(problem.cap_array, problem.quantity)
    trading = reach > 0
    if beta == 1.0:
        bound = 2.0 * k
    elif beta < 1.0:
        with np.errstate(divide="ignore"):
            bound = k * (1.0 + beta) * beta * np.where(trading, reach, 1.0) ** (beta - 1.0)
    else:
        bound = np.zeros_like(k)
    bad = trading & (bound < b)
    if bad.any():
        n = int(np.flatnonzero(bad)[0])
        raise ProblemError(
            f"{b!r} makes the problem non-convex: in bin {n} the temporary impact's curvature "
            f"allows at most {float(bound[n])!r} (need b <= k(1+beta)beta min(cap, Q)^(beta-1), "
            "or b <= 2k for linear impact; impact exponents above 1 allow no permanent impact); "
            "lower permanent_impact or raise temporary_impact",
            field="permanent_impact",
        )


# --------------------------------------------------------------------------------------------
# Public entry points


def solve(problem: Problem, *, tolerance: float = TOLERANCE) -> Schedule:
    """Solve one problem.

    Args:
        problem: A validated problem.
        tolerance: Relative accuracy of the objective on the interior-point path.

    Returns:
        The optimal schedule, or the capped schedule with status ``capped_shortfall``.

    Raises:
        ProblemError: The problem is not convex (permanent impact too large).
        SolveError: The interior-point method did not converge (a bug of ours; report it).
    """
    return solve_batch([problem], tolerance=tolerance)[0]


def solve_batch(problems: Sequence[Problem], *, tolerance: float = TOLERANCE) -> list[Schedule]:
    """Solve many problems; the general ones in one call of the kernel's method.

    Each problem is solved on its own, so its answer never depends on the others.

    Args:
        problems: Validated problems, of any sizes.
        tolerance: Relative accuracy of the objective on the interior-point path.

    Returns:
        One schedule per problem, in order.

    Raises:
        ProblemError: A problem is not convex; the message says which one (by position).
        SolveError: The interior-point method did not converge.
    """
    schedules: list[Schedule | None] = []
    general: list[int] = []  # positions of the problems for the interior-point method
    for index, problem in enumerate(problems):
        try:
            check_convex(problem)
        except ProblemError as exc:
            if len(problems) == 1:
                raise
            raise ProblemError(
                f"problem {index} of the batch: {exc.reason}", field=exc.field
            ) from exc
        schedule = _closed_form(problem)
        if schedule is None:
            general.append(index)
        schedules.append(schedule)
    if general:
        solved, iterations = _interior_point([problems[i] for i in general], tolerance)
        for index, trades, count in zip(general, solved, iterations.tolist(), strict=True):
            if count < 0:
                where = f" (problem {index} of the batch)" if len(problems) > 1 else ""
                raise SolveError(_kernel_failure(count) + where)
            schedules[index] = _finish(problems[index], trades, "interior_point", count)
    return [schedule for schedule in schedules if schedule is not None]


# --------------------------------------------------------------------------------------------
# Closed forms


def _finish(problem: Problem, trades: FloatArray, method: str, iterations: int) -> Schedule:
    """Wrap final trades into a Schedule: trajectory, objective, breakdown and status.

    ``trades`` must be a fresh float64 array: it is settled in place and becomes the schedule's.
    """
    quantity = problem.quantity
    trajectory, cost = _costed(problem, trades, settle=True)
    shortfall = float(trajectory[-1])
    capped = problem.caps is not None and float(problem.caps.sum()) < quantity
    trajectory.setflags(write=False)
    trades.setflags(write=False)
    return Schedule(
        status=CAPPED_SHORTFALL if capped else OPTIMAL,
        objective=math.fsum(cost.values()),
        trajectory=trajectory,
        trades=trades,
        cost=cost,
        shortfall=shortfall,
        method=method,
        iterations=iterations,
    )


def _closed_form(problem: Problem) -> Schedule | None:
    """The schedule when no iteration is needed, else ``None``."""
    quantity = problem.quantity
    if quantity == 0.0:
        return _finish(problem, np.zeros(problem.bins), "trivial", 0)
    caps = problem.caps
    tradeable = np.arange(problem.bins) if caps is None else np.flatnonzero(caps > 0.0)
    if tradeable.size == 0:
        return _finish(problem, np.zeros(problem.bins), "at_caps", 0)
    if problem.forced and caps is not None:
        capacity = float(caps.sum())
        if capacity <= quantity:
            # Completion is required and the caps allow at most the quantity: trade every cap.
            return _finish(problem, caps.copy(), "at_caps", 0)
        if capacity - quantity <= AT_CAPS_TOLERANCE * quantity:
            # The caps leave no room to choose (the quantity is the capacity up to rounding, as
            # when 0.55 x 400,000 comes out a few ulps below 220,000): the only schedule is
            # every cap, scaled to the quantity. The interior-point method would find no
            # interior to start from.
            return _finish(problem, caps * (quantity / capacity), "at_caps", 0)
    if problem.forced and tradeable.size == 1:
        trades = np.zeros(problem.bins)
        trades[tradeable[0]] = quantity
        return _finish(problem, trades, "trivial", 0)
    if problem.impact_exponent == 1.0 and problem.penalty_exponent == 2.0:
        return _riccati(problem)
    return None


def _riccati(problem: Problem) -> Schedule | None:
    """Exact solution of the linear-quadratic case, or ``None`` if it breaks a bound.

    Stage ``n`` costs ``h_n v + kappa_n v^2 + c_n q_{n+1}^2`` with ``kappa_n = k_n - b/2``; the
    permanent term's ``(b/2)(Q - q_N)^2`` joins the terminal cost. With the cost-to-go
    ``V_{n+1}(q) = a q^2 + d q + const``, minimising over ``q' = q_{n+1}`` gives
    ``q' = (2 kappa q + h - d) / (2 s)`` with ``s = kappa + c + a``, and
    ``a_n = kappa - kappa^2 / s``, ``d_n = h - kappa (h - d) / s``.
    """
    quantity = problem.quantity
    half_b = 0.5 * problem.permanent_impact
    kappa = problem.temporary_impact - half_b if half_b else problem.temporary_impact
    if problem.forced:
        # The last bin trades whatever is left (q_N = 0): its cost is the cost-to-go there.
        a, d = float(kappa[-1]), float(problem.fixed_cost[-1])
    else:
        a = problem.terminal_penalty + half_b
        d = -2.0 * half_b * quantity
    v = np.empty(problem.bins)
    q = kernel.KERNEL.riccati(
        problem.fixed_cost, kappa, problem.inventory_penalty, v, a, d, problem.forced, quantity
    )
    if math.isnan(q):
        return None  # linear in some bin: not strictly convex, let the general path decide
    if v.min() < 0.0 or q < -1e-12 * quantity:
        return None  # the bound v >= 0 or q_N >= 0 binds
    if problem.caps is not None and (v > problem.caps).any():
        return None  # a cap binds
    return _finish(problem, v, "riccati", 0)


# --------------------------------------------------------------------------------------------
# The general path


def _interior_point(
    problems: Sequence[Problem], tolerance: float
) -> tuple[list[FloatArray], npt.NDArray[np.int64]]:
    """Optimal trades (shares) of general problems, and per problem the kernel's iteration count.

    One call of the kernel's method for the whole batch, laid end to end; each problem is solved
    on its own, so its answer never depends on the others. A negative count is a failure
    (:func:`_kernel_failure`).

    Bins whose cap is zero cannot trade: they are taken out first and put back as zero trades.
    The inventory after such a bin equals the inventory after the last bin before it that
    trades, so its risk weight is folded into that bin's (or dropped where it is Q itself, a
    constant).
    """
    parts = [_tradeable(problem) for problem in problems]
    sizes = np.array([part.h.size for part in parts], dtype=np.int64)
    out = np.empty(int(sizes.sum()))
    iterations = np.empty(len(problems), dtype=np.int64)
    kernel.KERNEL.interior_point(
        np.concatenate([part.h for part in parts]),
        np.concatenate([part.k for part in parts]),
        np.concatenate([part.c for part in parts]),
        np.concatenate([part.caps for part in parts]),
        out,
        sizes,
        iterations,
        np.array([problem.quantity for problem in problems]),
        np.array([problem.impact_exponent for problem in problems]),
        np.array([problem.permanent_impact for problem in problems]),
        np.array([problem.penalty_exponent for problem in problems]),
        np.array([problem.terminal_penalty for problem in problems]),
        tolerance,
        _MAX_ITERATIONS,
    )
    solved: list[FloatArray] = []
    for problem, part, shares in zip(
        problems, parts, np.split(out, np.cumsum(sizes)[:-1]), strict=True
    ):
        if part.active is None:
            solved.append(shares.copy())
        else:
            trades = np.zeros(problem.bins)
            trades[part.active] = shares
            solved.append(trades)
    return solved, iterations


class _Tradeable(NamedTuple):
    """The bins of a problem that can trade (``active``; ``None``: all of them) and their data."""

    active: npt.NDArray[np.intp] | None
    h: FloatArray  # fixed cost
    k: FloatArray  # temporary impact
    c: FloatArray  # risk weight, with those of the bins that cannot trade folded in
    caps: FloatArray  # inf where none


def _tradeable(problem: Problem) -> _Tradeable:
    """The problem without the bins whose cap is zero (see :func:`_interior_point`)."""
    caps = problem.cap_array
    if problem.caps is None or (caps > 0.0).all():
        return _Tradeable(
            None, problem.fixed_cost, problem.temporary_impact, problem.inventory_penalty, caps
        )
    active = (caps > 0.0).nonzero()[0]
    owner = np.searchsorted(active, np.arange(problem.bins), side="right") - 1
    folded = np.zeros(active.size)
    np.add.at(folded, owner[owner >= 0], problem.inventory_penalty[owner >= 0])
    return _Tradeable(
        active, problem.fixed_cost[active], problem.temporary_impact[active], folded, caps[active]
    )


def _kernel_failure(code: int) -> str:
    """What a negative iteration count from the kernel means (codes of ``_kernel.c``, which
    ``kernel_numpy`` shares)."""
    if code == -1:
        return f"the interior-point method did not converge in {_MAX_ITERATIONS} iterations"
    if code == -2:
        return "singular Newton system in the interior-point method"
    if code == -3:
        return "the interior-point iterate became non-finite"
    return f"interior-point kernel failed (code {code})"

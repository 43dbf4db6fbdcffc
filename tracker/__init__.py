"""tracker: live re-optimisation of parent-order execution schedules.

The public Python API. The solver (:func:`solve`, :func:`solve_batch`) works on the canonical
execution problem (:class:`Problem`); :func:`explain` compares a schedule's feedback policy with the
classic rule that trades a fixed fraction of the remaining inventory each bin.

tracker advises; it does not place orders. Its output is for supervised use and is not investment
advice; the firm's own risk controls and the local market regulation come first.
"""

from tracker.core.policy import Policy, explain
from tracker.core.problem import FORCE, Problem
from tracker.core.solve import (
    CAPPED_SHORTFALL,
    COST_TERMS,
    OPTIMAL,
    Schedule,
    check_convex,
    cost_breakdown,
    objective_value,
    solve,
    solve_batch,
)
from tracker.errors import InputError, ProblemError, SolveError, TrackerError

__all__ = [
    "CAPPED_SHORTFALL",
    "COST_TERMS",
    "FORCE",
    "OPTIMAL",
    "InputError",
    "Policy",
    "Problem",
    "ProblemError",
    "Schedule",
    "SolveError",
    "TrackerError",
    "check_convex",
    "cost_breakdown",
    "explain",
    "objective_value",
    "solve",
    "solve_batch",
]

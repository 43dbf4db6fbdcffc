"""tracker: live re-optimisation of parent-order execution schedules.

The public Python API. The solver (:func:`solve`, :func:`solve_batch`) works on the canonical
execution problem (:class:`Problem`); :func:`explain` compares a schedule's feedback policy with the
classic rule that trades a fixed fraction of the remaining inventory each bin.

The names are loaded on first use (PEP 562), so ``import tracker`` (and so every ``tracker``
command, ``--help`` included) does not load numpy and the solver until something needs them; an
error while loading the solver then shows where it happened instead of surfacing as a
circular import of this package.

tracker advises; it does not place orders. Its output is for supervised use and is not investment
advice; the firm's own risk controls and the local market regulation come first.
"""

from __future__ import annotations

import importlib
from typing import TYPE_CHECKING, Any

from tracker.errors import InputError, ProblemError, SolveError, TrackerError

if TYPE_CHECKING:
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

#: The module that defines each name loaded on first use.
_LAZY = {
    "CAPPED_SHORTFALL": "tracker.core.solve",
    "COST_TERMS": "tracker.core.solve",
    "FORCE": "tracker.core.problem",
    "OPTIMAL": "tracker.core.solve",
    "Policy": "tracker.core.policy",
    "Problem": "tracker.core.problem",
    "Schedule": "tracker.core.solve",
    "check_convex": "tracker.core.solve",
    "cost_breakdown": "tracker.core.solve",
    "explain": "tracker.core.policy",
    "objective_value": "tracker.core.solve",
    "solve": "tracker.core.solve",
    "solve_batch": "tracker.core.solve",
}


def __getattr__(name: str) -> Any:
    """Load a public name from its module on first use, then keep it here."""
    module = _LAZY.get(name)
    if module is None:
        raise AttributeError(f"module 'tracker' has no attribute {name!r}")
    value = getattr(importlib.import_module(module), name)
    globals()[name] = value
    return value


def __dir__() -> list[str]:
    """The module's names, the ones not loaded yet included."""
    return sorted(set(globals()) | set(__all__))

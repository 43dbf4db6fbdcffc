"""Validation of the canonical problem: every bad field gets a message naming it."""

import math

import numpy as np
import pytest

from tracker import FORCE, Problem, ProblemError

GOOD = {
    "quantity": 1000,
    "bins": 4,
    "fixed_cost": 0.01,
    "temporary_impact": [1e-4, 2e-4, 2e-4, 1e-4],
    "impact_exponent": 1,
    "permanent_impact": 0,
    "inventory_penalty": 1e-6,
    "penalty_exponent": 2,
    "terminal_penalty": "force",
    "caps": None,
}


def test_scalars_broadcast_over_bins() -> None:
    """A scalar per-bin field becomes one value per bin."""
    problem = Problem.from_mapping(GOOD)
    assert problem.fixed_cost.tolist() == [0.01] * 4


def test_force_is_stored_as_infinity() -> None:
    """terminal_penalty "force" means q_N = 0 is required."""
    problem = Problem.from_mapping(GOOD)
    assert (math.inf, True) == (problem.terminal_penalty, problem.forced)


def test_arrays_are_read_only() -> None:
    """A validated problem cannot be changed behind the solver's back."""
    problem = Problem.from_mapping(GOOD)
    with pytest.raises(ValueError, match="read-only"):
        problem.fixed_cost[0] = 1.0


def test_round_trip_through_mapping() -> None:
    """to_mapping gives back a file that builds the same problem."""
    problem = Problem.from_mapping({**GOOD, "caps": [100, None, 300, 400]})
    again = Problem.from_mapping(problem.to_mapping())
    assert problem.to_mapping() == again.to_mapping()
    assert math.isinf(again.cap_array[1])


def test_all_infinite_caps_mean_no_caps() -> None:
    """A list of caps that are all absent is the same as no caps."""
    assert Problem.from_mapping({**GOOD, "caps": [None] * 4}).caps is None


BAD = [
    ("missing", {k: v for k, v in GOOD.items() if k != "bins"}, "bins"),
    ("unknown", {**GOOD, "quantiy": 5}, "quantiy"),
    ("negative-quantity", {**GOOD, "quantity": -1}, "quantity"),
    ("nan-quantity", {**GOOD, "quantity": float("nan")}, "quantity"),
    ("text-quantity", {**GOOD, "quantity": "1000"}, "quantity"),
    ("bool-quantity", {**GOOD, "quantity": True}, "quantity"),
    ("zero-bins", {**GOOD, "bins": 0}, "bins"),
    ("fractional-bins", {**GOOD, "bins": 2.5}, "bins"),
    ("short-list", {**GOOD, "temporary_impact": [1e-4] * 3}, "temporary_impact"),
    ("nan-in-list", {**GOOD, "fixed_cost": [0.01, float("nan"), 0.01, 0.01]}, "fixed_cost"),
    ("negative-in-list", {**GOOD, "inventory_penalty": [0, 0, -1, 0]}, "inventory_penalty"),
    ("p-below-one", {**GOOD, "penalty_exponent": 0.5}, "penalty_exponent"),
    ("p-above-four", {**GOOD, "penalty_exponent": 4.5}, "penalty_exponent"),
    ("beta-zero", {**GOOD, "impact_exponent": 0}, "impact_exponent"),
    ("beta-above-two", {**GOOD, "impact_exponent": 2.5}, "impact_exponent"),
    ("negative-b", {**GOOD, "permanent_impact": -1e-6}, "permanent_impact"),
    ("terminal-word", {**GOOD, "terminal_penalty": "always"}, "terminal_penalty"),
    ("terminal-negative", {**GOOD, "terminal_penalty": -1}, "terminal_penalty"),
    ("caps-text", {**GOOD, "caps": "none"}, "caps"),
    ("caps-negative", {**GOOD, "caps": -5}, "caps"),
]


@pytest.mark.parametrize(("data", "field"), [(d, f) for _, d, f in BAD], ids=[i for i, _, _ in BAD])
def test_bad_field_is_named(data: dict[str, object], field: str) -> None:
    """Each kind of bad value is rejected with the offending field named."""
    with pytest.raises(ProblemError) as info:
        Problem.from_mapping(data)
    assert field == info.value.field
    assert str(info.value).startswith(f"{field}: ")


def test_python_defaults() -> None:
    """The Python constructor defaults to linear impact, quadratic risk and forced completion."""
    problem = Problem(quantity=10, bins=3)
    assert (
        problem.impact_exponent,
        problem.penalty_exponent,
        problem.to_mapping()["terminal_penalty"],
    ) == (1.0, 2.0, FORCE)
    assert np.array_equal(np.full(3, np.inf), problem.cap_array)


def test_from_arrays_builds_the_same_problem() -> None:
    """The unchecked fast path gives the same problem as the checked constructor."""
    checked = Problem.from_mapping({**GOOD, "caps": [100.0, 200.0, 300.0, 400.0]})
    fast = Problem.from_arrays(
        quantity=1000.0,
        fixed_cost=np.full(4, 0.01),
        temporary_impact=np.array([1e-4, 2e-4, 2e-4, 1e-4]),
        impact_exponent=1.0,
        permanent_impact=0.0,
        inventory_penalty=np.full(4, 1e-6),
        penalty_exponent=2.0,
        terminal_penalty=math.inf,
        caps=np.array([100.0, 200.0, 300.0, 400.0]),
    )
    assert checked.to_mapping() == fast.to_mapping()
    assert not fast.fixed_cost.flags.writeable

"""The numpy kernel gives the compiled kernel's answers (tracker/core/kernel_numpy.py vs _kernel.c).

The numpy twin runs where the extension could not be built; it must not change an answer. Both
do the same floating-point operations in the same order, so on the same machine they agree to
rounding and stop after the same number of iterations. The checks: the same status, path and
iteration count, objectives within 1e-9 relative, trajectories within 1e-9 of the quantity, on
the problems of tests/test_solve_references.py (whose answers are checked against outside
sources there) and on generated ones (the generator of tests/test_solve_properties.py, and a
seeded batch like the benchmark's). Then each entry point on its own, with raw arrays.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Iterator, Sequence
from contextlib import contextmanager

import numpy as np
import numpy.typing as npt
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from test_solve_properties import problems
from test_solve_references import (
    AC_CASES,
    GENERAL_IDS,
    SHORTFALL_CASES,
    cjp_problem,
    general_problem,
    shortfall_problem,
)

from tracker import Problem, Schedule, solve_batch
from tracker.core import _kernel, kernel, kernel_numpy

FloatArray = npt.NDArray[np.float64]

OBJECTIVE_RTOL = 1e-9
TRAJECTORY_RTOL = 1e-9  # of the quantity


@contextmanager
def kernel_in_use(module: kernel.Kernel) -> Iterator[None]:
    """Run the solver on ``module`` for the duration of the block."""
    with pytest.MonkeyPatch.context() as patch:
        patch.setattr(kernel, "KERNEL", module)
        yield


def both(problems: Sequence[Problem]) -> tuple[list[Schedule], list[Schedule]]:
    """The schedules from the compiled kernel and from the numpy kernel."""
    with kernel_in_use(_kernel):
        compiled = solve_batch(problems)
    with kernel_in_use(kernel_numpy):
        twin = solve_batch(problems)
    return compiled, twin


def differences(problem: Problem, compiled: Schedule, twin: Schedule) -> dict[str, object]:
    """What differs between two schedules of the same problem beyond the tolerances."""
    found: dict[str, object] = {}
    for field in ("status", "method", "iterations"):
        if getattr(compiled, field) != getattr(twin, field):
            found[field] = (getattr(compiled, field), getattr(twin, field))
    a, b = compiled.objective, twin.objective
    if not (a == b or abs(a - b) <= OBJECTIVE_RTOL * abs(a)):  # equal also covers +inf
        found["objective"] = (a, b)
    gap = float(np.max(np.abs(compiled.trajectory - twin.trajectory)))
    if not gap <= TRAJECTORY_RTOL * max(problem.quantity, 1.0):
        found["trajectory"] = gap
    return found


def reference_problems() -> dict[str, Problem]:
    """The invented scenarios of tests/test_solve_references.py, every path among them."""
    found = {f"general-{name}": general_problem(name) for name in GENERAL_IDS}
    found |= {f"shortfall-{name}": shortfall_problem(name) for name in SHORTFALL_CASES}
    for name, case in AC_CASES.items():
        found[f"almgren-chriss-{name}"] = case.problem(with_permanent=True)
    found["cjp-alpha-1e-3-200-bins"] = cjp_problem(1e-3, 200)
    # The reference problems again with square-root impact: the general path on each.
    for name in GENERAL_IDS:
        general = general_problem(name)
        found[f"sqrt-{name}"] = Problem(
            quantity=general.quantity,
            bins=general.bins,
            fixed_cost=general.fixed_cost,
            temporary_impact=general.temporary_impact * 70.0,
            impact_exponent=0.5,
            inventory_penalty=general.inventory_penalty,
            penalty_exponent=general.penalty_exponent,
            terminal_penalty="force" if general.forced else general.terminal_penalty,
            caps=general.caps,
        )
    return found


REFERENCE_PROBLEMS = reference_problems()


@pytest.mark.parametrize("name", list(REFERENCE_PROBLEMS))
def test_reference_problems_agree(name: str) -> None:
    """On each reference problem both kernels give the same schedule."""
    problem = REFERENCE_PROBLEMS[name]
    (compiled,), (twin,) = both([problem])
    assert {} == differences(problem, compiled, twin)


def test_reference_problems_cover_every_path() -> None:
    """The reference problems reach the interior-point path, the Riccati path and the caps."""
    compiled, _ = both(list(REFERENCE_PROBLEMS.values()))
    expected = {"interior_point", "riccati", "at_caps"}
    assert expected == {schedule.method for schedule in compiled}


@settings(max_examples=150, deadline=None, database=None)
@given(st.lists(problems(), min_size=1, max_size=6))
def test_generated_problems_agree(batch: list[Problem]) -> None:
    """On generated problems (every field exercised) both kernels give the same schedules."""
    compiled, twin = both(batch)
    found = {
        index: differences(problem, a, b)
        for index, (problem, a, b) in enumerate(zip(batch, compiled, twin, strict=True))
    }
    assert {} == {index: what for index, what in found.items() if what}


def seeded_problems(count: int, seed: int) -> list[Problem]:
    """General problems of 78 bins like the benchmark's batch (invented, seeded)."""
    rng = np.random.default_rng(seed)
    bins = 78
    shape = 0.6 + 1.4 * np.linspace(-1.0, 1.0, bins) ** 2
    found = []
    for _ in range(count):
        quantity = float(np.exp(rng.uniform(math.log(1e3), math.log(1e7))))
        even = quantity / bins
        p = float(rng.choice([1.0, 1.5, 2.0, 3.0]))
        volume = quantity / rng.uniform(0.02, 0.1) * shape / shape.sum()
        found.append(
            Problem(
                quantity=quantity,
                bins=bins,
                fixed_cost=rng.uniform(0.0, 0.03, bins),
                temporary_impact=rng.uniform(0.005, 0.05) / even**0.5 * shape,
                impact_exponent=float(rng.choice([0.25, 0.5, 0.6, 1.5])),
                inventory_penalty=rng.uniform(0.0, 0.02) * even / quantity**p * shape,
                penalty_exponent=p,
                terminal_penalty="force"
                if rng.random() < 0.6
                else float(rng.uniform(0.1, 5.0) * even / quantity**p),
                caps=rng.uniform(0.1, 0.4) * volume * rng.lognormal(0.0, 0.3, bins),
            )
        )
    return found


def test_seeded_batch_agrees() -> None:
    """On 100 seeded problems of 78 bins, solved as one batch, both kernels agree."""
    batch = seeded_problems(100, seed=20261202)
    compiled, twin = both(batch)
    found = {
        index: differences(problem, a, b)
        for index, (problem, a, b) in enumerate(zip(batch, compiled, twin, strict=True))
    }
    assert {} == {index: what for index, what in found.items() if what}
    assert all(schedule.method == "interior_point" for schedule in compiled)


# --------------------------------------------------------------------------------------------
# Each entry point with raw arrays: the same outputs, written to the same buffers.


def test_interior_point_writes_the_same_buffers() -> None:
    """interior_point fills out and iterations alike, failures (-1) included."""
    rng = np.random.default_rng(7)
    sizes = np.array([1, 5, 30, 12], dtype=np.int64)
    total = int(sizes.sum())
    h = rng.uniform(0.0, 0.02, total)
    k = rng.uniform(1e-4, 1e-3, total)
    c = rng.uniform(0.0, 1e-6, total)
    caps = np.where(rng.random(total) < 0.3, rng.uniform(500.0, 5e3, total), np.inf)
    per_problem = [
        np.array([1e4, 2e4, 5e4, 3e4]),  # quantity
        np.array([0.5, 0.5, 0.6, 1.5]),  # beta
        np.zeros(4),  # b
        np.array([1.5, 2.0, 1.5, 3.0]),  # p
        np.array([np.inf, 1e-3, np.inf, 1e-6]),  # terminal
    ]
    results = []
    for module in (_kernel, kernel_numpy):
        for max_iterations in (200, 3):
            out = np.full(total, -7.0)
            iterations = np.full(4, -99, dtype=np.int64)
            module.interior_point(
                h, k, c, caps, out, sizes, iterations, *per_problem, 1e-10, max_iterations
            )
            results.append((out.tolist(), iterations.tolist()))
    assert results[0] == results[2]  # converged
    assert results[1] == results[3]  # stopped at 3 iterations: -1, out left as it was
    assert -1 in results[1][1]


@pytest.mark.parametrize("forced", [True, False], ids=["forced", "finite"])
def test_riccati_agrees(forced: bool) -> None:
    """riccati returns the same final inventory and trades, and NaN alike when not convex."""
    rng = np.random.default_rng(3)
    h, kappa, c = rng.uniform(0.0, 0.02, 40), rng.uniform(1e-6, 1e-5, 40), rng.uniform(0, 1e-7, 40)
    outputs = []
    for module in (_kernel, kernel_numpy):
        out = np.empty(40)
        q = module.riccati(h, kappa, c, out, 2e-6, -0.1, forced, 1e5)
        bad = np.full(40, 5.0)
        not_convex = module.riccati(h, np.r_[kappa[:-1], 0.0], c, bad, 2e-6, 0.0, forced, 1e5)
        outputs.append((q, out.tolist(), math.isnan(not_convex), bad.tolist()))
    assert outputs[0] == outputs[1]


@pytest.mark.parametrize("settle", [True, False], ids=["settle", "as-given"])
@pytest.mark.parametrize("terminal", [math.inf, 0.0, 3e-4], ids=["forced", "zero", "finite"])
def test_costs_agree(settle: bool, terminal: float) -> None:
    """costs returns the same terms, trajectory and clipped (or settled) trades."""
    rng = np.random.default_rng(5)
    n = 25
    trades = rng.uniform(-10.0, 900.0, n)
    trades *= 2e4 / trades.sum() * (1.0 + 1e-12)  # sells the quantity up to rounding
    outputs = []
    for module in (_kernel, kernel_numpy):
        v, q = trades.copy(), np.empty(n + 1)
        terms = module.costs(
            np.full(n, 0.01), np.full(n, 1e-3), np.full(n, 1e-7), v, q, 2e4, 0.5, 1e-8, 1.5,
            terminal, settle,
        )  # fmt: skip
        outputs.append((terms, v.tolist(), q.tolist()))
    assert outputs[0] == outputs[1]


@pytest.mark.parametrize(
    "diagonal",
    [
        [4.0, 4.0, 4.0, 4.0, 4.0],  # positive definite: the L D L^T route
        [1.0, -3.0, 2.0, 0.5, -1.0],  # indefinite: the pivoting route
        [0.0, -3.0, 2.0, 0.5, -1.0],  # a zero first pivot
        [2.0],  # one row
    ],
    ids=["positive-definite", "indefinite", "zero-pivot", "one-row"],
)
def test_tridiagonal_agrees(diagonal: list[float]) -> None:
    """The Newton solve gives the same solution from both kernels."""
    d = np.array(diagonal)
    e = np.array([2.0, 1.0, -1.0, 3.0])[: d.size - 1]
    solutions = []
    for module in (_kernel, kernel_numpy):
        b = np.arange(1.0, d.size + 1.0)
        module.tridiagonal(d, e, b)
        solutions.append(b.tolist())
    assert solutions[0] == solutions[1]


# Odd values a raw call may carry: zeros of both signs, infinities, NaN, the extremes.
SPECIALS = [0.0, -0.0, 1.0, -1.0, math.inf, -math.inf, math.nan, 1e-300, 1e300, 0.5, 2.0]


def sprinkled(rng: np.random.Generator, n: int, scale: float) -> FloatArray:
    """``n`` values in [0, scale), about one in ten replaced by a special value."""
    values = rng.uniform(0.0, scale, n)
    odd = rng.random(n) < 0.1
    values[odd] = rng.choice(SPECIALS, int(odd.sum()))
    return values


def outcome(function: Callable[..., object], args: Sequence[object], *buffers: FloatArray) -> str:
    """What a call returned or raised and what it left in the buffers, signs of zero included."""
    try:
        result: object = function(*args)
    except (ValueError, OverflowError) as exc:
        result = (type(exc).__name__, str(exc))
    return repr((result, [buffer.tolist() for buffer in buffers]))


def test_raw_calls_with_odd_values_agree_to_the_bit() -> None:
    """Calls with NaN, infinities, signed zeros and odd settings give identical results."""
    rng = np.random.default_rng(11)
    differ = []
    for trial in range(300):
        count = int(rng.integers(1, 4))
        sizes = rng.integers(1, 8, count).astype(np.int64)
        total = int(sizes.sum())
        per_bin = [sprinkled(rng, total, scale) for scale in (0.02, 1e-3, 1e-6)]
        caps = np.where(rng.random(total) < 0.5, sprinkled(rng, total, 500.0), np.inf)
        per_problem = [
            sprinkled(rng, count, 1e4),
            rng.choice([0.25, 0.5, 0.6, 1.0, 1.5, 2.0, 0.0, math.nan], count),
            sprinkled(rng, count, 1e-9),
            rng.choice([1.0, 1.5, 2.0, 3.0, 0.0], count),
            rng.choice([math.inf, 0.0, 1e-3, math.nan, -1.0], count),
        ]
        tolerance = float(rng.choice([1e-10, 1e-3, -1.0, 0.0, math.nan]))
        limit = int(rng.choice([200, 5, 0, -1]))
        n = int(rng.integers(1, 6))
        trades = sprinkled(rng, n, 100.0) * rng.choice([1.0, -1.0], n)
        coefficients = [sprinkled(rng, n, scale) for scale in (0.02, 1e-3, 1e-6)]
        settings_ = [
            float(rng.choice([0.0, 100.0, 300.0, math.nan, -5.0])),
            float(rng.choice([0.5, 1.0, 0.6, 0.0])),
            float(rng.choice([1e-6, 0.0, math.inf])),
            float(rng.choice([1.5, 2.0, 3.0, 0.0, -1.0])),
            float(rng.choice([math.inf, 0.0, 1e-3, -math.inf, math.nan])),
        ]
        settle = bool(rng.integers(2))
        results = []
        for module in (_kernel, kernel_numpy):
            out = np.full(total, -7.0)
            iterations = np.full(count, -99, dtype=np.int64)
            v, q = trades.copy(), np.full(n + 1, -3.0)
            solved = outcome(
                module.interior_point,
                (*per_bin, caps, out, sizes, iterations, *per_problem, tolerance, limit),
                out,
                iterations.astype(np.float64),
            )
            costed = outcome(module.costs, (*coefficients, v, q, *settings_, settle), v, q)
            results.append(solved + costed)
        if results[0] != results[1]:
            differ.append(trial)
    assert [] == differ

"""Crafted calls to the kernel: refused with a Python exception, alike in C and in numpy.

The kernel's entry points take buffers and sizes from their caller; the solver builds them right,
but nothing may crash the process or return a wrong success when they are not. Each check runs
on the compiled kernel (tracker/core/_kernel.c) and on its numpy twin, which must behave alike:
the same exception, the same message, the caller's buffers left as they were.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from tracker import Problem, ProblemError, cost_breakdown
from tracker.core import _kernel, kernel, kernel_numpy

KERNELS = {"compiled": _kernel, "numpy": kernel_numpy}


# Sizes that once wrapped around a signed sum: 16 problems of 2^60 bins and one of 4 add up to
# 2^64 + 4, which a 64-bit sum wraps to 4, the length of the vectors; the scratch allocation
# 2^60 x 42 x 8 bytes then wrapped to 0 bytes, and the kernel wrote past it (a segfault).
WRAPPING = [2**60] * 16 + [4]


@pytest.mark.parametrize("module", KERNELS.values(), ids=KERNELS.keys())
@pytest.mark.parametrize(
    ("sizes", "bins", "error", "message"),
    [
        (WRAPPING, 4, OverflowError, "sizes add up to more bins than memory can hold"),
        ([2**62, 2**62, 2**62], 4, OverflowError, "sizes add up to more bins than memory can hold"),
        ([2**60], 4, OverflowError, "a problem has more bins than memory can hold"),
        ([2, 0, 2], 4, ValueError, "every problem needs at least one bin"),
        ([3, -1, 2], 4, ValueError, "every problem needs at least one bin"),
        ([3, 2], 4, ValueError, "h must be a contiguous float64 vector of the same length"),
    ],
    ids=["wraps-to-length", "exceeds-ssize", "scratch-overflows", "empty", "negative", "mismatch"],
)
def test_interior_point_refuses_crafted_sizes(
    module: kernel.Kernel, sizes: list[int], bins: int, error: type[Exception], message: str
) -> None:
    """Sizes that overflow, are not positive or do not match the data raise before any work."""
    count = len(sizes)
    out = np.full(bins, -7.0)
    iterations = np.full(count, -99, dtype=np.int64)
    data = np.ones(bins)
    with pytest.raises(error, match=f"^{message}$"):
        module.interior_point(
            data,
            data,
            data,
            data,
            out,
            np.array(sizes, dtype=np.int64),
            iterations,
            *[np.ones(count) for _ in range(5)],
            1e-10,
            10,
        )
    assert ([-7.0] * bins, [-99] * count) == (out.tolist(), iterations.tolist())


@pytest.mark.parametrize("module", KERNELS.values(), ids=KERNELS.keys())
def test_interior_point_takes_sizes_that_fit(module: kernel.Kernel) -> None:
    """The checks refuse only what cannot fit: two forced problems of 1 and 3 bins still solve.

    Forced completion in one bin trades the whole quantity (a fact of the problem).
    """
    out = np.zeros(4)
    iterations = np.full(2, -99, dtype=np.int64)
    module.interior_point(
        np.full(4, 0.01),  # h
        np.full(4, 1e-3),  # k
        np.full(4, 1e-6),  # c
        np.full(4, np.inf),  # caps
        out,
        np.array([1, 3], dtype=np.int64),
        iterations,
        np.array([500.0, 1000.0]),  # quantity
        np.full(2, 0.5),  # beta
        np.zeros(2),  # b
        np.full(2, 1.5),  # p
        np.full(2, np.inf),  # terminal: forced
        1e-10,
        200,
    )
    assert all(count >= 0 for count in iterations.tolist())
    assert 500.0 == pytest.approx(out[0], rel=1e-9)
    assert 1000.0 == pytest.approx(out[1:].sum(), rel=1e-9)


@pytest.mark.parametrize("module", KERNELS.values(), ids=KERNELS.keys())
@pytest.mark.parametrize("pivot", [0.0, -0.0], ids=["zero", "negative-zero"])
def test_one_row_with_a_zero_pivot_is_singular(module: kernel.Kernel, pivot: float) -> None:
    """A 1x1 system 0 x = b has no solution: reported singular, b left as it was."""
    b = np.array([3.0])
    with pytest.raises(ValueError, match=r"^singular tridiagonal system$"):
        module.tridiagonal(np.array([pivot]), np.empty(0), b)
    assert [3.0] == b.tolist()


@pytest.mark.parametrize("module", KERNELS.values(), ids=KERNELS.keys())
def test_one_row_with_a_pivot_solves(module: kernel.Kernel) -> None:
    """A 1x1 system with a nonzero pivot is solved exactly: 4 x = 3 gives x = 0.75."""
    b = np.array([3.0])
    module.tridiagonal(np.array([4.0]), np.empty(0), b)
    assert [0.75] == b.tolist()


@pytest.mark.parametrize("module", KERNELS.values(), ids=KERNELS.keys())
@pytest.mark.parametrize("bad", [math.nan, math.inf, -math.inf], ids=["nan", "inf", "minus-inf"])
def test_costs_refuses_non_finite_trades(module: kernel.Kernel, bad: float) -> None:
    """A trade that is not a finite number raises (it was costed as 0) and changes no buffer."""
    trades = np.array([100.0, 200.0, bad, 300.0])
    trajectory = np.full(5, -1.0)
    four = np.full(4, 1e-3)
    with pytest.raises(ValueError, match=r"^trades must be finite numbers \(bin 2 is not\)$"):
        module.costs(four, four, four, trades, trajectory, 600.0, 0.5, 0.0, 2.0, math.inf, True)
    np.testing.assert_array_equal([100.0, 200.0, bad, 300.0], trades)  # NaN equals NaN here
    assert [-1.0] * 5 == trajectory.tolist()


@pytest.mark.parametrize("bad", [math.nan, math.inf], ids=["nan", "inf"])
def test_cost_breakdown_refuses_non_finite_trades(bad: float) -> None:
    """The public costing says which trade is not a number, as bad input (ProblemError)."""
    problem = Problem(quantity=1000, bins=3, temporary_impact=1e-3)
    with pytest.raises(ProblemError, match="trades must be finite numbers; bin 1 is") as info:
        cost_breakdown(problem, [500.0, bad, 500.0])
    assert "trades" == info.value.field

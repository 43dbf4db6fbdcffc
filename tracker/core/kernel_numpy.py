"""The solver's kernel in numpy: the twin of the compiled ``tracker/core/_kernel.c``.

Why a twin: the compiled kernel needs a C compiler and Python's headers at install time. Where
they are missing, the package still installs (the extension is optional) and the solver runs
this module instead (:mod:`tracker.core.kernel` chooses). It is slower, not different: the same
functions with the same arguments, the same interior-point method step for step (scaling,
starting point, Newton system, step rule, backtracking, stopping rules), the same failure codes
and the same errors for bad arguments. ``_kernel.c``'s comments describe the method and the
array layouts in full; this file follows its order of operations, down to summing in bin order
(``np.cumsum``, not numpy's pairwise ``sum``), so that the two agree to rounding.
``tests/test_kernel_parity.py`` holds them together.

Vector work (one expression over all bins) is numpy, except where numpy's answer differs from the
C library's in the last bit or the sign of a zero: powers and logarithms are taken with the C
library's ``pow`` and ``log`` (through :mod:`math`), ``fmax``/``fmin`` keep its rule for equal
values. The recursions that run bin after bin (the tridiagonal solve, the Riccati recursion) are
plain Python loops over floats. Floating-point exceptions give IEEE values here as in C (a NaN or
an infinity, never a warning or an error): the entry points run under
``np.errstate(all="ignore")`` and Python's scalar divisions go through :func:`_divide`.
"""

from __future__ import annotations

import math
import operator
import sys
from typing import NamedTuple

import numpy as np
import numpy.typing as npt

_Vector = npt.NDArray[np.float64]
_Counts = npt.NDArray[np.int64]

#: Steps stop this fraction of the way to the boundary of the positive slacks and multipliers.
BOUNDARY_FRACTION = 0.995
#: Step halvings tried per iteration.
BACKTRACKS = 60
#: Vectors of n doubles the compiled kernel allocates per problem of n bins (``VECTORS``); a
#: problem whose scratch space would not fit in a Py_ssize_t is refused alike here.
VECTORS = 42
_DOUBLE = 8
_INT_MAX = 2**31 - 1


# --------------------------------------------------------------------------------------------
# Arithmetic as C does it


def _power(x: _Vector, e: float) -> _Vector:
    """x ** e per bin, with the kernel's cheaper routes for the exponents the desk uses most."""
    if e == 1.0:
        return x
    if e == 0.5:
        return np.sqrt(x)
    if e == 2.0:
        return x * x
    if e == 1.5:
        return x * np.sqrt(x)
    if e == 0.0:
        return np.ones_like(x)
    # libm's pow, as the kernel calls it: numpy's own power differs in the last bit for about
    # one value in twenty, enough to move a stopping test by an iteration.
    try:
        return np.array([math.pow(value, e) for value in x.tolist()])
    except (ValueError, OverflowError):
        return np.array([_pow(value, e) for value in x.tolist()])


def _logs(x: _Vector) -> _Vector:
    """log per bin with libm's log, as the kernel calls it (numpy's differs in the last bit)."""
    try:
        return np.array([math.log(value) for value in x.tolist()])
    except ValueError:
        return np.array([_log(value) for value in x.tolist()])


def _pow(x: float, e: float) -> float:
    """C's ``pow``: a NaN or an infinity where Python's would raise."""
    try:
        return math.pow(x, e)
    except (ValueError, OverflowError):
        return float(np.power(np.float64(x), e))


def _sqrt(x: float) -> float:
    """C's ``sqrt``: NaN below zero."""
    return math.sqrt(x) if x >= 0.0 else math.nan


def _power1(x: float, e: float) -> float:
    """:func:`_power` of one value."""
    if e == 1.0:
        return x
    if e == 0.5:
        return _sqrt(x)
    if e == 2.0:
        return x * x
    if e == 1.5:
        return x * _sqrt(x)
    if e == 0.0:
        return 1.0
    return _pow(x, e)


def _log(x: float) -> float:
    """C's ``log``: minus infinity at zero, NaN below."""
    if x > 0.0 or math.isnan(x):
        return math.log(x)
    return -math.inf if x == 0.0 else math.nan


def _divide(a: float, b: float) -> float:
    """a / b as IEEE arithmetic has it (Python raises at b == 0)."""
    if b != 0.0:
        return a / b
    if a == 0.0 or math.isnan(a):
        return math.nan
    return math.copysign(math.inf, a) * math.copysign(1.0, b)


def _fmax(a: float, b: float) -> float:
    """C's ``fmax``: the larger, ignoring a NaN; b when they are equal (fmax(-0.0, 0.0) is 0.0
    in the C library here, where numpy's ``fmax`` keeps -0.0)."""
    if math.isnan(a):
        return b
    if math.isnan(b):
        return a
    return a if a > b else b


def _fmin(a: float, b: float) -> float:
    """C's ``fmin``: the smaller, ignoring a NaN; b when they are equal."""
    if math.isnan(a):
        return b
    if math.isnan(b):
        return a
    return a if a < b else b


def _at_least_zero(x: _Vector) -> _Vector:
    """``fmax(x, 0.0)`` per bin as the C library has it (NaN and -0.0 become 0.0)."""
    return np.where(x > 0.0, x, 0.0)


def _total(values: _Vector) -> float:
    """The sum in bin order, as a C loop from 0.0 adds (numpy's ``sum`` adds pairwise).

    The loop's first step, 0.0 + the first value, only turns -0.0 into 0.0: so does the + 0.0.
    """
    return float(np.cumsum(values)[-1]) + 0.0


def _largest_magnitude(values: _Vector) -> float:
    """max |value|, NaN when any is NaN (the kernel's loop keeps a NaN once it meets one)."""
    return float(np.max(np.abs(values)))


# --------------------------------------------------------------------------------------------
# Arguments, checked as the compiled kernel checks them


def _vector(value: object, n: int, writable: bool, name: str) -> _Vector:
    """A contiguous float64 vector of length n (any length when n < 0), sharing memory."""
    view = _buffer(value, writable)
    length = _length(view)
    if length < 0 or view.itemsize != _DOUBLE or view.format != "d" or (n >= 0 and length != n):
        raise ValueError(f"{name} must be a contiguous float64 vector of the same length")
    return np.asarray(view)


def _counts(value: object, n: int, writable: bool, name: str) -> _Counts:
    """A contiguous int64 vector of length n (any length when n < 0), sharing memory."""
    view = _buffer(value, writable)
    length = _length(view)
    if (
        length < 0
        or view.itemsize != 8
        or view.format not in ("l", "q")
        or (n >= 0 and length != n)
    ):
        raise ValueError(f"{name} must be a contiguous int64 vector of one per problem")
    return np.asarray(view)


def _length(view: memoryview) -> int:
    """The length of a one-dimensional buffer, else -1."""
    return view.shape[0] if view.ndim == 1 and view.shape else -1


def _buffer(value: object, writable: bool) -> memoryview:
    """The buffer of ``value``, refused where the kernel's request would be (the same errors)."""
    view = memoryview(value)  # type: ignore[arg-type]  # TypeError like PyObject_GetBuffer's
    if not view.c_contiguous:
        raise ValueError("ndarray is not C-contiguous")
    if writable and view.readonly:
        raise ValueError("buffer source array is read-only")
    return view


def _c_double(value: object) -> float:
    """A float argument as ``PyArg_ParseTuple``'s ``d`` takes it (no strings)."""
    if not hasattr(type(value), "__float__") and not hasattr(type(value), "__index__"):
        raise TypeError(f"must be real number, not {type(value).__name__}")
    return float(value)  # type: ignore[arg-type]


def _c_int(value: object) -> int:
    """An integer argument as ``PyArg_ParseTuple``'s ``i`` takes it."""
    number = operator.index(value)  # type: ignore[arg-type]  # TypeError for a float
    if number > _INT_MAX:
        raise OverflowError("signed integer is greater than maximum")
    if number < -_INT_MAX - 1:
        raise OverflowError("signed integer is less than minimum")
    return number


# --------------------------------------------------------------------------------------------
# The tridiagonal solve


def tridiagonal(d: _Vector, e: _Vector, b: _Vector, /) -> None:
    """Solve the symmetric tridiagonal system (diagonal d, off-diagonal e) for b in place.

    Raises:
        ValueError: The system is singular, or the vectors are not float64 of lengths n, n - 1, n.
    """
    diagonal = _vector(d, -1, False, "d")
    n = diagonal.shape[0]
    off = _vector(e, n - 1, False, "e")
    rhs = _vector(b, n, True, "b")
    if n < 1:
        raise ValueError("need at least one row")
    solved, solution = _solve_tridiagonal(diagonal.tolist(), off.tolist(), rhs.tolist())
    rhs[:] = solution
    if not solved:
        raise ValueError("singular tridiagonal system")


def _solve_tridiagonal(d: list[float], e: list[float], b: list[float]) -> tuple[bool, list[float]]:
    """Whether the system was solved, and what the kernel leaves in b (``solve_tridiagonal``).

    First as positive definite (L D L^T, no pivoting); if a pivot is not positive, Gaussian
    elimination with partial pivoting; if that meets a zero pivot, again with the diagonal
    shifted by 1e-12 of itself. Singular: False, with b as the last elimination left it (as the
    kernel leaves its buffer).
    """
    n = len(d)
    if n == 1:
        return (False, list(b)) if d[0] == 0.0 else (True, [b[0] / d[0]])
    dd = list(d)
    x = list(b)
    lower = [0.0] * (n - 1)
    positive = True
    for i in range(n - 1):
        if not dd[i] > 0.0:
            positive = False
            break
        lower[i] = e[i] / dd[i]
        dd[i + 1] -= lower[i] * e[i]
    if positive and dd[n - 1] > 0.0:
        for i in range(1, n):
            x[i] -= lower[i - 1] * x[i - 1]
        x[n - 1] /= dd[n - 1]
        for i in range(n - 2, -1, -1):
            x[i] = x[i] / dd[i] - lower[i] * x[i + 1]
        return True, x
    # Pivoting: dd diagonal, up superdiagonal, up2 the second superdiagonal fill-in.
    up2 = [0.0] * (n - 1)
    shifted = [value + 1e-12 * abs(value) + 1e-300 for value in d]
    for attempt in range(2):
        dd = list(d if attempt == 0 else shifted)
        x = list(b)
        up = list(e)
        singular = False
        for i in range(n - 1):
            sub = e[i]  # symmetric: the subdiagonal is e too
            if abs(dd[i]) >= abs(sub):
                if dd[i] == 0.0:
                    singular = True
                    break
                fact = sub / dd[i]
                dd[i + 1] -= fact * up[i]
                x[i + 1] -= fact * x[i]
                up2[i] = 0.0
            else:
                fact = _divide(dd[i], sub)
                dd[i] = sub
                temp = dd[i + 1]
                dd[i + 1] = up[i] - fact * temp
                if i < n - 2:
                    up2[i] = up[i + 1]
                    up[i + 1] = -fact * up[i + 1]
                else:
                    up2[i] = 0.0
                up[i] = temp
                top = x[i]
                x[i] = x[i + 1]
                x[i + 1] = top - fact * x[i + 1]
        if singular or dd[n - 1] == 0.0:
            continue
        x[n - 1] /= dd[n - 1]
        x[n - 2] = _divide(x[n - 2] - up[n - 2] * x[n - 1], dd[n - 2])
        for i in range(n - 3, -1, -1):
            x[i] = _divide(x[i] - up[i] * x[i + 1] - up2[i] * x[i + 2], dd[i])
        return True, x
    return False, x


# --------------------------------------------------------------------------------------------
# The interior-point method


class _Problem(NamedTuple):
    """One problem in the method's scaled units (``Problem`` in ``_kernel.c``)."""

    n: int
    forced: bool
    beta: float
    b: float
    p: float
    terminal: float
    h: _Vector
    k: _Vector
    c: _Vector
    k1: _Vector  # derivative coefficients
    k2: _Vector
    c1: _Vector
    c2: _Vector
    cap_f: _Vector  # 1 where a cap can bind, else 0
    capped: npt.NDArray[np.bool_]
    caps_safe: _Vector  # the cap, or 2 (more than any trade) where none can bind
    m: float  # number of inequality constraints


class _State(NamedTuple):
    """Everything :func:`_evaluate` derives from an iterate x."""

    v: _Vector
    gap_hi: _Vector
    d_bin: _Vector
    dd_bin: _Vector
    d_point: _Vector
    dd_point: _Vector
    x_end: float
    value: float


class _Sums(NamedTuple):
    """Per-iterate sums the merit function needs."""

    dual_sq: float
    centre: float
    gap: float
    dual_inf: float


def _evaluate(P: _Problem, x: _Vector) -> _State:
    """Trades, slacks, derivatives and the objective at inventories x (``evaluate``)."""
    n, b, p = P.n, P.b, P.p
    previous = np.empty(n)
    previous[0] = 1.0
    previous[1:] = x[:-1]
    v = previous - x
    v_beta = _power(v, P.beta)
    d_bin = P.h + P.k1 * v_beta - b * v
    dd_bin = P.k2 * v_beta / v - b
    gap_hi = P.caps_safe - v
    x_safe = x.copy()
    if P.forced:
        x_safe[n - 1] = 1.0
    x_pow = _power(x_safe, p - 1.0)
    d_point = P.c1 * x_pow
    dd_point = P.c2 * x_pow / x_safe
    value = _total(v * (P.h + P.k * v_beta - 0.5 * b * v) + P.c * x_pow * x_safe)
    x_end = float(x[n - 1])
    if not P.forced:
        end_pow = P.terminal * _power1(x_end, p - 1.0)
        d_point[n - 1] += p * end_pow - b * (1.0 - x_end)
        dd_point[n - 1] += _divide(p * (p - 1.0) * end_pow, x_end) + b
        value += end_pow * x_end + 0.5 * b * (1.0 - x_end) * (1.0 - x_end)
    return _State(v, gap_hi, d_bin, dd_bin, d_point, dd_point, x_end, value)


def _gradient(
    P: _Problem, d_bin: _Vector, shift: _Vector, d_point: _Vector, d_end: float
) -> _Vector:
    """Gradient in x from derivatives per bin (in v, d_bin - shift), per point and at the end."""
    n = P.n
    per_bin = d_bin - shift
    grad = d_point - per_bin
    grad[: n - 1] += per_bin[1:]
    if P.forced:
        grad[n - 1] = 0.0
    else:
        grad[n - 1] -= d_end
    return grad


def _assess(P: _Problem, S: _State, lo: _Vector, hi: _Vector, end: float) -> tuple[_Vector, _Sums]:
    """The dual residual r and the sums of the merit function (``assess``)."""
    r = _gradient(P, S.d_bin, lo - hi, S.d_point, end)
    comp_lo = lo * S.v
    comp_hi = hi * S.gap_hi  # hi is 0 where no cap can bind
    gap = _total(comp_lo + comp_hi)
    centre = _total(comp_lo * comp_lo + comp_hi * comp_hi)
    dual_sq = _total(r * r)
    dual_inf = _largest_magnitude(r)
    if not P.forced:
        comp_end = end * S.x_end
        gap += comp_end
        centre += comp_end * comp_end
    return r, _Sums(dual_sq, centre, gap, dual_inf)


def _merit(P: _Problem, s: _Sums, mu: float) -> float:
    """Squared norm of the residual of the KKT conditions perturbed by mu."""
    return s.dual_sq + s.centre - 2.0 * mu * s.gap + P.m * mu * mu


def _barrier(P: _Problem, S: _State, mu: float) -> float:
    """The log-barrier function: objective - mu * sum(log(slack))."""
    logs = _total(_logs(S.v) + P.cap_f * _logs(S.gap_hi))
    if not P.forced:
        logs += _log(S.x_end)
    return S.value - mu * logs


def _ratio_limit(value: _Vector, change: _Vector) -> _Vector:
    """Per bin the largest t >= 0 with value + t * change >= 0: infinite unless change < 0."""
    return np.where(change < 0.0, -value / change, math.inf)


def _ratio_limit1(value: float, change: float) -> float:
    """:func:`_ratio_limit` of one value."""
    return -value / change if change < 0.0 else math.inf


def _run(P: _Problem, start: _Vector, tolerance: float, max_iterations: int) -> tuple[int, _Vector]:
    """The method itself: iterations and the inventories, or a negative code (``run``)."""
    n, forced, m = P.n, P.forced, P.m
    # Start: the strictly feasible schedule, multipliers on the central path for mu = 1/m.
    x = 1.0 - np.cumsum(start)
    if forced:
        x[n - 1] = 0.0
    mu0 = 1.0 / m
    lo = mu0 / start
    hi = P.cap_f * mu0 / (P.caps_safe - start)
    end = 0.0 if forced else _divide(mu0, float(x[n - 1]))

    gap_tolerance = 1e-2 * tolerance
    dual_tolerance = 1e-3 * _sqrt(tolerance)
    S = _evaluate(P, x)
    _, sums = _assess(P, S, lo, hi, end)
    best_dual = math.inf
    flat = 0
    stalled = False
    for iteration in range(max_iterations + 1):
        gap = sums.gap
        dual_inf = sums.dual_inf
        improved = dual_inf < 0.5 * best_dual
        if improved:
            best_dual = dual_inf
        flat = 0 if (improved or gap > gap_tolerance) else flat + 1
        stalled = stalled or flat >= 5
        if (gap <= gap_tolerance and dual_inf <= dual_tolerance) or (stalled and gap <= tolerance):
            if forced:
                x[n - 1] = 0.0
            return iteration, x
        if iteration == max_iterations:
            break
        mu = _fmax(0.1 * gap, 0.1 * gap_tolerance) / m
        x_end = S.x_end

        # Newton system, tridiagonal in x.
        v, g = S.v, S.gap_hi
        w = S.dd_bin + lo / v + hi / g
        shift = mu / v - P.cap_f * mu / g
        rhs = -_gradient(P, S.d_bin, shift, S.d_point, 0.0 if forced else _divide(mu, x_end))
        diag = w + S.dd_point
        diag[: n - 1] += w[1:]
        off = -w[1:]
        if forced:
            diag[n - 1] = 1.0
            if n > 1:
                off[n - 2] = 0.0
        else:
            diag[n - 1] += _divide(end, x_end)
        solved, solution = _solve_tridiagonal(diag.tolist(), off.tolist(), rhs.tolist())
        if not solved:
            return -2, x
        dx = np.array(solution)
        if forced:
            dx[n - 1] = 0.0
        slope = -_total(rhs * dx)  # of the barrier function along dx
        dx_end = float(dx[n - 1])
        d_end = 0.0 if forced else _divide(mu, x_end) - end - _divide(end * dx_end, x_end)
        dv = np.empty(n)
        dv[0] = 0.0 - dx[0]
        dv[1:] = dx[:-1] - dx[1:]
        d_lo = mu / v - lo - lo * dv / v
        d_hi = P.cap_f * (mu / g - hi) + hi * dv / g
        candidates = [_ratio_limit(v, dv), _ratio_limit(lo, d_lo)]
        if P.capped.any():
            candidates.append(_ratio_limit(g, -dv)[P.capped])
            candidates.append(_ratio_limit(hi, d_hi)[P.capped])
        limit = math.inf
        for candidate in candidates:
            limit = _fmin(limit, float(np.fmin.reduce(candidate, initial=math.inf)))
        if not forced:
            limit = _fmin(limit, _ratio_limit1(x_end, dx_end))
            limit = _fmin(limit, _ratio_limit1(end, d_end))
        step = _fmin(1.0, BOUNDARY_FRACTION * limit)
        old = _merit(P, sums, mu)
        armijo_ready = False
        armijo_level = armijo_slope = 0.0
        # Backtrack until the step reduces the residual norm or satisfies Armijo's condition on
        # the barrier function.
        for _ in range(BACKTRACKS):
            x_new = x + step * dx
            lo_new = lo + step * d_lo
            hi_new = hi + step * d_hi
            end_new = end + step * d_end
            S_new = _evaluate(P, x_new)
            _, sums_new = _assess(P, S_new, lo_new, hi_new, end_new)
            reduced = (1.0 - 0.01 * step) * (1.0 - 0.01 * step) * old
            if _merit(P, sums_new, mu) <= reduced:
                break
            if not armijo_ready:
                old_barrier = _barrier(P, S, mu)
                armijo_level = old_barrier + 1e-13 * abs(old_barrier)
                armijo_slope = 1e-4 * slope
                armijo_ready = True
            if _barrier(P, S_new, mu) <= armijo_level + step * armijo_slope:
                break
            step *= 0.5
        moved = _largest_magnitude(x_new - x)
        stalled = moved <= 1e-14 or step < 1e-6
        x, lo, hi, end = x_new, lo_new, hi_new, end_new
        S, sums = S_new, sums_new
        if not math.isfinite(moved):
            return -3, x
    return -1, x


# --------------------------------------------------------------------------------------------
# Scaling and starting point


def _unscaled_objective(
    v: _Vector,
    h: _Vector,
    k: _Vector,
    c: _Vector,
    beta: float,
    b: float,
    p: float,
    terminal: float,
) -> float:
    """The objective of trades v (fractions of Q) with coefficients in units of Q."""
    executed = np.cumsum(v)
    x = _at_least_zero(1.0 - executed)
    value = _total(h * v + k * _power(v, 1.0 + beta) + c * _power(x, p))
    squares = _total(v * v)
    x_end = _fmax(1.0 - float(executed[-1]), 0.0)
    value += 0.5 * b * ((1.0 - x_end) * (1.0 - x_end) - squares)
    if math.isfinite(terminal):
        value += terminal * _power1(x_end, p)
    return value


def _yardstick(cost: float) -> float:
    """A cost usable as the unit of costs: itself when positive and finite, else 1."""
    return cost if cost > 0.0 and math.isfinite(cost) else 1.0


def _starting_point(
    caps: _Vector,
    h: _Vector,
    k: _Vector,
    c: _Vector,
    beta: float,
    b: float,
    p: float,
    terminal: float,
) -> tuple[float, _Vector]:
    """The cost scale and a strictly feasible start (``starting_point`` in ``_kernel.c``)."""
    start = np.where(caps < 1.0, caps, 1.0)  # fmin(caps, 1.0): NaN becomes 1
    total = _total(start)
    cap_sum = _total(caps)
    if not cap_sum > 1.0:  # the caps cannot complete the order
        start = start * 0.9
        return _yardstick(_unscaled_objective(start, h, k, c, beta, b, p, terminal)), start
    start = start / total
    scale = _yardstick(_unscaled_objective(start, h, k, c, beta, b, p, math.inf))
    if math.isfinite(terminal):
        left = 0.1 if terminal == 0.0 else _fmin(0.1, _pow(0.5 * scale / terminal, _divide(1.0, p)))
        keep = 1.0 - _fmax(left, 1e-9)
        start = start * keep
    return scale, start


def _solve_one(
    h_in: _Vector,
    k_in: _Vector,
    c_in: _Vector,
    caps_in: _Vector,
    trades: _Vector,
    quantity: float,
    beta: float,
    b: float,
    p: float,
    terminal: float,
    tolerance: float,
    max_iterations: int,
) -> int:
    """One problem in its own units: scale, start, run, write trades in shares (``solve_one``)."""
    n = h_in.shape[0]
    k_unit, c_unit = _pow(quantity, 1.0 + beta), _pow(quantity, p)
    h = h_in * quantity
    k = k_in * k_unit
    c = c_in * c_unit
    caps = caps_in / quantity
    caps[caps >= 1.0] = math.inf  # a cap of Q or more never binds
    b *= quantity * quantity
    terminal *= c_unit
    scale, start = _starting_point(caps, h, k, c, beta, b, p, terminal)
    forced = math.isinf(terminal)
    h /= scale
    k /= scale
    c /= scale
    k1 = k * (1.0 + beta)
    c1 = c * p
    capped = np.isfinite(caps)
    cap_f = capped.astype(np.float64)
    problem = _Problem(
        n=n,
        forced=forced,
        beta=beta,
        b=b / scale,
        p=p,
        terminal=terminal / scale,
        h=h,
        k=k,
        c=c,
        k1=k1,
        k2=k1 * beta,
        c1=c1,
        c2=c1 * (p - 1.0),
        cap_f=cap_f,
        capped=capped,
        caps_safe=np.where(capped, caps, 2.0),
        m=float(n) + (0.0 if forced else 1.0) + float(np.count_nonzero(capped)),
    )
    code, x = _run(problem, start, tolerance, max_iterations)
    if code >= 0:  # trades in shares from the inventories
        previous = np.empty(n)
        previous[0] = 1.0
        previous[1:] = x[:-1]
        trades[:] = _at_least_zero(previous - x) * quantity
    return code


# --------------------------------------------------------------------------------------------
# Entry points (the compiled kernel's, with its arguments)


def interior_point(
    h: _Vector,
    k: _Vector,
    c: _Vector,
    caps: _Vector,
    out: _Vector,
    sizes: _Counts,
    iterations: _Counts,
    quantity: _Vector,
    beta: _Vector,
    b: _Vector,
    p: _Vector,
    terminal: _Vector,
    tolerance: float,
    max_iterations: int,
    /,
) -> None:
    """Solve a batch of general problems laid end to end, each on its own.

    The arguments and the codes written to ``iterations`` are the compiled kernel's (see the
    header comment of ``tracker/core/_kernel.c``).

    Raises:
        ValueError: A vector is not contiguous float64 (int64 for the counts) of the right
            length, or a problem has no bin.
        OverflowError: The sizes add up to more bins than memory can hold.
    """
    tolerance = _c_double(tolerance)
    max_iterations = _c_int(max_iterations)
    size = _counts(sizes, -1, False, "sizes")
    count = size.shape[0]
    done = _counts(iterations, count, True, "iterations")
    total = largest = 0
    for each in size.tolist():
        if each < 1:
            raise ValueError("every problem needs at least one bin")
        if each > sys.maxsize - total:
            raise OverflowError("sizes add up to more bins than memory can hold")
        total += each
        largest = max(largest, each)
    if largest > sys.maxsize // (VECTORS * _DOUBLE):
        raise OverflowError("a problem has more bins than memory can hold")
    names = ("h", "k", "c", "caps", "out")
    per_bin = [
        _vector(value, total, name == "out", name)
        for value, name in zip((h, k, c, caps, out), names, strict=True)
    ]
    names = ("quantity", "beta", "b", "p", "terminal")
    per_problem = [
        _vector(value, count, False, name).tolist()
        for value, name in zip((quantity, beta, b, p, terminal), names, strict=True)
    ]
    h_all, k_all, c_all, caps_all, trades = per_bin
    quantities, betas, bs, ps, terminals = per_problem
    at = 0
    with np.errstate(all="ignore"):
        for i, n in enumerate(size.tolist()):
            part = slice(at, at + n)
            done[i] = _solve_one(
                h_all[part],
                k_all[part],
                c_all[part],
                caps_all[part],
                trades[part],
                quantities[i],
                betas[i],
                bs[i],
                ps[i],
                terminals[i],
                tolerance,
                max_iterations,
            )
            at += n


def riccati(
    h: _Vector,
    kappa: _Vector,
    c: _Vector,
    out: _Vector,
    a: float,
    d: float,
    forced: bool,
    quantity: float,
    /,
) -> float:
    """The linear-quadratic recursion of the exact path; returns the final inventory.

    Writes the trades into ``out``; returns NaN (and leaves ``out`` as it was) when some
    ``kappa`` is not positive. See ``riccati`` in ``tracker/core/_kernel.c``.

    Raises:
        ValueError: A vector is not contiguous float64 of the common length, or it is empty.
    """
    a, d, quantity, forced = _c_double(a), _c_double(d), _c_double(quantity), bool(forced)
    fixed = _vector(h, -1, False, "h")
    n = fixed.shape[0]
    gains = _vector(kappa, n, False, "kappa").tolist()
    risk = _vector(c, n, False, "c").tolist()
    trades = _vector(out, n, True, "out")
    if n < 1:
        raise ValueError("need at least one bin")
    if not all(value > 0.0 for value in gains):
        return math.nan
    fixed_list = fixed.tolist()
    last = n - 1 if forced else n
    gain = [0.0] * n
    offset = [0.0] * n
    # Backward pass: q_{n+1} = gain_n q_n + offset_n.
    for j in range(last - 1, -1, -1):
        s = gains[j] + risk[j] + a
        r = fixed_list[j] - d
        if s != 0.0:
            gain[j] = gains[j] / s
            offset[j] = 0.5 * r / s
            a = gains[j] - gains[j] * gains[j] / s
            d = fixed_list[j] - gains[j] * r / s
        else:
            gain[j] = _divide(gains[j], s)
            offset[j] = _divide(0.5 * r, s)
            a = gains[j] - _divide(gains[j] * gains[j], s)
            d = fixed_list[j] - _divide(gains[j] * r, s)
    q = quantity
    shares = [0.0] * n
    for j in range(last):
        q_next = gain[j] * q + offset[j]
        shares[j] = q - q_next
        q = q_next
    if forced:
        shares[n - 1] = q
        q = 0.0
    trades[:] = shares
    return q


def costs(
    h: _Vector,
    k: _Vector,
    c: _Vector,
    trades: _Vector,
    trajectory: _Vector,
    quantity: float,
    beta: float,
    b: float,
    p: float,
    terminal: float,
    settle: bool,
    /,
) -> tuple[float, float, float, float, float]:
    """The canonical objective of a schedule, term by term; fills the trajectory.

    See ``costs`` in ``tracker/core/_kernel.c`` for the terms, the clipping and ``settle``.

    Raises:
        ValueError: A vector is not contiguous float64 of the right length, it is empty, or a
            trade is not a finite number (then no buffer is changed).
    """
    quantity, beta, b, p, terminal = (_c_double(x) for x in (quantity, beta, b, p, terminal))
    settle = bool(settle)
    fixed = _vector(h, -1, False, "h")
    n = fixed.shape[0]
    impact = _vector(k, n, False, "k")
    risk = _vector(c, n, False, "c")
    v = _vector(trades, n, True, "trades")
    q = _vector(trajectory, n + 1, True, "trajectory")
    if n < 1:
        raise ValueError("need at least one bin")
    finite = np.isfinite(v)
    if not finite.all():
        bad = int(np.flatnonzero(~finite)[0])
        raise ValueError(f"trades must be finite numbers (bin {bad} is not)")
    with np.errstate(all="ignore"):
        v[:] = _at_least_zero(v)
        executed = np.cumsum(v)
        forced = math.isinf(terminal)
        left = quantity - float(executed[-1])
        if settle and quantity > 0.0 and abs(left) <= 1e-9 * quantity and (forced or left < 0.0):
            nonzero = np.flatnonzero(v[1:] != 0.0)
            last = int(nonzero[-1]) + 1 if nonzero.size else 0
            v[last] = _fmax(float(v[last]) + left, 0.0)
            executed[last:] = quantity  # the bins before it are unchanged
        q[0] = quantity
        q[1:] = _at_least_zero(quantity - executed)
        fixed_cost = _total(fixed * v)
        temporary = _total(impact * _power(v, 1.0 + beta))
        squares = _total(v * v)
        inventory = _total(risk * _power(q[1:], p))
        q_end = float(q[n])
        done = quantity - q_end
        if forced:
            terminal_cost = 0.0 if q_end <= 1e-9 * _fmax(quantity, 1.0) else math.inf
        else:
            terminal_cost = terminal * _power1(q_end, p)
    return fixed_cost, temporary, 0.5 * b * (done * done - squares), inventory, terminal_cost

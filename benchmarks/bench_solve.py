"""Speed of the solver against general-purpose peers on the same problems.

Run: ``.venv/bin/python benchmarks/bench_solve.py [--quick]``

Prints figures and ratios measured in one run (no timed assertions anywhere):

* the exact path (Riccati recursion): a linear-quadratic problem of 78 bins, against SciPy's
  ``solveh_banded`` on the same problem's optimality conditions (one tridiagonal linear system;
  the smallest general-purpose computation that gives the same answer);
* the general path (compiled interior point): 78 bins, square-root impact (beta = 0.5), penalty
  exponent 1.5, participation caps binding in some bins;
* a batch of 1,000 general problems with varied parameters, in one ``solve_batch`` call;
* peers on the general problems: SciPy's SLSQP (analytic gradient, scaled units) and cvxpy with
  Clarabel (a parametrised problem compiled once, then re-solved with new parameter values).
  Both peers' objectives are printed beside ours, evaluated by ``tracker.objective_value``;
* the numpy kernel (the fallback where the compiled one could not be built) against the compiled
  kernel on the same problems: the exact path, the general path and the batch, as ratios, and
  whether the schedules are the same.

The figures above it are taken with the kernel ``TRACKER_KERNEL`` chooses (the header says which).

Timings are medians of wall-clock times (``time.perf_counter``) over repeats; the machine is
shared, so the median rather than the mean. BLAS threads are pinned to one (one core).
All problem data is invented.
"""

from __future__ import annotations

import os

for _name in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_name, "1")

import argparse  # noqa: E402
import collections  # noqa: E402
import math  # noqa: E402
import platform  # noqa: E402
import statistics  # noqa: E402
import time  # noqa: E402
import warnings  # noqa: E402
from collections.abc import Callable  # noqa: E402
from datetime import UTC, datetime  # noqa: E402

import cvxpy as cp  # noqa: E402
import numpy as np  # noqa: E402
import numpy.typing as npt  # noqa: E402
from rich.console import Console  # noqa: E402
from rich.table import Table  # noqa: E402
from scipy.linalg import solveh_banded  # noqa: E402
from scipy.optimize import minimize  # noqa: E402

from tracker import Problem, Schedule, objective_value, solve, solve_batch  # noqa: E402
from tracker.core import kernel, kernel_numpy  # noqa: E402

FloatArray = npt.NDArray[np.float64]

BINS = 78  # five-minute bins of a 09:30-16:00 session
CLARABEL_OPTIONS = {"tol_gap_abs": 1e-10, "tol_gap_rel": 1e-10, "tol_feas": 1e-10}


# --------------------------------------------------------------------------------------------
# Problems (invented)


def u_shape(bins: int, low: float, high: float) -> FloatArray:
    """``high`` at the first and last bin, ``low`` in the middle."""
    s = np.linspace(-1.0, 1.0, bins)
    return low + (high - low) * s**2


def exact_problem() -> Problem:
    """Linear impact, quadratic risk, no caps: the Riccati path (Almgren-Chriss-like day)."""
    tau = 1.0 / BINS
    return Problem(
        quantity=4e5,
        bins=BINS,
        fixed_cost=0.01,
        temporary_impact=1e-6 / tau,
        impact_exponent=1.0,
        permanent_impact=1e-7,
        inventory_penalty=1e-6 * 0.3**2 * tau,
        penalty_exponent=2.0,
        terminal_penalty="force",
    )


def banded_reference(problem: Problem) -> FloatArray:
    """Inventories q_1 .. q_{N-1} of a forced linear-quadratic problem by SciPy's solveh_banded.

    With kappa_n = k_n - b/2 the objective is sum_n h_n v_n + kappa_n v_n^2 + c_n q_{n+1}^2 plus
    a constant (q_N = 0), v_n = q_n - q_{n+1}; setting its gradient in q_1 .. q_{N-1} to zero
    gives one symmetric tridiagonal system.
    """
    h = problem.fixed_cost
    kappa = problem.temporary_impact - 0.5 * problem.permanent_impact
    c = problem.inventory_penalty
    bands = np.zeros((2, problem.bins - 1))
    bands[1] = 2.0 * (kappa[:-1] + c[:-1] + kappa[1:])
    bands[0, 1:] = -2.0 * kappa[1:-1]
    rhs = h[:-1] - h[1:]
    rhs[0] += 2.0 * kappa[0] * problem.quantity
    solution: FloatArray = solveh_banded(bands, rhs)
    return solution


def general_problem() -> Problem:
    """Square-root impact, p = 1.5, U-shaped costs, caps binding around midday."""
    return Problem(
        quantity=4e5,
        bins=BINS,
        fixed_cost=u_shape(BINS, 0.01, 0.03),
        temporary_impact=u_shape(BINS, 2e-4, 5e-4),
        impact_exponent=0.5,
        inventory_penalty=3e-7,
        penalty_exponent=1.5,
        terminal_penalty="force",
        caps=[7000.0] * 8 + [None] * 27 + [3500.0] * 8 + [None] * 35,
    )


def batch_problems(count: int, seed: int = 11) -> list[Problem]:
    """``count`` general problems of 78 bins with varied quantity, costs, caps and urgency."""
    rng = np.random.default_rng(seed)
    volume_shape = u_shape(BINS, 0.6, 2.0)
    volume_shape /= volume_shape.sum()
    problems = []
    for _ in range(count):
        quantity = float(np.exp(rng.uniform(math.log(1e4), math.log(1e6))))
        daily_volume = quantity / rng.uniform(0.02, 0.1)  # order is 2-10 % of the day's volume
        volume = daily_volume * volume_shape * rng.lognormal(0.0, 0.3, BINS)
        participation = rng.uniform(0.15, 0.4)
        even = quantity / BINS
        p = float(rng.choice([1.5, 2.0]))
        problems.append(
            Problem(
                quantity=quantity,
                bins=BINS,
                fixed_cost=rng.uniform(0.005, 0.03) * u_shape(BINS, 1.0, rng.uniform(1.0, 3.0)),
                temporary_impact=rng.uniform(0.005, 0.05)
                / math.sqrt(even)
                * u_shape(BINS, 1.0, rng.uniform(1.0, 2.5)),
                impact_exponent=0.5,
                inventory_penalty=rng.uniform(0.001, 0.02) * even / quantity**p,
                penalty_exponent=p,
                terminal_penalty="force"
                if rng.random() < 0.7
                else float(rng.uniform(0.5, 5.0) * even / quantity**p),
                caps=participation * volume,
            )
        )
    return problems


# --------------------------------------------------------------------------------------------
# Peers


def _start(caps: FloatArray) -> FloatArray:
    """An even schedule (fractions of Q) moved under the caps: a feasible start for SLSQP."""
    x = np.zeros(caps.size)
    left = 1.0
    free = np.ones(caps.size, dtype=bool)
    while left > 1e-15 and free.any():
        share = left / free.sum()
        room = caps - x
        add = np.where(free, np.minimum(share, room), 0.0)
        x += add
        left -= add.sum()
        free &= caps - x > 1e-15
    return x


def slsqp(problem: Problem) -> FloatArray:
    """Trades from SciPy's SLSQP with the analytic gradient, in scaled units (forced only)."""
    quantity, beta, p = problem.quantity, problem.impact_exponent, problem.penalty_exponent
    scale = objective_value(problem, np.full(problem.bins, quantity / problem.bins))
    h = problem.fixed_cost * quantity / scale
    k = problem.temporary_impact * quantity ** (1.0 + beta) / scale
    c = problem.inventory_penalty * quantity**p / scale
    caps = np.minimum(problem.cap_array / quantity, 1.0)

    def fun(x: FloatArray) -> tuple[float, FloatArray]:
        v = np.maximum(x, 0.0)
        y = np.maximum(1.0 - np.cumsum(v), 0.0)
        value = h @ v + k @ v ** (1.0 + beta) + c @ y**p
        risk = p * c * y ** (p - 1.0)
        grad = h + (1.0 + beta) * k * v**beta - np.cumsum(risk[::-1])[::-1]
        return float(value), grad

    result = minimize(
        fun,
        _start(caps),
        jac=True,
        method="SLSQP",
        bounds=list(zip(np.zeros(problem.bins), caps, strict=True)),
        constraints=[
            {"type": "eq", "fun": lambda x: np.sum(x) - 1.0, "jac": lambda x: np.ones_like(x)}
        ],
        options={"ftol": 1e-12, "maxiter": 1000},
    )
    return _feasible(problem, result.x)


def _feasible(problem: Problem, x: FloatArray) -> FloatArray:
    """Shares from fractions, clipped to the bounds (peers stop within their own tolerances)."""
    trades = np.clip(x, 0.0, np.minimum(problem.cap_array / problem.quantity, 1.0))
    total = trades.sum()
    if total > 1.0:
        trades /= total
    return trades * problem.quantity


class ClarabelPeer:
    """The general problem as a cvxpy Parameter problem (DPP), compiled once and re-solved."""

    def __init__(self, bins: int, beta: float, p: float) -> None:
        self.beta, self.p = beta, p
        self.x = cp.Variable(bins, nonneg=True)
        self.h = cp.Parameter(bins, nonneg=True)
        self.k = cp.Parameter(bins, nonneg=True)
        self.c = cp.Parameter(bins, nonneg=True)
        self.caps = cp.Parameter(bins, nonneg=True)
        left = 1.0 - cp.cumsum(self.x)
        objective = (
            self.h @ self.x + self.k @ cp.power(self.x, 1.0 + beta) + self.c @ cp.power(left, p)
        )
        constraints = [left[bins - 1] == 0.0, self.x <= self.caps]
        self.model = cp.Problem(cp.Minimize(objective), constraints)
        assert self.model.is_dcp(dpp=True)

    def solve(self, problem: Problem) -> FloatArray:
        """Set the parameters from ``problem`` (forced, same beta and p) and solve."""
        assert problem.impact_exponent == self.beta and problem.penalty_exponent == self.p
        quantity = problem.quantity
        scale = objective_value(problem, np.full(problem.bins, quantity / problem.bins))
        self.h.value = problem.fixed_cost * quantity / scale
        self.k.value = problem.temporary_impact * quantity ** (1.0 + self.beta) / scale
        self.c.value = problem.inventory_penalty * quantity**self.p / scale
        self.caps.value = np.minimum(problem.cap_array / quantity, 1.0)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            self.model.solve(solver=cp.CLARABEL, **CLARABEL_OPTIONS)
        return _feasible(problem, np.asarray(self.x.value))


# --------------------------------------------------------------------------------------------
# Timing


def median_time(run: Callable[[], object], repeats: int, warmup: int = 3) -> float:
    """Median wall time of ``run`` in seconds."""
    for _ in range(warmup):
        run()
    times = []
    for _ in range(repeats):
        started = time.perf_counter()
        run()
        times.append(time.perf_counter() - started)
    return statistics.median(times)


def numpy_against_compiled(
    exact: Problem, general: Problem, batch: list[Problem], reps: Callable[[int], int]
) -> str:
    """Times of the numpy kernel over the compiled kernel's on the same problems, as one line."""
    compiled = kernel.compiled()
    if compiled is None:
        return "compiled kernel missing: nothing to compare with"
    chosen = kernel.KERNEL
    times: dict[str, list[float]] = {}
    schedules: dict[str, list[Schedule]] = {}
    try:
        for name, module in (("compiled", compiled), ("numpy", kernel_numpy)):
            kernel.KERNEL = module
            times[name] = [
                median_time(lambda: solve(exact), reps(1000)),
                median_time(lambda: solve(general), reps(100)),
                median_time(lambda: solve_batch(batch), 3, warmup=1),
            ]
            schedules[name] = solve_batch(batch)
    finally:
        kernel.KERNEL = chosen
    same = all(
        (a.iterations, a.trades.tolist()) == (b.iterations, b.trades.tolist())
        for a, b in zip(schedules["compiled"], schedules["numpy"], strict=True)
    )
    exact_x, general_x, batch_x = (
        slow / fast for slow, fast in zip(times["numpy"], times["compiled"], strict=True)
    )
    return (
        f"numpy over compiled: exact path {exact_x:.1f}x, general path {general_x:.1f}x "
        f"({times['numpy'][1] * 1e3:.2f} ms), batch of {len(batch):,} {batch_x:.1f}x "
        f"({times['numpy'][2]:.2f} s); schedules "
        + ("identical (trades and iterations)" if same else "DIFFERENT")
    )


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="fewer repeats (a smoke run)")
    args = parser.parse_args()
    scale = 0.1 if args.quick else 1.0

    def reps(n: int) -> int:
        return max(3, int(n * scale))

    console = Console(width=150)
    console.print(
        f"tracker solver benchmark, {datetime.now(UTC):%Y-%m-%d %H:%M} UTC, "
        f"{platform.processor() or platform.machine()}, {os.cpu_count()} cores, "
        f"Python {platform.python_version()}, NumPy {np.__version__}, kernel {kernel.NAME}"
    )
    started_all = time.perf_counter()

    exact = exact_problem()
    exact_schedule = solve(exact)
    assert exact_schedule.method == "riccati", exact_schedule.method
    exact_s = median_time(lambda: solve(exact), reps(3000))
    banded = banded_reference(exact)
    banded_gap = float(np.max(np.abs(banded - exact_schedule.trajectory[1:-1]))) / exact.quantity
    banded_s = median_time(lambda: banded_reference(exact), reps(3000))

    general = general_problem()
    general_schedule = solve(general)
    assert general_schedule.method == "interior_point", general_schedule.method
    at_cap = int(np.sum(np.abs(general_schedule.trades - general.cap_array) <= 1e-6 * 4e5))
    general_s = median_time(lambda: solve(general), reps(300))

    batch = batch_problems(1000)
    batch_s = median_time(lambda: solve_batch(batch), reps(7), warmup=1)
    one_by_one = solve_batch(batch)
    batch_methods = collections.Counter(s.method for s in one_by_one)
    batch_short = sum(s.status == "capped_shortfall" for s in one_by_one)
    batch_caps = sum(
        int(np.any(np.abs(s.trades - p.cap_array) <= 1e-6 * p.quantity))
        for s, p in zip(one_by_one, batch, strict=True)
    )

    slsqp_trades = slsqp(general)
    slsqp_s = median_time(lambda: slsqp(general), reps(20), warmup=1)
    peer = ClarabelPeer(BINS, 0.5, 1.5)
    started = time.perf_counter()
    clarabel_trades = peer.solve(general)
    clarabel_cold_s = time.perf_counter() - started
    clarabel_s = median_time(lambda: peer.solve(general), reps(50))

    ours = general_schedule.objective
    slsqp_obj = objective_value(general, slsqp_trades)
    not_worse = ours <= slsqp_obj * (1 + 1e-9)
    clarabel_obj = objective_value(general, clarabel_trades)

    # Peers on 20 forced problems of the batch (beta 0.5, p 1.5): objective gaps relative to ours.
    sample = [p for p in batch if p.forced and p.penalty_exponent == 1.5][: reps(20)]
    ours_sample = solve_batch(sample)
    gap_slsqp, gap_clarabel, slsqp_times, clarabel_times = [], [], [], []
    for problem, schedule in zip(sample, ours_sample, strict=True):
        started = time.perf_counter()
        trades = slsqp(problem)
        slsqp_times.append(time.perf_counter() - started)
        gap_slsqp.append(objective_value(problem, trades) / schedule.objective - 1.0)
        started = time.perf_counter()
        trades = peer.solve(problem)
        clarabel_times.append(time.perf_counter() - started)
        gap_clarabel.append(objective_value(problem, trades) / schedule.objective - 1.0)
    fallback = numpy_against_compiled(exact, general, batch, reps)
    total_s = time.perf_counter() - started_all

    def us(seconds: float) -> str:
        return f"{seconds * 1e6:,.1f} us"

    def ms(seconds: float) -> str:
        return f"{seconds * 1e3:,.2f} ms"

    table = Table(title="Solver speed (medians; one core)")
    table.add_column("what")
    table.add_column("time", justify="right")
    table.add_column("objective", justify="right")
    table.add_column("ratio / note")
    table.add_column("target")
    table.add_row(
        "exact path, N=78 (riccati)",
        us(exact_s),
        f"{exact_schedule.objective:,.4f}",
        f"{exact_s / banded_s:.2f}x SciPy solveh_banded on its optimality conditions "
        f"({us(banded_s)}; trajectories {banded_gap:.1e} of Q apart)",
        f"<= 50 us: {'met' if exact_s <= 50e-6 else 'MISSED'}",
    )
    table.add_row(
        f"general path, N=78, beta=0.5, p=1.5, {at_cap} bins at cap",
        ms(general_s),
        f"{ours:,.6f}",
        f"{general_schedule.iterations} iterations",
        f"<= 2 ms: {'met' if general_s <= 2e-3 else 'MISSED'}",
    )
    table.add_row(
        "SciPy SLSQP, analytic gradient, scaled",
        ms(slsqp_s),
        f"{slsqp_obj:,.6f}",
        f"{slsqp_s / general_s:,.0f}x ours; objective {slsqp_obj / ours - 1:+.2e} vs ours",
        f">= 50x: {'met' if slsqp_s >= 50 * general_s and not_worse else 'MISSED'}",
    )
    table.add_row(
        "cvxpy + Clarabel, DPP, warm (compiled once)",
        ms(clarabel_s),
        f"{clarabel_obj:,.6f}",
        f"{clarabel_s / general_s:,.1f}x ours (cold: {ms(clarabel_cold_s)}); "
        f"objective {clarabel_obj / ours - 1:+.2e} vs ours",
        "",
    )
    table.add_row(
        f"batch of {len(batch):,} general problems (solve_batch)",
        ms(batch_s),
        "",
        f"{batch_s / len(batch) * 1e6:,.0f} us per problem; "
        f"{len(batch):,} x the Clarabel median below: "
        f"{len(batch) * statistics.median(clarabel_times):.1f} s; {batch_caps} with a cap binding; "
        f"{batch_short} capped shortfall; {dict(sorted(batch_methods.items()))}",
        f"<= 0.5 s: {'met' if batch_s <= 0.5 else 'MISSED'}",
    )
    table.add_row(
        f"peers on {len(sample)} batch problems",
        f"SLSQP {ms(statistics.median(slsqp_times))}, "
        f"Clarabel {ms(statistics.median(clarabel_times))}",
        "",
        f"objective vs ours: SLSQP {min(gap_slsqp):+.1e} .. {max(gap_slsqp):+.1e}; "
        f"Clarabel {min(gap_clarabel):+.1e} .. {max(gap_clarabel):+.1e}",
        "",
    )
    console.print(table)
    console.print(fallback)
    console.print(f"total run {total_s:.1f} s")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())

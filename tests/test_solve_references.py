"""The solver against references from outside the project.

Each check names its source beside it:

* Almgren and Chriss (2000), "Optimal execution of portfolio transactions", Journal of Risk 3(2):
  the discrete optimal trajectory and its expected cost and variance.
* Cartea, Jaimungal and Penalva (2015), Algorithmic and High-Frequency Trading, ch. 6: the
  continuous-time closed form with running and terminal inventory penalties, reached as bins shrink.
* SciPy's ``solve_ivp`` on the Riccati equation with time-varying coefficients.
* cvxpy with the Clarabel interior-point solver on the general (non-quadratic, capped) problem.

Parameter values are invented for these checks unless a test says otherwise.
"""

from __future__ import annotations

import math
import warnings
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import cvxpy as cp
import numpy as np
import numpy.typing as npt
import pytest
from scipy.integrate import solve_ivp

from tracker import Problem, solve
from tracker.errors import ProblemError

FloatArray = npt.NDArray[np.float64]

# Tolerances asked of the solver (the figures).
TRAJECTORY_RTOL = 1e-9  # closed-form trajectories, relative to the quantity
COST_RTOL = 1e-9  # closed-form costs
OBJECTIVE_RTOL = 1e-7  # against cvxpy/Clarabel
CONSTRAINT_TOL = 1e-9  # constraints, as a fraction of the quantity


# --------------------------------------------------------------------------------------------
# An independent evaluation of the canonical objective (DESIGN.md), written from the formula.
# --------------------------------------------------------------------------------------------


def reference_objective(problem: Problem, trades: FloatArray) -> float:
    """The canonical objective of ``trades``, evaluated term by term straight from the formula.

    The forced-completion constraint is not priced here (it is checked separately); tiny negative
    values left by an interior-point solver are clipped before fractional powers.
    """
    q0 = problem.quantity
    v = np.clip(np.asarray(trades, dtype=np.float64), 0.0, None)
    q = q0 - np.cumsum(v)  # q_1 .. q_N
    beta = problem.impact_exponent
    p = problem.penalty_exponent
    total = float(problem.fixed_cost @ v)
    total += float(problem.temporary_impact @ v ** (1.0 + beta))
    total += problem.permanent_impact / 2.0 * ((q0 - q[-1]) ** 2 - float(v @ v))
    q_pos = np.clip(q, 0.0, None)
    total += float(problem.inventory_penalty @ q_pos**p)
    if not problem.forced:
        total += problem.terminal_penalty * q_pos[-1] ** p
    return total


def twap(problem: Problem) -> FloatArray:
    """The even schedule: the same number of shares in every bin."""
    return np.full(problem.bins, problem.quantity / problem.bins)


# --------------------------------------------------------------------------------------------
# Almgren and Chriss (2000), Journal of Risk 3(2), section 2 (discrete trading, linear impact).
# Holdings x_k at t_k = k tau, trades n_k = x_{k-1} - x_k, permanent impact gamma, temporary
# impact eta, fixed cost epsilon per share, risk aversion lambda:
#   E = gamma X^2 / 2 + epsilon sum |n_k| + (eta~ / tau) sum n_k^2,  eta~ = eta - gamma tau / 2
#   V = sigma^2 sum_k tau x_k^2
# and the minimiser of E + lambda V is x_j = X sinh(kappa (T - t_j)) / sinh(kappa T) with
#   (2 / tau^2) (cosh(kappa tau) - 1) = lambda sigma^2 / eta~.
# Closed forms of E and V on that trajectory are the paper's (equation numbers from memory, so not
# cited; the formulas are checked below against the sums above, which are the paper's definitions).
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class AlmgrenChriss:
    """One parameter set of the Almgren-Chriss model."""

    shares: float  # X
    horizon: float  # T
    periods: int  # N
    sigma: float  # volatility, currency per share per sqrt(time unit)
    eta: float  # temporary impact
    gamma: float  # permanent impact
    risk_aversion: float  # lambda
    epsilon: float  # fixed cost per share

    @property
    def tau(self) -> float:
        return self.horizon / self.periods

    @property
    def eta_tilde(self) -> float:
        return self.eta - self.gamma * self.tau / 2.0

    @property
    def kappa(self) -> float:
        tau = self.tau
        kappa_tilde_sq = self.risk_aversion * self.sigma**2 / self.eta_tilde
        return math.acosh(1.0 + kappa_tilde_sq * tau**2 / 2.0) / tau

    def trajectory(self) -> FloatArray:
        t = np.arange(self.periods + 1) * self.tau
        kappa, big_t = self.kappa, self.horizon
        return self.shares * np.sinh(kappa * (big_t - t)) / math.sinh(kappa * big_t)

    def expected_cost(self) -> float:
        """E on the optimal trajectory (Almgren and Chriss 2000, closed form)."""
        x, kappa, tau, big_t = self.shares, self.kappa, self.tau, self.horizon
        shape = math.tanh(kappa * tau / 2.0) * (
            tau * math.sinh(2.0 * kappa * big_t) + 2.0 * big_t * math.sinh(kappa * tau)
        )
        return (
            self.gamma * x**2 / 2.0
            + self.epsilon * x
            + self.eta_tilde * x**2 * shape / (2.0 * tau**2 * math.sinh(kappa * big_t) ** 2)
        )

    def variance(self) -> float:
        """V on the optimal trajectory (Almgren and Chriss 2000, closed form)."""
        x, kappa, tau, big_t = self.shares, self.kappa, self.tau, self.horizon
        num = tau * math.sinh(kappa * big_t) * math.cosh(kappa * (big_t - tau)) - big_t * math.sinh(
            kappa * tau
        )
        return (
            self.sigma**2
            * x**2
            * num
            / (2.0 * math.sinh(kappa * big_t) ** 2 * math.sinh(kappa * tau))
        )

    def problem(self, *, with_permanent: bool) -> Problem:
        """Our canonical problem for this parameter set.

        ``with_permanent=False``: k = eta~ / tau, b = 0 (objective = E + lambda V - gamma X^2 / 2).
        ``with_permanent=True``: k = eta / tau, b = gamma (objective = E + lambda V exactly).
        """
        tau = self.tau
        return Problem(
            quantity=self.shares,
            bins=self.periods,
            fixed_cost=self.epsilon,
            temporary_impact=(self.eta if with_permanent else self.eta_tilde) / tau,
            impact_exponent=1.0,
            permanent_impact=self.gamma if with_permanent else 0.0,
            inventory_penalty=self.risk_aversion * self.sigma**2 * tau,
            penalty_exponent=2.0,
            terminal_penalty="force",
        )


AC_CASES = {
    # Modelled on the paper's worked example (X = 10^6 shares, T = 5 days, N = 5, sigma = 0.95,
    # eta = 2.5e-6, gamma = 2.5e-7, epsilon = 0.0625; values from memory), with lambda = 2e-6.
    "paper-like-5-days": AlmgrenChriss(1e6, 5.0, 5, 0.95, 2.5e-6, 2.5e-7, 2e-6, 0.0625),
    # One trading day in 78 five-minute bins (invented).
    "one-day-78-bins": AlmgrenChriss(4e5, 1.0, 78, 0.3, 1e-6, 1e-7, 1e-6, 0.01),
    # Strong urgency: kappa T around 9 (invented).
    "urgent-20-bins": AlmgrenChriss(2.5e5, 1.0, 20, 2.0, 2e-6, 5e-7, 5e-5, 0.02),
    # Very low urgency: close to an even schedule (invented).
    "patient-13-bins": AlmgrenChriss(1e5, 1.0, 13, 0.5, 5e-5, 1e-6, 1e-8, 0.005),
}
AC_IDS = list(AC_CASES)
AC_VALUES = list(AC_CASES.values())


@pytest.mark.parametrize("case", AC_VALUES, ids=AC_IDS)
def test_almgren_chriss_reference_formulas_are_consistent(case: AlmgrenChriss) -> None:
    """The closed-form E and V of Almgren and Chriss (2000) equal their defining sums."""
    x = case.trajectory()
    n = -np.diff(x)
    e_sum = (
        case.gamma * case.shares**2 / 2.0
        + case.epsilon * n.sum()
        + case.eta_tilde / case.tau * float(n @ n)
    )
    v_sum = case.sigma**2 * case.tau * float(x[1:] @ x[1:])
    assert (e_sum, v_sum) == pytest.approx((case.expected_cost(), case.variance()), rel=1e-12)


@pytest.mark.parametrize(
    "with_permanent", [False, True], ids=["k=eta~/tau,b=0", "k=eta/tau,b=gamma"]
)
@pytest.mark.parametrize("case", AC_VALUES, ids=AC_IDS)
def test_almgren_chriss_trajectory(case: AlmgrenChriss, with_permanent: bool) -> None:
    """The trajectory is X sinh(kappa (T - t_j)) / sinh(kappa T) (Almgren and Chriss 2000)."""
    schedule = solve(case.problem(with_permanent=with_permanent))
    error = np.max(np.abs(schedule.trajectory - case.trajectory())) / case.shares
    assert error <= TRAJECTORY_RTOL


@pytest.mark.parametrize("case", AC_VALUES, ids=AC_IDS)
def test_almgren_chriss_uses_exact_riccati_path(case: AlmgrenChriss) -> None:
    """A linear-quadratic problem without caps is solved by the exact Riccati recursion."""
    expected = "riccati"
    assert expected == solve(case.problem(with_permanent=True)).method


@pytest.mark.parametrize("case", AC_VALUES, ids=AC_IDS)
def test_almgren_chriss_expected_cost_with_reduced_eta(case: AlmgrenChriss) -> None:
    """With k = eta~/tau, b = 0 the trading costs are E - gamma X^2/2 (Almgren and Chriss 2000)."""
    cost = solve(case.problem(with_permanent=False)).cost
    trading = cost["fixed_cost"] + cost["temporary_impact"] + cost["permanent_impact"]
    expected = case.expected_cost() - case.gamma * case.shares**2 / 2.0
    assert expected == pytest.approx(trading, rel=COST_RTOL)


@pytest.mark.parametrize("case", AC_VALUES, ids=AC_IDS)
def test_almgren_chriss_expected_cost_with_permanent_impact(case: AlmgrenChriss) -> None:
    """With k = eta/tau, b = gamma the trading costs are exactly E (Almgren and Chriss 2000)."""
    cost = solve(case.problem(with_permanent=True)).cost
    trading = cost["fixed_cost"] + cost["temporary_impact"] + cost["permanent_impact"]
    assert case.expected_cost() == pytest.approx(trading, rel=COST_RTOL)


@pytest.mark.parametrize(
    "with_permanent", [False, True], ids=["k=eta~/tau,b=0", "k=eta/tau,b=gamma"]
)
@pytest.mark.parametrize("case", AC_VALUES, ids=AC_IDS)
def test_almgren_chriss_variance(case: AlmgrenChriss, with_permanent: bool) -> None:
    """The inventory penalty with c = lambda sigma^2 tau is lambda V (Almgren and Chriss 2000)."""
    cost = solve(case.problem(with_permanent=with_permanent)).cost
    expected = case.risk_aversion * case.variance()
    assert expected == pytest.approx(cost["inventory_penalty"], rel=COST_RTOL)


@pytest.mark.parametrize("case", AC_VALUES, ids=AC_IDS)
def test_almgren_chriss_objective(case: AlmgrenChriss) -> None:
    """The objective is E + lambda V when b = gamma (Almgren and Chriss 2000)."""
    expected = case.expected_cost() + case.risk_aversion * case.variance()
    assert expected == pytest.approx(
        solve(case.problem(with_permanent=True)).objective, rel=COST_RTOL
    )


# --------------------------------------------------------------------------------------------
# Cartea, Jaimungal and Penalva (2015), Algorithmic and High-Frequency Trading, ch. 6:
# liquidate Q0 over [0, T] at rate nu with temporary impact k (cost k nu^2 dt), running inventory
# penalty phi Q^2 dt and terminal penalty alpha Q_T^2, no permanent impact. The cost-to-go is
# h(t) q^2 with the Riccati equation h' = h^2 / k - phi, h(T) = alpha, and the optimal rate is
# nu = h q / k. Its solution gives
#   Q_t = Q0 (zeta e^{g (T-t)} - e^{-g (T-t)}) / (zeta e^{g T} - e^{-g T}),
#   g = sqrt(phi / k),  zeta = (alpha + sqrt(k phi)) / (alpha - sqrt(k phi)),
# and Q_t = Q0 sinh(g (T-t)) / sinh(g T) as alpha -> infinity (from memory: the form is the book's,
# the equation number is not cited; it is re-derived here and checked against SciPy below).
#
# Discrete problem with bins of length tau: k_n = k / tau (so k_n v_n^2 = k nu^2 tau),
# c_n = phi tau, A = alpha. The interior optimality condition k (q_{n+1} - 2 q_n + q_{n-1}) / tau^2
# = phi q_n is a central difference of k Q'' = phi Q, second-order accurate; the terminal condition
# k (q_{N-1} - q_N) / tau = (alpha + phi tau) q_N is a one-sided difference of -k Q'(T) = alpha Q_T
# and is off by (tau / 2) phi Q_T: first order when alpha is finite (and Q_T is not negligible),
# second order when completion is forced (then this is the Almgren-Chriss case, where
# kappa - g = O(tau^2)).
# --------------------------------------------------------------------------------------------

CJP_QUANTITY = 2e5
CJP_HORIZON = 1.0
CJP_K = 2e-3
CJP_PHI = 1e-2  # g T = sqrt(5); sqrt(k phi) = 4.47e-3
CJP_BINS = (200, 400, 800, 1600, 3200)


def cjp_inventory(alpha: float, t: FloatArray) -> FloatArray:
    """Cartea, Jaimungal and Penalva (2015, ch. 6) optimal inventory at times ``t``."""
    q0, big_t, k, phi = CJP_QUANTITY, CJP_HORIZON, CJP_K, CJP_PHI
    g = math.sqrt(phi / k)
    if math.isinf(alpha):
        return q0 * np.sinh(g * (big_t - t)) / math.sinh(g * big_t)
    root = math.sqrt(k * phi)
    zeta = (alpha + root) / (alpha - root)
    return (
        q0
        * (zeta * np.exp(g * (big_t - t)) - np.exp(-g * (big_t - t)))
        / (zeta * math.exp(g * big_t) - math.exp(-g * big_t))
    )


def observed_orders(errors: list[float]) -> FloatArray:
    """log2 of successive error ratios when the number of bins doubles."""
    e = np.asarray(errors)
    return np.log2(e[:-1] / e[1:])


# (alpha, derived order, bound on the error at 3,200 bins as a fraction of Q0): alpha below and
# above sqrt(k phi) (zeta < 0 and zeta > 1), and forced completion. The bounds are about twice the
# errors measured when these tests were written (5e-5, 5e-7, 6e-9).
CJP_CASES = [
    pytest.param(1e-3, 1.0, 1e-4, id="alpha-below-sqrt(k*phi)"),
    pytest.param(5e-2, 1.0, 1e-6, id="alpha-above-sqrt(k*phi)"),
    pytest.param(math.inf, 2.0, 2e-8, id="force"),
]


def cjp_problem(alpha: float, bins: int) -> Problem:
    """The discrete problem whose small-bin limit is the CJP (2015, ch. 6) closed form."""
    tau = CJP_HORIZON / bins
    return Problem(
        quantity=CJP_QUANTITY,
        bins=bins,
        temporary_impact=CJP_K / tau,
        inventory_penalty=CJP_PHI * tau,
        terminal_penalty="force" if math.isinf(alpha) else alpha,
    )


@pytest.mark.parametrize("alpha", [1e-3, 5e-2], ids=["alpha-below", "alpha-above"])
def test_cjp_closed_form_solves_the_riccati_equation(alpha: float) -> None:
    """The closed form matches SciPy's solve_ivp on h' = h^2/k - phi, Q' = -h Q / k."""
    k, phi = CJP_K, CJP_PHI
    path = riccati_reference(lambda t: np.full_like(t, k), lambda t: np.full_like(t, phi), alpha)
    t = np.linspace(0.0, CJP_HORIZON, 101)
    error = np.max(np.abs(path(t) - cjp_inventory(alpha, t))) / CJP_QUANTITY
    assert error <= 1e-8


def cjp_error(alpha: float, bins: int) -> float:
    """Max distance, as a fraction of Q0, between the discrete trajectory and the closed form."""
    t = np.arange(bins + 1) * (CJP_HORIZON / bins)
    trajectory = solve(cjp_problem(alpha, bins)).trajectory
    return float(np.max(np.abs(trajectory - cjp_inventory(alpha, t)))) / CJP_QUANTITY


@pytest.mark.parametrize(("alpha", "order", "bound"), CJP_CASES)
def test_cjp_closed_form_is_the_small_bin_limit(alpha: float, order: float, bound: float) -> None:
    """The discrete trajectory tends to the CJP (2015, ch. 6) closed form at the derived rate."""
    errors = [cjp_error(alpha, bins) for bins in CJP_BINS]
    orders = observed_orders(errors)
    assert np.all(np.abs(orders - order) <= 0.1), f"errors {errors}, orders {orders}"


@pytest.mark.parametrize(("alpha", "order", "bound"), CJP_CASES)
def test_cjp_error_at_fine_bins(alpha: float, order: float, bound: float) -> None:
    """At 3,200 bins the trajectory is within the stated bound of the CJP (2015) closed form."""
    assert cjp_error(alpha, CJP_BINS[-1]) <= bound


# --------------------------------------------------------------------------------------------
# SciPy's solve_ivp on the Riccati equation with time-varying (U-shaped) coefficients: integrate
# h' = h^2 / k(t) - phi(t) backward from h(T) = alpha, then Q' = -h Q / k forward. The discrete
# problem samples k at bin midpoints (k_n = k(t_n + tau/2) / tau) and phi at bin ends
# (c_n = phi(t_{n+1}) tau, the inventory it prices); by the argument above, first-order convergence.
# --------------------------------------------------------------------------------------------

Curve = Callable[[Any], Any]


def riccati_reference(k: Curve, phi: Curve, alpha: float) -> Callable[[FloatArray], FloatArray]:
    """Inventory path from SciPy's solve_ivp (DOP853, rtol 1e-10) on the Riccati equation."""
    big_t, q0 = CJP_HORIZON, CJP_QUANTITY
    backward = solve_ivp(
        lambda t, h: h**2 / k(t) - phi(t),
        (big_t, 0.0),
        [alpha],
        method="DOP853",
        rtol=1e-10,
        atol=1e-14,
        dense_output=True,
    )
    assert backward.success
    forward = solve_ivp(
        lambda t, q: -backward.sol(t) * q / k(t),
        (0.0, big_t),
        [q0],
        method="DOP853",
        rtol=1e-10,
        atol=1e-10 * q0,
        dense_output=True,
    )
    assert forward.success
    return lambda t: forward.sol(t)[0]


def u_shaped_impact(t: Any) -> Any:
    """Temporary impact high at the open and the close (invented shape)."""
    return CJP_K * (1.0 + 4.0 * (t / CJP_HORIZON - 0.5) ** 2)


def u_shaped_risk(t: Any) -> Any:
    """Inventory penalty high at the open and the close (invented shape)."""
    return CJP_PHI * (0.5 + 6.0 * (t / CJP_HORIZON - 0.5) ** 2)


ODE_BINS = (200, 400, 800, 1600)


def ode_errors(alpha: float) -> list[float]:
    """Max trajectory error against the solve_ivp reference, per number of bins in ODE_BINS."""
    reference = riccati_reference(u_shaped_impact, u_shaped_risk, alpha)
    errors = []
    for bins in ODE_BINS:
        tau = CJP_HORIZON / bins
        t = np.arange(bins + 1) * tau
        problem = Problem(
            quantity=CJP_QUANTITY,
            bins=bins,
            temporary_impact=u_shaped_impact(t[:-1] + tau / 2.0) / tau,
            inventory_penalty=u_shaped_risk(t[1:]) * tau,
            terminal_penalty=alpha,
        )
        errors.append(
            float(np.max(np.abs(solve(problem).trajectory - reference(t)))) / CJP_QUANTITY
        )
    return errors


# (alpha, bound on the error at 1,600 bins as a fraction of Q0): about twice the errors measured
# when these tests were written (2.1e-4 and 1.5e-5); the observed order was 0.996-0.999.
ODE_CASES = [
    pytest.param(1e-3, 4e-4, id="alpha-low"),
    pytest.param(2e-2, 3e-5, id="alpha-high"),
]


@pytest.mark.parametrize(("alpha", "bound"), ODE_CASES)
def test_riccati_ode_first_order_convergence(alpha: float, bound: float) -> None:
    """With U-shaped k(t), phi(t) the discrete path converges to solve_ivp's at order 1 +- 0.1."""
    orders = observed_orders(ode_errors(alpha))
    assert np.all(np.abs(orders - 1.0) <= 0.1), f"orders {orders}"


@pytest.mark.parametrize(("alpha", "bound"), ODE_CASES)
def test_riccati_ode_error_at_fine_bins(alpha: float, bound: float) -> None:
    """At 1,600 bins the discrete path is within the stated bound of solve_ivp's."""
    assert ode_errors(alpha)[-1] <= bound


# --------------------------------------------------------------------------------------------
# cvxpy with Clarabel on the general problem. The reference is solved in scaled units (trades as
# fractions x = v / Q of the quantity, objective divided by the even schedule's cost): in raw share
# units Clarabel can stop at "optimal_inaccurate" with an objective a few percent too high.
# The permanent-impact term (b/2)[(sum v)^2 - sum v^2] is concave in part, so it is only written in
# DCP form with linear impact (beta = 1): (k - b/2) sum v^2 + (b/2) (sum v)^2.
# --------------------------------------------------------------------------------------------

CLARABEL_OPTIONS = {
    "tol_gap_abs": 1e-10,
    "tol_gap_rel": 1e-10,
    "tol_feas": 1e-10,
    "tol_ktratio": 1e-8,
    "max_iter": 500,
}


@dataclass(frozen=True)
class Reference:
    """A cvxpy/Clarabel solution, back in shares and currency."""

    trades: FloatArray
    objective: float
    status: str


def cvxpy_reference(problem: Problem) -> Reference:
    """Solve ``problem`` with cvxpy + Clarabel in scaled units (see the section comment)."""
    q0, bins = problem.quantity, problem.bins
    beta, p, b = problem.impact_exponent, problem.penalty_exponent, problem.permanent_impact
    scale = reference_objective(problem, twap(problem))
    x = cp.Variable(bins, nonneg=True)
    left = 1.0 - cp.cumsum(x)  # q_{n+1} / Q
    fixed = problem.fixed_cost * q0 / scale
    impact = problem.temporary_impact * q0 ** (1.0 + beta) / scale
    terms: list[Any] = [fixed @ x]
    if beta == 1.0:
        # Bins with a zero cap do not trade, so their (possibly negative) curvature is irrelevant.
        curvature = np.where(problem.cap_array > 0.0, impact - b * q0**2 / (2.0 * scale), 0.0)
        terms.append(curvature @ cp.square(x))
        terms.append(b * q0**2 / (2.0 * scale) * cp.square(cp.sum(x)))
    else:
        assert b == 0.0, "permanent impact is only DCP with beta = 1"
        terms.append(impact @ cp.power(x, 1.0 + beta))
    risk = problem.inventory_penalty * q0**p / scale
    terms.append(risk @ (left if p == 1.0 else cp.power(left, p)))
    constraints = [left[bins - 1] >= 0.0]
    if problem.forced:
        constraints.append(left[bins - 1] == 0.0)
    else:
        weight = problem.terminal_penalty * q0**p / scale
        terms.append(weight * (left[bins - 1] if p == 1.0 else cp.power(left[bins - 1], p)))
    capped = np.isfinite(problem.cap_array)
    if capped.any():
        constraints.append(x[np.flatnonzero(capped)] <= problem.cap_array[capped] / q0)
    model = cp.Problem(cp.Minimize(cp.sum(cp.hstack(terms))), constraints)
    with warnings.catch_warnings():
        # "Solution may be inaccurate" is reported through ``status`` instead.
        warnings.simplefilter("ignore", UserWarning)
        # Its value of power() on a final inventory of -1e-17 is nan; we re-evaluate ourselves.
        warnings.simplefilter("ignore", RuntimeWarning)
        try:
            model.solve(solver=cp.CLARABEL, **CLARABEL_OPTIONS)
        except cp.error.SolverError:
            return Reference(trades=np.full(bins, np.nan), objective=math.nan, status="failed")
    if x.value is None:
        return Reference(trades=np.full(bins, np.nan), objective=math.nan, status=model.status)
    trades = q0 * np.asarray(x.value, dtype=np.float64)
    return Reference(
        trades=trades, objective=reference_objective(problem, trades), status=model.status
    )


def u_shape(bins: int, low: float, high: float) -> FloatArray:
    """A U-shaped curve over the bins: ``high`` at the first and last bin, ``low`` in the middle."""
    s = np.linspace(-1.0, 1.0, bins)
    return low + (high - low) * s**2


INF = math.inf
Q = 1e5  # shares; invented scenarios below
N = 20

GENERAL_CASES: dict[str, dict[str, Any]] = {
    # Square-root impact, p = 1.5 risk, forced completion, U-shaped costs, no caps.
    "force-beta0.5-p1.5-u-shaped": {
        "fixed_cost": u_shape(N, 0.01, 0.03),
        "temporary_impact": u_shape(N, 2e-4, 6e-4),
        "impact_exponent": 0.5,
        "inventory_penalty": 1e-5,
        "penalty_exponent": 1.5,
        "terminal_penalty": "force",
    },
    # As above with caps that bind in the first bins (where the risk term wants to trade most).
    "force-beta0.5-p1.5-caps": {
        "fixed_cost": 0.02,
        "temporary_impact": 2.8e-4,
        "impact_exponent": 0.5,
        "inventory_penalty": 3e-5,
        "penalty_exponent": 1.5,
        "terminal_penalty": "force",
        "caps": [6000.0] * 6 + [None] * 8 + [4000.0] * 6,
    },
    # Finite terminal penalty, U-shaped costs, caps binding in some bins.
    "finite-beta0.5-p1.5-caps-u-shaped": {
        "fixed_cost": u_shape(N, 0.01, 0.03),
        "temporary_impact": u_shape(N, 2e-4, 6e-4),
        "impact_exponent": 0.5,
        "inventory_penalty": 2e-5,
        "penalty_exponent": 1.5,
        "terminal_penalty": 3e-2,
        "caps": [6000.0] * 10 + [INF] * 10,
    },
    # Linear impact with permanent impact, p = 1.5, caps binding, forced.
    "force-beta1-p1.5-permanent-caps": {
        "fixed_cost": 0.02,
        "temporary_impact": u_shape(N, 4e-6, 8e-6),
        "permanent_impact": 4e-6,
        "inventory_penalty": 3e-5,
        "penalty_exponent": 1.5,
        "terminal_penalty": "force",
        "caps": [6500.0] * 5 + [INF] * 15,
    },
    # Linear impact with permanent impact, quadratic risk, finite terminal penalty, caps.
    "finite-beta1-p2-permanent-caps": {
        "fixed_cost": 0.015,
        "temporary_impact": 4e-6,
        "permanent_impact": 2e-6,
        "inventory_penalty": 8e-8,
        "penalty_exponent": 2.0,
        "terminal_penalty": 2e-6,
        "caps": [8000.0] * 4 + [INF] * 16,
    },
    # Linear-quadratic, U-shaped, finite terminal penalty: the exact path (every trade > 0).
    "finite-beta1-p2-lq-u-shaped": {
        "fixed_cost": u_shape(N, 0.01, 0.015),
        "temporary_impact": u_shape(N, 3e-6, 9e-6),
        "permanent_impact": 1e-6,
        "inventory_penalty": u_shape(N, 2e-8, 8e-8),
        "penalty_exponent": 2.0,
        "terminal_penalty": 4e-6,
    },
    # Linear-quadratic, forced: the exact path.
    "force-beta1-p2-lq": {
        "fixed_cost": 0.02,
        "temporary_impact": 4e-6,
        "permanent_impact": 3e-6,
        "inventory_penalty": 5e-8,
        "penalty_exponent": 2.0,
        "terminal_penalty": "force",
    },
    # Convex impact beta = 1.5 and a cubic risk penalty.
    "force-beta1.5-p3": {
        "fixed_cost": 0.02,
        "temporary_impact": 5e-8,
        "impact_exponent": 1.5,
        "inventory_penalty": 4e-13,
        "penalty_exponent": 3.0,
        "terminal_penalty": "force",
    },
    # Linear inventory penalty (p = 1) with square-root impact and a finite terminal penalty.
    "finite-beta0.5-p1": {
        "fixed_cost": 0.02,
        "temporary_impact": 2.8e-4,
        "impact_exponent": 0.5,
        "inventory_penalty": 2e-3,
        "penalty_exponent": 1.0,
        "terminal_penalty": 0.5,
    },
    # Finite terminal penalty and caps that cannot complete the order (sum of caps < quantity).
    "finite-beta0.5-p1.5-caps-short": {
        "fixed_cost": 0.02,
        "temporary_impact": 2.8e-4,
        "impact_exponent": 0.5,
        "inventory_penalty": 1e-5,
        "penalty_exponent": 1.5,
        "terminal_penalty": 5e-2,
        "caps": 4500.0,
    },
}
GENERAL_IDS = list(GENERAL_CASES)
# Scenarios where caps bind in some bins and not others (the shortfall one trades every cap).
CAPPED_IDS = [
    name
    for name, fields in GENERAL_CASES.items()
    if fields.get("caps") is not None and "short" not in name
]
LQ_IDS = [name for name in GENERAL_IDS if "-lq" in name]


def general_problem(name: str) -> Problem:
    """The invented scenario ``name`` of GENERAL_CASES as a Problem."""
    return Problem(quantity=Q, bins=N, **GENERAL_CASES[name])


_REFERENCES: dict[str, Reference] = {}


def reference_for(name: str) -> Reference:
    """The cvxpy/Clarabel reference of scenario ``name``, solved once per session."""
    if name not in _REFERENCES:
        reference = cvxpy_reference(general_problem(name))
        assert cp.OPTIMAL == reference.status, f"the reference of {name} is not reliable"
        _REFERENCES[name] = reference
    return _REFERENCES[name]


@pytest.mark.parametrize("name", GENERAL_IDS)
def test_general_objective_matches_cvxpy(name: str) -> None:
    """The objective is within 1e-7 (relative) of cvxpy + Clarabel's."""
    expected = reference_for(name).objective
    actual = solve(general_problem(name)).objective
    assert expected == pytest.approx(actual, rel=OBJECTIVE_RTOL)


@pytest.mark.parametrize("name", GENERAL_IDS)
def test_general_trajectory_matches_cvxpy(name: str) -> None:
    """The trajectory agrees with cvxpy + Clarabel's to 1e-5 of the quantity (strictly convex)."""
    expected = Q - np.cumsum(reference_for(name).trades)
    actual = solve(general_problem(name)).trajectory[1:]
    assert np.max(np.abs(expected - actual)) <= 1e-5 * Q


@pytest.mark.parametrize("name", GENERAL_IDS)
def test_reported_objective_is_the_canonical_formula(name: str) -> None:
    """The reported objective equals the formula of DESIGN.md evaluated on the trades."""
    schedule = solve(general_problem(name))
    expected = reference_objective(general_problem(name), schedule.trades)
    assert expected == pytest.approx(schedule.objective, rel=1e-10)


@pytest.mark.parametrize("name", GENERAL_IDS)
def test_general_constraints_hold(name: str) -> None:
    """Trades lie in [0, cap], inventory ends in [0, Q] (0 when forced), to 1e-9 of Q."""
    problem = general_problem(name)
    schedule = solve(problem)
    tol = CONSTRAINT_TOL * Q
    assert np.all(schedule.trades >= -tol)
    assert np.all(schedule.trades <= problem.cap_array + tol)
    assert -tol <= schedule.trajectory[-1] <= Q + tol
    if problem.forced:
        assert abs(schedule.trajectory[-1]) <= tol


@pytest.mark.parametrize("name", GENERAL_IDS)
def test_general_trajectory_follows_trades(name: str) -> None:
    """trajectory[n + 1] = trajectory[n] - trades[n], starting from the quantity."""
    schedule = solve(general_problem(name))
    expected = Q - np.concatenate([[0.0], np.cumsum(schedule.trades)])
    assert expected[0] == schedule.trajectory[0]
    np.testing.assert_allclose(schedule.trajectory, expected, rtol=0.0, atol=1e-9 * Q)


@pytest.mark.parametrize("name", CAPPED_IDS)
def test_caps_bind_in_some_bins_only(name: str) -> None:
    """In the capped scenarios some bins trade at their cap and some below it (per cvxpy too)."""
    problem = general_problem(name)
    for trades in (solve(problem).trades, reference_for(name).trades):
        at_cap = np.abs(trades - problem.cap_array) <= 1e-6 * Q
        assert at_cap.any() and not at_cap.all()


@pytest.mark.parametrize("name", [n for n in GENERAL_IDS if n not in LQ_IDS])
def test_general_problems_use_the_iterative_path(name: str) -> None:
    """Problems that are not linear-quadratic (or have caps) are not given to the exact path."""
    exact = "riccati"
    assert exact != solve(general_problem(name)).method


@pytest.mark.parametrize("name", LQ_IDS)
def test_lq_problems_use_the_exact_path(name: str) -> None:
    """Linear-quadratic problems without caps are solved by the Riccati recursion."""
    expected = "riccati"
    assert expected == solve(general_problem(name)).method


@pytest.mark.parametrize("name", [n for n in GENERAL_IDS if "short" not in n])
def test_general_status_is_optimal(name: str) -> None:
    """A problem that caps do not constrain beyond completion reports status "optimal"."""
    expected = "optimal"
    assert expected == solve(general_problem(name)).status


# Forced completion that the caps cannot reach: trade every cap, report the shortfall.
SHORTFALL_CASES = {
    "beta0.5-p1.5-flat-caps": {
        "impact_exponent": 0.5,
        "temporary_impact": 2.8e-4,
        "penalty_exponent": 1.5,
        "inventory_penalty": 1e-5,
        "caps": 4000.0,
    },
    "beta1-p2-uneven-caps": {
        "impact_exponent": 1.0,
        "temporary_impact": 4e-6,
        "penalty_exponent": 2.0,
        "inventory_penalty": 5e-8,
        "caps": [2000.0] * 10 + [7000.0] * 9 + [0.0],
    },
}


def shortfall_problem(name: str) -> Problem:
    """Forced completion with caps summing to less than the quantity (invented)."""
    return Problem(
        quantity=Q, bins=N, fixed_cost=0.02, terminal_penalty="force", **SHORTFALL_CASES[name]
    )


@pytest.mark.parametrize("name", list(SHORTFALL_CASES))
def test_capped_shortfall_status(name: str) -> None:
    """Forced completion beyond the caps reports status "capped_shortfall"."""
    expected = "capped_shortfall"
    assert expected == solve(shortfall_problem(name)).status


@pytest.mark.parametrize("name", list(SHORTFALL_CASES))
def test_capped_shortfall_trades_every_cap(name: str) -> None:
    """Forced completion beyond the caps trades exactly the caps."""
    problem = shortfall_problem(name)
    np.testing.assert_allclose(solve(problem).trades, problem.cap_array, rtol=0.0, atol=1e-9 * Q)


@pytest.mark.parametrize("name", list(SHORTFALL_CASES))
def test_capped_shortfall_reports_shares_left(name: str) -> None:
    """The shortfall is the quantity minus the sum of the caps."""
    problem = shortfall_problem(name)
    expected = Q - float(problem.cap_array.sum())
    assert expected == pytest.approx(solve(problem).shortfall, rel=0.0, abs=1e-9 * Q)


# Non-convex settings: with linear impact the Hessian of the impact terms is
# diag(2 k_n - b) + b 11^T (from the formula in DESIGN.md); b well above 2 min k_n makes it
# indefinite.
NON_CONVEX = {
    "b=10k": {"temporary_impact": 4e-6, "permanent_impact": 4e-5},
    "b=3k": {"temporary_impact": 4e-6, "permanent_impact": 1.2e-5},
    "b=10k-one-bin": {
        "temporary_impact": [4e-6] * 10 + [4e-7] + [4e-6] * 9,
        "permanent_impact": 4e-6,
    },
}


@pytest.mark.parametrize("fields", list(NON_CONVEX.values()), ids=list(NON_CONVEX))
def test_non_convex_permanent_impact_is_rejected(fields: dict[str, Any]) -> None:
    """Permanent impact too large for the temporary impact raises ProblemError."""
    with pytest.raises(ProblemError) as caught:
        solve(Problem(quantity=Q, bins=N, fixed_cost=0.02, inventory_penalty=5e-8, **fields))
    expected = "permanent_impact"
    assert expected == caught.value.field

"""The router and the market's charge: what a target becomes, at what price, and the day's bill.

Theory of operation
-------------------
Each bin a policy hands the router a target (shares). The router fills a fraction of it (the
scenario's ``fill = [low, high]``, drawn from the day's fill draws, the same for every policy),
never more than the order's participation cap times the volume that really trades in the bin and
never more than the order has left.

The market charges every share of bin ``n`` (side ``s`` = +1 buy, -1 sell)::

    price = m_n (1 + s I_n) + s (spread_n / 2 + Y sigma_n sqrt(N) m_n sqrt(v_n / V_n))

with ``m_n`` the bin's VWAP without us, ``I_n`` our permanent impact so far, ``Y`` the scenario's
square-root impact coefficient (the planner's law, :mod:`tracker.core.formulation`, with
``sigma_n sqrt(N)`` the daily volatility implied by the bin's), ``v_n`` our shares and ``V_n``
the bin's real volume. After the bin our permanent impact grows by
``gamma sigma_day v_n / ADV`` (``gamma`` = ``costs.permanent_impact``). The engine sees the bin's
prices moved by our permanent impact (its own trades are part of the market it watches).

The implementation shortfall against the arrival price ``P0``, in basis points of the order's
value ``Q P0``, splits exactly into spread, temporary impact, permanent impact and timing (the
market's own move, ``s v_n (m_n - P0)``). Unfinished shares are valued separately at a penalty
(bps of arrival each) when the statistics are made.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import numpy.typing as npt

from tracker.sim.evaluation.config import CostSpec, Scenario
from tracker.sim.evaluation.market_day import MarketDay

FloatArray = npt.NDArray[np.float64]

#: Names of the parts of the executed shortfall, in bps of the order's value at arrival.
COST_PARTS = ("spread", "temporary", "permanent", "timing")


@dataclass(frozen=True, slots=True)
class DayResult:
    """One policy on one day.

    Attributes:
        quantity: Shares of the order.
        executed: Shares executed per bin of the session.
        costs: The executed shortfall by part (:data:`COST_PARTS`), bps of ``quantity x arrival``.
        unfinished: Fraction of the order left at the end (0 to 1).
        expected_cost: The plan's expected spread + impact, bps (the planner's model).
        implied_timing_variance: Variance of the timing cost the plan implies, bps squared.
        engine_messages: Wire messages fed to the engine (0 for the other policies).
    """

    quantity: int
    executed: FloatArray
    costs: dict[str, float]
    unfinished: float
    expected_cost: float
    implied_timing_variance: float
    engine_messages: int = 0

    @property
    def executed_cost(self) -> float:
        """The executed shortfall (every part), bps."""
        return math.fsum(self.costs.values())

    def shortfall(self, penalty_bps: float) -> float:
        """The implementation shortfall with each unfinished share valued at ``penalty_bps``."""
        return self.executed_cost + penalty_bps * self.unfinished


class Execution:
    """The router and the market for one policy on one day (see the module docstring).

    Args:
        day: The market day (with its order and the router's draws).
        scenario: The scenario (fill range, impact multiplier).
        costs: The market's impact coefficients.
    """

    def __init__(self, day: MarketDay, scenario: Scenario, costs: CostSpec) -> None:
        self.day = day
        order = day.order
        self.sign = order.sign
        self.quantity = order.quantity
        self.arrival = day.arrival_price
        n = day.session.n_bins
        self.executed = np.zeros(n)
        self.filled = 0
        low, high = scenario.fill
        self._fraction = low + (high - low) * day.fill_draws
        self._impact = costs.impact_coefficient * scenario.impact * math.sqrt(n)
        daily_sigma = math.sqrt(float(np.sum(day.volatility**2)))
        self._permanent_step = (
            costs.permanent_impact * daily_sigma / day.profile.average_daily_volume
        )
        self._permanent = 0.0  # our permanent impact so far, a fraction of the price
        self._parts = dict.fromkeys(COST_PARTS, 0.0)

    @property
    def remaining(self) -> int:
        """Shares of the order not yet executed."""
        return self.quantity - self.filled

    def capacity(self, n: int) -> int:
        """The most the router may trade in bin ``n``: the cap times the real volume."""
        return math.floor(self.day.order.max_participation * float(self.day.volume[n]) + 1e-9)

    def fill(self, n: int, target: int) -> tuple[int, float]:
        """Work ``target`` shares in bin ``n``: the shares filled and their average price.

        Returns ``(0, nan)`` when nothing fills.
        """
        day = self.day
        wanted = math.floor(self._fraction[n] * max(target, 0) + 1e-9)
        shares = max(min(wanted, self.capacity(n), self.remaining), 0)
        price = math.nan
        if shares > 0:
            m = float(day.vwap[n])
            volume = float(day.volume[n])
            half_spread = 0.5 * float(day.spread[n])
            temporary = self._impact * float(day.volatility[n]) * m * math.sqrt(shares / volume)
            permanent = m * self._permanent
            price = m + self.sign * (permanent + half_spread + temporary)
            parts = self._parts
            parts["spread"] += shares * half_spread
            parts["temporary"] += shares * temporary
            parts["permanent"] += shares * permanent
            parts["timing"] += self.sign * shares * (m - self.arrival)
            self.executed[n] = shares
            self.filled += shares
            self._permanent += self._permanent_step * shares
        return shares, price

    def observed_prices(self, n: int) -> tuple[float, float, float, float, float]:
        """Bin ``n``'s open, high, low, close and VWAP as the market shows them after our trades.

        Our permanent impact so far moves them all by the same factor.
        """
        factor = 1.0 + self.sign * self._permanent
        day = self.day
        return (
            float(day.open[n]) * factor,
            float(day.high[n]) * factor,
            float(day.low[n]) * factor,
            float(day.close[n]) * factor,
            float(day.vwap[n]) * factor,
        )

    def result(
        self, expected_cost: float, implied_timing_variance: float, engine_messages: int = 0
    ) -> DayResult:
        """The day's account (costs in bps of the order's value at arrival)."""
        scale = 1e4 / (self.quantity * self.arrival)
        return DayResult(
            quantity=self.quantity,
            executed=self.executed,
            costs={name: value * scale for name, value in self._parts.items()},
            unfinished=self.remaining / self.quantity,
            expected_cost=expected_cost,
            implied_timing_variance=implied_timing_variance,
            engine_messages=engine_messages,
        )


def implied_timing_variance(trades: FloatArray, volatility: FloatArray, quantity: float) -> float:
    """Variance of the timing cost a schedule implies, bps squared of the order's value.

    With the log price Brownian (per-bin variance ``sigma_n^2``) and each bin's shares bought at
    the bin's time-averaged price, the timing cost is ``sum_n [q_{n+1} D_n + v_n A_n]`` in
    fractions of the arrival price, with ``D_n`` the bin's move and ``A_n`` its average's
    deviation from the bin's start; ``Var D = sigma^2``, ``Var A = sigma^2 / 3``,
    ``Cov(A, D) = sigma^2 / 2``. So the variance is
    ``sum_n sigma_n^2 (q_{n+1}^2 + q_{n+1} v_n + v_n^2 / 3) / Q^2``, where ``q_{n+1}`` is what
    the schedule still trades after bin ``n`` (shares it never trades carry no timing cost; the
    completion penalty values them).

    Args:
        trades: Shares per bin of the order's window.
        volatility: Per-bin standard deviation of the log return, over the same bins.
        quantity: The order's shares.
    """
    v = np.asarray(trades, dtype=np.float64)
    after = float(v.sum()) - np.cumsum(v)  # q_{n+1}
    terms = volatility**2 * (after**2 + after * v + v**2 / 3.0)
    return float(terms.sum()) / (quantity * quantity) * 1e8

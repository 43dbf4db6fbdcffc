"""The policies compared by ``tracker evaluate``, each run on the same simulated days.

Theory of operation
-------------------
A policy says, bin by bin, how many shares the router should work (:meth:`Policy.target`), and
hears what filled (:meth:`Policy.after`). Four policies:

* ``replan`` -- the engine as it runs live: the real :class:`tracker.core.engine.Engine`, fed
  wire messages (the order, a tick at its start, each fill, each closed bin) built as payload
  dicts and passed through :func:`tracker.edge.wire.decode`; its outputs are read only through
  :func:`tracker.edge.wire.to_json_object` and :func:`tracker.edge.wire.topic_of`, as a router
  would read them off the bus. The router works each target the engine publishes for a bin: when
  the target carries a ``participation`` rate, that rate of the bin's real volume, executing at
  most ``max_participation`` of it, as a router that sees the market would; else its
  ``quantity``.
* ``opening-plan`` -- the plan made at the start with the same formulation and solver
  (:func:`tracker.core.formulation.build_problem`, :func:`tracker.core.solve.solve`), never
  re-solved; each bin it asks for the planned cumulative (in whole shares) minus what has filled,
  so a shortfall is caught up as soon as the cap allows.
* ``twap`` -- an even split of the order over its bins, with the same catch-up.
* ``constant-rate`` -- a fixed share of each bin's real volume: ``pov_scale x order / forecast
  volume of the window``, at most the cap (a participation-rate router).

The router (:class:`~tracker.sim.evaluation.execution.Execution`) caps every target at the cap
times the bin's real volume, so "catch-up" never breaks the participation limit.

Each policy also states its schedule as planned (:attr:`Policy.nominal`) for the model checks:
its expected spread + impact under the planner's model and the timing risk it implies.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from datetime import timedelta
from typing import Any, Protocol

import numpy as np
import numpy.typing as npt

from tracker.core.engine import Engine
from tracker.core.forecast import forecast
from tracker.core.formats import utc_text
from tracker.core.formulation import build_problem, own_permanent_impact, preferences
from tracker.core.problem import Problem
from tracker.core.solve import Schedule, cost_breakdown, solve
from tracker.edge.wire import Heartbeat, decode, to_json_object, topic_of
from tracker.errors import TrackerError
from tracker.sim.evaluation.execution import Execution
from tracker.sim.evaluation.market_day import MarketDay

FloatArray = npt.NDArray[np.float64]

#: The policies, in the order they are reported; the first one after ``replan`` is the baseline of
#: the paired differences.
POLICIES = ("replan", "opening-plan", "twap", "constant-rate")

#: The baseline of the paired differences.
BASELINE = "opening-plan"

#: Topic root of the wire messages fed to the engine.
ROOT = "tracker"

#: The order is sent this long before its start; a tick at the start starts it.
ORDER_LEAD = timedelta(seconds=60)

#: A bin's fills are sent this long before the bin closes.
FILL_LEAD = timedelta(seconds=1)


class EvaluationError(TrackerError, RuntimeError):
    """The harness fed the engine something it refused (a bug of ours, never of the input)."""


class OpeningPlan:
    """The plan of one day's order as it stands at the start (shared by the policies of the day).

    Attributes:
        problem: The canonical problem over the order's window, at the arrival price.
        schedule: Its solution.
        cumulative: Planned shares done by the end of each bin of the window (whole shares).
    """

    def __init__(self, day: MarketDay) -> None:
        order = day.order
        self.day = day
        self.problem: Problem = build_problem(
            quantity=float(order.quantity),
            first_bin=order.first,
            end_bin=order.end,
            forecast=forecast(day.profile, {}),
            preferences=preferences(order.urgency),
            max_participation=order.max_participation,
            price=day.arrival_price,
            reference_quantity=float(order.quantity),
        )
        self.schedule: Schedule = solve(self.problem)
        done = order.quantity - np.asarray(self.schedule.trajectory[1:])
        self.cumulative = np.round(done).astype(np.int64)

    def expected_cost(self, trades: FloatArray) -> float:
        """Expected spread + impact of ``trades`` (window bins) under the planner's model, bps:
        as the engine states it, with the order's own permanent impact."""
        terms = cost_breakdown(self.problem, trades)
        cost = terms["fixed_cost"] + terms["temporary_impact"] + terms["permanent_impact"]
        volatility = forecast(self.day.profile, {}).volatility
        cost += own_permanent_impact(
            trades,
            daily_volatility=math.sqrt(float(np.dot(volatility, volatility))),
            price=self.day.arrival_price,
            average_daily_volume=self.day.profile.average_daily_volume,
        )
        return cost / (self.day.order.quantity * self.day.arrival_price) * 1e4


class Policy(Protocol):
    """What the day's loop needs from a policy."""

    name: str

    def target(self, n: int) -> int:
        """Shares to work in bin ``n``."""
        ...

    def after(self, n: int, shares: int, price: float) -> None:
        """Bin ``n`` closed with ``shares`` filled at ``price`` (nan when none)."""
        ...

    @property
    def nominal(self) -> FloatArray:
        """The schedule as planned at the start, shares per bin of the order's window."""
        ...

    @property
    def expected_cost(self) -> float:
        """The expected spread + impact of the plan at the start, bps."""
        ...

    @property
    def messages(self) -> int:
        """Wire messages fed to the engine (0 when there is none)."""
        ...


class _CatchUp:
    """Cumulative targets with catch-up: each bin asks for the planned total minus the filled."""

    name = ""

    def __init__(self, plan: OpeningPlan, execution: Execution, cumulative: Any) -> None:
        self._plan = plan
        self._execution = execution
        self._first = plan.day.order.first
        self._cumulative = np.asarray(cumulative, dtype=np.int64)

    def target(self, n: int) -> int:
        return max(int(self._cumulative[n - self._first]) - self._execution.filled, 0)

    def after(self, n: int, shares: int, price: float) -> None:
        return None

    @property
    def nominal(self) -> FloatArray:
        return np.diff(self._cumulative, prepend=0).astype(np.float64)

    @property
    def expected_cost(self) -> float:
        return self._plan.expected_cost(self.nominal)

    @property
    def messages(self) -> int:
        return 0


class OpeningPlanPolicy(_CatchUp):
    """The opening plan, never re-solved, with catch-up."""

    name = "opening-plan"

    def __init__(self, plan: OpeningPlan, execution: Execution) -> None:
        super().__init__(plan, execution, plan.cumulative)


class TwapPolicy(_CatchUp):
    """An even split over the order's bins, with catch-up."""

    name = "twap"

    def __init__(self, plan: OpeningPlan, execution: Execution) -> None:
        order = plan.day.order
        bins = order.end - order.first
        cumulative = np.round(order.quantity * np.arange(1, bins + 1) / bins)
        super().__init__(plan, execution, cumulative)


class ConstantRatePolicy:
    """A fixed participation rate of each bin's real volume (at most the cap)."""

    name = "constant-rate"

    def __init__(self, plan: OpeningPlan, execution: Execution, scale: float) -> None:
        day = plan.day
        order = day.order
        self._plan = plan
        self._execution = execution
        forecast_volume = day.profile.expected_volume[order.first : order.end]
        self.rate: float = min(
            order.max_participation, scale * order.quantity / float(forecast_volume.sum())
        )
        planned = self.rate * forecast_volume
        done = np.minimum(np.cumsum(planned), order.quantity)
        self._nominal: FloatArray = np.diff(done, prepend=0.0)

    def target(self, n: int) -> int:
        return math.floor(self.rate * float(self._execution.day.volume[n]) + 1e-9)

    def after(self, n: int, shares: int, price: float) -> None:
        return None

    @property
    def nominal(self) -> FloatArray:
        return self._nominal

    @property
    def expected_cost(self) -> float:
        return self._plan.expected_cost(self._nominal)

    @property
    def messages(self) -> int:
        return 0


class EnginePolicy:
    """The real engine, driven through the wire contract (see the module docstring)."""

    name = "replan"

    def __init__(self, plan: OpeningPlan, execution: Execution) -> None:
        day = plan.day
        self._plan = plan
        self._day = day
        self._execution = execution
        self._engine = Engine(profiles={day.symbol: day.profile}, root=ROOT)
        self._bin_of = {utc_text(start): n for n, (start, _) in enumerate(day.bins)}
        self._targets: dict[int, tuple[int, float | None, float | None]] = {}
        self._expected: float | None = None
        self._order_id = f"EVAL-{day.index:05d}"
        self._fills = 0
        self.count = 0
        self.alerts = 0
        order = day.order
        start = day.bins[order.first][0]
        for n in range(order.first - 1):  # the day's bins before the order, as live
            self._send_bin(n)
        self._send(
            f"orders/{self._order_id}",
            {
                "type": "order",
                "action": "new",
                "order_id": self._order_id,
                "symbol": day.symbol,
                "side": order.side,
                "quantity": order.quantity,
                "start": utc_text(start),
                "end": utc_text(day.bins[order.end - 1][1]),
                "urgency": order.urgency,
                "max_participation": order.max_participation,
                "arrival_price": day.arrival_price,
                "ts": utc_text(start - ORDER_LEAD),
            },
        )
        if order.first > 0:
            self._send_bin(order.first - 1)  # closes at the start: the order starts with it
        else:
            self._send("tick", {"type": "tick", "ts": utc_text(start)})

    def target(self, n: int) -> int:
        quantity, rate, cap = self._targets.get(n, (0, None, None))
        if rate is None:
            return quantity
        # The rate is written to 6 decimals: to the nearest share. The cap bounds what is
        # executed, which the router (Execution.fill) applies to the fills with the same rate.
        if cap is not None and cap != self._day.order.max_participation:
            raise EvaluationError(f"the target's cap {cap} is not the order's")
        return max(round(rate * float(self._day.volume[n])), 0)

    def after(self, n: int, shares: int, price: float) -> None:
        if shares > 0:
            self._fills += 1
            self._send(
                f"fills/{self._order_id}",
                {
                    "type": "fill",
                    "fill_id": f"{self._order_id}-{self._fills:03d}",
                    "order_id": self._order_id,
                    "quantity": shares,
                    "price": price,
                    "ts": utc_text(self._day.bins[n][1] - FILL_LEAD),
                },
            )
        self._send_bin(n)

    @property
    def nominal(self) -> FloatArray:
        # The engine's first plan is the opening plan (same problem); the wire carries only its
        # next target, so the schedule is taken from the opening plan.
        return np.diff(self._plan.cumulative, prepend=0).astype(np.float64)

    @property
    def expected_cost(self) -> float:
        if self._expected is None:
            raise EvaluationError("the engine published no status with an expected cost")
        return self._expected

    @property
    def messages(self) -> int:
        return self.count

    def _send_bin(self, n: int) -> None:
        day = self._day
        open_, high, low, close, vwap = self._execution.observed_prices(n)
        start, end = day.bins[n]
        volume = int(day.volume[n])
        self._send(
            f"bins/{day.symbol}",
            {
                "type": "bin",
                "symbol": day.symbol,
                "start": utc_text(start),
                "end": utc_text(end),
                "volume": volume,
                "vwap": vwap if volume > 0 else None,
                "open": open_,
                "high": max(high, open_, close),
                "low": min(low, open_, close),
                "close": close,
                "spread": float(day.spread[n]),
                "ts": utc_text(end),
            },
        )

    def _send(self, kind: str, payload: dict[str, Any]) -> None:
        topic = f"{ROOT}/{kind}"
        self.count += 1
        event = decode(topic, payload, root=ROOT)
        assert not isinstance(event, Heartbeat)  # the policy sends orders, bins and fills only
        for message in self._engine.handle(event):
            where = topic_of(message, ROOT).split("/")[1]
            data = to_json_object(message)
            if where == "targets":
                index = self._bin_of.get(data["bin_start"]) if data["bin_start"] else None
                if index is not None:
                    rate, cap = data.get("participation"), data.get("max_participation")
                    self._targets[index] = (
                        int(data["quantity"]),
                        None if rate is None else float(rate),
                        None if cap is None else float(cap),
                    )
            elif where == "status":
                cost = data["expected_cost"]
                if self._expected is None and cost is not None and data["plan_version"] == 1:
                    value = self._day.order.quantity * self._day.arrival_price
                    self._expected = float(cost) / value * 1e4
            elif where == "errors":
                raise EvaluationError(
                    f"the engine refused a message of the harness on {topic}: {data['reason']}"
                )
            else:
                self.alerts += 1


#: Builders of the policies by name: ``(plan, execution, scale) -> policy``.
BUILDERS: dict[str, Callable[[OpeningPlan, Execution, float], Policy]] = {
    "replan": lambda plan, execution, scale: EnginePolicy(plan, execution),
    "opening-plan": lambda plan, execution, scale: OpeningPlanPolicy(plan, execution),
    "twap": lambda plan, execution, scale: TwapPolicy(plan, execution),
    "constant-rate": lambda plan, execution, scale: ConstantRatePolicy(plan, execution, scale),
}

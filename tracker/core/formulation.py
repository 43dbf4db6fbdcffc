"""From an order and today's liquidity to the canonical execution problem.

Theory of operation
-------------------
For the bins ``first_bin .. end_bin - 1`` of the session, with forecast volume V_n (shares), spread
s_n (currency) and per-bin volatility sigma_n (log return), at price P (currency):

* fixed cost ``h_n = s_n / 2 + fee_bps * 1e-4 * P`` (currency per share): half the spread is what
  crossing it costs, plus fees;
* temporary impact ``k_n = eta * sigma_n^day * P / V_n^beta`` so that trading v shares in the bin
  costs ``eta * sigma_n^day * P * (v / V_n)^beta`` per share. ``sigma_n^day = sigma_n *
  sqrt(n_bins)`` is the daily volatility implied by the bin's own volatility, because the published
  laws are stated with daily volatility and the share of a day's volume. Laws (:data:`IMPACT_LAWS`):

  - ``"sqrt"``, the square-root law, beta = 1/2, eta = Y = 0.5. Toth et al. (2011, Phys. Rev. X 1,
    021006) report a prefactor Y "of order one"; 0.5 is our conservative choice within that range
    (from memory).
  - ``"power"``, beta = 3/5 and eta = 0.142: the temporary impact fitted by Almgren, Thum, Hauptmann
    and Li (2005, Risk 18(7), "Direct estimation of equity market impact"); eta from memory.
  - ``"linear"``, beta = 1 (quadratic cost, the Almgren-Chriss 2000 setting, solved exactly by the
    Riccati recursion), eta = 0.5 / sqrt(0.1) ~ 1.58, chosen so that its cost equals the
    square-root law's at 10 % participation.

* inventory risk ``c_n = lambda * (sigma_n * P)^2 * X^(2 - p)`` on the inventory left after bin n,
  with ``lambda = risk_aversion / (P * ADV)`` in 1/currency: ``risk_aversion`` is dimensionless (per
  unit of the symbol's daily traded value), so the same value gives the same schedule shape on any
  stock under linear impact. X is the reference size (the parent order's quantity) so that
  ``c_n X^p`` does not depend on p;
* completion: ``"force"`` (finish by the end; the default) or a penalty of ``completion_penalty``
  basis points of P per unfinished share at the reference size: ``A = bps * 1e-4 * P * X^(1 - p)``;
* caps ``u_n = max_participation * V_n``.

Urgency presets (:data:`URGENCY`) set ``risk_aversion``; "low" follows the volume curve closely,
"high" front-loads, "medium" sits between. Everything here is pure and fast: :func:`build_problem`
is a few numpy slices (the engine builds about a thousand per bin close).
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass, fields
from datetime import datetime
from typing import Any

import numpy as np

from tracker.core.forecast import Forecast, forecast
from tracker.core.problem import FORCE, Problem
from tracker.core.profiles import Profile
from tracker.core.solve import Schedule, solve
from tracker.errors import InputError


@dataclass(frozen=True, slots=True)
class ImpactLaw:
    """A temporary-impact law: cost per share ``eta * sigma^day * P * (v / V)^beta``."""

    name: str
    exponent: float
    coefficient: float
    source: str


#: The impact laws, by name (see the module docstring for the sources of the defaults).
IMPACT_LAWS: dict[str, ImpactLaw] = {
    "sqrt": ImpactLaw("sqrt", 0.5, 0.5, "square-root law; Y = 0.5, Toth et al. (2011)"),
    "power": ImpactLaw(
        "power", 0.6, 0.142, "3/5 power law, Almgren, Thum, Hauptmann and Li (2005)"
    ),
    "linear": ImpactLaw(
        "linear",
        1.0,
        0.5 / math.sqrt(0.1),
        "linear impact (Almgren-Chriss 2000), matched to the square-root law at 10 % participation",
    ),
}

#: Default impact law.
DEFAULT_IMPACT_LAW = "sqrt"


@dataclass(frozen=True, slots=True)
class Preferences:
    """How the desk trades off cost against risk (units in the module docstring).

    Args:
        risk_aversion: Inventory aversion, dimensionless per unit of daily traded value (>= 0).
        completion_penalty: ``"force"`` (finish by the end) or basis points of price per
            unfinished share at the order's size (>= 0).
        penalty_exponent: p of the inventory and completion penalties, in [1, 4] (2 is classic).
        impact_law: ``"sqrt"``, ``"power"`` or ``"linear"``.
        impact_coefficient: eta of the impact law; ``None`` takes the law's published default.
        fee_bps: Fees in basis points of price, per share (>= 0).
        urgency: The preset these came from, if any (for reports).
    """

    risk_aversion: float = 0.0
    completion_penalty: float | str = FORCE
    penalty_exponent: float = 2.0
    impact_law: str = DEFAULT_IMPACT_LAW
    impact_coefficient: float | None = None
    fee_bps: float = 0.0
    urgency: str | None = None

    def __post_init__(self) -> None:
        _check_number("risk_aversion", self.risk_aversion, low=0.0)
        if self.completion_penalty != FORCE:
            _check_number(
                "completion_penalty",
                self.completion_penalty,
                low=0.0,
                allowed='"force" or a number of basis points >= 0',
            )
        _check_number("penalty_exponent", self.penalty_exponent, low=1.0, high=4.0)
        if self.impact_law not in IMPACT_LAWS:
            raise InputError(
                f"must be one of {', '.join(IMPACT_LAWS)}; got {self.impact_law!r}",
                field="preferences.impact_law",
            )
        if self.impact_coefficient is not None:
            _check_number("impact_coefficient", self.impact_coefficient, low=0.0)
        _check_number("fee_bps", self.fee_bps, low=0.0)

    @property
    def law(self) -> ImpactLaw:
        """The impact law with the coefficient in use."""
        law = IMPACT_LAWS[self.impact_law]
        if self.impact_coefficient is None:
            return law
        return ImpactLaw(law.name, law.exponent, float(self.impact_coefficient), "set by the user")

    def to_mapping(self) -> dict[str, Any]:
        """The preferences as a JSON object."""
        return {f.name: getattr(self, f.name) for f in fields(self)}


def _check_number(
    name: str, value: Any, *, low: float, high: float = math.inf, allowed: str | None = None
) -> None:
    what = allowed or (
        f"a number in [{low:g}, {high:g}]" if math.isfinite(high) else f"a number >= {low:g}"
    )
    if (
        isinstance(value, bool)
        or not isinstance(value, int | float)
        or not (math.isfinite(value) and low <= value <= high)
    ):
        raise InputError(f"must be {what}; got {value!r}", field=f"preferences.{name}")


#: Urgency presets: the ``risk_aversion`` each maps to (other preferences keep their defaults).
URGENCY: dict[str, dict[str, Any]] = {
    "low": {"risk_aversion": 10.0},
    "medium": {"risk_aversion": 100.0},
    "high": {"risk_aversion": 500.0},
}

#: The preset used when neither an urgency nor a risk aversion is given.
DEFAULT_URGENCY = "medium"

_PREFERENCE_KEYS = tuple(f.name for f in fields(Preferences) if f.name != "urgency")


def preferences(
    urgency: str | None = None, overrides: Mapping[str, Any] | None = None
) -> Preferences:
    """Preferences from an urgency preset, with explicit values taking precedence.

    Args:
        urgency: ``"low"``, ``"medium"`` or ``"high"``; ``None`` means ``"medium"``.
        overrides: Explicit preference values by field name (see :class:`Preferences`).

    Raises:
        InputError: an unknown urgency or key, or a value out of range (the field is named).
    """
    name = DEFAULT_URGENCY if urgency is None else urgency
    if name not in URGENCY:
        raise InputError(f"must be one of {', '.join(URGENCY)}; got {urgency!r}", field="urgency")
    values: dict[str, Any] = dict(URGENCY[name])
    for key, value in (overrides or {}).items():
        if key not in _PREFERENCE_KEYS:
            raise InputError(
                f"is not a preference; the preferences are {', '.join(_PREFERENCE_KEYS)}",
                field=f"preferences.{key}",
            )
        values[key] = value
    return Preferences(**values, urgency=name)


def build_problem(
    *,
    quantity: float,
    first_bin: int,
    end_bin: int,
    forecast: Forecast,
    preferences: Preferences,
    max_participation: float | None,
    price: float,
    first_fraction: float = 1.0,
    reference_quantity: float | None = None,
    last_bin_cap: float = 1.0,
) -> Problem:
    """The canonical problem for the bins ``first_bin .. end_bin - 1`` of ``forecast``.

    Args:
        quantity: Shares still to execute (>= 0; the side is handled outside).
        first_bin: First bin of the horizon (inclusive), index into the session's bins.
        end_bin: End of the horizon (exclusive).
        forecast: Today's liquidity (:func:`tracker.core.forecast.forecast`).
        preferences: Cost/risk preferences.
        max_participation: Largest fraction of a bin's forecast volume to trade, in (0, 1], or
            ``None`` for no cap.
        price: Current (or arrival) price, currency per share (> 0).
        first_fraction: Fraction of the first bin still ahead (an order starting mid-bin); scales
            that bin's volume.
        reference_quantity: The parent order's size, for the scale of a penalty exponent other
            than 2 and of the completion penalty; defaults to ``quantity``.
        last_bin_cap: Share of the cap the plan may count on in the horizon's last bin, in
            (0, 1]: below 1 the plan keeps that bin's room in reserve for a close that trades
            less than forecast (no later bin could absorb the shortfall).

    Returns:
        The :class:`~tracker.core.problem.Problem` with ``end_bin - first_bin`` bins.

    Raises:
        InputError: a bin range or value out of range.
    """
    n = forecast.volume.shape[0]
    if not 0 <= first_bin < end_bin <= n:
        raise InputError(
            f"need 0 <= first_bin < end_bin <= {n}; got first_bin={first_bin}, end_bin={end_bin}",
            field="bins",
        )
    if not (price > 0 and math.isfinite(price)):
        raise InputError(f"must be a price > 0; got {price!r}", field="price")
    if not (quantity >= 0 and math.isfinite(quantity)):
        raise InputError(f"must be a number of shares >= 0; got {quantity!r}", field="quantity")
    if max_participation is not None and not 0 < max_participation <= 1:
        raise InputError(
            f"must be a fraction in (0, 1]; got {max_participation!r}", field="max_participation"
        )
    if not 0 < first_fraction <= 1:
        raise InputError(f"must be in (0, 1]; got {first_fraction!r}", field="first_fraction")
    if not 0 < last_bin_cap <= 1:
        raise InputError(f"must be in (0, 1]; got {last_bin_cap!r}", field="last_bin_cap")
    volume = np.maximum(forecast.volume[first_bin:end_bin], 1.0)
    if first_fraction != 1.0:
        volume = volume.copy()
        volume[0] = max(volume[0] * first_fraction, 1.0)
    sigma = forecast.volatility[first_bin:end_bin]
    law = preferences.law
    fixed = forecast.spread[first_bin:end_bin] * 0.5 + preferences.fee_bps * 1e-4 * price
    impact = (law.coefficient * math.sqrt(n) * price) * sigma / volume**law.exponent
    p = preferences.penalty_exponent
    reference = quantity if reference_quantity is None else reference_quantity
    reference = max(reference, 1.0)
    aversion = preferences.risk_aversion / (price * forecast.average_daily_volume)
    risk = (aversion * price * price * reference ** (2.0 - p)) * sigma * sigma
    if preferences.completion_penalty == FORCE:
        terminal = math.inf  # Problem reads inf as "force"
    else:
        terminal = float(preferences.completion_penalty) * 1e-4 * price * reference ** (1.0 - p)
    caps = None if max_participation is None else max_participation * volume
    if caps is not None and last_bin_cap != 1.0:
        caps[-1] *= last_bin_cap
    # Every value above is derived from checked inputs and forecasts (volume >= 1, price > 0):
    # skip the constructor's checks, a third of the time of this function.
    return Problem.from_arrays(
        quantity=quantity,
        fixed_cost=fixed,
        temporary_impact=impact,
        impact_exponent=law.exponent,
        permanent_impact=0.0,
        inventory_penalty=risk,
        penalty_exponent=p,
        terminal_penalty=terminal,
        caps=caps,
    )


#: The order's own permanent impact: its trades move the price for good by this times the daily
#: volatility times (shares / average daily volume) -- linear permanent impact (Almgren and Chriss
#: 2000); a few tenths is the order of published estimates (from memory), and 0.2 is what the
#: evaluation's invented market charges. The planner's problem leaves it out (with completion
#: forced it barely depends on the schedule); the plan's expected cost includes it.
PERMANENT_IMPACT = 0.2


def own_permanent_impact(
    trades: Any,
    *,
    daily_volatility: float,
    price: float,
    average_daily_volume: float,
    coefficient: float = PERMANENT_IMPACT,
) -> float:
    """The cost of the order's own permanent impact on a schedule, currency.

    Each share pays the move of the shares traded in earlier bins: with ``b = coefficient x
    daily_volatility x price / average_daily_volume`` per share, ``sum_n v_n b sum_{j<n} v_j =
    (b / 2) ((sum v)^2 - sum v^2)`` (the linear permanent term of Almgren and Chriss 2000).

    Args:
        trades: Shares per bin of the schedule.
        daily_volatility: Standard deviation of the day's log return.
        price: Price per share, currency.
        average_daily_volume: Shares.
        coefficient: The permanent impact coefficient (:data:`PERMANENT_IMPACT`).
    """
    v = np.asarray(trades, dtype=np.float64)
    b = coefficient * daily_volatility * price / max(average_daily_volume, 1.0)
    total = float(v.sum())
    return 0.5 * b * (total * total - float(np.dot(v, v)))


def timing_cost_sd(trades: Any, volatility: Any, price: float) -> float:
    """Standard deviation of a schedule's timing cost (the market's own moves), currency.

    With the log price Brownian (per-bin variance ``sigma_n^2``) and each bin's shares bought at
    the bin's time-averaged price, the variance is ``price^2 sum_n sigma_n^2 (q_{n+1}^2 +
    q_{n+1} v_n + v_n^2 / 3)`` with ``q_{n+1}`` the shares still to trade after bin ``n``
    (``Var`` of the bin's move ``sigma^2``, of its average ``sigma^2 / 3``, their covariance
    ``sigma^2 / 2``).

    Args:
        trades: Shares per bin of the schedule.
        volatility: Per-bin standard deviation of the log return, over the same bins.
        price: Price per share, currency.
    """
    v = np.asarray(trades, dtype=np.float64)
    sigma = np.asarray(volatility, dtype=np.float64)
    after = float(v.sum()) - np.cumsum(v)
    variance = float(np.sum(sigma * sigma * (after * after + after * v + v * v / 3.0)))
    return price * math.sqrt(max(variance, 0.0))


# --------------------------------------------------------------------------- order plans

#: Sides of an order.
SIDES = ("buy", "sell")


@dataclass(frozen=True, slots=True)
class PlannedBin:
    """One bin of an order's plan.

    Attributes:
        start: Bin start, venue local time (tz-aware).
        end: Bin end.
        quantity: Whole shares planned in the bin, in the order's direction (never negative).
        forecast_volume: Forecast market volume of the bin (shares).
        participation: ``quantity / forecast_volume``.
        inventory_after: Shares of the order left after the bin.
    """

    start: datetime
    end: datetime
    quantity: int
    forecast_volume: float
    participation: float
    inventory_after: int

    def to_mapping(self) -> dict[str, Any]:
        """The bin as the JSON object of ``tracker plan --order --format json``."""
        return {
            "start": self.start.isoformat(),
            "end": self.end.isoformat(),
            "quantity": self.quantity,
            "participation": self.participation,
            "inventory_after": self.inventory_after,
            "forecast_volume": self.forecast_volume,
        }


@dataclass(frozen=True, eq=False)
class OrderPlan:
    """The optimal schedule of an order with its expected cost and what a trader reads first.

    Costs are in currency, positive for a cost, for buys and sells alike. Three numbers are kept
    apart because they are easily confused:

    * the *expected cost* (``cost["expected"]``): half spread and fees plus temporary and
      permanent impact of the planned trades -- what the plan expects to pay against the arrival
      price on average; the engine's status calls the same quantity ``expected_cost``;
    * its *standard deviation* (:attr:`cost_std`): the price risk of the inventory still held,
      ``sqrt(sum_n (sigma_n P)^2 q_n^2)`` with ``q_n`` the shares left after bin ``n`` and
      ``sigma_n`` the bin's volatility (Almgren and Chriss 2000, the variance of the cost of a
      trajectory);
    * the *risk term* (``cost["risk"]``): the penalty the optimiser adds for that risk,
      ``lambda x variance`` when the penalty exponent is 2; a preference, not money paid.

    Attributes:
        symbol: The order's symbol.
        side: ``"buy"`` or ``"sell"``; quantities are shares in that direction.
        quantity: Shares of the order.
        arrival_price: Price the costs are measured against (currency per share).
        preferences: The preferences used.
        problem: The canonical problem that was solved.
        schedule: The solver's schedule (continuous shares).
        bins: The plan per bin, rounded to whole shares.
        cost: In currency: ``spread``, ``impact``, ``risk``, ``completion`` (penalty on an
            unfinished quantity; infinite when completion is forced and the caps prevent it),
            ``expected`` (spread + impact) and ``total`` (the objective: all four terms).
        cost_std: Standard deviation of the cost, currency.
        requested_start, requested_end: The order's window as given, venue local time.
        timezone: The venue's IANA timezone.
        max_participation: The participation cap, or ``None``.
    """

    symbol: str
    side: str
    quantity: float
    arrival_price: float
    preferences: Preferences
    problem: Problem
    schedule: Schedule
    bins: tuple[PlannedBin, ...]
    cost: Mapping[str, float]
    cost_std: float = 0.0
    requested_start: datetime | None = None
    requested_end: datetime | None = None
    timezone: str = ""
    max_participation: float | None = None

    @property
    def cost_bps(self) -> dict[str, float]:
        """The cost in basis points of the order's value at the arrival price."""
        scale = self._bps_scale()
        return {name: value * scale for name, value in self.cost.items()}

    @property
    def cost_std_bps(self) -> float:
        """:attr:`cost_std` in basis points of the order's value at the arrival price."""
        return self.cost_std * self._bps_scale()

    def _bps_scale(self) -> float:
        notional = self.quantity * self.arrival_price
        return 1e4 / notional if notional > 0 else 0.0

    @property
    def window_start(self) -> datetime:
        """Start of the planned window (venue local time): the order's start inside the session."""
        return self.bins[0].start

    @property
    def window_end(self) -> datetime:
        """End of the planned window (venue local time)."""
        return self.bins[-1].end

    @property
    def start_clipped(self) -> bool:
        """Whether the session cut the start (the order asked to start before the open)."""
        return self.requested_start is not None and self.requested_start < self.window_start

    @property
    def end_clipped(self) -> bool:
        """Whether the session cut the end (the order asked to end after the close)."""
        return self.requested_end is not None and self.requested_end > self.window_end

    @property
    def window_volume(self) -> float:
        """Forecast market volume over the window, shares."""
        return float(sum(b.forecast_volume for b in self.bins))

    @property
    def volume_share(self) -> float:
        """The order's quantity as a fraction of the forecast volume in its window."""
        volume = self.window_volume
        return self.quantity / volume if volume > 0 else math.inf

    @property
    def average_participation(self) -> float:
        """Planned shares over the forecast volume of the bins that trade (a fraction)."""
        trading = [b for b in self.bins if b.quantity > 0]
        volume = sum(b.forecast_volume for b in trading)
        return sum(b.quantity for b in trading) / volume if volume > 0 else 0.0

    @property
    def peak_participation(self) -> float:
        """The largest planned share of a bin's forecast volume (a fraction)."""
        return max((b.participation for b in self.bins), default=0.0)

    def milestones(
        self, fractions: tuple[float, ...] = (0.25, 0.5, 0.75)
    ) -> dict[float, datetime | None]:
        """When the plan has done each fraction of the order: the end of the bin that reaches it.

        ``None`` for a fraction the plan never reaches (a capped shortfall).
        """
        done = 0
        reached: dict[float, datetime | None] = dict.fromkeys(fractions)
        for item in self.bins:
            done += item.quantity
            for fraction in fractions:
                if reached[fraction] is None and done >= fraction * self.quantity - 0.5:
                    reached[fraction] = item.end
        return reached

    def to_mapping(self) -> dict[str, Any]:
        """The plan as the JSON object of ``tracker plan --order --format json``."""

        def finite(value: float) -> float | None:
            return value if math.isfinite(value) else None

        bps = self.cost_bps
        return {
            "symbol": self.symbol,
            "side": self.side,
            "quantity": self.quantity,
            "arrival_price": self.arrival_price,
            "status": self.schedule.status,
            "shortfall": float(self.schedule.shortfall),
            "timezone": self.timezone,
            "window": {
                "start": self.window_start.isoformat(),
                "end": self.window_end.isoformat(),
                "start_clipped": self.start_clipped,
                "end_clipped": self.end_clipped,
            },
            "max_participation": self.max_participation,
            "forecast_volume": self.window_volume,
            "volume_share": finite(self.volume_share),
            "average_participation": self.average_participation,
            "peak_participation": self.peak_participation,
            "milestones": {
                f"{round(fraction * 100)}%": None if when is None else when.isoformat()
                for fraction, when in self.milestones().items()
            },
            "preferences": self.preferences.to_mapping(),
            "bins": [b.to_mapping() for b in self.bins],
            "expected_cost": {
                "currency": self.cost["expected"],
                "bps": bps["expected"],
                "breakdown": {
                    name: {"currency": finite(self.cost[name]), "bps": finite(bps[name])}
                    for name in ("spread", "impact", "risk", "completion")
                },
            },
            "cost_std": {"currency": self.cost_std, "bps": self.cost_std_bps},
            "objective": {"currency": finite(self.cost["total"]), "bps": finite(bps["total"])},
        }


def whole_shares(trajectory: Any) -> Any:
    """Round an inventory path to whole shares; trades stay >= 0 and sum to the order."""
    rounded = np.round(np.asarray(trajectory, dtype=np.float64))
    return rounded, -np.diff(rounded)


def plan_order(
    *,
    symbol: str,
    side: str,
    quantity: float,
    start: datetime,
    end: datetime,
    liquidity: Profile | Forecast,
    preferences: Preferences,
    max_participation: float | None,
    arrival_price: float,
) -> OrderPlan:
    """Plan an order over its window from a profile (or today's forecast).

    Args:
        symbol: The order's symbol.
        side: ``"buy"`` or ``"sell"``; only the reporting depends on it (the problem is
            side-free: shares to execute).
        quantity: Shares to execute (> 0).
        start: Order start (tz-aware, or naive in the venue's local time).
        end: Order end; the window is cut to the session of the start's local day.
        liquidity: A :class:`~tracker.core.profiles.Profile` (planned as a normal day) or a
            :class:`~tracker.core.forecast.Forecast`.
        preferences: Cost/risk preferences.
        max_participation: Cap as a fraction of forecast volume, or ``None``.
        arrival_price: Currency per share (> 0).

    Raises:
        InputError: a bad side, quantity, window or price.
    """
    if side not in SIDES:
        raise InputError(f"must be buy or sell; got {side!r}", field="side")
    if isinstance(quantity, bool) or not (quantity > 0 and math.isfinite(quantity)):
        raise InputError(f"must be a number of shares > 0; got {quantity!r}", field="quantity")
    today = forecast(liquidity, {}) if isinstance(liquidity, Profile) else liquidity
    session = today.session
    first, end_bin, fraction = session.bin_span(start, end)
    problem = build_problem(
        quantity=float(quantity),
        first_bin=first,
        end_bin=end_bin,
        forecast=today,
        preferences=preferences,
        max_participation=max_participation,
        price=arrival_price,
        first_fraction=fraction,
    )
    schedule = solve(problem)
    clock = session.bins(session.local(start).date())[first:end_bin]
    inventory, trades = whole_shares(schedule.trajectory)
    volumes = np.maximum(today.volume[first:end_bin], 1.0).copy()
    volumes[0] *= fraction
    if fraction < 1.0:  # the order starts inside its first bin
        clock[0] = (session.local(start), clock[0][1])
    bins = tuple(
        PlannedBin(
            start=b_start,
            end=b_end,
            quantity=int(trade),
            forecast_volume=float(volume),
            participation=float(trade / volume),
            inventory_after=int(left),
        )
        for (b_start, b_end), trade, volume, left in zip(
            clock, trades, volumes, inventory[1:], strict=True
        )
    )
    terms = schedule.cost
    cost = {
        "spread": float(terms["fixed_cost"]),
        "impact": float(terms["temporary_impact"] + terms["permanent_impact"]),
        "risk": float(terms["inventory_penalty"]),
        "completion": float(terms["terminal_penalty"]),
    }
    cost["total"] = sum(cost.values())
    cost["expected"] = cost["spread"] + cost["impact"]
    # Variance of the cost (Almgren and Chriss 2000): the price of each bin moves with standard
    # deviation sigma_n P and acts on the shares still held after the bin's trades.
    sigma = today.volatility[first:end_bin] * float(arrival_price)
    variance = float(np.sum((sigma * np.asarray(schedule.trajectory[1:])) ** 2))
    return OrderPlan(
        symbol=symbol,
        side=side,
        quantity=float(quantity),
        arrival_price=float(arrival_price),
        preferences=preferences,
        problem=problem,
        schedule=schedule,
        bins=bins,
        cost=cost,
        cost_std=math.sqrt(variance),
        requested_start=session.local(start),
        requested_end=session.local(end),
        timezone=session.timezone,
        max_participation=max_participation,
    )

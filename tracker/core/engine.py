"""The tracking engine: parent orders against their plan, re-planned every bin.

Theory of operation
-------------------
The engine is a pure state machine (h11 style): ``handle(event) -> outputs``. It never reads the
clock, the network or the disk; time is the ``ts`` of the events, and
:class:`~tracker.edge.wire.Tick` events (injected by the shells) move time when no message arrives.
The shells decode and validate at the edge (:func:`tracker.edge.wire.decode`) and publish or write
what the engine returns.

Per parent order the engine keeps: the lifecycle (:mod:`tracker.core.lifecycle`, one state table),
the *baseline* plan (made when the order starts; replaced by an amendment), the latest plan with its
version number, the fills (idempotent by fill id), the arrival price and the interval VWAP.

Events:

* ``order new``: checked against the symbol's session (:class:`~tracker.core.session.Session` of its
  :class:`~tracker.core.profiles.Profile`; the stated default profile when none was given, with an
  info alert once per symbol). It is ``pending`` until its start; then it is planned over its own
  remaining bins and its first target is published. ``amend`` (quantity, end, limit price,
  participation cap, urgency, preferences) re-plans at once and resets the baseline; ``cancel``
  publishes a zero target.
* ``fill``: recorded at once (status published); an overfill, a fill on an ended order and a fill
  whose price is far outside its bin's range raise alerts. A fill for an unknown order, a fill id
  seen before with different content and a fill whose side differs from the order's are rejected:
  one :class:`~tracker.edge.wire.ErrorMessage` each, plus a one-shot alert on the order's alert
  topic. An exact redelivery changes nothing and returns nothing.
* ``bin`` (a symbol's bin closed): the intraday forecast is updated; for every working order on
  the symbol the remaining horizon is re-solved from the realized inventory -- all orders of the
  event in one :func:`~tracker.core.solve.solve_batch` call -- and the next bin's target, the status
  and the alerts are published. When the last price is beyond an order's limit, the next bin's
  target is zero and the plan is re-solved over the bins after it.
* ``control``: halt or resume one order or all (a global halt also holds orders that start while
  it is on). A halt publishes a zero target.
* ``tick`` (and every other event): starts pending orders whose start has come, expires orders
  whose end has passed, and judges stale market data.

Outputs of one event are ordered by order id (symbol-level alerts first), and within an order as
produced: target, status, alerts. Floats are rounded only on the wire
(:func:`tracker.edge.wire.encode`).

Decisions (the alert codes, severities, thresholds and hysteresis are in
:mod:`tracker.core.alerts`):

* Overfill: the fill is recorded (it happened in the market), ``fill_overfill`` is raised
  (critical) and targets are never negative: remaining is ``max(quantity - filled, 0)``.
* A fill for an unknown order: one ErrorMessage (the line is rejected) and one
  ``fill_unknown_order`` alert (critical) on ``{root}/alerts/{order_id}``.
* Deviation from plan is measured against the *baseline* (the plan made at the start, or at the
  latest amendment), never against the latest re-plan, which starts from the realized inventory
  and so has no gap by construction. "Bins" of deviation are bins of the baseline's average
  planned trading (its quantity over its number of bins).
* Symbol-wide conditions (liquidity shock, stale data, default profile) are published once per
  symbol on ``{root}/alerts`` with ``order_id`` null, not once per order; the summary counts the
  alerts of each order only.
* Raised conditions of an order that ends (done, cancelled, expired) are dropped without a
  "cleared" message: the end of the order says it.
* Time going backwards is judged per stream: bins per symbol (by bin start), order messages per
  order, ticks among ticks, control among control messages. Fills carry their execution time and
  may arrive late: they are not rejected for it.
"""

from __future__ import annotations

import heapq
import json
import math
from collections import Counter
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field, fields, replace
from datetime import date, datetime, timedelta
from typing import Any

import numpy as np
import numpy.typing as npt

from tracker.core import alerts as rules
from tracker.core.alerts import AlertBook, AlertConfig, Check
from tracker.core.forecast import Forecast, ObservedBin, forecast
from tracker.core.formulation import Preferences, build_problem, preferences
from tracker.core.lifecycle import AMENDABLE, LIVE, Event, Lifecycle, State, TransitionError
from tracker.core.messages import (
    AlertMessage,
    BinMessage,
    ControlMessage,
    ErrorMessage,
    FillMessage,
    Inbound,
    OrderMessage,
    Outbound,
    Side,
    StatusMessage,
    TargetMessage,
    Tick,
    json_object,
    payload_text,
)
from tracker.core.problem import Problem
from tracker.core.profiles import Profile, default_profile
from tracker.core.solve import CAPPED_SHORTFALL, Schedule, solve, solve_batch
from tracker.core.topics import DEFAULT_ROOT, Topics
from tracker.errors import InputError, TrackerError

FloatArray = npt.NDArray[np.float64]

#: When no price is known yet (no bin, no arrival price, no limit), the plan assumes the price at
#: which the profile's median spread is this many basis points (a liquid stock's quoted spread is
#: a few basis points: common practice). Only the plan's shape depends on it, and only until the
#: first bin of the symbol arrives.
ASSUMED_SPREAD_BPS = 5.0


@dataclass(frozen=True)
class EngineConfig(AlertConfig):
    """Engine settings: every alert threshold (:class:`~tracker.core.alerts.AlertConfig`) plus
    these.

    Attributes:
        expiry_grace_seconds: An order expires this long after its end (fills of its last bin
            that arrive within the grace still count as live).
    """

    expiry_grace_seconds: float = 0.0

    def __post_init__(self) -> None:
        super().__post_init__()
        grace = self.expiry_grace_seconds
        if (
            isinstance(grace, bool)
            or not isinstance(grace, int | float)
            or not (math.isfinite(grace) and grace >= 0)
        ):
            raise InputError(
                f"must be a number of seconds >= 0; got {grace!r}", field="expiry_grace_seconds"
            )

    @classmethod
    def from_mapping(cls, data: Mapping[str, Any]) -> EngineConfig:
        """Build from a JSON object of thresholds; missing keys keep their defaults.

        Raises:
            InputError: an unknown key (named, with the allowed keys) or a bad value.
        """
        if not isinstance(data, Mapping):
            raise InputError(f"must be a JSON object; got {type(data).__name__}", field="config")
        names = [f.name for f in fields(cls)]
        for key in data:
            if key not in names:
                raise InputError(
                    f"is not an engine setting; the settings are {', '.join(sorted(names))}",
                    field=str(key),
                )
        return cls(**dict(data))


# --------------------------------------------------------------------------------------------
# Internal state
# --------------------------------------------------------------------------------------------


@dataclass(slots=True, eq=False)
class _Plan:
    """A solved schedule placed on the session's bins."""

    version: int
    first_bin: int  # absolute index of trades[0]
    cumulative: FloatArray  # cumulative planned trades from first_bin (length = bins planned)
    filled_at: int  # shares filled when the plan was made
    quantity: float  # shares the plan had to trade
    status: str
    shortfall: float
    expected_cost: float
    price: float

    def expected_filled(self, closed_bin: int | None) -> float:
        """Shares the plan expects filled by the end of bin ``closed_bin`` (None: none closed)."""
        if closed_bin is None or closed_bin < self.first_bin or self.cumulative.size == 0:
            return float(self.filled_at)
        offset = min(closed_bin - self.first_bin, self.cumulative.size - 1)
        return self.filled_at + float(self.cumulative[offset])


@dataclass(slots=True, eq=False)
class _Order:
    order_id: str
    symbol: str
    side: Side
    quantity: int
    start: datetime
    end: datetime
    day: date
    first_bin: int
    end_bin: int
    limit_price: float | None
    max_participation: float | None
    urgency: str | None
    overrides: dict[str, Any] | None
    prefs: Preferences
    arrival_given: float | None
    life: Lifecycle
    last_ts: datetime
    arrival_price: float | None = None
    fills: dict[str, FillMessage] = field(default_factory=dict)
    filled: int = 0
    notional: float = 0.0
    plan: _Plan | None = None
    baseline: _Plan | None = None
    plan_version: int = 0
    blocked: bool = False
    live_from: datetime | None = None
    live_until: datetime | None = None
    vwap_volume: float = 0.0
    vwap_notional: float = 0.0
    volume_scale: float | None = None

    @property
    def remaining(self) -> int:
        return max(self.quantity - self.filled, 0)

    @property
    def sign(self) -> float:
        return 1.0 if self.side == "buy" else -1.0


@dataclass(slots=True, eq=False)
class _Symbol:
    name: str
    profile: Profile
    forecast: Forecast
    day: date | None = None
    day_bins: list[tuple[datetime, datetime]] = field(default_factory=list)
    observed: dict[int, ObservedBin] = field(default_factory=dict)
    bins: dict[int, BinMessage] = field(default_factory=dict)
    last_index: int | None = None
    last_close: float | None = None
    last_bin_end: datetime | None = None
    stale_at: datetime | None = None  # stale if no bin arrives by then (None: not watched)
    orders: dict[str, None] = field(default_factory=dict)  # every order id, ordered set
    unchecked: list[tuple[str, FillMessage]] = field(default_factory=list)

    @property
    def session_bin_seconds(self) -> float:
        return self.profile.session.bin_minutes * 60.0


class _Rejected(Exception):
    """Internal: the current message is rejected with this reason (becomes an ErrorMessage)."""

    def __init__(self, reason: str, extra: list[Outbound] | None = None) -> None:
        super().__init__(reason)
        self.reason = reason
        self.extra = extra or []


#: A re-plan to do: order, reason, first bin, fraction of it left, limit-blocked, problem.
_Job = tuple["_Order", str, int, float, bool, Problem | None]


@dataclass
class _Staged:
    """An event applied up to its re-plans (see :meth:`Engine.handle_many`)."""

    ts: datetime
    jobs: list[_Job]
    out: list[Outbound]
    positions: dict[tuple[str, datetime], tuple[date, float]]


def _iso(ts: datetime) -> str:
    return ts.isoformat().replace("+00:00", "Z")


def _round_or_none(value: float | None, digits: int = 6) -> float | None:
    if value is None or not math.isfinite(value):
        return None
    rounded = round(value, digits)
    return 0.0 if rounded == 0 else rounded


# --------------------------------------------------------------------------------------------
# The engine
# --------------------------------------------------------------------------------------------


class Engine:
    """The pure core: feed it inbound events, get outbound messages.

    Args:
        config: Thresholds and settings (defaults when ``None``).
        profiles: Liquidity profiles by symbol; a symbol without one uses
            :func:`tracker.core.profiles.default_profile` (an info alert says so, once per symbol).
        root: The topic root, to name the topic of a message the engine itself rejects.
    """

    def __init__(
        self,
        config: EngineConfig | None = None,
        profiles: Mapping[str, Profile] | None = None,
        *,
        root: str = DEFAULT_ROOT,
    ) -> None:
        self.config = config or EngineConfig()
        self._grace = timedelta(seconds=self.config.expiry_grace_seconds)
        self.root = root
        self._topics = Topics(root)
        self._profiles: dict[str, Profile] = dict(profiles or {})
        self._orders: dict[str, _Order] = {}
        self._symbols: dict[str, _Symbol] = {}
        self._book = AlertBook()
        self._counts: dict[str, Counter[str]] = {}
        self._clock: datetime | None = None
        self._last_tick: datetime | None = None
        self._last_control: datetime | None = None
        self._seen: set[str] = set()
        self._halt_all = False
        self._starts: list[tuple[datetime, str]] = []
        self._ends: list[tuple[datetime, str]] = []
        self._to_plan: dict[str, str] = {}
        self._out: list[Outbound] = []
        self._positions: dict[tuple[str, datetime], tuple[date, float]] = {}
        self._stale_due: datetime | None = None

    # ---------------------------------------------------------------- public API

    def handle(self, event: Inbound) -> list[Outbound]:
        """Apply one validated inbound event and return what to publish.

        Never raises on bad input: a message the engine cannot accept becomes exactly one
        :class:`~tracker.edge.wire.ErrorMessage` (possibly with alerts), and nothing changes.

        Args:
            event: A message from :func:`tracker.edge.wire.decode` or a
            :class:`~tracker.edge.wire.Tick`.

        Returns:
            Targets, status, alerts and errors, ordered by order id.
        """
        staged = self._prepare(event)
        if isinstance(staged, list):
            return staged
        problems = [job[5] for job in staged.jobs]
        return self._conclude(staged, self._solve(problems) if problems else [])

    def handle_many(self, events: Sequence[Inbound]) -> list[list[Outbound]]:
        """Apply events in order; return the outputs of each, exactly as :meth:`handle` would.

        The one difference is speed: at a bin close every symbol's bin arrives with the same
        time, and each re-plans only that symbol's orders, so such a run of bins shares one
        :func:`~tracker.core.solve.solve_batch` call (the solver gives a problem the same answer,
        bit for bit, alone or in any batch). A run ends at any other event, a repeated symbol, a
        new time, or an event that also re-plans orders of another symbol.

        Args:
            events: Messages from :func:`tracker.edge.wire.decode` or ticks, in arrival order.

        Returns:
            One list of outputs per event.
        """
        results: list[list[Outbound]] = []
        group: list[_Staged] = []
        symbols: set[str] = set()

        def flush() -> None:
            if not group:
                return
            problems = [job[5] for staged in group for job in staged.jobs]
            schedules = iter(self._solve(problems) if problems else ())
            for staged in group:
                results.append(self._conclude(staged, [next(schedules) for _ in staged.jobs]))
            group.clear()
            symbols.clear()

        for event in events:
            joins = (
                isinstance(event, BinMessage)
                and event.symbol not in symbols
                and (not group or event.ts == group[0].ts)
            )
            if not joins:
                flush()
            staged = self._prepare(event)
            if isinstance(staged, list):
                flush()
                results.append(staged)
                continue
            if not staged.jobs and not group:  # nothing to solve and nothing waiting: done now
                results.append(self._conclude(staged, []))
                continue
            group.append(staged)
            if isinstance(event, BinMessage) and all(
                job[0].symbol == event.symbol for job in staged.jobs
            ):
                symbols.add(event.symbol)
            else:
                flush()  # it re-plans across symbols, or is no bin: nothing may join it
        flush()
        return results

    def _prepare(self, event: Inbound) -> _Staged | list[Outbound]:
        """Apply an event up to its re-plans: the problems to solve, or the final outputs."""
        self._out = []
        self._to_plan = {}
        self._positions = {}
        try:
            if isinstance(event, FillMessage):
                self._on_fill(event)
            elif isinstance(event, BinMessage):
                self._on_bin(event)
            elif isinstance(event, OrderMessage):
                self._on_order(event)
            elif isinstance(event, ControlMessage):
                self._on_control(event)
            elif isinstance(event, Tick):
                self._on_tick(event)
            else:  # pragma: no cover - the type says it cannot happen
                raise _Rejected(f"unknown event type {type(event).__name__}")
        except _Rejected as rejection:
            # Only a first-sight alert (default profile) can have been produced before a refusal.
            outputs: list[Outbound] = [
                self._error(event, rejection.reason),
                *rejection.extra,
                *self._out,
            ]
            self._count(outputs)
            return outputs
        except InputError as exc:  # a check deeper down (session, preferences): same contract
            outputs = [self._error(event, str(exc)), *self._out]
            self._count(outputs)
            return outputs
        jobs = self._plan_jobs(event.ts)
        return _Staged(event.ts, jobs, self._out, self._positions)

    def _conclude(self, staged: _Staged, schedules: Sequence[Schedule | None]) -> list[Outbound]:
        """Apply the solved re-plans of a prepared event and return its outputs."""
        self._out = staged.out
        self._positions = staged.positions
        for (order, reason, first, fraction, blocked, problem), schedule in zip(
            staged.jobs, schedules, strict=True
        ):
            self._replanned(order, reason, first, fraction, blocked, problem, schedule, staged.ts)
        outputs = sorted(self._out, key=_order_key)
        self._count(outputs)
        return outputs

    def reject(
        self, topic: str, payload: bytes | str | Mapping[str, Any], reason: str, ts: datetime | None
    ) -> ErrorMessage:
        """The error record of a message that did not pass the edge (decode, line checks).

        Args:
            topic: The topic it arrived on.
            payload: The raw payload (kept, truncated).
            reason: What is wrong and how to fix it.
            ts: When it was received (event time), if known.
        """
        return ErrorMessage(
            reason=reason,
            topic=topic,
            payload=payload_text(payload),
            ts=ts,
            order_id=self._topics.order_id_of(topic),
        )

    def summary(self) -> dict[str, Any]:
        """Per order: quantity, fills, prices, costs against arrival and interval VWAP, alerts.

        ``shortfall_bps`` and ``vwap_bps`` are signed so that positive is a cost for buys and
        sells alike: ``side_sign * (average_price - benchmark) / benchmark * 1e4``.
        """
        orders = []
        for order_id in sorted(self._orders):
            order = self._orders[order_id]
            average = order.notional / order.filled if order.filled else None
            arrival = order.arrival_price
            vwap = order.vwap_notional / order.vwap_volume if order.vwap_volume > 0 else None
            shortfall = (
                order.sign * (average - arrival) / arrival * 1e4
                if average is not None and arrival
                else None
            )
            versus_vwap = (
                order.sign * (average - vwap) / vwap * 1e4 if average is not None and vwap else None
            )
            counts = self._counts.get(order_id, Counter())
            orders.append(
                {
                    "order_id": order_id,
                    "symbol": order.symbol,
                    "side": order.side,
                    "quantity": order.quantity,
                    "filled": order.filled,
                    "average_price": _round_or_none(average),
                    "arrival_price": _round_or_none(arrival),
                    "interval_vwap": _round_or_none(vwap),
                    "shortfall_bps": _round_or_none(shortfall, 4),
                    "vwap_bps": _round_or_none(versus_vwap, 4),
                    "alerts": {code: counts[code] for code in sorted(counts)},
                    "state": order.life.state.value,
                    "plan_version": order.plan_version,
                }
            )
        return {"orders": orders}

    def state_of(self, order_id: str) -> State | None:
        """The lifecycle state of an order, or ``None`` if unknown."""
        order = self._orders.get(order_id)
        return order.life.state if order else None

    def filled(self, order_id: str) -> int:
        """Shares filled on an order (0 if unknown)."""
        order = self._orders.get(order_id)
        return order.filled if order else 0

    # ---------------------------------------------------------------- helpers

    def _error(self, event: Inbound, reason: str) -> ErrorMessage:
        topics = self._topics
        if isinstance(event, OrderMessage):
            topic, order_id = topics.orders(event.order_id), event.order_id
        elif isinstance(event, FillMessage):
            topic, order_id = topics.fills(event.order_id), event.order_id
        elif isinstance(event, BinMessage):
            topic, order_id = topics.bins(event.symbol), None
        elif isinstance(event, ControlMessage):
            topic, order_id = topics.control, event.order_id
        else:
            topic, order_id = topics.tick, None
        # The payload as sent, as near as the decoded message can say: only the fields it set.
        sent = json_object(event, only_set=True)
        return ErrorMessage(
            reason=reason,
            topic=topic,
            payload=payload_text(json.dumps(sent, separators=(",", ":"), ensure_ascii=False)),
            ts=event.ts,
            order_id=order_id,
        )

    def _count(self, outputs: list[Outbound]) -> None:
        for out in outputs:
            if isinstance(out, AlertMessage) and out.state == "raised" and out.order_id:
                self._counts.setdefault(out.order_id, Counter())[out.code] += 1

    def _emit(self, message: Outbound | None) -> None:
        if message is not None:
            self._out.append(message)

    def _apply_check(self, check: Check, order: _Order | None, symbol: str, ts: datetime) -> None:
        scope = order.order_id if order else f"symbol:{symbol}"
        self._emit(
            self._book.apply(
                check,
                scope=scope,
                order_id=order.order_id if order else None,
                symbol=symbol,
                ts=ts,
            )
        )

    def _event(
        self,
        code: str,
        message: str,
        order: _Order | None,
        symbol: str | None,
        ts: datetime,
        details: Mapping[str, Any] | None = None,
        case: str | None = None,
    ) -> AlertMessage:
        return rules.event(
            code,
            message,
            order_id=order.order_id if order else None,
            symbol=symbol,
            ts=ts,
            details=details,
            case=case,
        )

    def _symbol(self, name: str, ts: datetime) -> _Symbol:
        sym = self._symbols.get(name)
        if sym is not None:
            return sym
        profile = self._profiles.get(name)
        if profile is None:
            profile = default_profile(name)
            self._emit(
                self._event(
                    rules.DEFAULT_PROFILE,
                    f"No liquidity profile for {name}: using the stated default profile "
                    f"(1,000,000 shares a day, invented U-shaped curves). Calibrate one with "
                    f"'tracker calibrate' for real decisions.",
                    None,
                    name,
                    ts,
                    {"average_daily_volume": profile.average_daily_volume},
                )
            )
        sym = _Symbol(name=name, profile=profile, forecast=forecast(profile, {}))
        self._symbols[name] = sym
        return sym

    def _ensure_day(self, sym: _Symbol, day: date) -> None:
        if sym.day == day:
            return
        sym.day = day
        sym.day_bins = sym.profile.session.bins(day)
        sym.observed = {}
        sym.bins = {}
        sym.last_index = None
        sym.last_bin_end = None
        sym.stale_at = None
        sym.unchecked = []
        sym.forecast = forecast(sym.profile, {})

    def _local_day(self, sym: _Symbol, ts: datetime) -> date:
        return sym.profile.session.local(ts).date()

    # ---------------------------------------------------------------- time

    def _advance(self, ts: datetime) -> None:
        """Move event time forward: start, expire, judge staleness."""
        if self._clock is None or ts > self._clock:
            self._clock = ts
        now = self._clock
        while self._starts and self._starts[0][0] <= now:
            _, order_id = heapq.heappop(self._starts)
            order = self._orders[order_id]
            if order.life.state is State.PENDING:
                self._start(order, now)
        grace = self._grace
        while self._ends and self._ends[0][0] + grace <= now:
            end, order_id = heapq.heappop(self._ends)
            order = self._orders[order_id]
            if order.end == end and not order.life.terminal:
                self._expire(order, now)
        self._judge_staleness(now)

    def _start(self, order: _Order, now: datetime) -> None:
        order.live_from = now
        if self._halt_all:
            order.life.apply(Event.HALT)
            self._emit(self._zero_target(order, now))
            self._emit(self._status(order, now))
            self._emit(
                self._event(
                    rules.ORDER_HALTED,
                    "The order reached its start during a halt of all orders; it stays halted "
                    "until resumed.",
                    order,
                    order.symbol,
                    now,
                )
            )
            return
        order.life.apply(Event.START)
        self._to_plan[order.order_id] = "start"

    def _expire(self, order: _Order, now: datetime) -> None:
        order.life.apply(Event.EXPIRE)
        order.live_until = now
        self._to_plan.pop(order.order_id, None)
        residual = order.remaining
        self._book.clear_silently(order.order_id)
        self._emit(self._status(order, now))
        if residual > 0:
            message = (
                f"The order expired at its end with {residual:,} of {order.quantity:,} shares "
                f"not filled ({100.0 * residual / order.quantity:.1f} %)."
            )
        else:
            message = "The order reached its end."
        self._emit(
            self._event(
                rules.ORDER_EXPIRED,
                message,
                order,
                order.symbol,
                now,
                {"residual": residual, "filled": order.filled, "quantity": order.quantity},
                case="residual" if residual > 0 else "complete",
            )
        )

    def _arm_staleness(self, sym: _Symbol, reference: datetime) -> None:
        """Watch ``sym``: stale if no bin arrives within ``stale_bins`` bins of ``reference``."""
        limit = timedelta(seconds=self.config.stale_bins * sym.session_bin_seconds)
        sym.stale_at = reference + limit
        if self._stale_due is None or sym.stale_at < self._stale_due:
            self._stale_due = sym.stale_at

    def _judge_staleness(self, now: datetime) -> None:
        """Raise ``market_data_stale`` for watched symbols whose next bin is overdue.

        Cheap on every event: nothing is looked at before the earliest deadline. A symbol is
        judged once when its deadline passes (then unwatched until its next bin or plan): raised
        if it is in session, on its day, with a working order; otherwise just unwatched.
        """
        if self._stale_due is None or now <= self._stale_due:
            return
        due: datetime | None = None
        for name in sorted(self._symbols):
            sym = self._symbols[name]
            deadline = sym.stale_at
            if deadline is None:
                continue
            if now <= deadline:
                due = deadline if due is None else min(due, deadline)
                continue
            sym.stale_at = None
            if sym.profile.session.bin_index(now) is None:
                continue
            if sym.day is not None and self._local_day(sym, now) != sym.day:
                continue
            if not any(self._orders[o].life.state is State.WORKING for o in sym.orders):
                continue
            limit = self.config.stale_bins * sym.session_bin_seconds
            age = (now - deadline).total_seconds() + limit
            check = rules.stale(
                age_seconds=age, bin_seconds=sym.session_bin_seconds, config=self.config
            )
            self._apply_check(check, None, name, now)
        self._stale_due = due

    # ---------------------------------------------------------------- handlers

    def _on_tick(self, tick: Tick) -> None:
        if self._last_tick is not None and tick.ts < self._last_tick:
            raise _Rejected(
                f"tick time {_iso(tick.ts)} is earlier than the previous tick "
                f"{_iso(self._last_tick)}; ticks must move forward"
            )
        self._last_tick = tick.ts
        self._advance(tick.ts)

    def _on_control(self, message: ControlMessage) -> None:
        key = repr(message)
        if key in self._seen:
            return
        if self._last_control is not None and message.ts < self._last_control:
            raise _Rejected(
                f"control time {_iso(message.ts)} is earlier than the previous control message "
                f"{_iso(self._last_control)}; control messages must move forward"
            )
        if message.order_id is not None:
            order = self._orders.get(message.order_id)
            if order is None:
                raise _Rejected(
                    f"order_id: unknown order {message.order_id!r}; send the order first, or "
                    f"leave order_id out to {message.command} all orders"
                )
            event = self._control_event(order, message.command)
            if not order.life.can(event):
                raise _Rejected(
                    str(TransitionError(order.life.state, event, order_id=order.order_id).reason)
                )
            targets = [order]
        else:
            self._halt_all = message.command == "halt"
            wanted = (
                (State.PENDING, State.WORKING) if message.command == "halt" else (State.HALTED,)
            )
            targets = [
                self._orders[o]
                for o in sorted(self._orders)
                if self._orders[o].life.state in wanted
            ]
        self._seen.add(key)
        self._last_control = message.ts
        self._advance(message.ts)
        for order in targets:
            if order.life.terminal:
                continue
            event = self._control_event(order, message.command)
            if not order.life.can(event):
                continue
            order.life.apply(event)
            if event is Event.HALT:
                self._to_plan.pop(order.order_id, None)
                self._emit(self._zero_target(order, message.ts))
                self._emit(self._status(order, message.ts))
                self._emit(
                    self._event(
                        rules.ORDER_HALTED,
                        "The order is halted: its targets are zero until it is resumed.",
                        order,
                        order.symbol,
                        message.ts,
                    )
                )
            else:
                self._emit(
                    self._event(
                        rules.ORDER_RESUMED,
                        "The order is resumed and re-planned from its current inventory.",
                        order,
                        order.symbol,
                        message.ts,
                    )
                )
                if order.life.state is State.WORKING:
                    self._to_plan[order.order_id] = "resume"
                else:
                    self._emit(self._status(order, message.ts))

    def _control_event(self, order: _Order, command: str) -> Event:
        if command == "halt":
            return Event.HALT
        started = self._clock is not None and order.start <= self._clock
        return Event.RESUME if started else Event.RESUME_PENDING

    def _on_order(self, message: OrderMessage) -> None:
        key = repr(message)
        if key in self._seen:
            return  # a redelivery of an accepted message: nothing changes
        existing = self._orders.get(message.order_id)
        if existing is not None and message.ts < existing.last_ts:
            raise _Rejected(
                f"ts: {_iso(message.ts)} is earlier than the previous message of order "
                f"{message.order_id!r} ({_iso(existing.last_ts)}); order messages must move "
                "forward in time"
            )
        if message.action == "new":
            self._new_order(message, existing)
        elif existing is None:
            raise _Rejected(
                f"order_id: unknown order {message.order_id!r}; send action 'new' before "
                f"'{message.action}'"
            )
        else:
            self._check_identity(existing, message)
            if message.action == "amend":
                self._amend(existing, message)
            else:
                self._cancel(existing, message)
        self._seen.add(key)

    def _check_identity(self, order: _Order, message: OrderMessage) -> None:
        if message.symbol is not None and message.symbol != order.symbol:
            raise _Rejected(
                f"symbol: order {order.order_id!r} is on {order.symbol}, not {message.symbol}; "
                "the symbol cannot change (cancel and send a new order)"
            )
        if message.side is not None and message.side != order.side:
            raise _Rejected(
                f"side: order {order.order_id!r} is a {order.side}, not a {message.side}; the "
                "side cannot change (cancel and send a new order)"
            )

    def _new_order(self, message: OrderMessage, existing: _Order | None) -> None:
        if existing is not None:
            raise _Rejected(
                f"order_id: order {message.order_id!r} already exists "
                f"({existing.life.state.value}); send action 'amend' to change it or use a new "
                "order_id"
            )
        assert message.symbol and message.side and message.quantity and message.start
        assert message.end is not None
        sym = self._symbol(message.symbol, message.ts)
        session = sym.profile.session
        try:
            first_bin, end_bin, _ = session.bin_span(message.start, message.end)
        except InputError as exc:
            raise _Rejected(str(exc)) from None
        now = max(self._clock, message.ts) if self._clock else message.ts
        if message.end <= now:
            raise _Rejected(
                f"end: {_iso(message.end)} has already passed (event time {_iso(now)}); send an "
                "end in the future"
            )
        prefs = self._preferences(message.urgency, message.preferences)
        order = _Order(
            order_id=message.order_id,
            symbol=message.symbol,
            side=message.side,
            quantity=message.quantity,
            start=message.start,
            end=message.end,
            day=self._local_day(sym, message.start),
            first_bin=first_bin,
            end_bin=end_bin,
            limit_price=message.limit_price,
            max_participation=message.max_participation,
            urgency=message.urgency,
            overrides=dict(message.preferences) if message.preferences else None,
            prefs=prefs,
            arrival_given=message.arrival_price,
            arrival_price=message.arrival_price,
            life=Lifecycle(message.order_id),
            last_ts=message.ts,
        )
        self._orders[order.order_id] = order
        sym.orders[order.order_id] = None
        heapq.heappush(self._starts, (order.start, order.order_id))
        heapq.heappush(self._ends, (order.end, order.order_id))
        self._advance(message.ts)
        if order.life.state is State.PENDING:
            self._emit(self._status(order, message.ts))

    def _preferences(self, urgency: str | None, overrides: Mapping[str, Any] | None) -> Preferences:
        try:
            return preferences(urgency, overrides)
        except InputError as exc:
            raise _Rejected(str(exc)) from None

    def _amend(self, order: _Order, message: OrderMessage) -> None:
        if order.life.state not in AMENDABLE:
            raise _Rejected(
                f"order {order.order_id!r} is {order.life.state.value}; only pending, working "
                "or halted orders can be amended"
            )
        changed = message.fields_set
        quantity = message.quantity if message.quantity is not None else order.quantity
        if quantity < order.filled:
            raise _Rejected(
                f"quantity: {quantity:,} is below the {order.filled:,} shares already filled; "
                f"send at least {order.filled:,}"
            )
        end = message.end if message.end is not None else order.end
        first_bin, end_bin = order.first_bin, order.end_bin
        if message.end is not None:
            now = self._clock or message.ts
            if end <= now:
                raise _Rejected(
                    f"end: {_iso(end)} has already passed (event time {_iso(now)}); send an end "
                    "in the future"
                )
            session = self._symbols[order.symbol].profile.session
            try:
                first_bin, end_bin, _ = session.bin_span(order.start, end)
            except InputError as exc:
                raise _Rejected(str(exc)) from None
        urgency = message.urgency if "urgency" in changed else order.urgency
        overrides = (
            dict(message.preferences or {}) or None if "preferences" in changed else order.overrides
        )
        prefs = order.prefs
        if "urgency" in changed or "preferences" in changed:
            prefs = self._preferences(urgency, overrides)
        # Everything checked: apply.
        order.last_ts = message.ts
        order.quantity = quantity
        if end != order.end:
            order.end = end
            heapq.heappush(self._ends, (end, order.order_id))
        order.first_bin, order.end_bin = first_bin, end_bin
        if message.limit_price is not None or message.removes_limit:
            order.limit_price = message.limit_price
        if "max_participation" in changed:
            order.max_participation = message.max_participation
        order.urgency, order.overrides, order.prefs = urgency, overrides, prefs
        self._advance(message.ts)
        if order.life.terminal:
            return
        if order.filled >= order.quantity:
            self._complete(order, message.ts)
        elif order.life.state is State.WORKING:
            self._to_plan[order.order_id] = "amend"
        else:
            self._emit(self._status(order, message.ts))

    def _cancel(self, order: _Order, message: OrderMessage) -> None:
        if not order.life.can(Event.CANCEL):
            raise _Rejected(
                str(TransitionError(order.life.state, Event.CANCEL, order_id=order.order_id).reason)
            )
        order.last_ts = message.ts
        self._advance(message.ts)
        if order.life.terminal:  # expired while time advanced: the cancel changes nothing
            return
        order.life.apply(Event.CANCEL)
        order.live_until = message.ts
        self._to_plan.pop(order.order_id, None)
        self._book.clear_silently(order.order_id)
        self._emit(self._zero_target(order, message.ts))
        self._emit(self._status(order, message.ts))

    def _complete(self, order: _Order, ts: datetime) -> None:
        order.life.apply(Event.COMPLETE)
        order.live_until = ts
        self._to_plan.pop(order.order_id, None)
        self._book.clear_silently(order.order_id)
        self._emit(self._zero_target(order, ts))
        self._emit(self._status(order, ts))
        self._emit(
            self._event(
                rules.ORDER_DONE,
                f"The order is complete: {order.filled:,} shares at an average price of "
                f"{order.notional / order.filled:.4f}."
                if order.filled
                else "The order is complete.",
                order,
                order.symbol,
                ts,
                {"filled": order.filled, "quantity": order.quantity},
            )
        )

    def _on_fill(self, fill: FillMessage) -> None:
        order = self._orders.get(fill.order_id)
        if order is None:
            alert = self._event(
                rules.FILL_UNKNOWN_ORDER,
                f"Fill {fill.fill_id} ({fill.quantity:,} shares at {fill.price}) names an order "
                "the engine does not know; it is not counted anywhere.",
                None,
                None,
                fill.ts,
                {"fill_id": fill.fill_id, "quantity": fill.quantity, "price": fill.price},
            )
            alert = replace(alert, order_id=fill.order_id)
            raise _Rejected(
                f"order_id: fill {fill.fill_id!r} is for order {fill.order_id!r}, which the "
                "engine does not know; send the order (action 'new') before its fills",
                [alert],
            )
        previous = order.fills.get(fill.fill_id)
        if previous is not None:
            if previous == fill:
                return  # redelivery
            alert = self._event(
                rules.FILL_DUPLICATE_CONFLICT,
                f"Fill id {fill.fill_id} arrived again with different content; the first "
                "version stands and this one is not counted.",
                order,
                order.symbol,
                fill.ts,
                {
                    "fill_id": fill.fill_id,
                    "first": {"quantity": previous.quantity, "price": previous.price},
                    "second": {"quantity": fill.quantity, "price": fill.price},
                },
            )
            raise _Rejected(
                f"fill_id: {fill.fill_id!r} was already accepted for order {order.order_id!r} "
                f"with quantity {previous.quantity} at {previous.price}; a fill id cannot be "
                "reused -- send a correction under a new fill id",
                [alert],
            )
        if fill.side is not None and fill.side != order.side:
            alert = self._event(
                rules.FILL_WRONG_SIDE,
                f"Fill {fill.fill_id} is a {fill.side} on a {order.side} order; it is not counted.",
                order,
                order.symbol,
                fill.ts,
                {"fill_id": fill.fill_id, "fill_side": fill.side, "order_side": order.side},
            )
            raise _Rejected(
                f"side: fill {fill.fill_id!r} is a {fill.side} but order {order.order_id!r} is a "
                f"{order.side}; send it for the right order",
                [alert],
            )
        order.fills[fill.fill_id] = fill
        order.filled += fill.quantity
        order.notional += fill.quantity * fill.price
        sym = self._symbols[order.symbol]
        sym.unchecked.append((order.order_id, fill))
        self._advance(fill.ts)
        ts = fill.ts if self._clock is None else max(fill.ts, self._clock)
        if order.life.terminal:
            self._emit(
                self._event(
                    rules.FILL_AFTER_CLOSE,
                    f"Fill {fill.fill_id} ({fill.quantity:,} shares) arrived after the order was "
                    f"{order.life.state.value}; it is recorded because it happened in the market.",
                    order,
                    order.symbol,
                    ts,
                    {"fill_id": fill.fill_id, "state": order.life.state.value},
                )
            )
        if order.filled > order.quantity:
            self._emit(
                self._event(
                    rules.FILL_OVERFILL,
                    f"Fills total {order.filled:,} shares, {order.filled - order.quantity:,} more "
                    f"than the order's {order.quantity:,}. The fill is recorded; targets stay at "
                    "zero.",
                    order,
                    order.symbol,
                    ts,
                    {
                        "fill_id": fill.fill_id,
                        "filled": order.filled,
                        "quantity": order.quantity,
                        "excess": order.filled - order.quantity,
                    },
                )
            )
        if not order.life.terminal and order.filled >= order.quantity:
            self._complete(order, ts)
        else:
            self._emit(self._status(order, ts))

    def _on_bin(self, message: BinMessage) -> None:
        sym = self._symbol(message.symbol, message.ts)
        session = sym.profile.session
        day = self._local_day(sym, message.start)
        index = session.bin_index(message.start)
        expected = None
        if index is not None:
            bins = sym.day_bins if sym.day == day else session.bins(day)
            expected = bins[index]
        if index is None or expected is None or (message.start, message.end) != expected:
            grid = f"{session.start:%H:%M}-{session.end:%H:%M} {session.timezone}"
            raise _Rejected(
                f"start/end: {_iso(message.start)} to {_iso(message.end)} is not a bin of "
                f"{message.symbol}'s session ({grid}, {session.bin_minutes}-minute bins); send "
                "closed bins on the session's grid"
            )
        if sym.day is not None and day < sym.day:
            raise _Rejected(
                f"start: bin {_iso(message.start)} is on an earlier day than the bins already "
                f"received for {message.symbol}; bins must move forward in time"
            )
        if sym.day == day:
            previous = sym.bins.get(index)
            if previous is not None:
                if previous == message:
                    return  # redelivery
                raise _Rejected(
                    f"a different bin for {message.symbol} starting {_iso(message.start)} was "
                    "already accepted; a closed bin cannot change"
                )
            if sym.last_index is not None and index < sym.last_index:
                raise _Rejected(
                    f"start: bin {_iso(message.start)} is earlier than the last bin received for "
                    f"{message.symbol} ({_iso(sym.day_bins[sym.last_index][0])}); bins must move "
                    "forward in time"
                )
        self._ensure_day(sym, day)
        before = sym.forecast
        sym.bins[index] = message
        sym.observed[index] = ObservedBin(
            volume=float(message.volume),
            spread=message.spread,
            high=message.high,
            low=message.low,
        )
        sym.forecast = forecast(sym.profile, sym.observed)
        sym.last_index = index
        sym.last_close = message.close
        sym.last_bin_end = message.end
        ts = message.ts
        # Symbol-level checks: liquidity against the forecast made before this bin, staleness.
        self._apply_check(
            rules.volume_shock(
                observed=float(message.volume),
                forecast=float(before.volume[index]),
                config=self.config,
            ),
            None,
            sym.name,
            ts,
        )
        self._apply_check(
            rules.spread_shock(
                observed=message.spread, forecast=float(before.spread[index]), config=self.config
            ),
            None,
            sym.name,
            ts,
        )
        self._apply_check(
            rules.stale(age_seconds=None, bin_seconds=sym.session_bin_seconds, config=self.config),
            None,
            sym.name,
            ts,
        )
        self._arm_staleness(sym, ts)  # judged from when the last bin arrived (event time)
        for order_id in sym.orders:
            order = self._orders[order_id]
            if order.arrival_price is None and message.start >= order.start:
                order.arrival_price = message.open
            if (
                order.live_from is not None
                and message.end > order.live_from
                and (order.live_until is None or message.start < order.live_until)
                and message.vwap is not None
            ):
                order.vwap_volume += message.volume
                order.vwap_notional += message.volume * message.vwap
        self._check_fill_prices(sym, message, ts)
        self._advance(ts)
        for order_id in sym.orders:
            order = self._orders[order_id]
            if order.life.state is State.WORKING:
                self._to_plan.setdefault(order_id, "bin")
            elif order.life.state is State.HALTED:  # no target, but where it stands moved on
                self._emit(self._status(order, ts))

    def _check_fill_prices(self, sym: _Symbol, message: BinMessage, ts: datetime) -> None:
        keep: list[tuple[str, FillMessage]] = []
        for order_id, fill in sym.unchecked:
            if fill.ts >= message.end:
                keep.append((order_id, fill))
                continue
            if fill.ts < message.start:
                continue  # its bin never came (or came before the fill): nothing to judge by
            if rules.fill_price_outside(
                price=fill.price, low=message.low, high=message.high, config=self.config
            ):
                order = self._orders[order_id]
                self._emit(
                    self._event(
                        rules.FILL_PRICE_OUTSIDE,
                        f"Fill {fill.fill_id} at {fill.price} is outside its bin's range "
                        f"{message.low}-{message.high} by more than "
                        f"{self.config.fill_price_tolerance_pct:g} %. Check the fill.",
                        order,
                        order.symbol,
                        ts,
                        {
                            "fill_id": fill.fill_id,
                            "price": fill.price,
                            "low": message.low,
                            "high": message.high,
                        },
                    )
                )
        sym.unchecked = keep

    # ---------------------------------------------------------------- planning

    def _horizon(self, order: _Order, sym: _Symbol, now: datetime) -> tuple[int, float]:
        """The first bin still ahead for ``order`` at ``now`` and the fraction of it left."""
        session = sym.profile.session
        moment = max(order.start, now)
        n = session.n_bins
        key = (sym.name, moment)
        cached = self._positions.get(key)
        if cached is None:  # one timezone conversion per symbol and time, not per order
            cached = (self._local_day(sym, moment), session.position(moment))
            self._positions[key] = cached
        day, position = cached
        if day != order.day:
            return n, 1.0
        if position <= 0:
            first, fraction = 0, 1.0
        elif position >= n:
            return n, 1.0
        else:
            first = math.floor(position)
            fraction = 1.0 - (position - first)
            if fraction < 1e-9:
                first, fraction = first + 1, 1.0
        if sym.day == order.day and sym.last_index is not None and sym.last_index + 1 > first:
            first, fraction = sym.last_index + 1, 1.0
        return first, fraction

    def _price(self, order: _Order, sym: _Symbol) -> float:
        if sym.last_close is not None:
            return sym.last_close
        for candidate in (order.arrival_price, order.limit_price):
            if candidate is not None:
                return candidate
        spread = float(np.median(sym.profile.spread))
        return spread / (ASSUMED_SPREAD_BPS * 1e-4)

    def _plan_jobs(self, ts: datetime) -> list[_Job]:
        """The re-plans the current event asks for, with their problems built."""
        jobs: list[_Job] = []
        if not self._to_plan:
            return jobs
        for order_id in sorted(self._to_plan):
            order = self._orders[order_id]
            if order.life.state is not State.WORKING or order.remaining <= 0:
                continue
            sym = self._symbols[order.symbol]
            self._ensure_day_for_order(sym, order)
            now = self._clock or ts
            if sym.stale_at is None:  # watch the feed from when an order works, in session
                opening = sym.day_bins[0][0] if sym.day_bins else now
                self._arm_staleness(sym, max(now, opening, sym.last_bin_end or now))
            first, fraction = self._horizon(order, sym, now)
            price = self._price(order, sym)
            blocked = self._beyond_limit(order, sym)
            plan_from = first + 1 if blocked else first
            problem: Problem | None = None
            if plan_from < order.end_bin:
                try:
                    problem = build_problem(
                        quantity=float(order.remaining),
                        first_bin=plan_from,
                        end_bin=order.end_bin,
                        forecast=sym.forecast,
                        preferences=order.prefs,
                        max_participation=order.max_participation,
                        price=price,
                        first_fraction=fraction if plan_from == first else 1.0,
                        reference_quantity=float(order.quantity),
                    )
                except InputError as exc:  # never expected: the inputs were checked at the edge
                    self._emit(self._replan_failed(order, ts, str(exc)))
                    continue
            jobs.append((order, self._to_plan[order_id], first, fraction, blocked, problem))
        return jobs

    def _ensure_day_for_order(self, sym: _Symbol, order: _Order) -> None:
        if sym.day is None or sym.day < order.day:
            self._ensure_day(sym, order.day)

    def _beyond_limit(self, order: _Order, sym: _Symbol) -> bool:
        if order.limit_price is None or sym.last_close is None:
            return False
        if order.side == "buy":
            return sym.last_close > order.limit_price
        return sym.last_close < order.limit_price

    def _solve(self, problems: list[Problem | None]) -> list[Schedule | None]:
        real = [p for p in problems if p is not None]
        try:
            solved: list[Schedule | None] = list(solve_batch(real)) if real else []
        except (TrackerError, ArithmeticError, ValueError):
            solved = []
            for problem in real:  # find the one that fails; keep the others
                try:
                    solved.append(solve(problem))
                except (TrackerError, ArithmeticError, ValueError):
                    solved.append(None)
        iterator = iter(solved)
        return [next(iterator) if p is not None else None for p in problems]

    def _replanned(
        self,
        order: _Order,
        reason: str,
        first: int,
        fraction: float,
        blocked: bool,
        problem: Problem | None,
        schedule: Schedule | None,
        ts: datetime,
    ) -> None:
        sym = self._symbols[order.symbol]
        if problem is not None and schedule is None:
            self._emit(self._replan_failed(order, ts, "the solver did not converge"))
            return
        price = self._price(order, sym)
        if schedule is not None:
            trajectory = schedule.trajectory
            cumulative = trajectory[0] - trajectory[1:]  # cumulative trades, one array operation
            plan_first = first + 1 if blocked else first
            expected_cost = float(
                schedule.cost.get("fixed_cost", 0.0)
                + schedule.cost.get("temporary_impact", 0.0)
                + schedule.cost.get("permanent_impact", 0.0)
            )
            status, shortfall = schedule.status, float(schedule.shortfall)
        else:  # blocked on its last bin, or no bin left: nothing can trade
            cumulative = np.zeros(0)
            plan_first = first
            expected_cost = 0.0
            status, shortfall = CAPPED_SHORTFALL, float(order.remaining)
        previous = order.plan
        order.plan_version += 1
        plan = _Plan(
            version=order.plan_version,
            first_bin=plan_first,
            cumulative=cumulative,
            filled_at=order.filled,
            quantity=float(order.remaining),
            status=status,
            shortfall=shortfall,
            expected_cost=expected_cost,
            price=price,
        )
        order.plan = plan
        order.blocked = blocked
        order.volume_scale = float(sym.forecast.volume_scale)
        if reason in ("start", "amend") or order.baseline is None:
            order.baseline = plan
        # Target for the next bin.
        if first < sym.profile.session.n_bins and first < order.end_bin:
            if blocked or schedule is None or problem is None:
                quantity = 0
                volume = max(float(sym.forecast.volume[first]) * fraction, 1.0)
                cap = (
                    order.max_participation * volume
                    if order.max_participation is not None
                    else None
                )
            else:
                caps = problem.cap_array
                cap = float(caps[0]) if math.isfinite(caps[0]) else None
                quantity = round(float(schedule.trades[0]))
            max_quantity = None if cap is None else math.floor(cap + 1e-9)
            quantity = max(0, min(quantity, order.remaining))
            if max_quantity is not None:
                quantity = min(quantity, max_quantity)
            self._emit(self._target(order, first, quantity, max_quantity, ts))
        closed = sym.last_index if sym.day == order.day else None
        deviation = self._deviation(order, closed)
        self._emit(self._status(order, ts, deviation))
        # Alerts.
        if reason == "bin":
            _, gap, gap_bins = deviation
            behind, ahead = rules.deviation(
                quantity=order.quantity,
                deviation_shares=gap,
                deviation_bins=gap_bins,
                config=self.config,
            )
            self._apply_check(behind, order, order.symbol, ts)
            self._apply_check(ahead, order, order.symbol, ts)
            if previous is not None:
                self._apply_check(
                    rules.replan_moved(
                        move_shares=self._move(previous, plan, order),
                        quantity=order.quantity,
                        config=self.config,
                    ),
                    order,
                    order.symbol,
                    ts,
                )
        # These two can only breach in one known case; otherwise they matter only if raised.
        capped = status == CAPPED_SHORTFALL
        if capped or self._book.is_raised(order.order_id, rules.COMPLETION_INFEASIBLE):
            self._apply_check(
                rules.completion(
                    quantity=order.quantity,
                    shortfall=shortfall if capped else 0.0,
                    config=self.config,
                ),
                order,
                order.symbol,
                ts,
            )
        if blocked or self._book.is_raised(order.order_id, rules.LIMIT_BLOCKING):
            self._apply_check(
                rules.limit_blocking(
                    blocked=blocked, side=order.side, limit=order.limit_price, price=sym.last_close
                ),
                order,
                order.symbol,
                ts,
            )

    def _replan_failed(self, order: _Order, ts: datetime, why: str) -> AlertMessage:
        return self._event(
            rules.REPLAN_FAILED,
            f"The re-plan failed ({why}); the previous plan and target stand. Report this with "
            "the replay file.",
            order,
            order.symbol,
            ts,
        )

    def _deviation(self, order: _Order, closed: int | None) -> tuple[float, float, float | None]:
        """Against the baseline: planned filled shares, the gap (planned - filled, positive =
        behind) and the gap in bins of the baseline's average planned trading."""
        baseline = order.baseline
        if baseline is None:
            return 0.0, 0.0, None
        planned = baseline.expected_filled(closed)
        gap = planned - order.filled
        bins = baseline.cumulative.size
        per_bin = baseline.quantity / bins if bins else 0.0
        return planned, gap, (gap / per_bin if per_bin > 0 else None)

    @staticmethod
    def _move(previous: _Plan, plan: _Plan, order: _Order) -> float:
        """Largest change, over the bins both plans cover, of the expected filled shares."""
        if plan.cumulative.size == 0 or previous.cumulative.size == 0:
            return 0.0
        start = max(previous.first_bin, plan.first_bin)
        stop = min(
            previous.first_bin + previous.cumulative.size, plan.first_bin + plan.cumulative.size
        )
        if stop <= start:
            return 0.0
        old = (
            previous.filled_at
            + previous.cumulative[start - previous.first_bin : stop - previous.first_bin]
        )
        new = plan.filled_at + plan.cumulative[start - plan.first_bin : stop - plan.first_bin]
        difference = new - old
        index = int(np.argmax(np.abs(difference)))
        return float(difference[index])

    # ---------------------------------------------------------------- outputs

    def _bin_times(self, order: _Order, index: int) -> tuple[datetime | None, datetime | None]:
        sym = self._symbols[order.symbol]
        if sym.day != order.day or not 0 <= index < len(sym.day_bins):
            bins = sym.profile.session.bins(order.day)
            if not 0 <= index < len(bins):
                return None, None
            return bins[index]
        return sym.day_bins[index]

    def _target(
        self, order: _Order, index: int, quantity: int, max_quantity: int | None, ts: datetime
    ) -> TargetMessage:
        bin_start, bin_end = self._bin_times(order, index)
        return TargetMessage(
            order_id=order.order_id,
            symbol=order.symbol,
            side=order.side,
            bin_start=bin_start,
            bin_end=bin_end,
            quantity=quantity,
            cumulative_target=min(order.filled, order.quantity) + quantity,
            remaining=order.remaining,
            max_quantity=max_quantity,
            plan_version=order.plan_version,
            ts=ts,
        )

    def _zero_target(self, order: _Order, ts: datetime) -> TargetMessage:
        sym = self._symbols[order.symbol]
        first, _ = self._horizon(order, sym, self._clock or ts)
        return self._target(order, first, 0, None, ts)

    def _status(
        self,
        order: _Order,
        ts: datetime,
        deviation: tuple[float, float, float | None] | None = None,
    ) -> StatusMessage:
        if deviation is None:
            sym = self._symbols[order.symbol]
            closed = sym.last_index if sym.day == order.day else None
            deviation = self._deviation(order, closed)
        planned, gap, gap_bins = deviation
        plan = order.plan
        cost = plan.expected_cost if plan is not None and order.life.state in LIVE else None
        notional = order.remaining * plan.price if plan is not None else 0.0
        cost_bps = cost / notional * 1e4 if cost is not None and notional > 0 else None
        # Every value is already of its field's type (floats are floats, not ints or numpy).
        return StatusMessage(
            order_id=order.order_id,
            symbol=order.symbol,
            side=order.side,
            state=order.life.state.value,
            quantity=order.quantity,
            filled=order.filled,
            remaining=order.remaining,
            progress_pct=100.0 * min(order.filled, order.quantity) / order.quantity,
            planned_filled=round(planned),
            deviation_shares=round(gap),
            deviation_pct=100.0 * gap / order.quantity,
            deviation_bins=gap_bins,
            average_price=order.notional / order.filled if order.filled else None,
            arrival_price=order.arrival_price,
            limit_price=order.limit_price,
            volume_scale=order.volume_scale,
            expected_cost=cost,
            expected_cost_bps=cost_bps,
            plan_version=order.plan_version,
            ts=ts,
        )


def _order_key(message: Outbound) -> str:
    order_id = getattr(message, "order_id", None)
    return order_id or ""


__all__ = ["ASSUMED_SPREAD_BPS", "Engine", "EngineConfig"]

"""The invented demo day: a closed loop of market, router and fills around the engine.

Everything here is made up: the symbols X_ZEPH, X_KALO and X_MIRA, the venue Harbour Lane Exchange
(X_HLX), their prices and volumes, the orders and the router. It exists to show the engine at work
and to record a replay file; it says nothing about any real market.

Theory of operation
-------------------
:class:`Scenario` is a state machine that owns a queue of timed inbound messages. It never reads a
clock and never touches the network: its driver asks :meth:`Scenario.next_time` when the next
message is due, takes the due messages with :meth:`Scenario.inbound_until`, hands them to the engine
(in-process, :func:`tracker.shell.simulated_day.run_day`) or publishes them (over MQTT,
``tracker demo``), and passes whatever the engine said back through :meth:`Scenario.on_output`.
Only targets matter to it: they are what the order router works.

What goes into the queue:

* the market: one bin message per symbol at every bin close (plus one second of publication
  latency), from :mod:`tracker.sim.market`'s invented generator; at midday X_ZEPH's liquidity
  collapses for a while (:data:`SHOCK`): volume falls to a fifth, the spread triples;
* the parent orders (:data:`ORDERS`) at their submission times, one amend (X_MIRA's quantity and end
  move), one cancel (X_KALO's order stops early) and a quarter-hour halt of X_ZEPH-S2
  (:data:`HALT`);
* fills: the router works each target over its bin in a few child slices. The fill model gives a
  slice nothing (a miss), part of what was asked, or all of it, at the bin's VWAP plus a fraction
  of the half spread against us, never more than a set share of the bin's real volume, never past
  a limit price and never more than the order has left;
* a few deliberately bad messages (:data:`MALFORMED`) and one exact redelivery of a fill, so the
  recording exercises the error path.

The same seed gives the same day, message for message (given the same engine outputs).

Driving it (in-process as :func:`tracker.shell.simulated_day.run_day` does, or over MQTT)::

    scenario = Scenario(seed)
    while (due := scenario.next_time()) is not None:
        # live: wait until the (scaled) clock reaches `due`
        for record in scenario.inbound_until(due):
            publish(record.topic, payload_bytes(record.payload))  # or feed the engine
        for message in outputs_received_meanwhile():        # targets, status, ...
            scenario.on_output(message)

Fills for a target are scheduled after the later of the target's ``ts`` and the latest time already
handed out, so outputs that arrive late (over a broker) never make time go backwards.
"""

from __future__ import annotations

import heapq
import math
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from datetime import UTC, date, datetime, time, timedelta
from typing import Any

import numpy as np

from tracker.core.formats import utc_text
from tracker.core.session import Session
from tracker.core.topics import DEFAULT_ROOT, Topics
from tracker.edge.records import Record
from tracker.edge.wire import Outbound, StatusMessage, TargetMessage
from tracker.errors import InputError
from tracker.sim.market import VENUE, MarketParameters, simulate_day

__all__ = [
    "DAY",
    "ORDERS",
    "SYMBOLS",
    "VENUE",
    "MarketBin",
    "Scenario",
    "ScenarioOrder",
]

#: The invented trading day (a Tuesday).
DAY = date(2026, 3, 10)


@dataclass(frozen=True, slots=True)
class SymbolSpec:
    """An invented symbol: average daily volume (shares), opening price and midday spread."""

    symbol: str
    average_daily_volume: float
    open_price: float
    midday_spread: float


#: The invented symbols of the demo day.
SYMBOLS: tuple[SymbolSpec, ...] = (
    SymbolSpec("X_ZEPH", 1_200_000, 42.10, 0.02),
    SymbolSpec("X_KALO", 900_000, 18.55, 0.01),
    SymbolSpec("X_MIRA", 700_000, 67.30, 0.03),
)


@dataclass(frozen=True, slots=True)
class ScenarioOrder:
    """A parent order of the demo day (local venue times)."""

    order_id: str
    symbol: str
    side: str
    quantity: int
    submit: time
    start: time
    end: time
    urgency: str
    max_participation: float
    limit_price: float | None = None


#: The parent orders of the demo day.
ORDERS: tuple[ScenarioOrder, ...] = (
    ScenarioOrder(
        "X_ZEPH-B1", "X_ZEPH", "buy", 120_000, time(9, 29), time(9, 30), time(16, 0), "medium", 0.15
    ),
    ScenarioOrder(
        "X_KALO-S1", "X_KALO", "sell", 60_000, time(9, 58), time(10, 0), time(14, 30), "high", 0.20
    ),
    ScenarioOrder(
        "X_MIRA-B1", "X_MIRA", "buy", 40_000, time(9, 44), time(9, 45), time(13, 0), "low", 0.15
    ),
    ScenarioOrder(
        "X_ZEPH-S2",
        "X_ZEPH",
        "sell",
        30_000,
        time(12, 58),
        time(13, 0),
        time(15, 30),
        "medium",
        0.10,
        limit_price=None,
    ),
)

#: X_MIRA-B1 is amended at 11:00: more shares, one more hour.
AMEND = ("X_MIRA-B1", time(11, 0), {"quantity": 55_000, "end": time(14, 0)})

#: X_KALO-S1 is cancelled at 13:00, before its end.
CANCEL = ("X_KALO-S1", time(13, 0))

#: The desk halts X_ZEPH-S2 at 14:30 and resumes it at 14:45 (control messages).
HALT = ("X_ZEPH-S2", time(14, 30), time(14, 45))


@dataclass(frozen=True, slots=True)
class Shock:
    """A liquidity shock: over ``[start, end)`` a symbol's volume and spread are scaled."""

    symbol: str
    start: time
    end: time
    volume_factor: float
    spread_factor: float


#: The midday liquidity shock on X_ZEPH.
SHOCK = Shock("X_ZEPH", time(12, 0), time(12, 45), volume_factor=0.2, spread_factor=3.0)

#: The invented market follows the shapes of the stated default profile
#: (:func:`tracker.core.profiles.default_profile`), which the demo engine uses for want of a
#: calibrated one; the symbols differ in volume, price and spread.
DEFAULT_SHAPES: dict[str, Any] = {
    "volume_shape": (1.5, 0.08, 1.2, 0.04),
    "spread_shape": (1.5, 0.05, 0.0, 1.0),
    "variance_shape": (1.5, 0.08, 0.4, 0.04),
    "daily_volatility": 0.02,
}

#: Bin messages are published this long after the bin closes.
BIN_LATENCY = timedelta(seconds=1)

#: The fill model: child slices per target, chance a slice misses, chance a filled slice is
#: partial, the share of the bin's real volume the router can take, and the part of the half
#: spread paid.
SLICES = 4
MISS_PROBABILITY = 0.08
PARTIAL_PROBABILITY = 0.30
VOLUME_SHARE_CAP = 0.30


@dataclass(frozen=True, slots=True)
class MarketBin:
    """What the invented market did in one bin of one symbol."""

    symbol: str
    index: int
    start: datetime
    end: datetime
    volume: int
    vwap: float
    open: float
    high: float
    low: float
    close: float
    spread: float


Payload = Mapping[str, Any] | str


@dataclass(order=True)
class _Due:
    """A queued inbound message; ``build`` makes its topic and payload when it falls due.

    Building late lets the message depend on what happened meanwhile (a fill on what is left of
    the order, a withdrawn slice after a cancel). ``None`` drops it.
    """

    when: datetime
    seq: int
    build: Callable[[], tuple[str, Payload] | None] = field(compare=False)


@dataclass
class _Working:
    """The router's view of one parent order."""

    spec: ScenarioOrder
    quantity: int
    end: datetime
    filled: int = 0
    active: bool = True
    version: int = 0
    fills: int = 0


class Scenario:
    """The invented demo day as a state machine (see the module docstring).

    Args:
        seed: Seed of every random draw (market and fill model).
        day: The trading day.
        root: MQTT topic root of the messages.
        session: The venue's session (default 09:30-16:00 New York, 5-minute bins).

    Raises:
        InputError: The day is not a weekday.
    """

    def __init__(
        self,
        seed: int = 7,
        *,
        day: date = DAY,
        root: str = DEFAULT_ROOT,
        session: Session | None = None,
    ) -> None:
        if day.weekday() >= 5:
            raise InputError(f"must be a weekday; {day} is a {day:%A}", field="day")
        self.seed = seed
        self.day = day
        self.root = root
        self.topics = Topics(root)
        self.session = session or Session()
        self._rng = np.random.default_rng([seed, 1])
        self._queue: list[_Due] = []
        self._seq = 0
        self._line = 0
        self._clock: datetime | None = None
        self.market = generate_market(self.session, day, seed)
        self._bins = {(b.symbol, b.start): b for bins in self.market.values() for b in bins}
        self._capacity = {key: VOLUME_SHARE_CAP * b.volume for key, b in self._bins.items()}
        self._orders: dict[str, _Working] = {}
        self._fills_sent: list[tuple[str, Payload]] = []
        self._schedule_market()
        self._schedule_orders()
        self._schedule_malformed()

    # ------------------------------------------------------------------ driver interface

    def next_time(self) -> datetime | None:
        """When the next message falls due (``None`` when the day is over)."""
        return self._queue[0].when if self._queue else None

    def inbound_until(self, ts: datetime) -> list[Record]:
        """The messages due at or before ``ts``, in time order, numbered as lines of a recording.

        Each is a :class:`~tracker.edge.records.Record` with the payload as a JSON object, or as raw
        text for the deliberately malformed ones, and ``ts`` its send time.
        """
        out: list[Record] = []
        while self._queue and self._queue[0].when <= ts:
            due = heapq.heappop(self._queue)
            built = due.build()
            if built is None:
                continue
            topic, payload = built
            self._clock = due.when
            self._line += 1
            out.append(Record(line=self._line, topic=topic, payload=payload, ts=_ms(due.when)))
        if self._clock is None or ts > self._clock:
            self._clock = ts
        return out

    def on_output(self, message: Outbound) -> None:
        """See one engine output: a target is worked by the router; a final status stops work."""
        if isinstance(message, TargetMessage):
            self._work(message)
        elif isinstance(message, StatusMessage) and message.state in _FINAL_STATES:
            working = self._orders.get(message.order_id)
            if working is not None:
                working.active = False

    # ------------------------------------------------------------------ the market

    def _schedule_market(self) -> None:
        for symbol in sorted(self.market):
            for market_bin in self.market[symbol]:
                self._push(
                    market_bin.end.astimezone(UTC) + BIN_LATENCY,
                    self.topics.bins(symbol),
                    _constant(_bin_payload(market_bin, market_bin.end + BIN_LATENCY)),
                )

    # ------------------------------------------------------------------ the orders

    def _local(self, clock: time) -> datetime:
        return datetime.combine(self.day, clock, tzinfo=self.session.zone).astimezone(UTC)

    def _schedule_orders(self) -> None:
        for spec in ORDERS:
            submit = self._local(spec.submit)
            self._push(submit, self.topics.orders(spec.order_id), self._new_order(spec, submit))
        order_id, at, changes = AMEND
        self._push(
            self._local(at), self.topics.orders(order_id), self._amend(order_id, at, changes)
        )
        order_id, at = CANCEL
        self._push(self._local(at), self.topics.orders(order_id), self._cancel(order_id, at))
        order_id, halt, resume = HALT
        for command, clock in (("halt", halt), ("resume", resume)):
            payload = {
                "type": "control",
                "command": command,
                "order_id": order_id,
                "ts": _ms(self._local(clock)),
            }
            self._push(self._local(clock), self.topics.control, _constant(payload))

    def _new_order(self, spec: ScenarioOrder, submit: datetime) -> Callable[[], Mapping[str, Any]]:
        def build() -> Mapping[str, Any]:
            self._orders[spec.order_id] = _Working(spec, spec.quantity, self._local(spec.end))
            payload: dict[str, Any] = {
                "type": "order",
                "action": "new",
                "order_id": spec.order_id,
                "symbol": spec.symbol,
                "side": spec.side,
                "quantity": spec.quantity,
                "start": _ms(self._local(spec.start)),
                "end": _ms(self._local(spec.end)),
                "urgency": spec.urgency,
                "max_participation": spec.max_participation,
                "arrival_price": self._last_price(spec.symbol, submit),
                "ts": _ms(submit),
            }
            if spec.limit_price is not None:
                payload["limit_price"] = spec.limit_price
            return payload

        return build

    def _amend(
        self, order_id: str, at: time, changes: Mapping[str, Any]
    ) -> Callable[[], Mapping[str, Any]]:
        def build() -> Mapping[str, Any]:
            working = self._orders[order_id]
            payload: dict[str, Any] = {"type": "order", "action": "amend", "order_id": order_id}
            if "quantity" in changes:
                working.quantity = int(changes["quantity"])
                payload["quantity"] = working.quantity
            if "end" in changes:
                working.end = self._local(changes["end"])
                payload["end"] = _ms(working.end)
            payload["ts"] = _ms(self._local(at))
            return payload

        return build

    def _cancel(self, order_id: str, at: time) -> Callable[[], Mapping[str, Any]]:
        def build() -> Mapping[str, Any]:
            working = self._orders[order_id]
            working.active = False
            working.version += 1  # slices already planned are withdrawn with the order
            return {
                "type": "order",
                "action": "cancel",
                "order_id": order_id,
                "ts": _ms(self._local(at)),
            }

        return build

    def _last_price(self, symbol: str, ts: datetime) -> float:
        """The close of the last bin that ended by ``ts``, or the day's open before the first."""
        price = self.market[symbol][0].open
        for market_bin in self.market[symbol]:
            if market_bin.end > ts:
                break
            price = market_bin.close
        return price

    # ------------------------------------------------------------------ the router and fills

    def _work(self, target: TargetMessage) -> None:
        working = self._orders.get(target.order_id)
        if working is None:
            return
        working.version += 1  # any new target replaces what is still planned for this order
        if not working.active or target.bin_start is None or target.bin_end is None:
            return
        market_bin = self._bins.get((working.spec.symbol, target.bin_start.astimezone(UTC)))
        if market_bin is None:
            return
        now = max(target.ts, self._clock or target.ts)
        low = max(target.bin_start, now) + timedelta(milliseconds=1)
        high = target.bin_end - timedelta(milliseconds=1)
        wanted = min(target.quantity, target.max_quantity or target.quantity)
        if wanted <= 0 or high <= low:
            return
        span = (high - low).total_seconds()
        offsets = np.sort(self._rng.uniform(0.0, span, SLICES))
        version = working.version
        for k, offset in enumerate(offsets):
            ask = wanted // SLICES + (1 if k < wanted % SLICES else 0)
            when = low + timedelta(milliseconds=round(offset * 1000))
            draw = self._rng.uniform(size=3)
            self._push(
                when,
                self.topics.fills(working.spec.order_id),
                self._slice(working, version, market_bin, ask, when, draw),
            )

    def _slice(
        self,
        working: _Working,
        version: int,
        market_bin: MarketBin,
        ask: int,
        when: datetime,
        draw: np.ndarray,
    ) -> Callable[[], Mapping[str, Any] | None]:
        def build() -> Mapping[str, Any] | None:
            if not working.active or working.version != version or ask <= 0:
                return None
            if draw[0] < MISS_PROBABILITY:
                return None
            fraction = (
                0.5 + draw[1] / PARTIAL_PROBABILITY / 2 if draw[1] < PARTIAL_PROBABILITY else 1.0
            )
            key = (market_bin.symbol, market_bin.start)
            quantity = min(
                math.floor(ask * fraction),
                math.floor(self._capacity[key]),
                working.quantity - working.filled,
            )
            sign = 1.0 if working.spec.side == "buy" else -1.0
            price = round(float(market_bin.vwap + sign * market_bin.spread / 2 * draw[2]), 2)
            limit = working.spec.limit_price
            if limit is not None and sign * (price - limit) > 0:
                return None
            if quantity <= 0:
                return None
            self._capacity[key] -= quantity
            working.filled += quantity
            working.fills += 1
            payload = {
                "type": "fill",
                "fill_id": f"{working.spec.order_id}-{working.fills:04d}",
                "order_id": working.spec.order_id,
                "quantity": quantity,
                "price": price,
                "ts": _ms(when),
            }
            self._fills_sent.append((self.topics.fills(working.spec.order_id), payload))
            return payload

        return build

    # ------------------------------------------------------------------ bad messages

    def _schedule_malformed(self) -> None:
        topics = self.topics
        for clock, topic, make in (
            (time(10, 12, 3), topics.fills("X_ZEPH-B1"), _truncated_fill),
            (time(10, 47, 30), topics.fills("X_KALO-S1"), _negative_fill),
            (time(11, 20, 10), topics.fills("X_MIRA-B1"), _unknown_type),
            (time(12, 5, 0), topics.fills("X_ORIN-B9"), _unknown_order_fill),
            (time(14, 10, 0), topics.bins("X_KALO"), self._misrouted_bin),
        ):
            at = self._local(clock)
            self._push(at, topic, _bind(make, at))
        self._push_built(self._local(time(10, 31, 0)), self._redelivery)

    def _misrouted_bin(self, at: datetime) -> Mapping[str, Any]:
        market_bin = self.market["X_MIRA"][0]
        return _bin_payload(market_bin, at)

    def _redelivery(self) -> tuple[str, Payload] | None:
        # An exact copy of the latest fill sent so far, as a broker re-sends a QoS 1 message.
        return self._fills_sent[-1] if self._fills_sent else None

    # ------------------------------------------------------------------ queue

    def _push(self, when: datetime, topic: str, build: Callable[[], Payload | None]) -> None:
        def with_topic() -> tuple[str, Payload] | None:
            payload = build()
            return None if payload is None else (topic, payload)

        self._push_built(when, with_topic)

    def _push_built(self, when: datetime, build: Callable[[], tuple[str, Payload] | None]) -> None:
        self._seq += 1
        heapq.heappush(self._queue, _Due(when.astimezone(UTC), self._seq, build))


_FINAL_STATES = frozenset({"done", "cancelled", "expired"})


def _constant(payload: Mapping[str, Any]) -> Callable[[], Mapping[str, Any]]:
    return lambda: payload


def _bind(
    make: Callable[[datetime], Mapping[str, Any] | str], at: datetime
) -> Callable[[], Mapping[str, Any] | str]:
    return lambda: make(at)


def _truncated_fill(at: datetime) -> str:
    # Raw text cut off mid-message, as a sender that crashed mid-write would leave it.
    return (
        '{"type": "fill", "fill_id": "X_ZEPH-B1-X1", "order_id": "X_ZEPH-B1", "quantity": 500, "pri'
    )


def _negative_fill(at: datetime) -> Mapping[str, Any]:
    return {
        "type": "fill",
        "fill_id": "X_KALO-S1-X2",
        "order_id": "X_KALO-S1",
        "quantity": -400,
        "price": 18.4,
        "ts": _ms(at),
    }


def _unknown_type(at: datetime) -> Mapping[str, Any]:
    return {
        "type": "trade",
        "fill_id": "X_MIRA-B1-X3",
        "order_id": "X_MIRA-B1",
        "quantity": 300,
        "price": 67.5,
        "ts": _ms(at),
    }


def _unknown_order_fill(at: datetime) -> Mapping[str, Any]:
    return {
        "type": "fill",
        "fill_id": "X_ORIN-B9-0001",
        "order_id": "X_ORIN-B9",
        "quantity": 1_000,
        "price": 9.87,
        "ts": _ms(at),
    }


def _bin_payload(market_bin: MarketBin, ts: datetime) -> dict[str, Any]:
    return {
        "type": "bin",
        "symbol": market_bin.symbol,
        "start": _ms(market_bin.start),
        "end": _ms(market_bin.end),
        "volume": market_bin.volume,
        "vwap": market_bin.vwap,
        "open": market_bin.open,
        "high": market_bin.high,
        "low": market_bin.low,
        "close": market_bin.close,
        "spread": market_bin.spread,
        "ts": _ms(ts),
    }


# --------------------------------------------------------------------------------------------------
# The invented market


def generate_market(session: Session, day: date, seed: int) -> dict[str, list[MarketBin]]:
    """The invented market of the day: every bin of every symbol, with the shock applied.

    Each symbol's day comes from :func:`tracker.sim.market.simulate_day` (seed ``seed * 100 + k``
    for the k-th symbol of :data:`SYMBOLS`); the bins of :data:`SHOCK` then get their volume and
    spread scaled.
    """
    market: dict[str, list[MarketBin]] = {}
    for number, spec in enumerate(SYMBOLS):
        params = MarketParameters(
            price=spec.open_price,
            average_daily_volume=spec.average_daily_volume,
            midday_spread=spec.midday_spread,
            **DEFAULT_SHAPES,
        )
        frame = simulate_day(spec.symbol, day, seed * 100 + number, session, params)
        market[spec.symbol] = [
            _market_bin(session, spec.symbol, row) for row in frame.itertuples(index=False)
        ]
    return market


def _market_bin(session: Session, symbol: str, row: Any) -> MarketBin:
    start = row.start.to_pydatetime()
    index = session.bin_index(start)
    assert index is not None  # simulate_day gives session bins only
    volume_factor, spread_factor = 1.0, 1.0
    if symbol == SHOCK.symbol and SHOCK.start <= start.astimezone(session.zone).time() < SHOCK.end:
        volume_factor, spread_factor = SHOCK.volume_factor, SHOCK.spread_factor
    return MarketBin(
        symbol=symbol,
        index=index,
        start=start.astimezone(UTC),
        end=(start + timedelta(minutes=session.bin_minutes)).astimezone(UTC),
        volume=round(int(row.volume) * volume_factor),
        vwap=float(row.vwap),
        open=float(row.open),
        high=float(row.high),
        low=float(row.low),
        close=float(row.close),
        spread=round(float(row.spread) * spread_factor, 5),
    )


def _ms(ts: datetime) -> str:
    """A send time as recordings write it: UTC, to the millisecond."""
    return utc_text(ts, "milliseconds")

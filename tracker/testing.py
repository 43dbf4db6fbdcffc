"""Test helpers that ship with the package: an in-memory publisher, a recorder, message builders.

Use them to test an integration without a broker::

    from tracker.core.engine import Engine
    from tracker.testing import Recorder, order, fill, bin_message, tick

    recorder = Recorder(Engine())
    recorder.feed(order("A-1", "X_ZEPH", "buy", 40_000, "2026-03-02T14:30:00Z",
                        "2026-03-02T21:00:00Z", ts="2026-03-02T14:00:00Z"))
    recorder.feed(tick("2026-03-02T14:30:00Z"))
    assert recorder.targets("A-1")[-1].quantity > 0

The symbols and prices in the builders' examples are invented (a made-up venue, "Harbour Lane
Exchange", X_HLX).
"""

from __future__ import annotations

import json
from collections.abc import Mapping
from dataclasses import dataclass, field
from datetime import datetime
from typing import Any, Protocol, TypeVar

from tracker.core.messages import (
    AckMessage,
    AlertMessage,
    BinMessage,
    ControlMessage,
    ErrorMessage,
    FillCorrectionMessage,
    FillMessage,
    Inbound,
    OrderMessage,
    Outbound,
    StatusMessage,
    TargetMessage,
    Tick,
)
from tracker.core.topics import DEFAULT_ROOT, Topics
from tracker.edge.wire import Heartbeat, WireError, decode, encode, topic_of


class EngineLike(Protocol):
    """What :class:`Recorder` needs from an engine."""

    def handle(self, event: Inbound) -> list[Outbound]: ...

    def reject(
        self, topic: str, payload: bytes | str | Mapping[str, Any], reason: str, ts: datetime | None
    ) -> ErrorMessage: ...


@dataclass(frozen=True)
class Published:
    """One message a :class:`MemoryPublisher` received."""

    topic: str
    payload: bytes
    qos: int = 1
    retain: bool = False

    def json(self) -> Any:
        """The payload parsed as JSON."""
        return json.loads(self.payload)


@dataclass
class MemoryPublisher:
    """Keeps what would have been published to a broker, in order; retained messages by topic.

    ``publish`` is a coroutine with the shape of an MQTT client's publish, so it can stand in for
    the real bus in tests; :meth:`publish_now` is the same without ``await``.
    """

    messages: list[Published] = field(default_factory=list)
    retained: dict[str, Published] = field(default_factory=dict)

    async def publish(
        self, topic: str, payload: bytes | str | None = None, qos: int = 1, retain: bool = False
    ) -> None:
        """Record one publication."""
        self.publish_now(topic, payload, qos=qos, retain=retain)

    def publish_now(
        self, topic: str, payload: bytes | str | None = None, qos: int = 1, retain: bool = False
    ) -> None:
        """Record one publication (synchronously)."""
        data = payload.encode("utf-8") if isinstance(payload, str) else (payload or b"")
        item = Published(topic=topic, payload=data, qos=qos, retain=retain)
        self.messages.append(item)
        if retain:
            if data:
                self.retained[topic] = item
            else:  # MQTT: an empty retained payload deletes the retained message
                self.retained.pop(topic, None)

    def topics(self) -> list[str]:
        """Topics in publication order (with repeats)."""
        return [item.topic for item in self.messages]

    def on(self, topic: str) -> list[Published]:
        """Everything published on exactly ``topic``."""
        return [item for item in self.messages if item.topic == topic]

    def clear(self) -> None:
        """Forget everything."""
        self.messages.clear()
        self.retained.clear()


#: Target states after which an order gets no more targets.
_FINAL = frozenset({"done", "cancelled", "expired"})


@dataclass
class Recorder:
    """Feeds an engine and keeps every output, by kind; optionally publishes them.

    Args:
        engine: The engine under test.
        root: Topic root.
        publisher: If given, every output is also published there as the daemon publishes it
            (status and targets retained; an order's last target clears its retained one).
    """

    engine: EngineLike
    root: str = DEFAULT_ROOT
    publisher: MemoryPublisher | None = None
    outputs: list[Outbound] = field(default_factory=list)

    def feed(self, message: Inbound) -> list[Outbound]:
        """Hand a validated message to the engine; return (and keep) its outputs."""
        produced = self.engine.handle(message)
        self._keep(produced)
        return produced

    def feed_raw(
        self, topic: str, payload: bytes | str | Mapping[str, Any], ts: datetime | None = None
    ) -> list[Outbound]:
        """Decode like a shell would; a bad message becomes the engine's error record. A
        heartbeat gives nothing: it is the intake's (:class:`tracker.edge.intake.Intake` follows
        sources' sequence numbers), and changes nothing in an engine."""
        try:
            message = decode(topic, payload, root=self.root)
        except WireError as exc:
            produced: list[Outbound] = [self.engine.reject(topic, payload, exc.reason, ts)]
            self._keep(produced)
            return produced
        if isinstance(message, Heartbeat):
            return []
        return self.feed(message)

    def _keep(self, produced: list[Outbound]) -> None:
        self.outputs.extend(produced)
        if self.publisher is not None:
            for out in produced:
                topic = topic_of(out, self.root)
                final = isinstance(out, TargetMessage) and out.state in _FINAL
                retain = isinstance(out, StatusMessage | TargetMessage) and not final
                self.publisher.publish_now(topic, encode(out), retain=retain)
                if final:  # an order's last target: published once, its retained one cleared
                    self.publisher.publish_now(topic, b"", retain=True)

    def targets(self, order_id: str | None = None) -> list[TargetMessage]:
        """Targets, optionally for one order."""
        return [
            o
            for o in self.outputs
            if isinstance(o, TargetMessage) and order_id in (None, o.order_id)
        ]

    def statuses(self, order_id: str | None = None) -> list[StatusMessage]:
        """Status messages, optionally for one order."""
        return [
            o
            for o in self.outputs
            if isinstance(o, StatusMessage) and order_id in (None, o.order_id)
        ]

    def alerts(self, code: str | None = None, order_id: str | None = None) -> list[AlertMessage]:
        """Alerts, optionally of one code and/or for one order."""
        return [
            o
            for o in self.outputs
            if isinstance(o, AlertMessage)
            and code in (None, o.code)
            and order_id in (None, o.order_id)
        ]

    def errors(self) -> list[ErrorMessage]:
        """Error records."""
        return [o for o in self.outputs if isinstance(o, ErrorMessage)]

    def acks(self, order_id: str | None = None) -> list[AckMessage]:
        """Replies to order messages, optionally for one order."""
        return [
            o for o in self.outputs if isinstance(o, AckMessage) and order_id in (None, o.order_id)
        ]

    def clear(self) -> None:
        """Forget the outputs kept so far."""
        self.outputs.clear()


# --------------------------------------------------------------------------------------------
# Message builders (validated like decoded messages: through the edge's own decode)
# --------------------------------------------------------------------------------------------

_TOPICS = Topics()
_M = TypeVar(
    "_M", OrderMessage, FillMessage, FillCorrectionMessage, BinMessage, ControlMessage, Tick
)


def _decoded(topic: str, data: Mapping[str, Any], kind: type[_M]) -> _M:
    """``data`` decoded on ``topic`` exactly as a shell would (a bad value raises WireError)."""
    message = decode(topic, data)
    assert isinstance(message, kind)
    return message


def order(
    order_id: str,
    symbol: str,
    side: str,
    quantity: int,
    start: str,
    end: str,
    *,
    ts: str,
    **extra: Any,
) -> OrderMessage:
    """A ``new`` order message (extra fields: limit_price, max_participation, urgency, ...)."""
    data = {
        "type": "order",
        "action": "new",
        "order_id": order_id,
        "symbol": symbol,
        "side": side,
        "quantity": quantity,
        "start": start,
        "end": end,
        "ts": ts,
        **extra,
    }
    return _decoded(_TOPICS.orders(order_id), data, OrderMessage)


def amend(order_id: str, *, ts: str, **changes: Any) -> OrderMessage:
    """An ``amend`` order message with the given changes."""
    data = {"type": "order", "action": "amend", "order_id": order_id, "ts": ts, **changes}
    return _decoded(_TOPICS.orders(order_id), data, OrderMessage)


def cancel(order_id: str, *, ts: str, **echoed: Any) -> OrderMessage:
    """A ``cancel`` order message (``echoed``: order fields a router repeats in it)."""
    data = {"type": "order", "action": "cancel", "order_id": order_id, "ts": ts, **echoed}
    return _decoded(_TOPICS.orders(order_id), data, OrderMessage)


def fill_correction(
    order_id: str,
    fill_id: str,
    *,
    ts: str,
    quantity: int | None = None,
    price: float | None = None,
) -> FillCorrectionMessage:
    """A bust of fill ``fill_id`` (no quantity, no price) or its correction (either or both)."""
    data: dict[str, Any] = {
        "type": "fill_correction",
        "action": "bust" if quantity is None and price is None else "correct",
        "fill_id": fill_id,
        "order_id": order_id,
        "ts": ts,
    }
    if quantity is not None:
        data["quantity"] = quantity
    if price is not None:
        data["price"] = price
    return _decoded(_TOPICS.fills(order_id), data, FillCorrectionMessage)


def fill(
    order_id: str, fill_id: str, quantity: int, price: float, *, ts: str, **extra: Any
) -> FillMessage:
    """A fill message."""
    data = {
        "type": "fill",
        "fill_id": fill_id,
        "order_id": order_id,
        "quantity": quantity,
        "price": price,
        "ts": ts,
        **extra,
    }
    return _decoded(_TOPICS.fills(order_id), data, FillMessage)


def bin_message(
    symbol: str,
    start: str | datetime,
    end: str | datetime,
    *,
    volume: int,
    price: float,
    spread: float = 0.02,
    high: float | None = None,
    low: float | None = None,
    ts: str | datetime | None = None,
) -> BinMessage:
    """A closed bin with open = close = vwap = ``price`` unless high/low say otherwise."""
    high = price if high is None else high
    low = price if low is None else low
    data = {
        "type": "bin",
        "symbol": symbol,
        "start": start,
        "end": end,
        "volume": volume,
        "vwap": price,
        "open": price,
        "high": high,
        "low": low,
        "close": price,
        "spread": spread,
        "ts": end if ts is None else ts,
    }
    return _decoded(_TOPICS.bins(symbol), data, BinMessage)


def control(command: str, *, ts: str, order_id: str | None = None) -> ControlMessage:
    """A halt or resume for one order or (without ``order_id``) all orders."""
    data: dict[str, Any] = {"type": "control", "command": command, "ts": ts}
    if order_id is not None:
        data["order_id"] = order_id
    return _decoded(_TOPICS.control, data, ControlMessage)


def tick(ts: str | datetime) -> Tick:
    """A tick at ``ts``."""
    return _decoded(_TOPICS.tick, {"type": "tick", "ts": ts}, Tick)


__all__ = [
    "EngineLike",
    "MemoryPublisher",
    "Published",
    "Recorder",
    "amend",
    "bin_message",
    "cancel",
    "control",
    "fill",
    "fill_correction",
    "order",
    "tick",
]

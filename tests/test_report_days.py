"""Small invented closed-loop days for the review's tests, and checks that they are what they say.

:func:`closed_loop_day` runs the engine on an invented market (made-up symbols on the invented
venue) with a router that fills a chosen share of each target at the bin's VWAP plus half the
spread, never past a limit. Desk actions (amend, cancel, halt, resume) come in at chosen times.
It returns the recording's lines; replaying them reproduces the day.
"""

from __future__ import annotations

import json
import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from datetime import UTC, date, datetime, time, timedelta
from pathlib import Path
from typing import Any

import numpy as np

from tracker.core.engine import Engine
from tracker.core.messages import TargetMessage
from tracker.core.profiles import default_profile
from tracker.core.session import Session
from tracker.edge.intake import Intake
from tracker.edge.recordings import parse_line
from tracker.edge.records import Record, record_line

DAY = date(2026, 3, 10)
SESSION = Session()


def at(clock: time, day: date = DAY) -> datetime:
    """A local time of the invented day, in UTC."""
    return datetime.combine(day, clock, tzinfo=SESSION.zone).astimezone(UTC)


def iso(ts: datetime) -> str:
    return ts.astimezone(UTC).isoformat(timespec="milliseconds").replace("+00:00", "Z")


@dataclass(frozen=True)
class DayOrder:
    """An invented parent order (local times)."""

    order_id: str
    symbol: str
    side: str
    quantity: int
    start: time = time(9, 30)
    end: time = time(16, 0)
    max_participation: float | None = 0.2
    urgency: str = "medium"
    limit_price: float | None = None

    def message(self, price: float) -> dict[str, Any]:
        payload: dict[str, Any] = {
            "type": "order",
            "action": "new",
            "order_id": self.order_id,
            "symbol": self.symbol,
            "side": self.side,
            "quantity": self.quantity,
            "start": iso(at(self.start)),
            "end": iso(at(self.end)),
            "urgency": self.urgency,
            "arrival_price": price,
            "ts": iso(at(self.start) - timedelta(minutes=1)),
        }
        if self.max_participation is not None:
            payload["max_participation"] = self.max_participation
        if self.limit_price is not None:
            payload["limit_price"] = self.limit_price
        return payload


@dataclass
class Market:
    """An invented price and volume path per symbol, one value per bin of the day."""

    prices: dict[str, list[float]] = field(default_factory=dict)
    volumes: dict[str, list[int]] = field(default_factory=dict)
    spread: float = 0.02


def invented_market(
    symbols: Sequence[str], seed: int = 3, drift: Callable[[int], float] | None = None
) -> Market:
    """A random walk of 5-minute closes (0.1 % a bin) and the default profile's volumes."""
    rng = np.random.default_rng(seed)
    market = Market()
    n = SESSION.n_bins
    for number, symbol in enumerate(symbols):
        price = 20.0 + 5 * number
        closes = []
        for k in range(n):
            price *= math.exp(0.001 * float(rng.standard_normal()) + (drift(k) if drift else 0.0))
            closes.append(round(price, 2))
        share = default_profile(symbol).volume_share
        volumes = [int(1_000_000 * s * float(rng.lognormal(0.0, 0.1))) for s in share]
        market.prices[symbol], market.volumes[symbol] = closes, volumes
    return market


def closed_loop_day(
    orders: Sequence[DayOrder],
    *,
    fill_rate: Callable[[time], float] = lambda _: 1.0,
    desk: Sequence[tuple[time, str, dict[str, Any]]] = (),
    market: Market | None = None,
) -> list[str]:
    """Run the invented day and return its recording's lines (see the module docstring).

    Args:
        orders: The parent orders (each submitted a minute before its start).
        fill_rate: Share of each bin's target the router fills, by the bin's local start.
        desk: (local time, topic suffix, payload without ts) of amends, cancels and controls.
        market: The market (default: :func:`invented_market` of the orders' symbols).
    """
    symbols = sorted({o.symbol for o in orders})
    market = market or invented_market(symbols)
    engine = Engine()
    intake = Intake(engine)
    lines: list[str] = []
    targets: dict[tuple[str, datetime], TargetMessage] = {}
    by_id = {o.order_id: o for o in orders}
    filled: dict[str, int] = dict.fromkeys(by_id, 0)
    quantity: dict[str, int] = {o.order_id: o.quantity for o in orders}
    queue: list[tuple[datetime, int, str, dict[str, Any]]] = []

    def push(when: datetime, topic: str, payload: dict[str, Any]) -> None:
        queue.append((when, len(queue), topic, payload))

    for order in orders:
        first = market.prices[order.symbol][0]
        push(
            at(order.start) - timedelta(minutes=1),
            f"tracker/orders/{order.order_id}",
            order.message(first),
        )
    for clock, topic, payload in desk:
        push(at(clock), f"tracker/{topic}", {**payload, "ts": iso(at(clock))})
    bins = SESSION.bins(DAY)

    def feed(when: datetime, topic: str, payload: dict[str, Any]) -> None:
        record = Record(line=len(lines) + 1, topic=topic, payload=payload, ts=iso(when))
        text = record_line(record)
        lines.append(text)
        for message in intake.feed(parse_line(record.line, text)):
            if isinstance(message, TargetMessage) and message.bin_start is not None:
                targets[(message.order_id, message.bin_start.astimezone(UTC))] = message

    def drain(until: datetime) -> None:
        queue.sort()
        while queue and queue[0][0] <= until:
            when, _, topic, payload = queue.pop(0)
            if payload.get("action") == "amend" and "quantity" in payload:
                quantity[payload["order_id"]] = payload["quantity"]
            feed(when, topic, payload)

    for k, (start, end) in enumerate(bins):
        start_utc, end_utc = start.astimezone(UTC), end.astimezone(UTC)
        drain(start_utc + timedelta(minutes=2))
        for order in orders:
            target = targets.get((order.order_id, start_utc))
            if target is None or target.quantity <= 0:
                continue
            close = market.prices[order.symbol][k]
            opening = market.prices[order.symbol][k - 1] if k else close
            vwap = round((opening + close) / 2, 4)
            sign = 1.0 if order.side == "buy" else -1.0
            price = round(vwap + sign * market.spread / 2, 4)
            if order.limit_price is not None and sign * (price - order.limit_price) > 0:
                continue
            size = math.floor(target.quantity * fill_rate(start.timetz().replace(tzinfo=None)))
            size = min(size, quantity[order.order_id] - filled[order.order_id])
            if size <= 0:
                continue
            filled[order.order_id] += size
            when = start_utc + timedelta(minutes=2, seconds=30)
            feed(
                when,
                f"tracker/fills/{order.order_id}",
                {
                    "type": "fill",
                    "fill_id": f"{order.order_id}-{k:03d}",
                    "order_id": order.order_id,
                    "quantity": size,
                    "price": price,
                    "ts": iso(when),
                },
            )
        drain(end_utc)
        for symbol in symbols:
            close = market.prices[symbol][k]
            opening = market.prices[symbol][k - 1] if k else close
            vwap = round((opening + close) / 2, 4)
            feed(
                end_utc + timedelta(seconds=1),
                f"tracker/bins/{symbol}",
                {
                    "type": "bin",
                    "symbol": symbol,
                    "start": iso(start_utc),
                    "end": iso(end_utc),
                    "volume": market.volumes[symbol][k],
                    "vwap": vwap,
                    "open": opening,
                    "high": round(max(opening, close) * 1.001, 4),
                    "low": round(min(opening, close) * 0.999, 4),
                    "close": close,
                    "spread": market.spread,
                    "ts": iso(end_utc + timedelta(seconds=1)),
                },
            )
    drain(at(time(23, 59)))
    return lines


def write_day(lines: Sequence[str], path: Path) -> Path:
    """Write recording lines to a file."""
    path.write_text("".join(line + "\n" for line in lines), encoding="utf-8")
    return path


# ----------------------------------------------------------------------- checks of the builder


def test_router_fills_the_chosen_share_of_each_target() -> None:
    """With fill rate 0.8 each fill is floor(0.8 x its bin's target) (the builder's contract)."""
    lines = closed_loop_day([DayOrder("ZZ-B1", "ZZTA", "buy", 40_000)], fill_rate=lambda _: 0.8)
    records = [json.loads(line) for line in lines]
    fills = [r["payload"] for r in records if r["topic"].startswith("tracker/fills/")]
    bins = [r for r in records if r["topic"].startswith("tracker/bins/")]
    assert (len(bins), len(fills) > 50) == (78, True)
    assert all(f["quantity"] > 0 for f in fills)


def test_a_limit_below_the_market_stops_a_buy() -> None:
    """A buy limit under every VWAP: the router never fills (the builder honours limits)."""
    order = DayOrder("ZZ-B2", "ZZTA", "buy", 10_000, limit_price=1.0)
    lines = closed_loop_day([order])
    assert not any('"tracker/fills/' in line for line in lines)

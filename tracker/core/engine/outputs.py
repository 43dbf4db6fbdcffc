"""Building what the engine says: targets, status, alerts and error records.

Outputs of one event are ordered by order id (symbol-level alerts first, :func:`order_key`), and
within an order as produced: target, status, alerts. Floats are rounded only when written
(:func:`tracker.core.messages.json_object`).

* Symbol-wide conditions (liquidity shock, stale data, default profile) are published once per
  symbol on ``{root}/alerts`` with ``order_id`` null, not once per order; the summary counts the
  alerts of each order only.
* Raised conditions of an order that ends (done, cancelled, expired) are dropped without a
  "cleared" message: the end of the order says it.
"""

from __future__ import annotations

import json
from collections import Counter
from collections.abc import Mapping
from datetime import datetime
from typing import Any

from tracker.core import alerts as rules
from tracker.core.alerts import Check
from tracker.core.engine.state import Deviation, EngineState, OrderState, SymbolState
from tracker.core.engine.step import Step
from tracker.core.formats import rounded, utc_text
from tracker.core.lifecycle import LIVE, State
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
    json_object,
    payload_text,
)
from tracker.core.topics import Topics


def order_key(message: Outbound) -> str:
    """The sort key of an output within its event: its order id (symbol-level first)."""
    order_id = getattr(message, "order_id", None)
    return order_id or ""


def bin_times(
    state: EngineState, order: OrderState, index: int
) -> tuple[datetime | None, datetime | None]:
    """Start and end of bin ``index`` of the order's day (``None`` outside the session)."""
    sym = state.symbols[order.symbol]
    if sym.day != order.day or not 0 <= index < len(sym.day_bins):
        bins = sym.profile.session.bins(order.day)
        if not 0 <= index < len(bins):
            return None, None
        return bins[index]
    return sym.day_bins[index]


def target(
    state: EngineState,
    order: OrderState,
    index: int,
    quantity: int,
    max_quantity: int | None,
    ts: datetime,
    *,
    participation: float | None = None,
    max_participation: float | None = None,
) -> TargetMessage:
    """The target of bin ``index``: ``quantity`` shares, at most ``max_quantity`` (the cap);
    ``participation`` and ``max_participation`` are the same as rates of the bin's volume."""
    bin_start, bin_end = bin_times(state, order, index)
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
        participation=participation,
        max_participation=max_participation,
        plan_version=order.plan_version,
        state=order.life.state.value,
        reason=target_reason(state, order, quantity, max_quantity),
        next_bins=next_bins(state, order, index),
        ts=ts,
    )


#: How many bins of the plan after a target's bin the target carries (``next_bins``).
NEXT_BINS = 3


def target_reason(
    state: EngineState, order: OrderState, quantity: int, max_quantity: int | None
) -> str:
    """Why a target's quantity is what it is (the wire's ``reason``; the first that applies).

    The order's own state when it is not working (``pending``, ``halted``, ``done``,
    ``cancelled``, ``expired``); then ``limit_blocked`` (the market is beyond its limit),
    ``capped`` (the participation cap binds), ``catching_up`` (behind the baseline plan: the
    ``behind_plan`` alert is raised), else ``on_plan``.
    """
    life = order.life.state
    if life is not State.WORKING:
        return life.value
    if order.blocked:
        return "limit_blocked"
    if max_quantity is not None and quantity > 0 and quantity >= max_quantity:
        return "capped"
    if state.book.is_raised(order.order_id, rules.BEHIND_PLAN):
        return "catching_up"
    return "on_plan"


def next_bins(state: EngineState, order: OrderState, index: int) -> tuple[dict[str, Any], ...]:
    """The plan's next :data:`NEXT_BINS` bins after bin ``index``: times and planned shares
    (none when the order is not working or has no plan)."""
    plan = order.plan
    if plan is None or order.life.state is not State.WORKING or plan.cumulative.size == 0:
        return ()
    rows: list[dict[str, Any]] = []
    for bin_index in range(index + 1, index + 1 + NEXT_BINS):
        offset = bin_index - plan.first_bin
        if offset < 0 or offset >= plan.cumulative.size:
            break
        before = float(plan.cumulative[offset - 1]) if offset > 0 else 0.0
        start, end = bin_times(state, order, bin_index)
        if start is None or end is None:
            break
        shares = max(round(float(plan.cumulative[offset]) - before), 0)
        rows.append({"bin_start": utc_text(start), "bin_end": utc_text(end), "quantity": shares})
    return tuple(rows)


def status(
    state: EngineState, order: OrderState, ts: datetime, deviation: Deviation | None = None
) -> StatusMessage:
    """Where the order stands (``deviation``: already computed by the caller, else computed)."""
    if deviation is None:
        deviation = order.deviation(state.symbols[order.symbol].closed_for(order))
    planned, gap, gap_bins = deviation
    plan = order.plan
    live = plan is not None and order.life.state in LIVE
    cost = plan.expected_cost if plan is not None and live else None
    cost_sd = plan.cost_sd if plan is not None and live else None
    notional = order.remaining * plan.price if plan is not None else 0.0
    cost_bps = cost / notional * 1e4 if cost is not None and notional > 0 else None
    cost_sd_bps = cost_sd / notional * 1e4 if cost_sd is not None and notional > 0 else None
    # Every value is of its field's type (floats are floats, not ints or numpy scalars): the
    # encoder writes them as they are (tests/test_wire.py holds it to the contract's models).
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
        max_participation=order.max_participation,
        cap_source=order.cap_source,
        cost_sd=cost_sd,
        cost_sd_bps=cost_sd_bps,
        risk_penalty=plan.risk_penalty if plan is not None and live else None,
        ts=ts,
    )


def alert(
    code: str,
    message: str,
    order: OrderState | None,
    symbol: str | None,
    ts: datetime,
    details: Mapping[str, Any] | None = None,
    case: str | None = None,
) -> AlertMessage:
    """A one-shot alert about ``order`` (or, without one, the symbol); severity from the table."""
    return rules.event(
        code,
        message,
        order_id=order.order_id if order else None,
        symbol=symbol,
        ts=ts,
        details=details,
        case=case,
    )


def apply_check(
    state: EngineState,
    step: Step,
    check: Check,
    order: OrderState | None,
    symbol: str,
    ts: datetime,
) -> None:
    """Pass a condition's verdict through the alert book: at most one raise or clear."""
    scope = order.order_id if order else f"symbol:{symbol}"
    step.emit(
        state.book.apply(
            check,
            scope=scope,
            order_id=order.order_id if order else None,
            symbol=symbol,
            ts=ts,
        )
    )


def replan_failed(order: OrderState, ts: datetime, why: str) -> AlertMessage:
    """The alert that a re-plan could not be made (the previous plan and target stand)."""
    return alert(
        rules.REPLAN_FAILED,
        f"The re-plan failed ({why}); the previous plan and target stand. Report this with "
        "the replay file.",
        order,
        order.symbol,
        ts,
    )


def ack(message: OrderMessage, result: str, reason: str | None) -> AckMessage:
    """The reply to an order message: ``accepted`` or ``rejected``, and why."""
    return AckMessage(
        order_id=message.order_id,
        action=message.action,
        result="accepted" if result == "accepted" else "rejected",
        reason=reason,
        message_ts=message.ts,
        ts=message.ts,
    )


def refused_ack(event: Inbound, reason: str) -> list[Outbound]:
    """The rejected reply of a refused order message (nothing for other messages)."""
    return [ack(event, "rejected", reason)] if isinstance(event, OrderMessage) else []


def unassigned_row(fill: FillMessage, why: str) -> dict[str, Any]:
    """A fill no order took, as the summary lists it (with the fields beyond the contract)."""
    row: dict[str, Any] = {
        "fill_id": fill.fill_id,
        "order_id": fill.order_id,
        "quantity": fill.quantity,
        "price": rounded(fill.price),
        "ts": utc_text(fill.ts),
        "why": why,
    }
    if fill.extra:
        row["extra"] = dict(fill.extra)
    return row


def topic_and_order(topics: Topics, event: Inbound) -> tuple[str, str | None]:
    """The topic an event arrived on and the order it names."""
    if isinstance(event, OrderMessage):
        return topics.orders(event.order_id), event.order_id
    if isinstance(event, FillMessage | FillCorrectionMessage):
        return topics.fills(event.order_id), event.order_id
    if isinstance(event, BinMessage):
        return topics.bins(event.symbol), None
    if isinstance(event, ControlMessage):
        return topics.control, event.order_id
    return topics.tick, None


def error(topics: Topics, event: Inbound, reason: str) -> ErrorMessage:
    """The error record of an event the engine refused (or failed on)."""
    topic, order_id = topic_and_order(topics, event)
    # The payload as sent, as near as the decoded message can say: only the fields it set.
    sent = json_object(event, only_set=True)
    return ErrorMessage(
        reason=reason,
        topic=topic,
        payload=payload_text(json.dumps(sent, separators=(",", ":"), ensure_ascii=False)),
        ts=event.ts,
        order_id=order_id,
    )


def fill_price_alerts(
    state: EngineState, step: Step, sym: SymbolState, message: BinMessage
) -> None:
    """Judge the fills waiting for this bin: a price far outside its range is flagged."""
    keep: list[tuple[str, FillMessage]] = []
    for order_id, fill in sym.unchecked:
        if fill.ts >= message.end:
            keep.append((order_id, fill))
            continue
        if fill.ts < message.start:
            continue  # its bin never came (or came before the fill): nothing to judge by
        if rules.fill_price_outside(
            price=fill.price, low=message.low, high=message.high, config=state.config
        ):
            order = state.orders[order_id]
            step.emit(
                alert(
                    rules.FILL_PRICE_OUTSIDE,
                    f"Fill {fill.fill_id} at {fill.price} is outside its bin's range "
                    f"{message.low}-{message.high} by more than "
                    f"{state.config.fill_price_tolerance_pct:g} %. Check the fill.",
                    order,
                    order.symbol,
                    step.ts,
                    {
                        "fill_id": fill.fill_id,
                        "price": fill.price,
                        "low": message.low,
                        "high": message.high,
                    },
                )
            )
    sym.unchecked = keep


def summary_row(order: OrderState, counts: Counter[str]) -> dict[str, Any]:
    """One order's line of the summary: fills, prices, costs against its benchmarks, alerts.

    ``shortfall_bps`` and ``vwap_bps`` are signed so that positive is a cost for buys and sells
    alike: ``side_sign * (average_price - benchmark) / benchmark * 1e4``.
    """
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
    return {
        "order_id": order.order_id,
        "symbol": order.symbol,
        "side": order.side,
        "quantity": order.quantity,
        "filled": order.filled,
        "average_price": rounded(average),
        "arrival_price": rounded(arrival),
        "interval_vwap": rounded(vwap),
        "shortfall_bps": rounded(shortfall, 4),
        "vwap_bps": rounded(versus_vwap, 4),
        "alerts": {code: counts[code] for code in sorted(counts)},
        "state": order.life.state.value,
        "plan_version": order.plan_version,
    }


__all__ = [
    "ack",
    "alert",
    "apply_check",
    "bin_times",
    "error",
    "fill_price_alerts",
    "next_bins",
    "order_key",
    "refused_ack",
    "replan_failed",
    "status",
    "summary_row",
    "target",
    "target_reason",
    "topic_and_order",
    "unassigned_row",
]

"""Event time: starting orders, expiring them, and judging stale market data.

Every event moves event time (never back) before the engine applies it, and a
:class:`~tracker.core.messages.Tick` moves it when no message arrives; :func:`advance` then starts
the pending orders whose start has come, expires the orders whose end (plus the grace) has passed,
gives up the parked fills whose order did not come in time, and judges the watched symbols whose
next bin is overdue. The engine never reads a clock.
"""

from __future__ import annotations

import dataclasses
import heapq
from datetime import datetime

from tracker.core import alerts as rules
from tracker.core.engine import outputs
from tracker.core.engine.planning import zero_target
from tracker.core.engine.state import EngineState, OrderState
from tracker.core.engine.step import Step
from tracker.core.lifecycle import Event, State
from tracker.core.messages import FillMessage


def advance(state: EngineState, step: Step, ts: datetime) -> None:
    """Move event time forward to ``ts``: start, expire, judge staleness."""
    if state.clock is None or ts > state.clock:
        state.clock = ts
    now = state.clock
    while state.starts and state.starts[0][0] <= now:
        step.undo.heaps()
        _, order_id = heapq.heappop(state.starts)
        order = state.orders[order_id]
        if order.life.state is State.PENDING:
            start(state, step, order, now)
    grace = state.grace
    while state.ends and state.ends[0][0] + grace <= now:
        step.undo.heaps()
        end, order_id = heapq.heappop(state.ends)
        order = state.orders[order_id]
        if order.end == end and not order.life.terminal:
            expire(state, step, order, now)
    if state.parked and state.parked[0][0] < now:
        step.undo.parking()
        while state.parked and state.parked[0][0] < now:
            _, fill = state.parked.pop(0)
            unassign(state, step, fill, now, "its order did not arrive in time")
    judge_staleness(state, step, now)


def unpark_overflow(state: EngineState, step: Step, now: datetime) -> None:
    """Give up the oldest parked fills while more than ``fill_parking_max`` wait."""
    while len(state.parked) > state.config.fill_parking_max:
        step.undo.parking()
        _, fill = state.parked.pop(0)
        unassign(state, step, fill, now, "too many fills were waiting for their orders")


def unassign(state: EngineState, step: Step, fill: FillMessage, now: datetime, why: str) -> None:
    """A parked fill is given up: kept as unassigned shares (summary), with a critical alert."""
    step.undo.parking()
    state.unassigned.append(fill)
    alert = outputs.alert(
        rules.FILL_UNASSIGNED,
        f"Fill {fill.fill_id} ({fill.quantity:,} shares at {fill.price}) names order "
        f"{fill.order_id}, which the engine does not know, and {why}: its shares are "
        "unassigned (in the summary). Send the order, or book the shares by hand.",
        None,
        None,
        now,
        {"fill_id": fill.fill_id, "quantity": fill.quantity, "price": fill.price},
    )
    step.emit(dataclasses.replace(alert, order_id=fill.order_id))


def start(state: EngineState, step: Step, order: OrderState, now: datetime) -> None:
    """The order's start has come: it works (and is planned), or stays halted in a halt of all."""
    step.undo.order(order)
    order.live_from = now
    if state.halt_all:
        order.life.apply(Event.HALT)
        step.emit(zero_target(state, step, order, now))
        step.emit(outputs.status(state, order, now))
        step.emit(
            outputs.alert(
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
    step.to_plan[order.order_id] = "start"


def expire(state: EngineState, step: Step, order: OrderState, now: datetime) -> None:
    """The order's end (plus the grace) has passed: it expires, with or without a residual."""
    step.undo.order(order)
    order.life.apply(Event.EXPIRE)
    order.live_until = now
    step.to_plan.pop(order.order_id, None)
    residual = order.remaining
    state.book.clear_silently(order.order_id)
    step.emit(zero_target(state, step, order, now))  # the order's last target
    step.emit(outputs.status(state, order, now))
    if residual > 0:
        message = (
            f"The order expired at its end with {residual:,} of {order.quantity:,} shares "
            f"not filled ({100.0 * residual / order.quantity:.1f} %)."
        )
    else:
        message = "The order reached its end."
    step.emit(
        outputs.alert(
            rules.ORDER_EXPIRED,
            message,
            order,
            order.symbol,
            now,
            {"residual": residual, "filled": order.filled, "quantity": order.quantity},
            case="residual" if residual > 0 else "complete",
        )
    )


def judge_staleness(state: EngineState, step: Step, now: datetime) -> None:
    """Raise ``market_data_stale`` for watched symbols whose next bin is overdue.

    Cheap on every event: nothing is looked at before the earliest deadline. A symbol is judged
    once when its deadline passes (then unwatched until its next bin or plan): raised if it is
    in session, on its day, with a working order; otherwise just unwatched.
    """
    if state.stale_due is None or now <= state.stale_due:
        return
    due: datetime | None = None
    for name in sorted(state.symbols):
        sym = state.symbols[name]
        deadline = sym.stale_at
        if deadline is None:
            continue
        if now <= deadline:
            due = deadline if due is None else min(due, deadline)
            continue
        step.undo.symbol(sym)
        sym.stale_at = None
        if sym.profile.session.bin_index(now) is None:
            continue
        if sym.day is not None and sym.local_day(now) != sym.day:
            continue
        if not any(state.orders[o].life.state is State.WORKING for o in sym.orders):
            continue
        limit = state.config.stale_bins * sym.bin_seconds
        age = (now - deadline).total_seconds() + limit
        check = rules.stale(age_seconds=age, bin_seconds=sym.bin_seconds, config=state.config)
        outputs.apply_check(state, step, check, None, name, now)
    state.stale_due = due


__all__ = ["advance", "expire", "judge_staleness", "start", "unassign", "unpark_overflow"]

"""What each message does to the engine's state: orders, fills, bins, control and ticks.

Each handler applies one validated message to the state, recording what it says in the
:class:`~tracker.core.engine.step.Step` of the event (outputs, re-plans asked for). A message that
cannot be applied raises :class:`~tracker.core.engine.step.Rejected` before it changes an order,
with a reason that says what to fix (a symbol seen for the first time is kept, with its
``default_profile`` alert when it has no profile).

Decisions:

* Overfill: the fill is recorded (it happened in the market), ``fill_overfill`` is raised and
  targets are never negative: remaining is ``max(quantity - filled, 0)``.
* Fills are never dropped. A fill for an order not seen yet is *parked* (``fill_parked``, info):
  it waits ``fill_parking_seconds`` of event time (at most ``fill_parking_max`` fills wait) and is
  applied, in arrival order, when its order arrives; one whose order never comes is given up as
  unassigned (``fill_unassigned``, critical; in the summary).
* A fill id seen before with the same shares, price and side is a redelivery, whatever its ``ts``
  (a gateway re-sending it restamps it): it changes nothing. With other content it is a conflict
  (rejected, critical): the way to change a fill is a ``fill_correction`` message -- a bust (the
  fill did not happen) or a correction (new quantity and/or price) -- which recomputes the
  inventory, the average price and the plan, with an alert.
* Cancels always win: a cancel is honoured whatever else it carries (echoed fields are ignored; a
  symbol or side contradicting the order still cancels it, with ``cancel_mismatch``), and
  whatever its ``ts``. A halt likewise.
* Time going backwards is judged per stream: bins per symbol (by bin start), order messages per
  order, ticks among ticks, control among control messages. Fills carry their execution time and
  may arrive late: they are not rejected for it.
* Redelivery (the same message again, as an MQTT broker re-sends it) is the edge's concern
  (:class:`tracker.edge.intake.Intake`, which every shell feeds through). The engine judges
  messages by what they mean: a fill id seen before with the same content changes nothing, a
  closed bin cannot change, an order id is created once.
"""

from __future__ import annotations

import heapq
import math
from collections.abc import Mapping
from dataclasses import replace
from datetime import date, datetime, timedelta
from typing import Any

from tracker.core import alerts as rules
from tracker.core.engine import outputs, timers
from tracker.core.engine.planning import zero_target
from tracker.core.engine.state import EngineState, OrderState, SymbolState
from tracker.core.engine.step import Rejected, Step
from tracker.core.forecast import ObservedBin, forecast
from tracker.core.formats import utc_text
from tracker.core.formulation import Preferences, preferences
from tracker.core.lifecycle import AMENDABLE, Event, Lifecycle, State, TransitionError
from tracker.core.messages import (
    BinMessage,
    ControlMessage,
    FillCorrectionMessage,
    FillMessage,
    OrderMessage,
    Tick,
)
from tracker.core.profiles import default_profile
from tracker.errors import InputError


def on_tick(state: EngineState, step: Step, tick: Tick) -> None:
    """Time passes: ticks move forward only."""
    if state.last_tick is not None and tick.ts < state.last_tick:
        raise Rejected(
            f"tick time {utc_text(tick.ts)} is earlier than the previous tick "
            f"{utc_text(state.last_tick)}; ticks must move forward"
        )
    state.last_tick = tick.ts
    timers.advance(state, step, tick.ts)


def on_control(state: EngineState, step: Step, message: ControlMessage) -> None:
    """Halt or resume one order, or all (a halt of all also holds orders that start later)."""
    if (
        message.command != "halt"  # a halt is a safety action: never refused for its time
        and state.last_control is not None
        and message.ts < state.last_control
    ):
        raise Rejected(
            f"control time {utc_text(message.ts)} is earlier than the previous control "
            f"message {utc_text(state.last_control)}; control messages must move forward"
        )
    if message.order_id is not None:
        order = state.orders.get(message.order_id)
        if order is None:
            raise Rejected(
                f"order_id: unknown order {message.order_id!r}; send the order first, or "
                f"leave order_id out to {message.command} all orders"
            )
        event = _control_event(state, order, message.command)
        if not order.life.can(event):
            raise Rejected(
                str(TransitionError(order.life.state, event, order_id=order.order_id).reason)
            )
        targets = [order]
    else:
        state.halt_all = message.command == "halt"
        wanted = (State.PENDING, State.WORKING) if message.command == "halt" else (State.HALTED,)
        targets = [
            state.orders[o] for o in sorted(state.orders) if state.orders[o].life.state in wanted
        ]
    if state.last_control is None or message.ts > state.last_control:
        state.last_control = message.ts
    timers.advance(state, step, message.ts)
    for order in targets:
        if order.life.terminal:
            continue
        event = _control_event(state, order, message.command)
        if not order.life.can(event):
            continue
        step.undo.order(order)
        order.life.apply(event)
        if event is Event.HALT:
            step.to_plan.pop(order.order_id, None)
            step.emit(zero_target(state, step, order, message.ts))
            step.emit(outputs.status(state, order, message.ts))
            step.emit(
                outputs.alert(
                    rules.ORDER_HALTED,
                    "The order is halted: its targets are zero until it is resumed.",
                    order,
                    order.symbol,
                    message.ts,
                )
            )
            continue
        step.emit(
            outputs.alert(
                rules.ORDER_RESUMED,
                "The order is resumed and re-planned from its current inventory.",
                order,
                order.symbol,
                message.ts,
            )
        )
        if order.life.state is State.WORKING:
            step.to_plan[order.order_id] = "resume"
        else:
            step.emit(outputs.status(state, order, message.ts))


def _control_event(state: EngineState, order: OrderState, command: str) -> Event:
    if command == "halt":
        return Event.HALT
    clock = state.clock
    started = clock is not None and order.start <= clock
    return Event.RESUME if started else Event.RESUME_PENDING


def on_order(state: EngineState, step: Step, message: OrderMessage) -> None:
    """A new order, an amendment or a cancel (order messages of one order move forward)."""
    existing = state.orders.get(message.order_id)
    if existing is not None and message.action != "cancel" and message.ts < existing.last_ts:
        raise Rejected(
            f"ts: {utc_text(message.ts)} is earlier than the previous message of order "
            f"{message.order_id!r} ({utc_text(existing.last_ts)}); order messages must move "
            "forward in time"
        )
    if message.action == "new":
        _new_order(state, step, message, existing)
    elif existing is None:
        raise Rejected(
            f"order_id: unknown order {message.order_id!r}; send action 'new' before "
            f"'{message.action}'"
        )
    elif message.action == "amend":
        _check_identity(existing, message)
        _amend(state, step, existing, message)
    else:
        _cancel(state, step, existing, message)


def _check_identity(order: OrderState, message: OrderMessage) -> None:
    if message.start is not None and message.start != order.start:
        raise Rejected(
            f"start: order {order.order_id!r} starts at {utc_text(order.start)}, not "
            f"{utc_text(message.start)}; the start cannot be amended (cancel and send a new order)"
        )
    if message.symbol is not None and message.symbol != order.symbol:
        raise Rejected(
            f"symbol: order {order.order_id!r} is on {order.symbol}, not {message.symbol}; "
            "the symbol cannot change (cancel and send a new order)"
        )
    if message.side is not None and message.side != order.side:
        raise Rejected(
            f"side: order {order.order_id!r} is a {order.side}, not a {message.side}; the "
            "side cannot change (cancel and send a new order)"
        )


def _new_order(
    state: EngineState, step: Step, message: OrderMessage, existing: OrderState | None
) -> None:
    if existing is not None:
        raise Rejected(
            f"order_id: order {message.order_id!r} already exists "
            f"({existing.life.state.value}); send action 'amend' to change it or use a new "
            "order_id"
        )
    assert message.symbol and message.side and message.quantity and message.start
    assert message.end is not None
    sym = _symbol(state, step, message.symbol)
    try:
        first_bin, end_bin, _ = sym.profile.session.bin_span(message.start, message.end)
    except InputError as exc:
        raise Rejected(str(exc)) from None
    now = max(state.clock, message.ts) if state.clock else message.ts
    if message.end <= now:
        raise Rejected(
            f"end: {utc_text(message.end)} has already passed (event time {utc_text(now)}); "
            "send an end in the future"
        )
    order = OrderState(
        order_id=message.order_id,
        symbol=message.symbol,
        side=message.side,
        quantity=message.quantity,
        start=message.start,
        end=message.end,
        day=sym.local_day(message.start),
        first_bin=first_bin,
        end_bin=end_bin,
        limit_price=message.limit_price,
        max_participation=_cap(state, message.max_participation),
        cap_source="order" if message.max_participation is not None else "default",
        urgency=message.urgency,
        overrides=dict(message.preferences) if message.preferences else None,
        prefs=_preferences(message.urgency, message.preferences),
        arrival_price=message.arrival_price,
        life=Lifecycle(message.order_id),
        last_ts=message.ts,
    )
    step.undo.new_order(order)
    state.orders[order.order_id] = order
    step.undo.symbol(sym)
    sym.orders[order.order_id] = None
    step.undo.heaps()
    heapq.heappush(state.starts, (order.start, order.order_id))
    heapq.heappush(state.ends, (order.end, order.order_id))
    timers.advance(state, step, message.ts)
    if order.life.state is State.PENDING:
        step.emit(outputs.status(state, order, message.ts))
    _unpark(state, step, order)


def _cap(state: EngineState, max_participation: float | None) -> float:
    """The order's participation cap: its own, else the configured default."""
    if max_participation is not None:
        return max_participation
    return state.config.default_max_participation


def _unpark(state: EngineState, step: Step, order: OrderState) -> None:
    """Apply the fills that waited for ``order``, in the order they arrived."""
    if not any(fill.order_id == order.order_id for _, fill in state.parked):
        return
    step.undo.parking()
    waiting = [fill for _, fill in state.parked if fill.order_id == order.order_id]
    state.parked[:] = [entry for entry in state.parked if entry[1].order_id != order.order_id]
    for fill in waiting:
        try:
            _count_fill(state, step, order, fill)
        except Rejected as rejection:  # a parked fill that turns out wrong (its side): say so
            step.emit(
                outputs.error(
                    state.topics, fill, f"parked fill applied to its order: {rejection.reason}"
                )
            )
            step.out.extend(rejection.extra)


def _park(state: EngineState, step: Step, fill: FillMessage) -> None:
    """Keep a fill for an order not seen yet until its order comes (or its time is up)."""
    for _, waiting in state.parked:
        if waiting.fill_id == fill.fill_id and waiting.order_id == fill.order_id:
            if waiting.same_execution(fill):
                return  # the same fill again, still waiting
            raise Rejected(
                f"fill_id: {fill.fill_id!r} is already waiting for order {fill.order_id!r} "
                f"with quantity {waiting.quantity} at {waiting.price}; send a fill_correction "
                "to change it"
            )
    timers.advance(state, step, fill.ts)
    now = state.now(fill.ts)
    step.undo.parking()
    until = now + timedelta(seconds=state.config.fill_parking_seconds)
    state.parked.append((until, fill))
    step.emit(
        replace(
            outputs.alert(
                rules.FILL_PARKED,
                f"Fill {fill.fill_id} ({fill.quantity:,} shares at {fill.price}) names an "
                f"order not seen yet; it waits for it until {utc_text(until)} and is counted "
                "when the order arrives.",
                None,
                None,
                now,
                {"fill_id": fill.fill_id, "quantity": fill.quantity, "price": fill.price},
            ),
            order_id=fill.order_id,
        )
    )
    timers.unpark_overflow(state, step, now)


def _preferences(urgency: str | None, overrides: Mapping[str, Any] | None) -> Preferences:
    try:
        return preferences(urgency, overrides)
    except InputError as exc:
        raise Rejected(str(exc)) from None


def _amend(state: EngineState, step: Step, order: OrderState, message: OrderMessage) -> None:
    if order.life.state not in AMENDABLE:
        raise Rejected(
            f"order {order.order_id!r} is {order.life.state.value}; only pending, working "
            "or halted orders can be amended"
        )
    quantity = message.quantity if message.quantity is not None else order.quantity
    if quantity < order.filled:
        raise Rejected(
            f"quantity: {quantity:,} is below the {order.filled:,} shares already filled; "
            f"send at least {order.filled:,}"
        )
    end = message.end if message.end is not None else order.end
    first_bin, end_bin = order.first_bin, order.end_bin
    if message.end is not None:
        now = state.now(message.ts)
        if end <= now:
            raise Rejected(
                f"end: {utc_text(end)} has already passed (event time {utc_text(now)}); "
                "send an end in the future"
            )
        session = state.symbols[order.symbol].profile.session
        try:
            first_bin, end_bin, _ = session.bin_span(order.start, end)
        except InputError as exc:
            raise Rejected(str(exc)) from None
    sets = message.sets
    if sets("start") and message.start != order.start:
        raise Rejected("start: the start cannot be amended (cancel and send a new order)")
    urgency = message.urgency if sets("urgency") else order.urgency
    overrides = dict(message.preferences or {}) or None if sets("preferences") else order.overrides
    prefs = order.prefs
    if sets("urgency") or sets("preferences"):
        prefs = _preferences(urgency, overrides)
    # Everything checked: apply.
    step.undo.order(order)
    order.last_ts = message.ts
    order.quantity = quantity
    if end != order.end:
        order.end = end
        step.undo.heaps()
        heapq.heappush(state.ends, (end, order.order_id))
    order.first_bin, order.end_bin = first_bin, end_bin
    if message.limit_price is not None or message.removes_limit:
        order.limit_price = message.limit_price
    if sets("max_participation"):
        order.max_participation = _cap(state, message.max_participation)
        order.cap_source = "order" if message.max_participation is not None else "default"
    order.urgency, order.overrides, order.prefs = urgency, overrides, prefs
    timers.advance(state, step, message.ts)
    if order.life.terminal:
        return
    if order.filled >= order.quantity:
        _complete(state, step, order, message.ts)
    elif order.life.state is State.WORKING:
        step.to_plan[order.order_id] = "amend"
    else:
        step.emit(outputs.status(state, order, message.ts))


def _cancel(state: EngineState, step: Step, order: OrderState, message: OrderMessage) -> None:
    """Cancel an order, whatever else the message carries (see the module docstring)."""
    if order.life.terminal:
        step.ack_note = f"the order is already {order.life.state.value}; nothing to cancel"
        return
    step.undo.order(order)
    if message.ts > order.last_ts:
        order.last_ts = message.ts
    timers.advance(state, step, message.ts)
    if order.life.terminal:  # expired while time advanced: the cancel changes nothing
        step.ack_note = f"the order is already {order.life.state.value}; nothing to cancel"
        return
    contradictions = {
        name: {"order": getattr(order, name), "cancel": getattr(message, name)}
        for name in ("symbol", "side")
        if getattr(message, name) is not None and getattr(message, name) != getattr(order, name)
    }
    if contradictions:
        said = ", ".join(
            f"{name} {values['cancel']} (the order's is {values['order']})"
            for name, values in contradictions.items()
        )
        step.ack_note = f"cancelled; the cancel named {said}"
        step.emit(
            outputs.alert(
                rules.CANCEL_MISMATCH,
                f"A cancel for order {order.order_id} named {said}. The order is cancelled all "
                "the same (cancels always win); check the router's order ids.",
                order,
                order.symbol,
                message.ts,
                {"contradictions": contradictions},
            )
        )
    order.life.apply(Event.CANCEL)
    order.live_until = message.ts
    step.to_plan.pop(order.order_id, None)
    state.book.clear_silently(order.order_id)
    step.emit(zero_target(state, step, order, message.ts))
    step.emit(outputs.status(state, order, message.ts))


def _complete(state: EngineState, step: Step, order: OrderState, ts: datetime) -> None:
    step.undo.order(order)
    order.life.apply(Event.COMPLETE)
    order.live_until = ts
    step.to_plan.pop(order.order_id, None)
    state.book.clear_silently(order.order_id)
    step.emit(zero_target(state, step, order, ts))
    step.emit(outputs.status(state, order, ts))
    step.emit(
        outputs.alert(
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


def on_fill(state: EngineState, step: Step, fill: FillMessage) -> None:
    """A fill: recorded at once (it happened in the market) unless it cannot be counted; parked
    when its order is not known yet."""
    order = state.orders.get(fill.order_id)
    if order is None:
        _park(state, step, fill)
        return
    _count_fill(state, step, order, fill)


def _count_fill(state: EngineState, step: Step, order: OrderState, fill: FillMessage) -> None:
    previous = order.fills.get(fill.fill_id) or order.busted.get(fill.fill_id)
    if previous is not None:
        if previous.same_execution(fill) or (
            fill.fill_id in order.busted and order.busted[fill.fill_id].same_execution(fill)
        ):
            return  # the same fill again (a redelivery, whatever its ts): it happened once
        alert = outputs.alert(
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
        raise Rejected(
            f"fill_id: {fill.fill_id!r} was already accepted for order {order.order_id!r} "
            f"with quantity {previous.quantity} at {previous.price}; to change it send a "
            "fill_correction (action 'correct' or 'bust') for this fill_id, not the fill again",
            [alert],
        )
    if fill.side is not None and fill.side != order.side:
        alert = outputs.alert(
            rules.FILL_WRONG_SIDE,
            f"Fill {fill.fill_id} is a {fill.side} on a {order.side} order; it is not counted.",
            order,
            order.symbol,
            fill.ts,
            {"fill_id": fill.fill_id, "fill_side": fill.side, "order_side": order.side},
        )
        raise Rejected(
            f"side: fill {fill.fill_id!r} is a {fill.side} but order {order.order_id!r} is a "
            f"{order.side}; send it for the right order",
            [alert],
        )
    step.undo.order(order)
    order.fills[fill.fill_id] = fill
    order.filled += fill.quantity
    order.notional += fill.quantity * fill.price
    sym = state.symbols[order.symbol]
    step.undo.symbol(sym)
    sym.unchecked.append((order.order_id, fill))
    timers.advance(state, step, fill.ts)
    ts = fill.ts if state.clock is None else max(fill.ts, state.clock)
    if order.life.terminal:
        step.emit(
            outputs.alert(
                rules.FILL_AFTER_CLOSE,
                f"Fill {fill.fill_id} ({fill.quantity:,} shares) arrived after the order was "
                f"{order.life.state.value}; it is recorded because it happened in the "
                "market.",
                order,
                order.symbol,
                ts,
                {"fill_id": fill.fill_id, "state": order.life.state.value},
            )
        )
    if order.filled > order.quantity:
        excess = order.filled - order.quantity
        step.emit(
            outputs.alert(
                rules.FILL_OVERFILL,
                f"Fills total {order.filled:,} shares, {excess:,} more than the order's "
                f"{order.quantity:,}. The fill is recorded; targets stay at zero.",
                order,
                order.symbol,
                ts,
                {
                    "fill_id": fill.fill_id,
                    "filled": order.filled,
                    "quantity": order.quantity,
                    "excess": excess,
                },
            )
        )
    if not order.life.terminal and order.filled >= order.quantity:
        _complete(state, step, order, ts)
    else:
        step.emit(outputs.status(state, order, ts))


def on_fill_correction(state: EngineState, step: Step, message: FillCorrectionMessage) -> None:
    """A bust or a correction of an earlier fill: the inventory, the average price and the plan
    are recomputed without it (bust) or with its new values (correction), with an alert."""
    order = state.orders.get(message.order_id)
    if order is None:
        _correct_parked(state, step, message)
        return
    previous = order.fills.get(message.fill_id)
    if previous is None:
        if message.fill_id in order.busted:
            if message.action == "bust":
                return  # busted already: the same bust again
            raise Rejected(
                f"fill_id: fill {message.fill_id!r} of order {order.order_id!r} was busted; a "
                "busted fill cannot be corrected -- send the execution as a new fill"
            )
        raise Rejected(
            f"fill_id: order {order.order_id!r} has no fill {message.fill_id!r} to "
            f"{message.action}; send the fill first, or name a fill it has"
        )
    corrected: FillMessage | None = None
    if message.action == "correct":
        corrected = replace(
            previous,
            quantity=message.quantity if message.quantity is not None else previous.quantity,
            price=message.price if message.price is not None else previous.price,
        )
        if corrected == previous:
            return  # the same correction again: nothing changes
    step.undo.order(order)
    timers.advance(state, step, message.ts)
    fills = dict(order.fills)  # a new mapping: the savepoint keeps the old one (see there)
    if corrected is None:
        del fills[message.fill_id]
        order.busted = {**order.busted, message.fill_id: previous}
    else:
        fills[message.fill_id] = corrected
    order.fills = fills
    order.filled = sum(fill.quantity for fill in fills.values())
    order.notional = math.fsum(fill.quantity * fill.price for fill in fills.values())
    ts = state.now(message.ts)
    average = order.notional / order.filled if order.filled else None
    details: dict[str, Any] = {
        "fill_id": message.fill_id,
        "before": {"quantity": previous.quantity, "price": previous.price},
        "filled": order.filled,
        "average_price": average,
    }
    if message.reason:
        details["reason"] = message.reason
    if corrected is None:
        code = rules.FILL_BUSTED
        text = (
            f"Fill {message.fill_id} ({previous.quantity:,} shares at {previous.price}) was busted"
        )
    else:
        code = rules.FILL_CORRECTED
        details["after"] = {"quantity": corrected.quantity, "price": corrected.price}
        text = (
            f"Fill {message.fill_id} was corrected from {previous.quantity:,} at "
            f"{previous.price} to {corrected.quantity:,} at {corrected.price}"
        )
    text += f"; the order has {order.filled:,} of {order.quantity:,} shares filled"
    if order.life.terminal and order.filled < order.quantity:
        text += f" and stays {order.life.state.value} (send a new order for the rest)"
    step.emit(outputs.alert(code, text + ".", order, order.symbol, ts, details))
    if not order.life.terminal and order.filled >= order.quantity:
        _complete(state, step, order, ts)
    elif order.life.state is State.WORKING:
        step.to_plan.setdefault(order.order_id, "correction")
    else:
        step.emit(outputs.status(state, order, ts))


def _correct_parked(state: EngineState, step: Step, message: FillCorrectionMessage) -> None:
    """A bust or a correction of a fill still waiting for its order."""
    for index, (until, fill) in enumerate(state.parked):
        if fill.fill_id == message.fill_id and fill.order_id == message.order_id:
            step.undo.parking()
            timers.advance(state, step, message.ts)
            if message.action == "bust":
                del state.parked[index]
            else:
                state.parked[index] = (
                    until,
                    replace(
                        fill,
                        quantity=message.quantity or fill.quantity,
                        price=message.price or fill.price,
                    ),
                )
            return
    raise Rejected(
        f"order_id: no order {message.order_id!r} and no fill {message.fill_id!r} waiting for "
        f"it; a {message.action} needs the fill first"
    )


def on_bin(state: EngineState, step: Step, message: BinMessage) -> None:
    """A closed bin: the forecast, the symbol's checks, then a re-plan of its working orders."""
    sym = _symbol(state, step, message.symbol)
    place = _check_bin(sym, message)
    if place is None:
        return  # the same bin again: nothing changes
    index, day = place
    step.undo.symbol(sym)
    sym.start_day(day)
    before = sym.forecast
    sym.bins[index] = message
    sym.observed[index] = ObservedBin(
        volume=float(message.volume), spread=message.spread, high=message.high, low=message.low
    )
    sym.forecast = forecast(sym.profile, sym.observed)
    sym.last_index = index
    sym.last_close = message.close
    sym.last_bin_end = message.end
    ts, config = message.ts, state.config
    # Symbol-level checks: liquidity against the forecast made before this bin, staleness.
    for check in (
        rules.volume_shock(
            observed=float(message.volume), forecast=float(before.volume[index]), config=config
        ),
        rules.spread_shock(
            observed=message.spread, forecast=float(before.spread[index]), config=config
        ),
        rules.stale(age_seconds=None, bin_seconds=sym.bin_seconds, config=config),
    ):
        outputs.apply_check(state, step, check, None, sym.name, ts)
    state.watch(sym, ts)  # judged from when the last bin arrived (event time)
    for order_id in sym.orders:
        order = state.orders[order_id]
        if order.arrival_price is None and message.start >= order.start:
            step.undo.order(order)
            order.arrival_price = message.open
        if (
            order.live_from is not None
            and message.end > order.live_from
            and (order.live_until is None or message.start < order.live_until)
            and message.vwap is not None
        ):
            step.undo.order(order)
            order.vwap_volume += message.volume
            order.vwap_notional += message.volume * message.vwap
    outputs.fill_price_alerts(state, step, sym, message)
    timers.advance(state, step, ts)
    for order_id in sym.orders:
        order = state.orders[order_id]
        if order.life.state is State.WORKING:
            step.to_plan.setdefault(order_id, "bin")
        elif order.life.state is State.HALTED:  # no target, but where it stands moved on
            step.emit(outputs.status(state, order, ts))


def _check_bin(sym: SymbolState, message: BinMessage) -> tuple[int, date] | None:
    """The bin's index in its session and its local day; ``None`` for an exact copy of an
    accepted bin.

    Raises:
        Rejected: off the session's grid, on an earlier day, earlier than the last bin, or
            different from the bin accepted for the same slot.
    """
    session = sym.profile.session
    day = sym.local_day(message.start)
    index = session.bin_index(message.start)
    expected = None
    if index is not None:
        bins = sym.day_bins if sym.day == day else session.bins(day)
        expected = bins[index]
    if index is None or expected is None or (message.start, message.end) != expected:
        grid = f"{session.start:%H:%M}-{session.end:%H:%M} {session.timezone}"
        raise Rejected(
            f"start/end: {utc_text(message.start)} to {utc_text(message.end)} is not a bin of "
            f"{message.symbol}'s session ({grid}, {session.bin_minutes}-minute bins); send "
            "closed bins on the session's grid"
        )
    if sym.day is not None and day < sym.day:
        raise Rejected(
            f"start: bin {utc_text(message.start)} is on an earlier day than the bins already "
            f"received for {message.symbol}; bins must move forward in time"
        )
    if sym.day == day:
        previous = sym.bins.get(index)
        if previous is not None:
            if previous == message:
                return None
            raise Rejected(
                f"a different bin for {message.symbol} starting {utc_text(message.start)} "
                "was already accepted; a closed bin cannot change"
            )
        if sym.last_index is not None and index < sym.last_index:
            raise Rejected(
                f"start: bin {utc_text(message.start)} is earlier than the last bin received "
                f"for {message.symbol} ({utc_text(sym.day_bins[sym.last_index][0])}); bins "
                "must move forward in time"
            )
    return index, day


def _symbol(state: EngineState, step: Step, name: str) -> SymbolState:
    """The symbol's state, made on first sight (with an info alert if it has no profile)."""
    sym = state.symbols.get(name)
    if sym is not None:
        return sym
    profile = state.profiles.get(name)
    if profile is None:
        profile = default_profile(name)
        step.emit(
            outputs.alert(
                rules.DEFAULT_PROFILE,
                f"No liquidity profile for {name}: using the stated default profile "
                f"(1,000,000 shares a day, invented U-shaped curves). Calibrate one with "
                f"'tracker calibrate' for real decisions.",
                None,
                name,
                step.ts,
                {"average_daily_volume": profile.average_daily_volume},
            )
        )
    sym = SymbolState(name=name, profile=profile, forecast=forecast(profile, {}))
    step.undo.new_symbol(sym)
    state.symbols[name] = sym
    return sym


__all__ = ["on_bin", "on_control", "on_fill", "on_fill_correction", "on_order", "on_tick"]

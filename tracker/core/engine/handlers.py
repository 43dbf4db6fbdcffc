"""What each message does to the engine's state: orders, fills, bins, control and ticks.

Each handler applies one validated message to the state, recording what it says in the
:class:`~tracker.core.engine.step.Step` of the event (outputs, re-plans asked for). A message that
cannot be applied raises :class:`~tracker.core.engine.step.Rejected` before it changes an order,
with a reason that says what to fix (a symbol seen for the first time is kept, with its
``default_profile`` alert when it has no profile).

Decisions:

* Overfill: the fill is recorded (it happened in the market), ``fill_overfill`` is raised and
  targets are never negative: remaining is ``max(quantity - filled, 0)``.
* A fill for an unknown order: one ErrorMessage (the line is rejected) and one
  ``fill_unknown_order`` alert on ``{root}/alerts/{order_id}``.
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
from collections.abc import Mapping
from dataclasses import replace
from datetime import date, datetime
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
from tracker.core.messages import BinMessage, ControlMessage, FillMessage, OrderMessage, Tick
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
    if state.last_control is not None and message.ts < state.last_control:
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
    if existing is not None and message.ts < existing.last_ts:
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
    else:
        _check_identity(existing, message)
        if message.action == "amend":
            _amend(state, step, existing, message)
        else:
            _cancel(state, step, existing, message)


def _check_identity(order: OrderState, message: OrderMessage) -> None:
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
        max_participation=message.max_participation,
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
        order.max_participation = message.max_participation
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
    if not order.life.can(Event.CANCEL):
        raise Rejected(
            str(TransitionError(order.life.state, Event.CANCEL, order_id=order.order_id).reason)
        )
    step.undo.order(order)
    order.last_ts = message.ts
    timers.advance(state, step, message.ts)
    if order.life.terminal:  # expired while time advanced: the cancel changes nothing
        return
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
    """A fill: recorded at once (it happened in the market) unless it cannot be counted."""
    order = state.orders.get(fill.order_id)
    if order is None:
        alert = outputs.alert(
            rules.FILL_UNKNOWN_ORDER,
            f"Fill {fill.fill_id} ({fill.quantity:,} shares at {fill.price}) names an order "
            "the engine does not know; it is not counted anywhere.",
            None,
            None,
            fill.ts,
            {"fill_id": fill.fill_id, "quantity": fill.quantity, "price": fill.price},
        )
        raise Rejected(
            f"order_id: fill {fill.fill_id!r} is for order {fill.order_id!r}, which the "
            "engine does not know; send the order (action 'new') before its fills",
            [replace(alert, order_id=fill.order_id)],
        )
    previous = order.fills.get(fill.fill_id)
    if previous is not None:
        if previous == fill:
            return  # the same fill again: it happened once
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
            f"with quantity {previous.quantity} at {previous.price}; a fill id cannot be "
            "reused -- send a correction under a new fill id",
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


__all__ = ["on_bin", "on_control", "on_fill", "on_order", "on_tick"]

"""Undoing events that failed inside the engine, without copying the engine.

An unexpected exception while the engine handles an event (a bug, a solver that raised something
it should not) must not leave an order half-changed: moved to working but with no plan, its re-plan
request lost. So before an event the engine takes a :class:`Savepoint`, and every change an event
makes to an order, a symbol or the engine's timers goes through it first: the savepoint keeps the
field values of each record the first time it is touched (a shallow copy: fills, bins and
forecasts are only ever added to or replaced, so remembering how many there were is enough), the
engine-wide values (event time, the last tick and control times, the halt of all orders) and,
lazily, the start and end heaps and the parked fills. A bust or a correction replaces an order's
``fills`` (and ``busted``) mapping with a changed copy rather than changing it in place, so the
saved field values still hold the mapping as it was. The alert book keeps its own log of changes
(:meth:`~tracker.core.alerts.AlertBook.mark`).

:meth:`Savepoint.rollback` puts all of it back as it was; :meth:`Savepoint.release` keeps the
changes. One savepoint may cover several events (the bins of one bin close share a solve), and
rolling it back undoes them all.
"""

from __future__ import annotations

from dataclasses import fields
from datetime import datetime
from operator import attrgetter
from typing import Any

from tracker.core.engine.state import EngineState, OrderState, SymbolState
from tracker.core.lifecycle import State
from tracker.core.messages import FillMessage

_ORDER_FIELDS = tuple(item.name for item in fields(OrderState))
_SYMBOL_FIELDS = tuple(item.name for item in fields(SymbolState))
_order_values = attrgetter(*_ORDER_FIELDS)  # every field at once, as a tuple
_symbol_values = attrgetter(*_SYMBOL_FIELDS)


def _truncate(mapping: dict[Any, Any], size: int) -> None:
    """Drop the entries added after the mapping had ``size`` of them (insertion order)."""
    while len(mapping) > size:
        mapping.popitem()


class Savepoint:
    """What the engine looked like before an event, kept only for what the event touches.

    Args:
        state: The engine's state (the alert book is marked at once).
    """

    __slots__ = (
        "_heaps",
        "_new_orders",
        "_new_symbols",
        "_orders",
        "_parking",
        "_scalars",
        "_state",
        "_symbols",
    )

    def __init__(self, state: EngineState) -> None:
        self._state = state
        self._scalars = (
            state.clock,
            state.last_tick,
            state.last_control,
            state.halt_all,
            state.stale_due,
        )
        # id -> (the record, its field values then or None for a new one, sizes then)
        self._orders: dict[str, tuple[OrderState, tuple[Any, ...] | None, State, int]] = {}
        self._symbols: dict[
            str, tuple[SymbolState, tuple[Any, ...] | None, int, int, int, int]
        ] = {}
        self._new_orders: list[str] = []
        self._new_symbols: list[str] = []
        self._heaps: tuple[list[tuple[datetime, str]], list[tuple[datetime, str]]] | None = None
        self._parking: tuple[list[tuple[datetime, FillMessage]], int] | None = None
        state.book.mark()

    def order(self, order: OrderState) -> None:
        """Call before changing ``order`` (a no-op after the first time, or for a new order)."""
        if order.order_id not in self._orders:
            saved = _order_values(order)
            self._orders[order.order_id] = (order, saved, order.life.state, len(order.fills))

    def symbol(self, sym: SymbolState) -> None:
        """Call before changing ``sym`` (a no-op after the first time, or for a new symbol)."""
        if sym.name not in self._symbols:
            saved = _symbol_values(sym)
            sizes = (len(sym.observed), len(sym.bins), len(sym.orders), len(sym.unchecked))
            self._symbols[sym.name] = (sym, saved, *sizes)

    def heaps(self) -> None:
        """Call before pushing to or popping from the start and end heaps."""
        if self._heaps is None:
            self._heaps = (list(self._state.starts), list(self._state.ends))

    def parking(self) -> None:
        """Call before changing the parked fills or the unassigned ones."""
        if self._parking is None:
            self._parking = (list(self._state.parked), len(self._state.unassigned))

    def new_order(self, order: OrderState) -> None:
        """An order the event created (undone by forgetting it)."""
        self._new_orders.append(order.order_id)
        self._orders[order.order_id] = (order, None, order.life.state, 0)  # nothing to restore

    def new_symbol(self, sym: SymbolState) -> None:
        """A symbol the event created (undone by forgetting it)."""
        self._new_symbols.append(sym.name)
        self._symbols[sym.name] = (sym, None, 0, 0, 0, 0)  # nothing to restore

    def rollback(self) -> None:
        """Put everything the events touched back as it was before them."""
        state = self._state
        (
            state.clock,
            state.last_tick,
            state.last_control,
            state.halt_all,
            state.stale_due,
        ) = self._scalars
        for order, saved, life_state, fills in self._orders.values():
            if saved is None:
                continue
            for name, value in zip(_ORDER_FIELDS, saved, strict=True):
                setattr(order, name, value)
            order.life.state = life_state
            _truncate(order.fills, fills)
        for sym, saved_sym, observed, bins, orders, unchecked in self._symbols.values():
            if saved_sym is None:
                continue
            for name, value in zip(_SYMBOL_FIELDS, saved_sym, strict=True):
                setattr(sym, name, value)
            _truncate(sym.observed, observed)
            _truncate(sym.bins, bins)
            _truncate(sym.orders, orders)
            del sym.unchecked[unchecked:]
        for order_id in self._new_orders:
            del state.orders[order_id]
        for name in self._new_symbols:
            del state.symbols[name]
        if self._heaps is not None:
            state.starts[:] = self._heaps[0]
            state.ends[:] = self._heaps[1]
        if self._parking is not None:
            state.parked[:] = self._parking[0]
            del state.unassigned[self._parking[1] :]
        state.book.rollback()

    def release(self) -> None:
        """Keep what the events changed."""
        self._state.book.release()


__all__ = ["Savepoint"]

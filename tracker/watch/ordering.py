"""Which orders come first: the attention ranking, the other sort orders, and the filter.

The default order puts first what a person should look at now, in this order of urgency:

0. a raised critical alert on the order or its symbol, not yet acknowledged in this view (completion
   no longer feasible under the cap, an overfill, market data stale, a failed re-plan, ...);
1. behind plan: the daemon's ``behind_plan`` alert is raised, or the order is at least one bin of
   its planned trading behind (``deviation_bins >= 1``; a view that started after the alert was
   raised still sees it);
2. residual at risk: halted with shares left, or ended (expired) with shares left;
3. everything else that is live (working, pending), most behind first;
4. finished (done, cancelled, expired complete).

Within a rank, the order furthest behind plan (as % of its quantity) comes first, then the order
id, so the list is stable from one frame to the next.
"""

from __future__ import annotations

from collections.abc import Callable, Iterable
from dataclasses import dataclass
from typing import Any

from tracker.watch.board import Board, OrderView

__all__ = ["SORTS", "STATES", "Filter", "attention", "rows"]

#: Order states the state filter cycles through (``None``: all).
STATES: tuple[str | None, ...] = (
    None,
    "working",
    "halted",
    "pending",
    "done",
    "cancelled",
    "expired",
)

#: A ``deviation_bins`` this large counts as behind plan without the daemon's alert.
BEHIND_BINS = 1.0


def attention(view: OrderView, board: Board) -> int:
    """The attention rank of an order (0 first; see the module docstring)."""
    if view.critical_open() or (not view.finished and board.symbol_critical(view.symbol)):
        return 0
    if view.finished:
        return 2 if view.state == "expired" and (view.remaining or 0) > 0 else 4
    if "behind_plan" in view.open_alerts or (view.deviation_bins or 0.0) >= BEHIND_BINS:
        return 1
    if view.state == "halted" and (view.remaining or 0) > 0:
        return 2
    return 3


def _behind(view: OrderView) -> float:
    return view.deviation_pct if view.deviation_pct is not None else 0.0


def _attention_key(board: Board) -> Callable[[OrderView], Any]:
    return lambda view: (attention(view, board), -_behind(view), view.order_id)


def _key(name: str) -> Callable[[Board], Callable[[OrderView], Any]]:
    keys: dict[str, Callable[[OrderView], Any]] = {
        "order": lambda view: view.order_id,
        "symbol": lambda view: (view.symbol or "", view.order_id),
        "behind": lambda view: (-_behind(view), view.order_id),
        "progress": lambda view: (
            (view.filled or 0) / view.quantity if view.quantity else 0.0,
            view.order_id,
        ),
        "cost": lambda view: (-(view.expected_cost_bps or 0.0), view.order_id),
    }
    return lambda board: keys[name]


#: Sort orders by name, in the order the sort key cycles through them.
SORTS: dict[str, Callable[[Board], Callable[[OrderView], Any]]] = {
    "attention": _attention_key,
    "order": _key("order"),
    "symbol": _key("symbol"),
    "behind": _key("behind"),
    "progress": _key("progress"),
    "cost": _key("cost"),
}

#: What each sort order means, for the screen.
SORT_WORDS = {
    "attention": "needs attention first",
    "order": "by order id",
    "symbol": "by symbol",
    "behind": "most behind plan first",
    "progress": "least filled first",
    "cost": "highest expected cost first",
}


@dataclass(frozen=True, slots=True)
class Filter:
    """Which orders to show: a symbol (prefix, any case) and a state; ``None`` shows all."""

    symbol: str | None = None
    state: str | None = None

    def keeps(self, view: OrderView) -> bool:
        """Whether the order passes."""
        if self.state is not None and view.state != self.state:
            return False
        if self.symbol:
            return (view.symbol or "").upper().startswith(self.symbol.upper())
        return True

    def describe(self) -> str:
        """The filter in words ("" when it shows everything)."""
        parts = []
        if self.symbol:
            parts.append(f"symbol {self.symbol.upper()}*")
        if self.state:
            parts.append(f"state {self.state}")
        return ", ".join(parts)


def rows(board: Board, sort: str = "attention", keep: Filter | None = None) -> list[OrderView]:
    """The orders to show, filtered and sorted.

    Raises:
        KeyError: ``sort`` is not one of :data:`SORTS`.
    """
    views: Iterable[OrderView] = board.orders.values()
    if keep is not None:
        views = [view for view in views if keep.keeps(view)]
    return sorted(views, key=SORTS[sort](board))

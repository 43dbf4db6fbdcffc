"""What the engine remembers between events: plans, orders, symbols, and the engine as a whole.

These are plain mutable records; the engine's modules change them while handling an event, each
record saved first in the event's savepoint (``step.undo``, :mod:`tracker.core.engine.savepoint`)
so that an event that fails inside the engine can be undone.
"""

from __future__ import annotations

import heapq
from collections import Counter
from collections.abc import Iterable
from dataclasses import dataclass, field
from datetime import date, datetime, timedelta
from typing import Any

import numpy as np
import numpy.typing as npt

from tracker.core.alerts import AlertBook
from tracker.core.engine.config import EngineConfig
from tracker.core.engine.learning import NO_EVIDENCE, FillRatio, WorkedBin
from tracker.core.forecast import Forecast, ObservedBin, forecast
from tracker.core.formulation import Preferences
from tracker.core.lifecycle import Lifecycle
from tracker.core.messages import BinMessage, FillMessage, Side
from tracker.core.profiles import Profile
from tracker.core.topics import Topics

FloatArray = npt.NDArray[np.float64]


@dataclass(slots=True, eq=False)
class Plan:
    """A solved schedule placed on the session's bins."""

    version: int
    first_bin: int  # absolute index of trades[0]
    cumulative: FloatArray  # cumulative planned trades from first_bin (length = bins planned)
    filled_at: int  # shares filled when the plan was made
    quantity: float  # shares the plan had to trade
    status: str
    shortfall: float
    expected_cost: float  # spread, fees, temporary and own permanent impact (no risk term)
    price: float
    cost_sd: float = 0.0  # sd of the cost to go (timing risk), currency
    risk_penalty: float = 0.0  # the objective's inventory-risk and completion terms, currency

    def expected_filled(self, closed_bin: int | None) -> float:
        """Shares the plan expects filled by the end of bin ``closed_bin`` (None: none closed)."""
        if closed_bin is None or closed_bin < self.first_bin or self.cumulative.size == 0:
            return float(self.filled_at)
        offset = min(closed_bin - self.first_bin, self.cumulative.size - 1)
        return self.filled_at + float(self.cumulative[offset])

    def move_from(self, previous: Plan) -> float:
        """Largest change from ``previous``, over the bins both plans cover, of the expected
        filled shares (signed; 0 when they share no bin)."""
        if self.cumulative.size == 0 or previous.cumulative.size == 0:
            return 0.0
        start = max(previous.first_bin, self.first_bin)
        stop = min(
            previous.first_bin + previous.cumulative.size, self.first_bin + self.cumulative.size
        )
        if stop <= start:
            return 0.0
        old = (
            previous.filled_at
            + previous.cumulative[start - previous.first_bin : stop - previous.first_bin]
        )
        new = self.filled_at + self.cumulative[start - self.first_bin : stop - self.first_bin]
        difference = new - old
        index = int(np.argmax(np.abs(difference)))
        return float(difference[index])


#: Where an order stands against its baseline: planned filled shares, the gap (planned - filled,
#: positive = behind) and the gap in bins of the baseline's average planned trading.
Deviation = tuple[float, float, float | None]


@dataclass(slots=True, eq=False)
class OrderState:
    """One parent order: its terms, lifecycle, fills, plans and benchmarks."""

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
    life: Lifecycle
    last_ts: datetime
    arrival_price: float | None = None
    fills: dict[str, FillMessage] = field(default_factory=dict)
    filled: int = 0
    notional: float = 0.0
    plan: Plan | None = None
    baseline: Plan | None = None
    plan_version: int = 0
    blocked: bool = False
    live_from: datetime | None = None
    live_until: datetime | None = None
    vwap_volume: float = 0.0
    vwap_notional: float = 0.0
    volume_scale: float | None = None
    cap_source: str | None = None  # where max_participation came from: "order" or "default"
    busted: dict[str, FillMessage] = field(default_factory=dict)  # fills a bust took back
    fill_ratio: FillRatio = NO_EVIDENCE  # how its targets fill (tracker.core.engine.learning)
    worked: WorkedBin | None = None  # the target of the bin ahead, as published

    @property
    def remaining(self) -> int:
        """Shares still to fill (never negative, even after an overfill)."""
        return max(self.quantity - self.filled, 0)

    @property
    def sign(self) -> float:
        """+1 for a buy, -1 for a sell."""
        return 1.0 if self.side == "buy" else -1.0

    def deviation(self, closed: int | None) -> Deviation:
        """Against the baseline, by the end of bin ``closed``: planned filled shares, the gap
        and the gap in bins.

        Deviation is measured against the *baseline* (the plan made at the start, or at the
        latest amendment), never against the latest re-plan, which starts from the realized
        inventory and so has no gap by construction. "Bins" of deviation are bins of the
        baseline's average planned trading (its quantity over its number of bins).
        """
        baseline = self.baseline
        if baseline is None:
            return 0.0, 0.0, None
        planned = baseline.expected_filled(closed)
        gap = planned - self.filled
        bins = baseline.cumulative.size
        per_bin = baseline.quantity / bins if bins else 0.0
        return planned, gap, (gap / per_bin if per_bin > 0 else None)


@dataclass(slots=True, eq=False)
class SymbolState:
    """One symbol: its profile, today's bins and forecast, and the orders on it."""

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
    fill_ratio: FillRatio = NO_EVIDENCE  # its orders' targets pooled (learning's prior)

    @property
    def bin_seconds(self) -> float:
        """The length of the session's bins, in seconds."""
        return self.profile.session.bin_minutes * 60.0

    def local_day(self, ts: datetime) -> date:
        """The session's local date at ``ts``."""
        return self.profile.session.local(ts).date()

    def closed_for(self, order: OrderState) -> int | None:
        """The last closed bin of the order's day (None: none yet, or another day)."""
        return self.last_index if self.day == order.day else None

    def start_day(self, day: date) -> None:
        """Forget the previous day's bins: ``day`` begins (nothing if it already has)."""
        if self.day == day:
            return
        self.day = day
        self.day_bins = self.profile.session.bins(day)
        self.observed = {}
        self.bins = {}
        self.last_index = None
        self.last_bin_end = None
        self.stale_at = None
        self.unchecked = []
        self.forecast = forecast(self.profile, {})


@dataclass(slots=True, eq=False)
class EngineState:
    """Everything the engine keeps: settings, orders, symbols, alerts raised, and event time.

    Attributes:
        clock: Event time: the latest time seen (never moves back).
        starts, ends: Heaps of (time, order id): orders to start and to expire.
        stale_due: The earliest time a watched symbol may turn stale (None: none watched).
        halt_all: A halt of all orders is on (orders that start meanwhile are held too).
        parked: Fills for orders not seen yet, in arrival order, each with the event time at
            which it stops waiting (``fill_parking_seconds`` after it arrived).
        unassigned: Parked fills whose order never came (in the summary as unassigned shares).
    """

    config: EngineConfig
    profiles: dict[str, Profile]
    topics: Topics
    grace: timedelta
    orders: dict[str, OrderState] = field(default_factory=dict)
    symbols: dict[str, SymbolState] = field(default_factory=dict)
    book: AlertBook = field(default_factory=AlertBook)
    counts: dict[str, Counter[str]] = field(default_factory=dict)
    clock: datetime | None = None
    last_tick: datetime | None = None
    last_control: datetime | None = None
    halt_all: bool = False
    starts: list[tuple[datetime, str]] = field(default_factory=list)
    ends: list[tuple[datetime, str]] = field(default_factory=list)
    stale_due: datetime | None = None
    parked: list[tuple[datetime, FillMessage]] = field(default_factory=list)
    unassigned: list[FillMessage] = field(default_factory=list)

    def now(self, ts: datetime) -> datetime:
        """Event time, or ``ts`` before any time was seen."""
        return self.clock or ts

    def forget_ended(self) -> list[str]:
        """Drop the orders that have ended (done, cancelled, expired) and everything that refers
        to them: their symbols' lists, their timers, fills waiting for a bin check, alert
        counts and raised alerts. Return their ids, sorted.

        Run between events (the daemon does when a new day's journal begins), never inside one:
        nothing is saved for an undo.
        """
        ended = sorted(o for o, order in self.orders.items() if order.life.terminal)
        if not ended:
            return []
        gone = set(ended)
        for order_id in ended:
            del self.orders[order_id]
            self.counts.pop(order_id, None)
        for sym in self.symbols.values():
            sym.orders = {o: None for o in sym.orders if o not in gone}
            sym.unchecked = [(o, fill) for o, fill in sym.unchecked if o not in gone]
        self.starts = _heap(entry for entry in self.starts if entry[1] not in gone)
        self.ends = _heap(entry for entry in self.ends if entry[1] not in gone)
        self.book.forget(gone)
        return ended

    def watch(self, sym: SymbolState, reference: datetime) -> None:
        """Watch ``sym``: stale if no bin arrives within ``stale_bins`` bins of ``reference``."""
        sym.stale_at = reference + timedelta(seconds=self.config.stale_bins * sym.bin_seconds)
        if self.stale_due is None or sym.stale_at < self.stale_due:
            self.stale_due = sym.stale_at


def _heap(entries: Iterable[tuple[datetime, str]]) -> list[tuple[datetime, str]]:
    """A heap of ``(time, order id)`` entries, made whole before anyone sees it."""
    heap = list(entries)
    heapq.heapify(heap)
    return heap


__all__ = ["Deviation", "EngineState", "OrderState", "Plan", "SymbolState"]

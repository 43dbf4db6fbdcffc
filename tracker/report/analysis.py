"""One order's day, worked out from the data: bins, paths, cost attribution and what happened.

Theory of operation
-------------------
:func:`review_order` turns what a :class:`~tracker.report.day.ReviewDay` holds about one order into
an :class:`OrderReview`: a row per bin of the order's window (target, filled, the market's volume,
VWAP and spread, the forecast), the cumulative paths (every plan version, the realized fills, the
market's volume), the cost attribution and a list of findings. Nothing here is written by hand:
each finding is a rule over those rows, and says so in its words.

Cost attribution (all in currency, positive = a cost, for buys and sells alike; ``s`` = +1 for a
buy and -1 for a sell; ``P0`` the arrival price; fill ``i`` of ``q_i`` shares at ``p_i`` in a bin
with VWAP ``V_b`` and average quoted spread ``S_b``; ``X`` the order's final quantity, ``F`` the
shares filled and ``P_end`` the last bin close by the time the order stopped working):

* spread = ``sum_i q_i S_b / 2``: half the quoted spread, what crossing it costs (an estimate from
  the bin's average spread);
* impact = ``s sum_i q_i (p_i - V_b) - spread``: what the fills paid against the bin's VWAP beyond
  the half spread (negative when they beat it);
* timing = ``s sum_i q_i (V_b - P0)``: the drift of the price from arrival to the bins in which
  the order traded;
* opportunity = ``s (X - F) (P_end - P0)``: the shares not executed, valued at the end price.

Together they are exactly the implementation shortfall against arrival (Perold 1988):
``s sum_i q_i (p_i - P0) + s (X - F)(P_end - P0)``. In basis points they are divided by the value
of the order at arrival, ``X P0``. A fill outside every recorded bin counts wholly as timing.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from datetime import UTC, datetime
from typing import Any

import numpy as np
import numpy.typing as npt

from tracker.core.alerts import AlertConfig
from tracker.errors import InputError
from tracker.report.day import Fill, MarketBin, OrderEvent, PlanPath, ReviewDay, parse_time

#: A bin whose fills are below this share of its target counts as under-filled.
FILL_RATE_THRESHOLD = 0.95
#: Consecutive under-filled bins reported as one run from this many on.
RUN_BINS = 3
#: At most this many runs are listed (those with the most shares short).
MAX_RUNS = 4
#: A re-plan that moves the expected filled shares by this share of the order is material:
#: the engine's own threshold for its ``replan_moved`` alert.
MATERIAL_MOVE = AlertConfig().replan_move_pct / 100.0
#: A total cost above expected + this many standard deviations is "far above expected".
FAR_ABOVE_STD = 2.0

Point = tuple[datetime, float]
FloatArray = npt.NDArray[np.float64]


@dataclass
class BinRow:
    """One bin of the order's window (times in the venue's zone)."""

    index: int
    start: datetime
    end: datetime
    target: int | None = None
    cap_quantity: int | None = None
    target_version: int | None = None
    filled: int = 0
    fill_price: float | None = None
    volume: float | None = None
    vwap: float | None = None
    spread: float | None = None
    close: float | None = None
    high: float | None = None
    low: float | None = None
    forecast_volume: float | None = None
    forecast_spread: float | None = None
    cap_bound: bool = False
    limit_bound: bool = False
    halted: bool = False

    @property
    def fill_rate(self) -> float | None:
        """Filled over target, when there was a target to fill."""
        if self.target is None or self.target <= 0:
            return None
        return self.filled / self.target

    @property
    def participation(self) -> float | None:
        """Filled over the bin's market volume."""
        if self.volume is None or self.volume <= 0:
            return None
        return self.filled / self.volume


@dataclass(frozen=True, eq=False)
class PlanLine:
    """One plan version on the day's bin edges (edge ``k`` is the start of bin ``k``).

    Attributes:
        version: The plan's version (1 = the plan made at the start).
        first_edge: The edge of ``values[0]``: the start of the plan's first bin.
        values: Shares expected done at edges ``first_edge, first_edge + 1, ...``.
    """

    version: int
    first_edge: int
    values: FloatArray

    def points(self, edges: Sequence[datetime]) -> list[Point]:
        """The line as (time, shares) points."""
        return [
            (edges[self.first_edge + k], float(v))
            for k, v in enumerate(self.values)
            if self.first_edge + k < len(edges)
        ]


@dataclass(frozen=True)
class CostPart:
    """One part of the cost: name, currency, bps of the arrival value, what it means."""

    name: str
    currency: float
    bps: float
    meaning: str


@dataclass
class Attribution:
    """The cost of the order against arrival, in parts that add up to the total."""

    parts: list[CostPart]
    total: float
    total_bps: float
    end_price: float
    executed: float
    unpriced_fills: int
    expected: float | None = None
    expected_bps: float | None = None
    expected_std: float | None = None
    expected_std_bps: float | None = None

    @property
    def far_above_expected(self) -> bool:
        """The total exceeds the expected cost by more than FAR_ABOVE_STD standard deviations."""
        if self.expected is None or self.expected_std is None:
            return False
        return self.total > self.expected + FAR_ABOVE_STD * self.expected_std


@dataclass(frozen=True)
class Finding:
    """One thing that happened, in words; ``problem`` marks what the desk should look at."""

    text: str
    problem: bool = False


@dataclass
class OrderReview:
    """Everything the report shows about one order."""

    order_id: str
    symbol: str
    side: str
    quantity: int
    filled: int
    state: str
    timezone: str
    arrival_price: float | None
    limit_price: float | None
    max_participation: float | None
    start: datetime | None
    end: datetime | None
    average_price: float | None
    shortfall_bps: float | None
    vwap_bps: float | None
    bins: list[BinRow] = field(default_factory=list)
    realized: list[Point] = field(default_factory=list)
    plans: list[PlanLine] = field(default_factory=list)
    edges: tuple[datetime, ...] = ()
    baseline: list[Point] = field(default_factory=list)
    market_curve: list[Point] = field(default_factory=list)
    market_curve_source: str = ""
    fills: list[Fill] = field(default_factory=list)
    fill_rows: list[int] = field(default_factory=list)
    alerts: list[dict[str, Any]] = field(default_factory=list)
    errors: list[dict[str, Any]] = field(default_factory=list)
    events: list[OrderEvent] = field(default_factory=list)
    attribution: Attribution | None = None
    findings: list[Finding] = field(default_factory=list)
    has_market: bool = False

    @property
    def residual(self) -> int:
        """Shares of the order not executed."""
        return max(self.quantity - self.filled, 0)

    @property
    def critical_alerts(self) -> list[dict[str, Any]]:
        """The raised alerts of severity critical."""
        return [
            a
            for a in self.alerts
            if a.get("severity") == "critical" and a.get("state") != "cleared"
        ]

    @property
    def problems(self) -> list[str]:
        """Short tags of what needs the desk's eye (empty: nothing)."""
        tags = []
        if self.residual > 0:
            tags.append("residual")
        if self.critical_alerts:
            tags.append("critical alert")
        if self.attribution is not None and self.attribution.far_above_expected:
            tags.append("cost far above expected")
        if self.errors:
            tags.append("errors")
        return tags


# ------------------------------------------------------------------------------ helpers


def _num(value: Any) -> float | None:
    if isinstance(value, bool) or not isinstance(value, int | float):
        return None
    return float(value) if math.isfinite(value) else None


def _int(value: Any) -> int | None:
    number = _num(value)
    return None if number is None else round(number)


def clock(ts: datetime) -> str:
    """``HH:MM`` of a local time."""
    return f"{ts:%H:%M}"


def _ranges(rows: Sequence[BinRow]) -> str:
    """Bins as clock ranges: ``10:00-10:15, 12:30-12:35``."""
    parts: list[str] = []
    start: BinRow | None = None
    last: BinRow | None = None
    for row in rows:
        if start is None or last is None or row.index != last.index + 1:
            if start is not None and last is not None:
                parts.append(f"{clock(start.start)}-{clock(last.end)}")
            start = row
        last = row
    if start is not None and last is not None:
        parts.append(f"{clock(start.start)}-{clock(last.end)}")
    return ", ".join(parts)


def _by_order(items: list[dict[str, Any]]) -> dict[str, list[dict[str, Any]]]:
    grouped: dict[str, list[dict[str, Any]]] = {}
    for item in items:
        order_id = item.get("order_id")
        if isinstance(order_id, str):
            grouped.setdefault(order_id, []).append(item)
    return grouped


# ------------------------------------------------------------------------------ the review


def review_day(day: ReviewDay) -> list[OrderReview]:
    """Every order of the day, problems first (most problems, then the largest residual)."""
    targets = _by_order(day.targets)
    status = _by_order(day.status)
    alerts = _by_order(day.alerts)
    errors = _by_order(day.errors)
    summary: dict[str, dict[str, Any]] = {
        str(o["order_id"]): o
        for o in day.summary.get("orders", [])
        if isinstance(o, dict) and isinstance(o.get("order_id"), str)
    }
    order_ids = sorted(set(status) | set(summary) | set(targets))
    reviews = [
        review_order(
            day,
            order_id,
            targets=targets.get(order_id, []),
            status=status.get(order_id, []),
            alerts=alerts.get(order_id, []),
            errors=errors.get(order_id, []),
            summary=summary.get(order_id, {}),
        )
        for order_id in order_ids
    ]
    reviews = [r for r in reviews if r is not None]
    reviews.sort(
        key=lambda r: (-len(r.problems), -(r.residual / r.quantity if r.quantity else 0.0))
    )
    return reviews


def review_order(
    day: ReviewDay,
    order_id: str,
    *,
    targets: list[dict[str, Any]],
    status: list[dict[str, Any]],
    alerts: list[dict[str, Any]],
    errors: list[dict[str, Any]],
    summary: dict[str, Any],
) -> OrderReview:
    """The review of one order (see the module docstring)."""
    last = status[-1] if status else {}
    first = next((s for s in status if s), {})
    symbol = str(summary.get("symbol") or last.get("symbol") or "?")
    side = str(summary.get("side") or last.get("side") or "buy")
    events = sorted(
        [*(day.events or {}).get(order_id, []), *(day.events or {}).get("*", [])],
        key=lambda e: e.ts,
    )
    new = next((e for e in events if e.action == "new"), None)
    session = day.session(symbol)
    quantity = _int(last.get("quantity")) or _int(summary.get("quantity")) or 0
    start = new.changes.get("start") if new else None
    end = new.changes.get("end") if new else None
    for event in events:
        if event.action == "amend" and isinstance(event.changes.get("end"), datetime):
            end = event.changes["end"]
    limit = _num(last.get("limit_price"))
    cap = None
    if new is not None:
        cap = _num(new.changes.get("max_participation"))
        for event in events:
            if event.action == "amend" and "max_participation" in event.changes:
                cap = _num(event.changes["max_participation"])
    review = OrderReview(
        order_id=order_id,
        symbol=symbol,
        side=side,
        quantity=quantity,
        filled=_int(last.get("filled")) or _int(summary.get("filled")) or 0,
        state=str(last.get("state") or summary.get("state") or "unknown"),
        timezone=session.timezone,
        arrival_price=_num(last.get("arrival_price")) or _num(summary.get("arrival_price")),
        limit_price=limit,
        max_participation=cap,
        start=session.local(start) if isinstance(start, datetime) else None,
        end=session.local(end) if isinstance(end, datetime) else None,
        average_price=_num(summary.get("average_price")) or _num(last.get("average_price")),
        shortfall_bps=_num(summary.get("shortfall_bps")),
        vwap_bps=_num(summary.get("vwap_bps")),
        alerts=alerts,
        errors=errors,
        events=[e for e in events if e.action != "new" or e is new],
        fills=sorted((day.fills or {}).get(order_id, []), key=lambda f: f.ts),
    )
    _bins(day, review, targets, status, first)
    _paths(day, review, status)
    review.attribution = _attribution(day, review, status)
    review.findings = _findings(day, review)
    return review


def _order_day_bins(
    day: ReviewDay, review: OrderReview, targets: list[dict[str, Any]], status: list[dict[str, Any]]
) -> list[tuple[int, datetime, datetime]]:
    """The (index, start, end) of the bins of the order's window, venue local time."""
    session = day.session(review.symbol)
    times = [parse_time(t.get("bin_start")) for t in targets] + [
        parse_time(t.get("bin_end")) for t in targets
    ]
    known = [t for t in times if t is not None]
    anchor = review.start or (min(known) if known else None)
    if anchor is None:
        stamps = [parse_time(s.get("ts")) for s in status]
        found = [s for s in stamps if s is not None]
        if not found:
            return []
        anchor = min(found)
    local_day = session.local(anchor).date()
    regular = session.bins(local_day)
    first_bin, last_bin = None, None
    if review.start is not None and review.end is not None:
        try:
            first_bin, end_bin, _ = session.bin_span(review.start, review.end)
            last_bin = end_bin - 1
        except InputError:  # a window the session refuses: fall back to the targets
            first_bin = None
    if first_bin is None or last_bin is None:
        indexes = [session.bin_index(t) for t in known]
        real = [i for i in indexes if i is not None]
        if not real:
            return []
        first_bin, last_bin = min(real), max(real)
    for fill in review.fills:  # a fill after the window (within the grace) still shows
        index = session.bin_index(fill.ts)
        if index is not None and session.local(fill.ts).date() == local_day:
            last_bin = max(last_bin, index)
            first_bin = min(first_bin, index)
    return [(i, regular[i][0], regular[i][1]) for i in range(first_bin, last_bin + 1)]


def _bins(
    day: ReviewDay,
    review: OrderReview,
    targets: list[dict[str, Any]],
    status: list[dict[str, Any]],
    first_status: dict[str, Any] | None,
) -> None:
    spans = _order_day_bins(day, review, targets, status)
    by_start: dict[datetime, dict[str, Any]] = {}
    for target in targets:
        start = parse_time(target.get("bin_start"))
        if start is not None:
            by_start[start] = target  # the last target of a bin is what the router had last
    market = (day.market or {}).get(review.symbol, {})
    forecasts = (day.forecasts or {}).get(review.symbol, {})
    review.has_market = bool(market)
    halts = _intervals(review.events, "halt", "resume")
    limits = _alert_intervals(review.alerts, "limit_blocking")
    rows: list[BinRow] = []
    previous_close: float | None = None
    for index, start, end in spans:
        row = BinRow(index=index, start=start, end=end)
        chosen = by_start.get(start.astimezone(UTC))
        if chosen is not None:
            target = chosen
            row.target = _int(target.get("quantity"))
            row.cap_quantity = _int(target.get("max_quantity"))
            row.target_version = _int(target.get("plan_version"))
            row.cap_bound = (
                row.cap_quantity is not None
                and row.target is not None
                and row.target > 0
                and row.target >= row.cap_quantity
            )
        bar: MarketBin | None = market.get(start)
        if bar is not None:
            row.volume, row.vwap, row.spread = bar.volume, bar.vwap, bar.spread
            row.close, row.high, row.low = bar.close, bar.high, bar.low
        guess = forecasts.get(start)
        if guess is not None:
            row.forecast_volume, row.forecast_spread = guess.volume, guess.spread
        row.halted = any(a <= start < b for a, b in halts)
        blocked_by_alert = any(a <= start < b for a, b in limits)
        blocked_by_price = (
            review.limit_price is not None
            and previous_close is not None
            and (
                previous_close > review.limit_price
                if review.side == "buy"
                else previous_close < review.limit_price
            )
        )
        row.limit_bound = blocked_by_alert or bool(blocked_by_price)
        if bar is not None:
            previous_close = bar.close
        rows.append(row)
    review.bins = rows
    if day.fills is not None:
        _fills_into(review)
    else:
        _status_fills_into(rows, status)


def _fills_into(review: OrderReview) -> None:
    """Each fill into the row of its bin (by its time); filled shares and price per row.

    ``review.fill_rows`` keeps each fill's row (-1: outside every row's bin). A fill before the
    first row or after the last counts in that row's filled shares.
    """
    rows = review.bins
    if not rows or not review.fills:
        review.fill_rows = [-1] * len(review.fills)
        return
    edges = np.array([rows[0].start.timestamp(), *(row.end.timestamp() for row in rows)])
    starts = np.array([row.start.timestamp() for row in rows])
    times = np.array([fill.ts.timestamp() for fill in review.fills])
    slots = np.searchsorted(edges, times, side="right") - 1
    inside = (slots >= 0) & (slots < len(rows))
    inside &= times >= starts[np.clip(slots, 0, len(rows) - 1)]  # rows may leave gaps
    review.fill_rows = np.where(inside, slots, -1).tolist()
    counted = np.clip(slots, 0, len(rows) - 1).tolist()
    notional = [0.0] * len(rows)
    for fill, offset in zip(review.fills, counted, strict=True):
        rows[offset].filled += fill.quantity
        notional[offset] += fill.quantity * fill.price
    for row, value in zip(rows, notional, strict=True):
        row.fill_price = value / row.filled if row.filled else None


def _status_fills_into(rows: list[BinRow], status: list[dict[str, Any]]) -> None:
    """Filled per bin from the status messages: the change of ``filled`` within each bin.

    ``filled`` at a moment is that of the last status before it; one sweep over the statuses
    (in time order, as the engine wrote them) and the bin edges.
    """
    stamps: list[tuple[float, int]] = []
    previous = 0
    for item in status:
        filled = _int(item.get("filled"))
        if filled is None or filled == previous:
            continue  # only the changes matter
        ts = parse_time(item.get("ts"))
        if ts is not None:
            stamps.append((ts.timestamp(), filled))
            previous = filled
    stamps.sort()
    position, current = 0, 0

    def filled_by(moment: float) -> int:
        nonlocal position, current
        while position < len(stamps) and stamps[position][0] < moment:
            current = stamps[position][1]
            position += 1
        return current

    edges = [filled_by(rows[0].start.timestamp())] if rows else []
    for row in rows:
        edges.append(filled_by(row.end.timestamp()))
    for row, before, after in zip(rows, edges, edges[1:], strict=False):
        row.filled = max(after - before, 0)
    if rows and stamps:  # fills after the last bin (within the grace) land in the last bin
        rows[-1].filled += max(stamps[-1][1] - edges[-1], 0)


def _intervals(events: list[OrderEvent], on: str, off: str) -> list[tuple[datetime, datetime]]:
    spans: list[tuple[datetime, datetime]] = []
    opened: datetime | None = None
    for event in events:
        if event.action == on and opened is None:
            opened = event.ts
        elif event.action == off and opened is not None:
            spans.append((opened, event.ts))
            opened = None
    if opened is not None:
        spans.append((opened, datetime.max.replace(tzinfo=UTC)))
    return spans


def _alert_intervals(alerts: list[dict[str, Any]], code: str) -> list[tuple[datetime, datetime]]:
    spans: list[tuple[datetime, datetime]] = []
    opened: datetime | None = None
    for alert in alerts:
        if alert.get("code") != code:
            continue
        ts = parse_time(alert.get("ts"))
        if ts is None:
            continue
        if alert.get("state", "raised") == "raised" and opened is None:
            opened = ts
        elif alert.get("state") == "cleared" and opened is not None:
            spans.append((opened, ts))
            opened = None
    if opened is not None:
        spans.append((opened, datetime.max.replace(tzinfo=UTC)))
    return spans


def _paths(day: ReviewDay, review: OrderReview, status: list[dict[str, Any]]) -> None:
    """Cumulative shares over the day: plans, realized, and the market's volume curve."""
    rows = review.bins
    if not rows:
        return
    session = day.session(review.symbol)
    regular = session.bins(rows[0].start.date())
    done = 0
    review.realized = [(rows[0].start, 0.0)]
    for row in rows:
        done += row.filled
        review.realized.append((row.end, float(done)))
    review.edges = (*(start for start, _ in regular), regular[-1][1])
    for path in (day.plans or {}).get(review.order_id, []):
        room = len(regular) - path.first_bin  # bins of the day from the plan's first
        if path.first_bin < 0 or room <= 0 or len(path.cumulative) == 0:
            continue
        values = np.empty(min(len(path.cumulative), room) + 1)
        values[0] = 0.0
        values[1:] = path.cumulative[: values.size - 1]
        review.plans.append(PlanLine(path.version, path.first_bin, values + path.filled_at))
    last_planned: int | None = None
    for item in status:
        planned = _int(item.get("planned_filled"))
        if planned is None or planned == last_planned or not item.get("plan_version"):
            continue  # one point per change of the baseline's expected filled shares
        ts = parse_time(item.get("ts"))
        if ts is not None:
            review.baseline.append((session.local(ts), float(planned)))
            last_planned = planned
    volumes = [row.volume for row in rows]
    if all(v is not None for v in volumes):
        review.market_curve_source = "market volume (recorded bins)"
        curve = [float(v or 0.0) for v in volumes]
    else:
        profile = day.profile(review.symbol)
        review.market_curve_source = "market volume (the profile's curve: the input holds no bins)"
        curve = [float(profile.expected_volume[row.index]) for row in rows]
    total = sum(curve)
    seen = 0.0
    review.market_curve = [(rows[0].start, 0.0)]
    for row, value in zip(rows, curve, strict=True):
        seen += value
        review.market_curve.append((row.end, seen / total if total > 0 else 0.0))


def _attribution(
    day: ReviewDay, review: OrderReview, status: list[dict[str, Any]]
) -> Attribution | None:
    """The cost parts of the module docstring, or ``None`` without fills, bins or arrival."""
    if day.fills is None or not review.has_market or not review.arrival_price:
        return None
    p0 = review.arrival_price
    sign = 1.0 if review.side == "buy" else -1.0
    market = (day.market or {}).get(review.symbol, {})
    rows = review.bins
    spread = impact = timing = 0.0
    unpriced = 0
    for fill, slot in zip(review.fills, review.fill_rows, strict=True):
        row = rows[slot] if slot >= 0 else None
        if row is None or row.vwap is None or row.spread is None:
            unpriced += 1
            timing += sign * fill.quantity * (fill.price - p0)
            continue
        half = fill.quantity * row.spread / 2.0
        spread += half
        impact += sign * fill.quantity * (fill.price - row.vwap) - half
        timing += sign * fill.quantity * (row.vwap - p0)
    finish = _finish_time(review, status)
    end_price = p0
    for bar in sorted(market.values(), key=lambda b: b.end):
        if finish is not None and bar.end > finish:
            break
        end_price = bar.close
    filled = sum(f.quantity for f in review.fills)
    left = max(review.quantity - filled, 0)
    opportunity = sign * left * (end_price - p0)
    notional = review.quantity * p0
    scale = 1e4 / notional if notional > 0 else 0.0
    words = {
        "spread": "half the quoted spread of each fill's bin",
        "impact": "fills against the bin VWAP beyond the half spread (negative: better)",
        "timing": "drift of the price from arrival to the bins the order traded in",
        "opportunity": f"{left:,} shares not executed, valued at the end price {end_price:,.4f}",
    }
    values = {"spread": spread, "impact": impact, "timing": timing, "opportunity": opportunity}
    parts = [CostPart(name, value, value * scale, words[name]) for name, value in values.items()]
    total = sum(values.values())
    attribution = Attribution(
        parts=parts,
        total=total,
        total_bps=total * scale,
        end_price=end_price,
        executed=spread + impact + timing,
        unpriced_fills=unpriced,
    )
    _expected_at_start(day, review, status, attribution, scale)
    return attribution


def _finish_time(review: OrderReview, status: list[dict[str, Any]]) -> datetime | None:
    """When the order stopped working: its final status, else its end."""
    for item in reversed(status):
        if item.get("state") in ("done", "cancelled", "expired"):
            ts = parse_time(item.get("ts"))
            if ts is not None:
                return ts
    return review.end


def _expected_at_start(
    day: ReviewDay,
    review: OrderReview,
    status: list[dict[str, Any]],
    attribution: Attribution,
    scale: float,
) -> None:
    """The first plan's expected cost (as its status said) and its standard deviation."""
    first = next(
        (s for s in status if _num(s.get("expected_cost")) is not None and s.get("plan_version")),
        None,
    )
    if first is None:
        return
    attribution.expected = _num(first.get("expected_cost"))
    attribution.expected_bps = (
        None if attribution.expected is None else attribution.expected * scale
    )
    plans = (day.plans or {}).get(review.order_id, [])
    version = _int(first.get("plan_version"))
    plan = next((p for p in plans if p.version == version), None)
    quantity = _int(first.get("remaining"))
    if plan is None or quantity is None or not review.arrival_price:
        return
    session = day.session(review.symbol)
    profile = day.profile(review.symbol)
    forecasts = (day.forecasts or {}).get(review.symbol, {})
    regular = session.bins(review.bins[0].start.date()) if review.bins else []
    variance = 0.0
    for offset, done in enumerate(plan.cumulative):
        index = plan.first_bin + offset
        if not 0 <= index < len(regular):
            continue
        guess = forecasts.get(regular[index][0])
        sigma = guess.volatility if guess is not None else float(profile.volatility[index])
        left = quantity - done
        variance += (sigma * review.arrival_price * left) ** 2
    attribution.expected_std = math.sqrt(variance)
    attribution.expected_std_bps = attribution.expected_std * scale


# ------------------------------------------------------------------------------ findings


def _findings(day: ReviewDay, review: OrderReview) -> list[Finding]:
    found: list[Finding] = []
    found += _fill_rate_findings(review)
    capped = [r for r in review.bins if r.cap_bound]
    if capped:
        cap = review.max_participation
        found.append(
            Finding(
                f"The participation cap{'' if cap is None else f' ({100 * cap:.0f} %)'} bound "
                f"the target in {len(capped)} bins: {_ranges(capped)}."
            )
        )
    cap = review.max_participation
    above = [r for r in review.bins if cap is not None and (r.participation or 0.0) > cap + 1e-9]
    if above and cap is not None:
        found.append(
            Finding(
                f"In {len(above)} bins the fills were more than {100 * cap:.0f} % of the bin's "
                f"real volume (the cap applies to the forecast volume): {_ranges(above)}."
            )
        )
    blocked = [r for r in review.bins if r.limit_bound]
    if blocked:
        found.append(
            Finding(
                f"The limit price {review.limit_price or 0:,.4f} blocked trading in "
                f"{len(blocked)} bins: {_ranges(blocked)}."
            )
        )
    found += _replan_findings(review)
    found += _event_findings(day, review)
    found += _residual_findings(review)
    if review.critical_alerts:
        codes = sorted({str(a.get("code")) for a in review.critical_alerts})
        found.append(
            Finding(f"Critical alerts: {', '.join(codes)} (see the alert timeline).", problem=True)
        )
    if review.errors:
        found.append(
            Finding(
                f"{len(review.errors)} inbound message{'s' if len(review.errors) > 1 else ''} "
                "naming this order rejected (see the errors).",
                problem=True,
            )
        )
    a = review.attribution
    if a is not None and a.far_above_expected and a.expected is not None:
        found.append(
            Finding(
                f"The cost, {a.total_bps:,.1f} bps, is far above the plan's expected "
                f"{a.expected_bps or 0:,.1f} bps (more than {FAR_ABOVE_STD:g} standard "
                f"deviations of {a.expected_std_bps or 0:,.1f} bps).",
                problem=True,
            )
        )
    if not found:
        found.append(Finding("Nothing to report: the order followed its targets."))
    return found


def _fill_rate_findings(review: OrderReview) -> list[Finding]:
    worked = [r for r in review.bins if r.fill_rate is not None and not r.halted]
    if not worked:
        return []
    under = [r for r in worked if (r.fill_rate or 0.0) < FILL_RATE_THRESHOLD]
    if not under:
        return []
    found: list[Finding] = []
    target = sum(r.target or 0 for r in worked)
    filled = sum(r.filled for r in worked)
    found.append(
        Finding(
            f"The router filled {100 * filled / target:.1f} % of the targets over the day "
            f"({filled:,} of {target:,} shares); {len(under)} of {len(worked)} bins were below "
            f"{100 * FILL_RATE_THRESHOLD:.0f} %.",
            problem=filled < FILL_RATE_THRESHOLD * target,
        )
    )
    runs: list[list[BinRow]] = []
    for position, row in enumerate(worked):
        low = (row.fill_rate or 0.0) < FILL_RATE_THRESHOLD
        if low and runs and position > 0 and runs[-1][-1] is worked[position - 1]:
            runs[-1].append(row)
        elif low:
            runs.append([row])
    long_runs = [run for run in runs if len(run) >= RUN_BINS]
    worst = sorted(long_runs, key=lambda run: -sum((r.target or 0) - r.filled for r in run))[
        :MAX_RUNS
    ]
    for run in sorted(worst, key=lambda run: run[0].start):
        run_target = sum(r.target or 0 for r in run)
        run_filled = sum(r.filled for r in run)
        found.append(
            Finding(
                f"From {clock(run[0].start)} to {clock(run[-1].end)} the router filled "
                f"{100 * run_filled / run_target:.1f} % of the targets ({len(run)} bins, "
                f"{run_target - run_filled:,} shares short).",
                problem=True,
            )
        )
    return found


def _replan_findings(review: OrderReview) -> list[Finding]:
    found: list[Finding] = []
    moved = [
        a for a in review.alerts if a.get("code") == "replan_moved" and a.get("state") != "cleared"
    ]
    for alert in moved:
        ts = parse_time(alert.get("ts"))
        when = clock(ts.astimezone(review.bins[0].start.tzinfo)) if ts and review.bins else "?"
        found.append(Finding(f"{when}: {alert.get('message', 'a re-plan moved materially')}"))
    if moved or len(review.plans) < 2 or review.quantity <= 0:
        return found
    biggest: list[tuple[float, int, datetime, datetime]] = []
    edges = review.edges
    for old, new in zip(review.plans, review.plans[1:], strict=False):
        # Compare the edges both cover, after the new plan's start (which is what was filled).
        start = max(old.first_edge, new.first_edge + 1)
        stop = min(old.first_edge + old.values.size, new.first_edge + new.values.size)
        if stop <= start:
            continue
        difference = (
            new.values[start - new.first_edge : stop - new.first_edge]
            - old.values[start - old.first_edge : stop - old.first_edge]
        )
        where = int(np.argmax(np.abs(difference)))
        shift = float(difference[where])
        if abs(shift) >= MATERIAL_MOVE * review.quantity:
            biggest.append((shift, new.version, edges[new.first_edge], edges[start + where]))
    biggest.sort(key=lambda item: -abs(item[0]))
    for shift, version, made, at in biggest[:3]:
        found.append(
            Finding(
                f"Re-plan {version} (from {clock(made)}) moved the shares expected done by "
                f"{clock(at)} by {shift:+,.0f} ({100 * abs(shift) / review.quantity:.1f} % of "
                "the order)."
            )
        )
    return found


def _event_findings(day: ReviewDay, review: OrderReview) -> list[Finding]:
    found: list[Finding] = []
    tz = review.bins[0].start.tzinfo if review.bins else UTC
    current: dict[str, Any] = {}
    for event in review.events:
        when = clock(event.ts.astimezone(tz))
        if event.action == "new":
            current.update(event.changes)
        elif event.action == "amend":
            changes = ", ".join(
                f"{name} {_show(current.get(name), tz)} to {_show(value, tz)}"
                for name, value in event.changes.items()
            )
            current.update(event.changes)
            found.append(Finding(f"{when}: amended ({changes or 'no change'}); re-planned."))
        elif event.action == "cancel":
            found.append(Finding(f"{when}: cancelled by the desk."))
        elif event.action == "halt":
            found.append(Finding(f"{when}: halted (targets zero until resumed)."))
        elif event.action == "resume":
            found.append(Finding(f"{when}: resumed."))
    if day.events is None:  # an output folder: the alerts tell some of it
        for alert in review.alerts:
            if alert.get("code") in ("order_halted", "order_resumed"):
                ts = parse_time(alert.get("ts"))
                when = clock(ts.astimezone(tz)) if ts else "?"
                found.append(Finding(f"{when}: {alert.get('message', alert.get('code'))}"))
        if review.state == "cancelled":
            found.append(Finding("Cancelled by the desk (the time is in the status history)."))
    return found


def _show(value: Any, tz: Any) -> str:
    if isinstance(value, datetime):
        return clock(value.astimezone(tz))
    if isinstance(value, float):
        return f"{value:,.4f}".rstrip("0").rstrip(".")
    if isinstance(value, int):
        return f"{value:,}"
    return str(value)


def _residual_findings(review: OrderReview) -> list[Finding]:
    left = review.residual
    if left <= 0:
        return [Finding(f"Done: {review.filled:,} of {review.quantity:,} shares.")]
    causes: list[str] = []
    if review.state == "cancelled":
        causes.append("the desk cancelled the order")
    if any(a.get("code") == "completion_infeasible" for a in review.alerts):
        causes.append("the participation cap could not complete it (completion infeasible)")
    blocked = [r for r in review.bins if r.limit_bound]
    if blocked:
        causes.append(f"the limit blocked {len(blocked)} bins")
    short: int = sum(max((r.target or 0) - r.filled, 0) for r in review.bins if not r.halted)
    if short >= 0.5 * left:
        causes.append(f"the router filled {short:,} shares fewer than the targets")
    if review.bins and review.bins[-1].halted:
        causes.append("the order was halted at the end")
    if not causes:
        causes.append("the cause is not in the data")
    return [
        Finding(
            f"Residual: {left:,} of {review.quantity:,} shares ({100 * left / review.quantity:.1f} "
            f"%) not executed, state {review.state}; cause: {'; '.join(causes)}.",
            problem=True,
        )
    ]


def fill_rate_after(rows: Sequence[BinRow], moment: datetime) -> float | None:
    """Filled over target for the worked bins starting at or after ``moment``."""
    chosen = [r for r in rows if r.start >= moment and r.fill_rate is not None and not r.halted]
    target = sum(r.target or 0 for r in chosen)
    return sum(r.filled for r in chosen) / target if target else None


__all__ = [
    "Attribution",
    "BinRow",
    "CostPart",
    "Finding",
    "OrderReview",
    "PlanPath",
    "fill_rate_after",
    "review_day",
    "review_order",
]

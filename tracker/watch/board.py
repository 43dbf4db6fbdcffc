"""Everything the view knows, built only from what the daemon publishes on the bus.

Theory of operation
-------------------
:class:`Board` takes one MQTT message at a time (:meth:`Board.take`: topic, payload, whether the
broker sent it as retained, and the view's monotonic clock) and keeps, per order, the latest status,
the latest target, the open alerts, a short history for the detail chart, and per daemon instance
its health. It never reads a clock or a file itself, so tests feed it messages and times directly.

Sources, all under ``{root}/`` (wire contract v1, see ``tracker/edge/wire.py``):

* ``status/{order_id}`` (retained): state, filled, deviation from plan, costs. The first thing a
  fresh view gets: the broker sends every order's last status on subscription.
* ``targets/{order_id}``: this bin's shares. ``cumulative_target - quantity`` is what the order had
  filled when the target was made, so ``filled - (cumulative_target - quantity)`` is how much of
  this bin's target is filled so far.
* ``alerts/{order_id}`` and ``alerts`` (symbol-wide): raised and cleared alerts.
* ``health/{instance}`` (retained; ``offline`` as the last will): which daemons are up.
* ``bins/{symbol}`` (what the daemon reads; we only look): the bin length, whether market data
  still arrives, and the bin's volume: an order's participation is what it filled between two
  bin closes (from two targets) over the volume of the bin between them.
* ``fills/{order_id}``: the last fills of the order whose detail is open.
* ``orders/{order_id}``: the participation cap (``max_participation``) when the view sees the order
  message; a later daemon that states the cap on its targets or status is read the same way.
* ``errors``: rejections, so that a control message the daemon refused shows why.

Every payload is read with :mod:`tracker.watch.reading`: unknown fields are ignored, a missing or
malformed field is blank, and a payload that is not a JSON object is counted and skipped.
"""

from __future__ import annotations

import collections
from collections.abc import Iterable
from dataclasses import dataclass, field
from datetime import datetime, timedelta
from typing import Any

from tracker.watch.reading import as_float, as_int, as_text, as_time, json_object

__all__ = [
    "DEFAULT_BIN_SECONDS",
    "FINISHED",
    "AlertEntry",
    "Banner",
    "Board",
    "Instance",
    "OrderView",
    "StatusPoint",
    "TargetPoint",
]

#: Bin length assumed until a bin or target on the bus shows the real one (common practice: 5 min).
DEFAULT_BIN_SECONDS = 300.0
#: Order states after which nothing more is traded.
FINISHED = frozenset({"done", "cancelled", "expired"})
#: History kept per order for the detail chart (status changes and targets).
HISTORY = 2_000
TARGET_HISTORY = 400
FILL_HISTORY = 200
#: Alerts kept in the feed.
ALERT_FEED = 500
#: Bin volumes kept per symbol (to match a target's bin close with the bin that closed).
VOLUMES_KEPT = 8
#: A daemon whose heartbeat is this many intervals late is shown as silent.
SILENT_INTERVALS = 3.0


@dataclass(frozen=True, slots=True)
class StatusPoint:
    """One status of an order: when (daemon time), filled and the baseline plan's filled."""

    ts: datetime
    filled: int
    planned: int | None


@dataclass(frozen=True, slots=True)
class TargetPoint:
    """One target: the bin, its shares, the cumulative shares aimed at by the bin's end."""

    ts: datetime | None
    bin_start: datetime | None
    bin_end: datetime | None
    quantity: int | None
    cumulative: int | None
    plan_version: int | None
    max_quantity: int | None


@dataclass(frozen=True, slots=True)
class AlertEntry:
    """One alert message as the feed shows it.

    Attributes:
        seen: The view's monotonic clock when it arrived.
        ts: Its time (daemon time, UTC), or ``None`` when absent.
        state: ``raised`` or ``cleared`` (absent: ``raised``, as the contract's default).
    """

    seen: float
    ts: datetime | None
    order_id: str | None
    symbol: str | None
    code: str
    severity: str
    state: str
    message: str

    @property
    def critical(self) -> bool:
        """A raised critical alert."""
        return self.severity == "critical" and self.state == "raised"


@dataclass(slots=True)
class OrderView:
    """What the view knows of one order; every field but the id may be unknown (``None``)."""

    order_id: str
    symbol: str | None = None
    side: str | None = None
    state: str | None = None
    quantity: int | None = None
    filled: int | None = None
    remaining: int | None = None
    planned_filled: int | None = None
    deviation_shares: int | None = None
    deviation_pct: float | None = None
    deviation_bins: float | None = None
    average_price: float | None = None
    arrival_price: float | None = None
    expected_cost: float | None = None
    expected_cost_bps: float | None = None
    plan_version: int | None = None
    ts: datetime | None = None
    max_participation: float | None = None
    participation: float | None = None
    target_rate: float | None = None
    target_reason: str | None = None
    target: TargetPoint | None = None
    last_alert: AlertEntry | None = None
    open_alerts: dict[str, str] = field(default_factory=dict)
    acknowledged: set[str] = field(default_factory=set)
    status: dict[str, Any] | None = None
    history: collections.deque[StatusPoint] = field(
        default_factory=lambda: collections.deque(maxlen=HISTORY)
    )
    targets: collections.deque[TargetPoint] = field(
        default_factory=lambda: collections.deque(maxlen=TARGET_HISTORY)
    )
    fills: collections.deque[tuple[datetime | None, int, float | None]] = field(
        default_factory=lambda: collections.deque(maxlen=FILL_HISTORY)
    )

    @property
    def finished(self) -> bool:
        """Done, cancelled or expired."""
        return self.state in FINISHED

    @property
    def bin_filled(self) -> int | None:
        """Shares of this bin's target filled so far (``None`` without a target and a status)."""
        target = self.target
        if target is None or self.filled is None:
            return None
        if target.cumulative is None or target.quantity is None:
            return None
        return max(0, self.filled - (target.cumulative - target.quantity))

    @property
    def realized_bps(self) -> float | None:
        """Cost so far: average price against the arrival price, in bps, positive when it costs.

        A buy costs when it paid above arrival, a sell when it sold below (common practice:
        implementation shortfall of the executed part).
        """
        if self.average_price is None or not self.arrival_price or self.side not in ("buy", "sell"):
            return None
        sign = 1.0 if self.side == "buy" else -1.0
        return sign * (self.average_price - self.arrival_price) / self.arrival_price * 1e4

    def critical_open(self) -> list[str]:
        """Codes of raised critical alerts not acknowledged in this view."""
        return [
            code
            for code, severity in self.open_alerts.items()
            if severity == "critical" and code not in self.acknowledged
        ]


@dataclass(slots=True)
class Instance:
    """One daemon instance as its retained health messages describe it.

    Attributes:
        online: The last health message said ``online``.
        heartbeat: The time the daemon wrote in its last ``online`` message (``None``: not given).
        seen: The view's monotonic clock at its last health message.
        interval: Seconds between its last two heartbeats, as we saw them.
    """

    name: str
    online: bool
    heartbeat: datetime | None
    seen: float
    interval: float | None = None
    document: dict[str, Any] | None = None


@dataclass(frozen=True, slots=True)
class Banner:
    """A condition shown across the top of the screen: ``kind`` and the sentence to show."""

    kind: str
    text: str


class Board:
    """The view's state (see the module docstring).

    Args:
        root: The topic root.
        stale_after: Seconds without a status or bin before the "no data" banner; ``None``: two
            bins (the bin length as seen on the bus).
        started: The view's monotonic clock at start (staleness counts from here until data
            arrives).
    """

    def __init__(self, root: str, *, stale_after: float | None = None, started: float = 0.0):
        self.root = root
        self._prefix = f"{root}/"
        self.stale_after = stale_after
        self.orders: dict[str, OrderView] = {}
        self.alerts: collections.deque[AlertEntry] = collections.deque(maxlen=ALERT_FEED)
        self.symbol_alerts: dict[str, dict[str, str]] = {}
        self.instances: dict[str, Instance] = {}
        self.errors: collections.deque[tuple[int, dict[str, Any]]] = collections.deque(maxlen=100)
        self.error_count = 0  # errors seen so far (the deque keeps the last 100)
        self.bin_seconds: float | None = None
        self.last_data = started
        self.messages = 0
        self.unreadable = 0
        self.version = 0  # bumped by every message that changed something
        self._daemon_ts: datetime | None = None
        self._daemon_seen = started
        self._volumes: dict[str, dict[datetime, int]] = {}  # symbol -> bin end -> volume

    # -- intake ----------------------------------------------------------------------------------

    def take(self, topic: str, payload: bytes | str, *, retained: bool, now: float) -> None:
        """Apply one message (see the module docstring); anything unreadable is counted, skipped.

        Args:
            topic: The MQTT topic.
            payload: The raw payload.
            retained: The broker sent it as a retained message (a stored last value).
            now: The view's monotonic clock, in seconds.
        """
        self.messages += 1
        if not topic.startswith(self._prefix):
            return
        kind, _, rest = topic[len(self._prefix) :].partition("/")
        if kind == "health" and rest:
            self._health(rest, payload, now)
            self.version += 1
            return
        data = json_object(payload)
        if data is None:
            self.unreadable += 1
            return
        if kind == "status" and rest:
            self._status(rest, data, retained, now)
        elif kind == "targets" and rest:
            self._target(rest, data, now)
        elif kind == "alerts":
            # {root}/alerts/ORDER names an order; symbol and engine alerts sit two levels down.
            self._alert(rest if rest and "/" not in rest else None, data, now)
        elif kind == "bins" and rest:
            self._bin(rest, data, retained, now)
        elif kind == "fills" and rest:
            self._fill(rest, data)
        elif kind == "orders" and rest:
            self._order(rest, data)
        elif kind == "errors" and not rest:
            self.error_count += 1
            self.errors.append((self.error_count, data))
        else:
            return
        self.version += 1

    def _order_view(self, order_id: str) -> OrderView:
        view = self.orders.get(order_id)
        if view is None:
            view = self.orders[order_id] = OrderView(order_id)
        return view

    def _daemon_time(self, ts: datetime | None, now: float) -> None:
        if ts is not None and (self._daemon_ts is None or ts >= self._daemon_ts):
            self._daemon_ts = ts
            self._daemon_seen = now

    def _status(self, order_id: str, data: dict[str, Any], retained: bool, now: float) -> None:
        view = self._order_view(order_id)
        before = view.state
        view.status = data
        view.symbol = as_text(data, "symbol") or view.symbol
        view.side = as_text(data, "side") or view.side
        view.state = as_text(data, "state")
        view.quantity = as_int(data, "quantity")
        view.filled = as_int(data, "filled")
        view.remaining = as_int(data, "remaining")
        view.planned_filled = as_int(data, "planned_filled")
        view.deviation_shares = as_int(data, "deviation_shares")
        view.deviation_pct = as_float(data, "deviation_pct")
        view.deviation_bins = as_float(data, "deviation_bins")
        view.average_price = as_float(data, "average_price")
        view.arrival_price = as_float(data, "arrival_price")
        view.expected_cost = as_float(data, "expected_cost")
        view.expected_cost_bps = as_float(data, "expected_cost_bps")
        view.plan_version = as_int(data, "plan_version")
        cap = as_float(data, "max_participation")
        view.max_participation = cap if cap is not None else view.max_participation
        view.ts = as_time(data, "ts")
        if view.ts is not None and view.filled is not None:
            last = view.history[-1] if view.history else None
            if last is None or (last.filled, last.planned) != (view.filled, view.planned_filled):
                view.history.append(StatusPoint(view.ts, view.filled, view.planned_filled))
        if view.state in FINISHED and before not in FINISHED:
            # The daemon drops an ended order's raised conditions without clearing them.
            view.open_alerts.clear()
        if not retained:
            self.last_data = now
            self._daemon_time(view.ts, now)

    def _target(self, order_id: str, data: dict[str, Any], now: float) -> None:
        view = self._order_view(order_id)
        view.symbol = as_text(data, "symbol") or view.symbol
        view.side = as_text(data, "side") or view.side
        point = TargetPoint(
            ts=as_time(data, "ts"),
            bin_start=as_time(data, "bin_start"),
            bin_end=as_time(data, "bin_end"),
            quantity=as_int(data, "quantity"),
            cumulative=as_int(data, "cumulative_target"),
            plan_version=as_int(data, "plan_version"),
            max_quantity=as_int(data, "max_quantity"),
        )
        previous = view.target
        view.target = point
        view.targets.append(point)
        cap = as_float(data, "max_participation")
        view.max_participation = cap if cap is not None else view.max_participation
        # A target's own "participation" is the rate it plans for the bin, not what was done.
        if view.status is None:  # a daemon that states the order's state on its targets
            view.state = as_text(data, "state") or view.state
        view.target_rate = as_float(data, "participation")
        view.target_reason = as_text(data, "reason")
        if previous is not None:
            self._participation(view, previous, point)
        if point.bin_start is not None and point.bin_end is not None:
            self._bin_length(point.bin_start, point.bin_end)
        self._daemon_time(point.ts, now)

    def _alert(self, order_id: str | None, data: dict[str, Any], now: float) -> None:
        order_id = as_text(data, "order_id") or order_id
        entry = AlertEntry(
            seen=now,
            ts=as_time(data, "ts"),
            order_id=order_id,
            symbol=as_text(data, "symbol"),
            code=as_text(data, "code") or "(no code)",
            severity=as_text(data, "severity") or "",
            state=as_text(data, "state") or "raised",
            message=as_text(data, "message") or "",
        )
        self.alerts.append(entry)
        self._daemon_time(entry.ts, now)
        if order_id is not None:
            view = self._order_view(order_id)
            view.symbol = view.symbol or entry.symbol
            view.last_alert = entry
            book = view.open_alerts
        elif entry.symbol is not None:
            book = self.symbol_alerts.setdefault(entry.symbol, {})
        else:
            return
        if entry.state == "cleared":
            book.pop(entry.code, None)
            if order_id is not None:
                self.orders[order_id].acknowledged.discard(entry.code)
        else:
            book[entry.code] = entry.severity

    def _health(self, name: str, payload: bytes | str, now: float) -> None:
        data = json_object(payload)
        text = payload.decode("utf-8", "replace") if isinstance(payload, bytes) else payload
        if data is None:
            status = text.strip().strip('"').lower()
        else:
            status = (as_text(data, "status") or "").lower()
        online = status == "online"
        previous = self.instances.get(name)
        heartbeat = previous.heartbeat if previous is not None else None
        interval = previous.interval if previous is not None else None
        if online:
            if previous is not None and previous.online and previous.seen < now:
                interval = now - previous.seen
            heartbeat = as_time(data, "ts") if data is not None else None
        self.instances[name] = Instance(
            name=name,
            online=online,
            heartbeat=heartbeat,
            seen=now,
            interval=interval,
            document=data,
        )

    def _bin(self, symbol: str, data: dict[str, Any], retained: bool, now: float) -> None:
        start, end = as_time(data, "start"), as_time(data, "end")
        if start is not None and end is not None:
            self._bin_length(start, end)
        if not retained:
            self.last_data = now
        volume = as_int(data, "volume")
        if end is not None and volume is not None:
            volumes = self._volumes.setdefault(symbol, {})
            volumes[end] = volume
            while len(volumes) > VOLUMES_KEPT:
                del volumes[min(volumes)]

    def _participation(self, view: OrderView, previous: TargetPoint, point: TargetPoint) -> None:
        """The order's share of the bin that just closed, from two targets and the bin's volume.

        A target's ``cumulative_target - quantity`` is what the order had filled when the daemon
        made it, at a bin close; the difference between two consecutive closes is what it filled
        in the bin between them. Judged on the daemon's own outputs, so it does not depend on
        whether the view saw the market's bin before or after the daemon's fills.
        """
        if view.symbol is None or point.bin_start is None or point.bin_start == previous.bin_start:
            return
        values = (point.cumulative, point.quantity, previous.cumulative, previous.quantity)
        if any(value is None for value in values):
            return
        volume = self._volumes.get(view.symbol, {}).get(point.bin_start)
        if not volume or volume <= 0:
            return
        now_filled = point.cumulative - point.quantity  # type: ignore[operator]
        then_filled = previous.cumulative - previous.quantity  # type: ignore[operator]
        view.participation = max(0, now_filled - then_filled) / volume

    def _fill(self, order_id: str, data: dict[str, Any]) -> None:
        view = self.orders.get(order_id)
        if view is None:
            return  # a fill the daemon may reject; its status tells the rest
        quantity = as_int(data, "quantity")
        if quantity is not None:
            view.fills.append((as_time(data, "ts"), quantity, as_float(data, "price")))

    def _order(self, order_id: str, data: dict[str, Any]) -> None:
        view = self._order_view(order_id)
        view.symbol = as_text(data, "symbol") or view.symbol
        view.side = as_text(data, "side") or view.side
        cap = as_float(data, "max_participation")
        if cap is not None:
            view.max_participation = cap

    def _bin_length(self, start: datetime, end: datetime) -> None:
        seconds = (end - start).total_seconds()
        if seconds > 0:
            self.bin_seconds = seconds

    # -- questions -------------------------------------------------------------------------------

    def acknowledge(self, order_id: str) -> int:
        """Mark the order's raised critical alerts as seen in this view; return how many.

        Nothing is sent: it only lets the order leave the top of the list.
        """
        view = self.orders.get(order_id)
        if view is None:
            return 0
        codes = view.critical_open()
        view.acknowledged.update(codes)
        self.version += 1
        return len(codes)

    def symbol_critical(self, symbol: str | None) -> list[str]:
        """Raised critical alerts about a whole symbol (market data stale, ...)."""
        if symbol is None:
            return []
        book = self.symbol_alerts.get(symbol, {})
        return [code for code, severity in book.items() if severity == "critical"]

    def daemon_clock(self, now: float, wall: datetime) -> datetime:
        """The daemon's clock as the bus shows it: its latest time plus the time since we saw it.

        A daemon on the wall clock gives about ``wall``; one on a simulated clock (the demo, the
        tests) gives its own time, which is what a control message's ``ts`` must be near.
        """
        if self._daemon_ts is None:
            return wall
        return self._daemon_ts + timedelta(seconds=max(0.0, now - self._daemon_seen))

    def stale_limit(self) -> float:
        """Seconds without a status or bin before the data counts as stopped."""
        if self.stale_after is not None:
            return self.stale_after
        return 2.0 * (self.bin_seconds or DEFAULT_BIN_SECONDS)

    def banners(self, now: float) -> list[Banner]:
        """The conditions that deserve the top line: daemons offline or silent, data stopped."""
        found: list[Banner] = []
        for name in sorted(self.instances):
            instance = self.instances[name]
            if not instance.online:
                found.append(
                    Banner(
                        "offline",
                        f"daemon {name} is OFFLINE: what it published last stays below; it "
                        "re-plans nothing until it is back",
                    )
                )
            elif (
                instance.interval is not None
                and now - instance.seen > SILENT_INTERVALS * instance.interval + 5.0
            ):
                late = now - instance.seen
                found.append(Banner("silent", f"daemon {name} sent no heartbeat for {late:.0f} s"))
            if instance.online and instance.document is not None:
                found.extend(_source_banners(name, instance.document))
        working = any(view.state == "working" for view in self.orders.values())
        quiet = now - self.last_data
        limit = self.stale_limit()
        if working and quiet > limit:
            found.append(
                Banner(
                    "stale",
                    f"NO DATA: no status or market bin for {_duration(quiet)} "
                    f"(limit {_duration(limit)}); orders below may be out of date",
                )
            )
        return found

    def statuses(self) -> list[dict[str, Any]]:
        """The latest status object of every order, exactly as received, by order id."""
        return [
            self.orders[key].status  # type: ignore[misc]
            for key in sorted(self.orders)
            if self.orders[key].status is not None
        ]

    def symbols(self) -> list[str]:
        """Every symbol seen on an order."""
        return sorted({view.symbol for view in self.orders.values() if view.symbol})

    def known(self, order_ids: Iterable[str]) -> list[str]:
        """The ids among ``order_ids`` that the board has an order for."""
        return [order_id for order_id in order_ids if order_id in self.orders]


def _source_banners(name: str, health: dict[str, Any]) -> list[Banner]:
    """What a daemon's health says of its senders: messages that never arrived (``gaps``: per
    source, the missing ``[first, last]`` seq ranges) and sources gone quiet (``silent``)."""
    found: list[Banner] = []
    gaps = health.get("gaps")
    if isinstance(gaps, dict):
        for source in sorted(gaps):
            ranges = [
                (r[0], r[1])
                for r in gaps[source]
                if isinstance(r, list) and len(r) == 2 and all(isinstance(x, int) for x in r)
            ]
            if not ranges:
                continue
            count = sum(last - first + 1 for first, last in ranges)
            shown = ", ".join(f"{a}" if a == b else f"{a}-{b}" for a, b in ranges[:3])
            extra = len(ranges) - 3
            more = f", +{extra} range{'s' if extra > 1 else ''}" if extra > 0 else ""
            found.append(
                Banner(
                    "lost",
                    f"LOST: {count:,} messages of source {source} never reached daemon {name} "
                    f"(seq {shown}{more}): fills may be missing",
                )
            )
    silent = health.get("silent")
    if isinstance(silent, list):
        for source in sorted(str(item) for item in silent):
            found.append(
                Banner(
                    "source",
                    f"source {source} has gone quiet (no heartbeat reached daemon {name}): "
                    "check it and the broker",
                )
            )
    return found


def _duration(seconds: float) -> str:
    if seconds < 120:
        return f"{seconds:.0f} s"
    return f"{seconds / 60:.0f} min"

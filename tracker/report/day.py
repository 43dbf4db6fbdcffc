"""What a review knows about a day: the engine's outputs, and the market and fills when recorded.

Theory of operation
-------------------
A review starts from one of two things:

* a replay output folder (``tracker replay DAY --out DIR``): targets, alerts, status, errors and
  the summary. These are read tolerantly, as a consumer of the wire would: unknown fields are
  ignored, missing optional fields are ``None``, a line that is not a JSON object is skipped and
  counted. The folder holds no market bins, no fills and no full plans, so the parts of the report
  that need them say "not available".
* a recording (JSON Lines) or a daemon's journal: it is replayed first
  (:func:`tracker.shell.replay.replay`, the same run ``tracker replay`` makes; its output files
  are written to ``DIR/replay/`` on request), with an observer around the engine that keeps
  what the engine accepted (orders, amends, cancels, halts, fills, market bins) and the path of
  every plan version. The forecast volume of each bin is recomputed with the engine's own
  forecast function (:func:`tracker.core.forecast.forecast`) from the bins seen before it.

The plan paths are read from the engine's per-order state after each step (the wire carries only
the next bin's target). That state is private to the engine: :func:`_plan_of` reads it defensively
and, if the engine's layout changes, the review loses only the faint re-plan lines.
"""

from __future__ import annotations

import json
import operator
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from datetime import datetime
from pathlib import Path
from typing import Any

import numpy as np

from tracker.core.forecast import ObservedBin, forecast
from tracker.core.messages import (
    BinMessage,
    ControlMessage,
    ErrorMessage,
    FillMessage,
    OrderMessage,
    Outbound,
    StatusMessage,
)
from tracker.core.profiles import Profile, default_profile
from tracker.core.session import Session
from tracker.errors import InputError

#: The files of a replay output folder the review reads.
OUTPUT_FILES = ("targets.jsonl", "alerts.jsonl", "status.jsonl", "errors.jsonl", "summary.json")


@dataclass(frozen=True, slots=True)
class Fill:
    """A fill the engine accepted."""

    fill_id: str
    quantity: int
    price: float
    ts: datetime


@dataclass(frozen=True, slots=True)
class MarketBin:
    """One bin of a symbol as the market reported it."""

    start: datetime
    end: datetime
    volume: float
    vwap: float | None
    high: float
    low: float
    close: float
    spread: float


@dataclass(frozen=True, slots=True)
class Forecast:
    """The forecast of one bin made before it was seen (what the plan used for it)."""

    volume: float
    spread: float
    volatility: float


@dataclass(frozen=True, slots=True)
class PlanPath:
    """One plan version: shares expected filled by the end of each bin from ``first_bin`` on."""

    version: int
    made_at: datetime
    first_bin: int
    filled_at: float
    cumulative: Any  # float array: shares expected done by the end of each bin from first_bin


@dataclass(frozen=True, slots=True)
class OrderEvent:
    """Something the desk did to an order: new, amend, cancel, halt or resume."""

    ts: datetime
    action: str
    changes: Mapping[str, Any]


@dataclass
class ReviewDay:
    """Everything the review draws on. ``None`` marks what the input does not hold.

    Attributes:
        source: ``"outputs"`` (a replay folder), ``"recording"`` or ``"journal"``.
        input: The path given.
        targets, alerts, status, errors: The engine's outputs as JSON objects.
        summary: summary.json (``{"orders": [...]}``).
        events: Order, amend, cancel, halt and resume per order id (``"*"``: every order).
        fills: Accepted fills per order id.
        market: Market bins per symbol, by bin start (UTC).
        forecasts: Forecast of each bin per symbol, by bin start (UTC).
        plans: Every plan version per order id.
        profiles: Liquidity profiles by symbol (given, or the stated default).
        skipped: Lines of the output files that were not JSON objects.
    """

    source: str
    input: Path
    targets: list[dict[str, Any]] = field(default_factory=list)
    alerts: list[dict[str, Any]] = field(default_factory=list)
    status: list[dict[str, Any]] = field(default_factory=list)
    errors: list[dict[str, Any]] = field(default_factory=list)
    summary: dict[str, Any] = field(default_factory=dict)
    events: dict[str, list[OrderEvent]] | None = None
    fills: dict[str, list[Fill]] | None = None
    market: dict[str, dict[datetime, MarketBin]] | None = None
    forecasts: dict[str, dict[datetime, Forecast]] | None = None
    plans: dict[str, list[PlanPath]] | None = None
    profiles: dict[str, Profile] = field(default_factory=dict)
    skipped: int = 0

    def profile(self, symbol: str) -> Profile:
        """The symbol's profile: the one given, or the stated default (as the engine used)."""
        found = self.profiles.get(symbol)
        if found is None:
            found = default_profile(symbol)
            self.profiles[symbol] = found
        return found

    def session(self, symbol: str) -> Session:
        """The venue session of a symbol (the default: 09:30-16:00 America/New_York)."""
        return self.profile(symbol).session


def parse_time(value: Any) -> datetime | None:
    """An ISO 8601 time with an offset (``Z`` allowed), or ``None`` for anything else.

    A timezone-aware ``datetime`` (an output read straight from a replay) is returned as is.
    """
    if isinstance(value, datetime):
        return value if value.tzinfo is not None else None
    if not isinstance(value, str):
        return None
    try:
        parsed = datetime.fromisoformat(value)
    except ValueError:
        return None
    return parsed if parsed.tzinfo is not None else None


def _read_lines(path: Path) -> tuple[list[dict[str, Any]], int]:
    objects: list[dict[str, Any]] = []
    skipped = 0
    try:
        with open(path, encoding="utf-8") as handle:
            for line in handle:
                if not line.strip():
                    continue
                try:
                    value = json.loads(line)
                except ValueError:
                    skipped += 1
                    continue
                if isinstance(value, dict):
                    objects.append(value)
                else:
                    skipped += 1
    except FileNotFoundError:
        return [], 0
    except OSError as exc:
        raise InputError(f"cannot read {path}: {exc.strerror}", field="INPUT") from exc
    return objects, skipped


def read_outputs(folder: Path, profiles: Mapping[str, Profile] | None = None) -> ReviewDay:
    """Read a replay output folder tolerantly.

    Raises:
        InputError: The folder has none of the output files, or summary.json is not JSON.
    """
    if not any((folder / name).exists() for name in OUTPUT_FILES):
        raise InputError(
            f"{folder} holds none of {', '.join(OUTPUT_FILES)}: give the folder `tracker replay "
            "--out` wrote, a recording (.jsonl) or a journal",
            field="INPUT",
        )
    day = ReviewDay(source="outputs", input=folder, profiles=dict(profiles or {}))
    for name in ("targets", "alerts", "status", "errors"):
        objects, skipped = _read_lines(folder / f"{name}.jsonl")
        setattr(day, name, objects)
        day.skipped += skipped
    summary_path = folder / "summary.json"
    if summary_path.exists():
        try:
            summary = json.loads(summary_path.read_text(encoding="utf-8"))
        except ValueError as exc:
            raise InputError(
                f"{summary_path} is not valid JSON ({exc}); run the replay again", field="INPUT"
            ) from exc
        day.summary = summary if isinstance(summary, dict) else {}
    return day


# ------------------------------------------------------------------------------- recordings


def _plan_of(engine: Any, order_id: str) -> list[Any]:
    """The engine's latest and baseline plans of an order (:meth:`Engine.plans`, read-only)."""
    plans = getattr(engine, "plans", None)
    return list(plans(order_id)) if plans is not None else []


def _path(plan: Any, made_at: datetime) -> PlanPath | None:
    try:
        return PlanPath(
            version=int(plan.version),
            made_at=made_at,
            first_bin=int(plan.first_bin),
            filled_at=float(plan.filled_at),
            cumulative=np.array(plan.cumulative, dtype=np.float64),  # a copy: plans are reused
        )
    except (AttributeError, TypeError, ValueError):
        return None


class Observer:
    """Wraps an engine for a replay: passes every call through and keeps what the review needs.

    ``handle_many`` hands the engine the same events in runs it would batch itself (the bins of
    one bin close, one symbol each), so each order is re-planned at most once per run and every
    plan version can be read after its run. The outputs are exactly the engine's.
    """

    def __init__(self, engine: Any) -> None:
        self.engine = engine
        self.events: dict[str, list[OrderEvent]] = {}
        self.fills: dict[str, list[Fill]] = {}
        self.bins: dict[str, list[BinMessage]] = {}
        self.plans: dict[str, dict[int, PlanPath]] = {}
        self._versions: dict[str, int] = {}

    def handle(self, event: Any) -> list[Outbound]:
        """Apply one event (see :meth:`tracker.core.engine.Engine.handle`)."""
        return self.handle_many([event])[0]

    def handle_many(self, events: Sequence[Any]) -> list[list[Outbound]]:
        """Apply events in order, in runs, observing each run.

        A run is the bins of one bin close (one per symbol, as the engine batches them) or
        consecutive fills (a fill re-plans nothing, though it may start an order that was due:
        once); anything else runs alone. So no order gets two new plans within a run.
        """
        results: list[list[Outbound]] = []
        run: list[Any] = []
        kind = ""
        symbols: set[str] = set()
        for event in events:
            if isinstance(event, BinMessage):
                joins = kind == "bins" and event.symbol not in symbols and event.ts == run[0].ts
                now = "bins"
            elif isinstance(event, FillMessage):
                joins, now = kind == "fills", "fills"
            else:
                joins, now = False, "other"
            if run and not joins:
                results += self._run(run)
                run, symbols = [], set()
            run.append(event)
            kind = now
            if isinstance(event, BinMessage):
                symbols.add(event.symbol)
        if run:
            results += self._run(run)
        return results

    def _run(self, events: list[Any]) -> list[list[Outbound]]:
        many = getattr(self.engine, "handle_many", None)
        produced: list[list[Outbound]] = (
            many(events) if many is not None else [self.engine.handle(e) for e in events]
        )
        for event, outputs in zip(events, produced, strict=True):
            if not any(isinstance(o, ErrorMessage) for o in outputs):
                self._keep(event)
            for message in outputs:
                if isinstance(message, StatusMessage):
                    self._snapshot(message)
        return produced

    def _keep(self, event: Any) -> None:
        if isinstance(event, FillMessage):
            self.fills.setdefault(event.order_id, []).append(
                Fill(event.fill_id, event.quantity, event.price, event.ts)
            )
        elif isinstance(event, BinMessage):
            self.bins.setdefault(event.symbol, []).append(event)
        elif isinstance(event, OrderMessage):
            names = event.fields_set or frozenset(
                name
                for name in (
                    "symbol",
                    "side",
                    "quantity",
                    "start",
                    "end",
                    "limit_price",
                    "max_participation",
                    "urgency",
                    "preferences",
                    "arrival_price",
                )
                if getattr(event, name) is not None
            )
            changes = {
                name: getattr(event, name, None)
                for name in sorted(names)
                if name not in ("action", "order_id", "ts", "type")
            }
            self.events.setdefault(event.order_id, []).append(
                OrderEvent(event.ts, event.action, changes)
            )
        elif isinstance(event, ControlMessage):
            self.events.setdefault(event.order_id or "*", []).append(
                OrderEvent(event.ts, event.command, {})
            )

    def _snapshot(self, status: StatusMessage) -> None:
        if status.plan_version <= self._versions.get(status.order_id, 0):
            return
        self._versions[status.order_id] = status.plan_version
        kept = self.plans.setdefault(status.order_id, {})
        for plan in _plan_of(self.engine, status.order_id):
            version = getattr(plan, "version", None)
            if isinstance(version, int) and version not in kept:
                path = _path(plan, status.ts)
                if path is not None:
                    kept[version] = path

    def reject(self, topic: str, payload: Any, reason: str, ts: datetime | None) -> ErrorMessage:
        """Pass through (see :meth:`tracker.core.engine.Engine.reject`)."""
        message: ErrorMessage = self.engine.reject(topic, payload, reason, ts)
        return message

    def summary(self) -> dict[str, Any]:
        """Pass through (see :meth:`tracker.core.engine.Engine.summary`)."""
        result: dict[str, Any] = self.engine.summary()
        return result


def _forecasts(
    bins: Iterable[BinMessage], profile: Profile
) -> tuple[dict[datetime, MarketBin], dict[datetime, Forecast]]:
    """The market bins of a symbol and, per bin, the forecast made from the bins before it."""
    session = profile.session
    market: dict[datetime, MarketBin] = {}
    forecasts: dict[datetime, Forecast] = {}
    observed: dict[int, ObservedBin] = {}
    day = None
    current = forecast(profile, {})
    for message in sorted(bins, key=lambda b: b.start):
        start = message.start
        local_day = session.local(start).date()
        if local_day != day:  # a new day starts from the profile again
            day, observed, current = local_day, {}, forecast(profile, {})
        index = session.bin_index(start)
        market[start] = MarketBin(
            start=start,
            end=message.end,
            volume=float(message.volume),
            vwap=message.vwap,
            high=message.high,
            low=message.low,
            close=message.close,
            spread=message.spread,
        )
        if index is None:
            continue
        forecasts[start] = Forecast(
            volume=float(current.volume[index]),
            spread=float(current.spread[index]),
            volatility=float(current.volatility[index]),
        )
        observed[index] = ObservedBin(
            volume=float(message.volume),
            spread=message.spread,
            high=message.high,
            low=message.low,
        )
        try:
            current = forecast(profile, observed)
        except InputError:  # a bin the forecast refuses: keep the previous forecast
            observed.pop(index, None)
    return market, forecasts


_GETTERS: dict[type, tuple[tuple[str, ...], Any]] = {}


def _fields(message: Any) -> dict[str, Any]:
    """An output message as the JSON object the files hold, times left as datetimes."""
    kind = type(message)
    found = _GETTERS.get(kind)
    if found is None:  # one getter per message class reads every field in one C call
        names = tuple(message.__dataclass_fields__)
        found = _GETTERS[kind] = (names, operator.attrgetter(*names))
    names, getter = found
    return dict(zip(names, getter(message), strict=True))


def read_recording(
    path: Path,
    out_dir: Path,
    *,
    profiles: Mapping[str, Profile] | None = None,
    config: Any = None,
    root: str | None = None,
    keep_replay: bool = False,
) -> ReviewDay:
    """Replay a recording or journal and observe it.

    Args:
        path: A JSON Lines recording or a daemon journal.
        out_dir: The report folder.
        profiles: Liquidity profiles by symbol (as ``tracker replay --profiles``).
        config: Engine settings (as ``tracker replay --config``).
        root: The recording's MQTT topic root.
        keep_replay: Also write the replay's output files to ``out_dir / "replay"`` (what
            ``tracker replay`` writes).

    Raises:
        InputError: The input cannot be read or the folder written.
    """
    from tracker.core.topics import DEFAULT_ROOT
    from tracker.shell.replay import is_journal, read_input, replay, write_outputs
    from tracker.shell.setup import plan_replay

    # A journal is replayed with the setup it recorded (root, settings, profiles), as
    # 'tracker replay' does; flags that disagree with it are refused.
    plan = plan_replay(path, root=root, config=config, profiles=profiles, default_root=DEFAULT_ROOT)
    given = dict(plan.engine.profiles)
    records = list(read_input(path))
    observer = Observer(plan.engine)
    result = replay(records, observer, plan.root, changes=plan.changes)
    if keep_replay:
        write_outputs(result, out_dir / "replay")
    day = ReviewDay(
        source="journal" if is_journal(path) else "recording",
        input=path,
        targets=[_fields(m) for m in result.targets],
        alerts=[_fields(m) for m in result.alerts],
        status=[_fields(m) for m in result.status],
        errors=[_fields(m) for m in result.errors],
        summary=dict(result.summary),
        profiles=given,
    )
    day.events = observer.events
    day.fills = observer.fills
    day.plans = {
        order_id: [paths[v] for v in sorted(paths)] for order_id, paths in observer.plans.items()
    }
    day.market, day.forecasts = {}, {}
    for symbol, bins in observer.bins.items():
        day.market[symbol], day.forecasts[symbol] = _forecasts(bins, day.profile(symbol))
    return day

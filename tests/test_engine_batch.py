"""Engine.handle_many: the same outputs as handle, event by event, whatever the grouping."""

from __future__ import annotations

from datetime import UTC, datetime, timedelta
from pathlib import Path

from pytest import MonkeyPatch

from tracker import Problem, Schedule, solve_batch
from tracker.core.engine import Engine
from tracker.core.engine import planning as engine_module
from tracker.edge.recordings import read_jsonl
from tracker.edge.records import Record
from tracker.edge.wire import BinMessage, Inbound, OrderMessage, Tick, WireError, decode, encode

DAY = Path(__file__).resolve().parent.parent / "replay_data" / "day-2026-03-10-seed7.jsonl"


def recorded_events() -> list[Inbound]:
    """The decodable messages of the shipped invented day, in order."""
    events: list[Inbound] = []
    for record in read_jsonl(DAY):
        if not isinstance(record, Record):
            continue
        try:
            events.append(decode(record.topic, record.payload))
        except WireError:
            continue
    return events


def encoded(outputs: list[list[object]]) -> list[list[bytes]]:
    return [[encode(message) for message in per_event] for per_event in outputs]  # type: ignore[arg-type]


def test_recorded_day_is_the_same_in_one_call() -> None:
    """Handling the invented day in one handle_many call equals handling it event by event."""
    events = recorded_events()
    one_by_one = Engine()
    expected = [one_by_one.handle(event) for event in events]
    assert encoded(expected) == encoded(Engine().handle_many(events))


def synthetic_bin_close(symbols: int) -> list[Inbound]:
    """Orders on several invented symbols, then every symbol's bins closing at one time."""
    open_ = datetime(2026, 3, 10, 14, 30, tzinfo=UTC)  # 09:30 in New York
    events: list[Inbound] = []
    for s in range(symbols):
        for side, quantity in (("buy", 50_000), ("sell", 20_000)):
            events.append(
                OrderMessage(
                    action="new",
                    order_id=f"X_HX{s:02d}-{side}",
                    symbol=f"X_HX{s:02d}",
                    side=side,
                    quantity=quantity,
                    start=open_,
                    end=open_ + timedelta(hours=6, minutes=30),
                    ts=open_ - timedelta(minutes=1),
                )
            )
    for n in range(3):
        start = open_ + timedelta(minutes=5 * n)
        end = start + timedelta(minutes=5)
        for s in range(symbols):
            price = 20.0 + s
            events.append(
                BinMessage(
                    symbol=f"X_HX{s:02d}",
                    start=start,
                    end=end,
                    volume=30_000 + 1_000 * s,
                    vwap=price,
                    open=price,
                    high=price * 1.002,
                    low=price * 0.998,
                    close=price,
                    spread=0.02,
                    ts=end + timedelta(seconds=1),
                )
            )
        events.append(Tick(ts=end + timedelta(seconds=2)))
    return events


def test_simultaneous_bin_closes_are_the_same_in_one_call(monkeypatch: MonkeyPatch) -> None:
    """A bin close of many symbols at one time (one shared solve) equals one bin at a time."""
    events = synthetic_bin_close(6)
    one_by_one = Engine()
    expected = [one_by_one.handle(event) for event in events]
    batches: list[int] = []

    def counting(problems: list[Problem]) -> list[Schedule]:
        batches.append(len(problems))
        return solve_batch(problems)

    monkeypatch.setattr(engine_module, "solve_batch", counting)
    actual = Engine().handle_many(events)
    assert encoded(expected) == encoded(actual)
    # The first bin starts all twelve orders (re-plans across symbols: it closes its group); the
    # other five bins of that close share a solve, and each later close is one solve of twelve.
    assert [12, 10, 12, 12] == batches

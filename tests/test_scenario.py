"""The invented demo day: its market, orders, router and fill model, and the closed loop.

Everything here is invented (symbols X_ZEPH, X_KALO, X_MIRA on the made-up venue Harbour Lane
Exchange). The router is driven by a plain per-bin target feed (a stand-in for the engine) so these
checks do not depend on the engine's numbers; the closed-loop checks at the end use the real engine.
"""

from __future__ import annotations

import json
from collections import Counter
from collections.abc import Iterator
from dataclasses import replace
from datetime import UTC, date, datetime, timedelta
from pathlib import Path
from typing import Any

import pytest

from tracker.cli import main
from tracker.core.engine import Engine
from tracker.edge.records import Record, payload_bytes, record_line
from tracker.edge.wire import (
    BinMessage,
    ControlMessage,
    FillMessage,
    OrderMessage,
    StatusMessage,
    TargetMessage,
    WireError,
    decode,
)
from tracker.errors import InputError
from tracker.shell.replay import OUTPUT_FILES, read_input, replay, write_outputs
from tracker.shell.simulated_day import DayRun, run_day, write_day
from tracker.sim.scenario import (
    CANCEL,
    SHOCK,
    VOLUME_SHARE_CAP,
    Scenario,
)

BIN = timedelta(minutes=5)


def drive(scenario: Scenario, share: float = 0.02) -> Iterator[tuple[Record, Any]]:
    """Run the scenario with a stand-in engine: at every bin close, each live order of the symbol
    gets a target of ``share`` of its quantity for the next bin. Yields (record, decoded or
    WireError)."""
    live: dict[str, OrderMessage] = {}
    while (due := scenario.next_time()) is not None:
        for record in scenario.inbound_until(due):
            try:
                message: Any = decode(record.topic, record.payload)
            except WireError as exc:
                yield record, exc
                continue
            yield record, message
            if isinstance(message, OrderMessage):
                if message.action == "new":
                    live[message.order_id] = message
                elif message.action == "cancel":
                    live.pop(message.order_id, None)
            if isinstance(message, BinMessage):
                for order in list(live.values()):
                    if order.symbol == message.symbol and order.end and message.end < order.end:
                        scenario.on_output(target(order, message.end, share, message.ts))


def target(order: OrderMessage, start: datetime, share: float, ts: datetime) -> TargetMessage:
    """A target of ``share`` of the order for the bin starting at ``start``."""
    assert order.quantity is not None and order.side is not None and order.symbol is not None
    return TargetMessage(
        order_id=order.order_id,
        symbol=order.symbol,
        side=order.side,
        bin_start=start,
        bin_end=start + BIN,
        quantity=round(order.quantity * share),
        cumulative_target=0,
        remaining=order.quantity,
        max_quantity=None,
        plan_version=1,
        ts=ts,
    )


@pytest.fixture(scope="module")
def day() -> list[tuple[Record, Any]]:
    """The seed-7 day, driven by the stand-in target feed."""
    return list(drive(Scenario(7)))


def fills(day: list[tuple[Record, Any]]) -> list[FillMessage]:
    """The valid fills of a day, each fill id once."""
    unique = {m.fill_id: m for _, m in day if isinstance(m, FillMessage)}
    return list(unique.values())


def test_same_seed_same_day() -> None:
    """The same seed gives the same recording, line for line."""
    first = [record_line(r) for r, _ in drive(Scenario(11))]
    second = [record_line(r) for r, _ in drive(Scenario(11))]
    assert first == second


def test_other_seed_other_market() -> None:
    """Another seed gives another market."""
    assert Scenario(1).market["X_ZEPH"][10].volume != Scenario(2).market["X_ZEPH"][10].volume


def test_lines_are_numbered_in_time_order(day: list[tuple[Record, Any]]) -> None:
    """Records come numbered 1..n with non-decreasing times."""
    lines = [r.line for r, _ in day]
    times = [r.ts for r, _ in day]
    assert (list(range(1, len(day) + 1)), sorted(times)) == (lines, times)


def test_every_symbol_has_a_bin_message_per_bin(day: list[tuple[Record, Any]]) -> None:
    """Each symbol publishes one bin per bin of the 78-bin session (common practice: 5-minute
    bins of a 6.5-hour session)."""
    counts = Counter(m.symbol for _, m in day if isinstance(m, BinMessage))
    expected = {"X_ZEPH": 78, "X_KALO": 78, "X_MIRA": 78}
    assert expected == dict(counts)


def test_the_day_has_one_amend_and_one_cancel(day: list[tuple[Record, Any]]) -> None:
    """One order is amended and one cancelled."""
    actions = Counter(m.action for _, m in day if isinstance(m, OrderMessage))
    expected = {"new": 4, "amend": 1, "cancel": 1}
    assert expected == dict(actions)


def test_the_day_has_a_halt_and_a_resume(day: list[tuple[Record, Any]]) -> None:
    """The desk halts one order and resumes it a quarter of an hour later."""
    commands = [(m.command, m.order_id) for _, m in day if isinstance(m, ControlMessage)]
    expected = [("halt", "X_ZEPH-S2"), ("resume", "X_ZEPH-S2")]
    assert expected == commands


def test_the_day_has_five_malformed_messages(day: list[tuple[Record, Any]]) -> None:
    """Four messages fail validation at the edge (plus a fill for an unknown order, which only
    the engine can reject)."""
    rejected = [exc.reason for _, exc in day if isinstance(exc, WireError)]
    unknown = [m for _, m in day if isinstance(m, FillMessage) and m.order_id == "X_ORIN-B9"]
    expected = (4, 1)
    assert expected == (len(rejected), len(unknown))


def test_the_day_has_one_exact_redelivery(day: list[tuple[Record, Any]]) -> None:
    """Exactly one fill is sent twice, byte for byte the same payload."""
    payloads = Counter(
        json.dumps(r.payload, sort_keys=True) for r, m in day if isinstance(m, FillMessage)
    )
    expected = [2]
    assert expected == [n for n in payloads.values() if n > 1]


def test_shock_cuts_volume_and_widens_spread() -> None:
    """During the shock X_ZEPH trades far less and quotes far wider than the hour before."""
    scenario = Scenario(7)
    bins = scenario.market[SHOCK.symbol]
    zone = scenario.session.zone
    inside = [b for b in bins if SHOCK.start <= b.start.astimezone(zone).time() < SHOCK.end]
    before = [b for b in bins if b.index in range(inside[0].index - 12, inside[0].index)]
    volume_ratio = (sum(b.volume for b in inside) / len(inside)) / (
        sum(b.volume for b in before) / len(before)
    )
    spread_ratio = (sum(b.spread for b in inside) / len(inside)) / (
        sum(b.spread for b in before) / len(before)
    )
    expected = (True, True)
    assert expected == (volume_ratio < 0.4, spread_ratio > 2.0)


def test_market_bins_are_valid_wire_bins() -> None:
    """Every invented bin is consistent: low <= open, close, vwap <= high; spread >= 0."""
    bad = [
        b
        for bins in Scenario(3).market.values()
        for b in bins
        if not (b.low <= min(b.open, b.close, b.vwap) and max(b.open, b.close, b.vwap) <= b.high)
        or b.spread < 0
    ]
    expected: list[Any] = []
    assert expected == bad


def test_fills_stay_within_the_bin_volume_cap(day: list[tuple[Record, Any]]) -> None:
    """The router never takes more than its share of a bin's real volume."""
    scenario = Scenario(7)
    taken: Counter[tuple[str, datetime]] = Counter()
    symbol = {
        "X_ZEPH-B1": "X_ZEPH",
        "X_ZEPH-S2": "X_ZEPH",
        "X_KALO-S1": "X_KALO",
        "X_MIRA-B1": "X_MIRA",
    }
    for fill in fills(day):
        if fill.order_id in symbol:
            start = scenario.session.bins(date(2026, 3, 10))[0][0]
            index = int((fill.ts - start) // BIN)
            taken[(symbol[fill.order_id], scenario.market[symbol[fill.order_id]][index].start)] += (
                fill.quantity
            )
    volumes = {(b.symbol, b.start): b.volume for bins in scenario.market.values() for b in bins}
    over = [
        key for key, quantity in taken.items() if quantity > VOLUME_SHARE_CAP * volumes[key] + 1e-9
    ]
    expected: list[Any] = []
    assert expected == over


def test_fills_never_exceed_the_order(day: list[tuple[Record, Any]]) -> None:
    """No order is filled beyond its (amended) quantity."""
    total: Counter[str] = Counter()
    for fill in fills(day):
        total[fill.order_id] += fill.quantity
    limits = {"X_ZEPH-B1": 120_000, "X_KALO-S1": 60_000, "X_MIRA-B1": 55_000, "X_ZEPH-S2": 30_000}
    over = [order for order, limit in limits.items() if total[order] > limit]
    expected: list[str] = []
    assert expected == over


def test_no_fill_after_the_cancel(day: list[tuple[Record, Any]]) -> None:
    """The cancelled order gets no fill after its cancel."""
    order_id, clock = CANCEL
    cancel_at = datetime.combine(date(2026, 3, 10), clock, tzinfo=Scenario(7).session.zone)
    late = [f for f in fills(day) if f.order_id == order_id and f.ts >= cancel_at]
    expected: list[FillMessage] = []
    assert expected == late


def test_some_slices_miss_and_some_fill_partly(day: list[tuple[Record, Any]]) -> None:
    """The fill model gives both misses and partial fills (fewer shares than slices ask)."""
    ask = round(120_000 * 0.02) // 4
    sizes = [f.quantity for f in fills(day) if f.order_id == "X_ZEPH-B1"]
    slices = 4 * len([1 for _, m in day if isinstance(m, BinMessage) and m.symbol == "X_ZEPH"])
    expected = (True, True)
    assert expected == (len(sizes) < slices, any(size < ask for size in sizes))


def test_final_status_stops_the_router() -> None:
    """Once the engine says an order is done, its planned slices are withdrawn."""
    scenario = Scenario(7)
    first = scenario.inbound_until(datetime(2026, 3, 10, 13, 29, tzinfo=UTC))
    order = decode(first[0].topic, first[0].payload)
    assert isinstance(order, OrderMessage)
    start = datetime(2026, 3, 10, 13, 30, tzinfo=UTC)
    scenario.on_output(target(order, start, 0.05, order.ts))
    scenario.on_output(status(order, "done", order.ts))
    records = scenario.inbound_until(start + BIN)
    expected: list[str] = []
    assert expected == [r.topic for r in records if "fills/X_ZEPH-B1" in r.topic]


def status(order: OrderMessage, state: str, ts: datetime) -> StatusMessage:
    """A status message of the given state."""
    assert order.quantity is not None and order.side is not None and order.symbol is not None
    return StatusMessage(
        order_id=order.order_id,
        symbol=order.symbol,
        side=order.side,
        state=state,
        quantity=order.quantity,
        filled=0,
        remaining=order.quantity,
        progress_pct=0.0,
        planned_filled=0,
        deviation_shares=0,
        deviation_pct=0.0,
        deviation_bins=None,
        average_price=None,
        arrival_price=None,
        limit_price=None,
        volume_scale=None,
        expected_cost=None,
        expected_cost_bps=None,
        plan_version=1,
        ts=ts,
    )


def test_weekend_day_is_refused() -> None:
    """A scenario day must be a weekday."""
    with pytest.raises(InputError, match="weekday"):
        Scenario(7, day=date(2026, 3, 7))


def test_record_line_round_trips(tmp_path: Path) -> None:
    """A recording line holds topic, payload and ts as JSON."""
    record = Record(line=1, topic="tracker/control", payload={"a": 1}, ts="2026-03-10T14:00:00Z")
    expected = {"topic": "tracker/control", "payload": {"a": 1}, "ts": "2026-03-10T14:00:00Z"}
    assert expected == json.loads(record_line(record))


# ------------------------------------------------------------------ closed loop, real engine


@pytest.fixture(scope="module")
def closed_loop() -> DayRun:
    """The seed-7 day run in-process against the real engine."""
    return run_day(7)


def test_closed_loop_equals_replay_of_its_recording(closed_loop: DayRun, tmp_path: Path) -> None:
    """Replaying the recording of a closed-loop day reproduces its outputs byte for byte."""
    path = write_day(closed_loop, tmp_path / "day.jsonl")
    write_outputs(closed_loop.result, tmp_path / "live")
    write_outputs(replay(read_input(path), Engine()), tmp_path / "replayed")
    differing = [
        name
        for name in OUTPUT_FILES
        if (tmp_path / "live" / name).read_bytes() != (tmp_path / "replayed" / name).read_bytes()
    ]
    expected: list[str] = []
    assert expected == differing


def test_router_never_fills_more_than_the_bin_target(closed_loop: DayRun) -> None:
    """In each bin an order's fills stay within the largest target the engine gave for it."""
    targets: dict[tuple[str, datetime], int] = {}
    for t in closed_loop.result.targets:
        if t.bin_start is not None:
            key = (t.order_id, t.bin_start)
            targets[key] = max(targets.get(key, 0), t.quantity)
    filled: Counter[tuple[str, datetime]] = Counter()
    seen: set[str] = set()
    for record in closed_loop.records:
        payload = record.payload
        if not isinstance(payload, dict) or payload.get("type") != "fill":
            continue
        if payload["fill_id"] in seen or payload["order_id"] == "X_ORIN-B9":
            continue
        seen.add(payload["fill_id"])
        ts = datetime.fromisoformat(payload["ts"])
        start = ts - timedelta(
            minutes=ts.minute % 5, seconds=ts.second, microseconds=ts.microsecond
        )
        filled[(payload["order_id"], start)] += payload["quantity"]
    over = [key for key, quantity in filled.items() if quantity > targets.get(key, 0)]
    expected: list[Any] = []
    assert expected == over


def test_closed_loop_rejects_exactly_the_bad_messages(closed_loop: DayRun) -> None:
    """The day's errors are the four malformed messages; the fill for an unknown order is not
    an error but is kept, unassigned, in the summary."""
    topics = [e.topic for e in closed_loop.result.errors]
    expected = [
        "tracker/fills/X_ZEPH-B1",
        "tracker/fills/X_KALO-S1",
        "tracker/fills/X_MIRA-B1",
        "tracker/bins/X_KALO",
    ]
    assert expected == topics
    unassigned = closed_loop.result.summary["unassigned_fills"]
    assert ["X_ORIN-B9"] == [row["order_id"] for row in unassigned]


def test_closed_loop_shows_the_shock_amend_and_cancel(closed_loop: DayRun) -> None:
    """The engine saw the shock (volume alert), the cancel (state) and the amend (quantity)."""
    codes = {a.code for a in closed_loop.result.alerts}
    orders = {o["order_id"]: o for o in closed_loop.result.summary["orders"]}
    expected = (True, "cancelled", 55_000)
    assert expected == (
        "volume_shock" in codes,
        orders["X_KALO-S1"]["state"],
        orders["X_MIRA-B1"]["quantity"],
    )


def test_simulate_day_command_writes_the_recording(tmp_path: Path) -> None:
    """`tracker simulate day -o FILE` writes a replay file that replays without surprises."""
    path = tmp_path / "day.jsonl"
    code = main(["simulate", "day", "--seed", "3", "-o", str(path)])
    result = replay(read_input(path), Engine())
    expected = (0, 4)  # the malformed messages (the fill for an unknown order waits instead)
    assert expected == (code, len(result.errors))


def test_payload_bytes_decode_to_the_same_message() -> None:
    """The bytes published over MQTT decode to the same message as the recorded object."""
    record = Scenario(7).inbound_until(datetime(2026, 3, 10, 13, 29, tzinfo=UTC))[0]
    expected = decode(record.topic, record.payload)
    assert expected == decode(record.topic, payload_bytes(record.payload))


def test_no_fill_while_halted(closed_loop: DayRun) -> None:
    """The router sends no fill for the halted order between its halt and its resume."""
    from tracker.sim.scenario import HALT

    order_id, halt, resume = HALT
    zone = Scenario(7).session.zone
    start = datetime.combine(date(2026, 3, 10), halt, tzinfo=zone)
    end = datetime.combine(date(2026, 3, 10), resume, tzinfo=zone)
    during = [
        r.line
        for r in closed_loop.records
        if r.topic == f"tracker/fills/{order_id}"
        and r.ts is not None
        and start <= datetime.fromisoformat(r.ts) < end
    ]
    expected: list[int] = []
    assert expected == during


def test_halt_and_resume_reach_the_engine(closed_loop: DayRun) -> None:
    """The halt and the resume of the day each raise their alert."""
    codes = [a.code for a in closed_loop.result.alerts if a.order_id == "X_ZEPH-S2"]
    expected = (1, 1)
    assert expected == (codes.count("order_halted"), codes.count("order_resumed"))


def test_target_without_a_bin_withdraws_planned_slices() -> None:
    """A target with no bin (nothing to trade) still withdraws the slices planned before it."""
    scenario = Scenario(7)
    first = scenario.inbound_until(datetime(2026, 3, 10, 13, 29, tzinfo=UTC))
    order = decode(first[0].topic, first[0].payload)
    assert isinstance(order, OrderMessage)
    start = datetime(2026, 3, 10, 13, 30, tzinfo=UTC)
    scenario.on_output(target(order, start, 0.05, order.ts))
    nothing = replace(target(order, start, 0.0, order.ts), bin_start=None, bin_end=None)
    scenario.on_output(nothing)
    records = scenario.inbound_until(start + BIN)
    expected: list[str] = []
    assert expected == [r.topic for r in records if "fills/X_ZEPH-B1" in r.topic]

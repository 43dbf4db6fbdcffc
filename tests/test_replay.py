"""Replay: line-level checks, error records with line numbers, redelivery, ticks, determinism.

The recordings here are invented: order ORD1 on the made-up symbol X_ZEPH of the made-up venue
Harbour Lane Exchange (X_HLX).
"""

from __future__ import annotations

import gc
import json
from collections.abc import Mapping
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any

import pytest

from tracker.cli import main
from tracker.core.engine import Engine
from tracker.edge.intake import Intake
from tracker.edge.recordings import BadLine, read_jsonl
from tracker.edge.records import Record
from tracker.edge.wire import ErrorMessage, Inbound, Outbound, Tick
from tracker.errors import InputError
from tracker.shell.replay import OUTPUT_FILES, dumps_summary, read_input, replay, write_outputs


def make_engine() -> Engine:
    """A fresh engine with default settings."""
    return Engine()


T0 = datetime(2026, 3, 10, 14, 35, tzinfo=UTC)  # 09:35 in New York, a Tuesday


def at(seconds: float) -> str:
    """An ISO time ``seconds`` after T0."""
    return (T0 + timedelta(seconds=seconds)).isoformat().replace("+00:00", "Z")


def order(seconds: float = 0.0, order_id: str = "ORD1", **changes: Any) -> dict[str, Any]:
    """A new-order line for 100,000 X_ZEPH to buy over the rest of the morning."""
    payload: dict[str, Any] = {
        "type": "order",
        "action": "new",
        "order_id": order_id,
        "symbol": "X_ZEPH",
        "side": "buy",
        "quantity": 100_000,
        "start": at(0),
        "end": at(3 * 3600),
        "arrival_price": 20.0,
        "ts": at(seconds),
    }
    payload.update(changes)
    return {"topic": f"tracker/orders/{order_id}", "payload": payload, "ts": at(seconds)}


def fill(fill_id: str, quantity: Any, seconds: float, order_id: str = "ORD1") -> dict[str, Any]:
    """A fill line."""
    payload = {
        "type": "fill",
        "fill_id": fill_id,
        "order_id": order_id,
        "quantity": quantity,
        "price": 20.01,
        "ts": at(seconds),
    }
    return {"topic": f"tracker/fills/{order_id}", "payload": payload, "ts": at(seconds)}


def write(tmp_path: Path, lines: list[Mapping[str, Any] | str], name: str = "in.jsonl") -> Path:
    """Write lines (objects or raw text) as a JSON Lines file."""
    path = tmp_path / name
    text = [line if isinstance(line, str) else json.dumps(line) for line in lines]
    path.write_text("\n".join(text) + "\n", encoding="utf-8")
    return path


def filled(result_summary: Mapping[str, Any], order_id: str = "ORD1") -> int:
    """Shares filled on an order, from the replay summary."""
    for entry in result_summary["orders"]:
        if entry["order_id"] == order_id:
            return int(entry["filled"])
    raise AssertionError(f"{order_id} not in summary")


def run_file(path: Path) -> tuple[list[ErrorMessage], dict[str, Any]]:
    """Replay a file on a fresh engine; return the errors and the summary."""
    result = replay(read_input(path), make_engine())
    return result.errors, result.summary


def _fill_payload_text(**changes: Any) -> str:
    payload = fill("F9", 300, 120)["payload"]
    payload.update(changes)
    return json.dumps(payload)


# One row per kind of bad line: (the bad line placed at line 3, the part of its reason that says
# what to do about it).
# Lines 1, 2 and 4 are a new order and two good fills (100 and 200 shares).
MALFORMED = [
    pytest.param(
        '{"topic": "tracker/fills/ORD1", "payload": {',
        "each line must be one object",
        id="not-json",
    ),
    pytest.param("[1, 2, 3]", "each line must be one object", id="line-not-object"),
    pytest.param(
        {"payload": fill("F9", 300, 120)["payload"], "ts": at(120)},
        "give the MQTT topic",
        id="no-topic",
    ),
    pytest.param(
        {"topic": "tracker/fills/ORD1", "ts": at(120)}, "give the message object", id="no-payload"
    ),
    pytest.param(
        {**fill("F9", 300, 120), "payload": 42}, "give the message object", id="payload-number"
    ),
    pytest.param(
        {**fill("F9", 300, 120), "ts": "yesterday"},
        "write it like 2026-03-10T14:30:00Z",
        id="bad-line-ts",
    ),
    pytest.param(
        {"topic": "tracker/fills/ORD1", "payload": '{"type": "fill", "fill_id": ', "ts": at(120)},
        "send one JSON object",
        id="payload-text-not-json",
    ),
    pytest.param(
        {
            **fill("F9", 300, 120),
            "payload": {k: v for k, v in fill("F9", 300, 120)["payload"].items() if k != "price"},
        },
        "price: is required",
        id="missing-field",
    ),
    pytest.param(fill("F9", "300", 120), "quantity: must be a JSON number", id="wrong-type"),
    pytest.param(fill("F9", -300, 120), "quantity: must be greater than 0", id="negative-quantity"),
    pytest.param(
        {
            "topic": "tracker/fills/ORD1",
            "payload": _fill_payload_text(quantity=float("nan")),
            "ts": at(120),
        },
        "NaN is not valid JSON",
        id="nan-quantity",
    ),
    pytest.param(
        {**fill("F9", 300, 120), "payload": {**fill("F9", 300, 120)["payload"], "type": "trade"}},
        "one of bin, control, fill, fill_correction, heartbeat, order, tick",
        id="unknown-type",
    ),
    pytest.param(
        {**fill("F9", 300, 120), "topic": "tracker/orders/ORD1"},
        "publish fill messages to tracker/fills/",
        id="wrong-topic",
    ),
    pytest.param(
        {**fill("F9", 300, 120), "topic": "tracker/fills/ORD2"},
        "they must match",
        id="topic-id-mismatch",
    ),
    pytest.param(
        {**fill("F9", 300, 120), "payload": {**fill("F9", 300, 120)["payload"], "side": "sell"}},
        "send it for the right order",
        id="wrong-side",
    ),
]


@pytest.mark.parametrize(("bad", "phrase"), MALFORMED)
def test_bad_line_gives_one_error_with_its_line(
    tmp_path: Path, bad: Mapping[str, Any] | str, phrase: str
) -> None:
    """Each kind of bad line gives exactly one error record, for its own line, saying why."""
    path = write(tmp_path, [order(0), fill("F1", 100, 60), bad, fill("F2", 200, 180)])
    errors, _ = run_file(path)
    expected = [3]
    assert expected == [error.line for error in errors]
    assert phrase.lower() in errors[0].reason.lower()


@pytest.mark.parametrize(("bad", "phrase"), MALFORMED)
def test_bad_line_leaves_valid_lines_in_effect(
    tmp_path: Path, bad: Mapping[str, Any] | str, phrase: str
) -> None:
    """The valid lines around a bad line still take effect (both fills count)."""
    path = write(tmp_path, [order(0), fill("F1", 100, 60), bad, fill("F2", 200, 180)])
    _, summary = run_file(path)
    expected = 300
    assert expected == filled(summary)


def test_error_record_keeps_topic_and_raw_payload(tmp_path: Path) -> None:
    """The error record carries the topic and the raw text, so the sender can find the message."""
    raw = '{"type": "fill", "fill_id": '
    path = write(tmp_path, [order(0), {"topic": "tracker/fills/ORD1", "payload": raw, "ts": at(5)}])
    errors, _ = run_file(path)
    assert ("tracker/fills/ORD1", raw) == (errors[0].topic, errors[0].payload)


def test_blank_lines_are_skipped_without_error(tmp_path: Path) -> None:
    """Blank lines are not messages: no error, and line numbers still count them."""
    path = write(tmp_path, [order(0), "", "   ", fill("F1", 100, 60), "{"])
    errors, summary = run_file(path)
    expected = ([5], 100)
    assert expected == ([error.line for error in errors], filled(summary))


def bin_line(seconds: float) -> dict[str, Any]:
    """The X_ZEPH bin that closes at T0 + 5 minutes, published ``seconds`` after T0."""
    payload = {
        "type": "bin",
        "symbol": "X_ZEPH",
        "start": at(0),
        "end": at(300),
        "volume": 10_000,
        "vwap": 20.0,
        "open": 20.0,
        "high": 20.1,
        "low": 19.9,
        "close": 20.0,
        "spread": 0.02,
        "ts": at(seconds),
    }
    return {"topic": "tracker/bins/X_ZEPH", "payload": payload, "ts": at(seconds)}


def control_line(command: str, seconds: float) -> dict[str, Any]:
    """A halt or resume of ORD1."""
    payload = {"type": "control", "command": command, "order_id": "ORD1", "ts": at(seconds)}
    return {"topic": "tracker/control", "payload": payload, "ts": at(seconds)}


DAY_LINES: list[dict[str, Any]] = [
    order(0),
    fill("F1", 100, 60),
    control_line("halt", 120),
    control_line("resume", 180),
    fill("F2", 200, 240),
    bin_line(301),
    fill("F3", 300, 360),
]


@pytest.mark.parametrize("index", [0, 1, 2, 3, 5], ids=["order", "fill", "halt", "resume", "bin"])
def test_redelivery_changes_nothing(tmp_path: Path, index: int) -> None:
    """A copy of an accepted message, delivered again later, changes no output and no order."""
    copy = {**DAY_LINES[index], "ts": at(361)}  # the broker re-sends it after the last line
    once = write(tmp_path, DAY_LINES, "once.jsonl")
    twice = write(tmp_path, [*DAY_LINES, copy], "twice.jsonl")
    first = replay(read_input(once), make_engine())
    second = replay(read_input(twice), make_engine())
    write_outputs(first, tmp_path / "once")
    write_outputs(second, tmp_path / "twice")
    differing = [
        name
        for name in OUTPUT_FILES[:-1]
        if (tmp_path / "once" / name).read_bytes() != (tmp_path / "twice" / name).read_bytes()
    ]
    expected: tuple[list[str], bool] = ([], True)
    assert expected == (differing, first.summary["orders"] == second.summary["orders"])


def test_redelivery_is_counted_not_rejected(tmp_path: Path) -> None:
    """A redelivered line is counted as such in the summary, and is not an error."""
    line = fill("F1", 100, 60)
    path = write(tmp_path, [order(0), line, line])
    errors, summary = run_file(path)
    expected = ([], 1, 100)
    assert expected == (errors, summary["replay"]["redelivered"], filled(summary))


FILL_VARIANTS: list[dict[str, Any]] = [
    fill("F1", 100, 60)["payload"],
    {**fill("F1", 100, 60)["payload"], "quantity": 100.0},  # the same fill
    {**fill("F1", 100, 60)["payload"], "ts": at(60).replace("Z", "+00:00")},  # the same fill
    {**fill("F1", 100, 60)["payload"], "ts": "2026-03-10T09:36:00-05:00"},  # the same fill
    {**fill("F1", 100, 60)["payload"], "side": None},  # the same fill
    {**fill("F1", 100, 60)["payload"], "price": 20.010000000000005},  # the next float after 20.01
    {**fill("F1", 100, 60)["payload"], "ts": at(60.000001)},
    {**fill("F1", 100, 60)["payload"], "side": "buy"},
    {**fill("F1", 100, 60)["payload"], "price": 20},
    {**fill("F1", 100, 60)["payload"], "price": 20.0},
    fill("F1", 101, 60)["payload"],
    fill("F2", 100, 60)["payload"],
    fill("F1", 100, 60, order_id="ORD2")["payload"],
]


def test_fill_identity_decides_as_the_message_text() -> None:
    """Two fills are copies for the intake exactly when topic and JSON text of both are equal,
    their ``ts`` aside (a gateway re-sending a fill restamps it)."""
    from tracker.core.messages import wire_fields
    from tracker.edge.intake import _identity
    from tracker.edge.wire import decode

    def text(message: Inbound) -> str:
        """The message's JSON text at full precision (times as UTC text)."""
        values = {name: getattr(message, name) for name in wire_fields(message) if name != "ts"}
        return json.dumps(
            {key: str(v) if isinstance(v, datetime) else v for key, v in values.items()}
        )

    messages = [
        (f"tracker/fills/{p['order_id']}", decode(f"tracker/fills/{p['order_id']}", p))
        for p in FILL_VARIANTS
    ]
    pairs = [(a, b) for a in messages for b in messages]
    expected = [(ta, text(a)) == (tb, text(b)) for (ta, a), (tb, b) in pairs]
    actual = [_identity(ta, a) == _identity(tb, b) for (ta, a), (tb, b) in pairs]
    # Equal pairs: the six ways of writing the first fill (one a later ts), the two prices of
    # 20, five singles.
    assert (expected, 6 * 6 + 2 * 2 + 5) == (actual, sum(expected))


def test_fill_written_differently_is_still_a_redelivery(tmp_path: Path) -> None:
    """A fill whose line differs only in how it writes the same values is a redelivery."""
    first = fill("F1", 100, 60)
    second = {**first, "payload": {**first["payload"], "quantity": 100.0, "side": None}}
    path = write(tmp_path, [order(0), first, second])
    errors, summary = run_file(path)
    expected = ([], 1, 100)
    assert expected == (errors, summary["replay"]["redelivered"], filled(summary))


def test_copy_of_a_rejected_line_is_rejected_again(tmp_path: Path) -> None:
    """Only accepted messages count as redelivered: a repeated bad fill is two errors."""
    line = fill("F1", 100, 60)
    line["payload"]["side"] = "sell"
    path = write(tmp_path, [order(0), line, line])
    errors, _ = run_file(path)
    expected = [2, 3]
    assert expected == [error.line for error in errors]


def test_two_replays_are_byte_identical(tmp_path: Path) -> None:
    """Two runs on the same input write byte-identical files."""
    path = write(
        tmp_path, [order(0), fill("F1", 100, 60), "oops", fill("F2", 200, 180), fill("F3", 7, 9)]
    )
    for name in ("a", "b"):
        write_outputs(replay(read_input(path), make_engine()), tmp_path / name)
    assert [(tmp_path / "a" / n).read_bytes() for n in OUTPUT_FILES] == [
        (tmp_path / "b" / n).read_bytes() for n in OUTPUT_FILES
    ]


def test_replay_leaves_the_garbage_collector_as_it_found_it(tmp_path: Path) -> None:
    """replay() freezes what each chunk leaves behind and unfreezes it at the end."""
    path = write(tmp_path, [order(0), fill("F1", 100, 60), "oops"])
    replay(read_input(path), make_engine())
    assert 0 == gc.get_freeze_count()


def test_replay_keeps_a_callers_frozen_objects_frozen(tmp_path: Path) -> None:
    """A caller that froze objects itself finds them still frozen, and no more, after replay()."""
    path = write(tmp_path, [order(0), fill("F1", 100, 60)])
    gc.freeze()
    try:
        frozen = gc.get_freeze_count()
        replay(read_input(path), make_engine())
        assert frozen == gc.get_freeze_count()
    finally:
        gc.unfreeze()


class Spy:
    """Wraps an engine and keeps every event it was given."""

    def __init__(self) -> None:
        self.engine = make_engine()
        self.events: list[Inbound] = []

    def handle(self, event: Inbound) -> list[Outbound]:
        self.events.append(event)
        return self.engine.handle(event)

    def reject(self, topic: str, payload: bytes | str, reason: str, ts: datetime) -> ErrorMessage:
        return self.engine.reject(topic, payload, reason, ts)

    def summary(self) -> dict[str, Any]:
        return self.engine.summary()


def tick_times(events: list[Inbound]) -> list[str]:
    """The times of the ticks among events, as ISO text."""
    return [at((e.ts - T0).total_seconds()) for e in events if isinstance(e, Tick)]


def test_ticks_are_derived_on_whole_intervals_between_lines(tmp_path: Path) -> None:
    """With no tick lines, ticks come at each whole second after one line and up to the next."""
    path = write(tmp_path, [order(0.5), fill("F1", 100, 3.0)])
    spy = Spy()
    replay(read_input(path), spy)
    assert [at(1), at(2), at(3)] == tick_times(spy.events)


def test_derived_tick_comes_before_a_line_at_the_same_time(tmp_path: Path) -> None:
    """A derived tick at exactly a line's time is handled before that line."""
    path = write(tmp_path, [order(0.5), fill("F1", 100, 2.0)])
    spy = Spy()
    replay(read_input(path), spy)
    expected = ["order", "tick", "tick", "fill"]
    assert expected == [e.type for e in spy.events]


def test_tick_interval_is_a_parameter(tmp_path: Path) -> None:
    """tick_seconds sets the interval of derived ticks."""
    path = write(tmp_path, [order(0), fill("F1", 100, 25)])
    spy = Spy()
    replay(read_input(path), spy, tick_seconds=10)
    assert [at(10), at(20)] == tick_times(spy.events)


def test_recorded_ticks_are_not_doubled(tmp_path: Path) -> None:
    """When the input holds tick lines, only those ticks reach the engine."""
    tick = {"topic": "tracker/tick", "payload": {"type": "tick", "ts": at(7)}, "ts": at(7)}
    path = write(tmp_path, [order(0), tick, fill("F1", 100, 25)])
    spy = Spy()
    replay(read_input(path), spy)
    assert [at(7)] == tick_times(spy.events)


def test_rejected_line_does_not_move_time(tmp_path: Path) -> None:
    """A line rejected before the engine sees it derives no ticks."""
    path = write(tmp_path, [order(0), fill("F1", -1, 5)])
    spy = Spy()
    replay(read_input(path), spy)
    expected = []
    assert expected == tick_times(spy.events)


def test_late_fill_without_line_ts_is_accepted(tmp_path: Path) -> None:
    """A line recorded without ts is left to the engine's rules: a late fill still counts."""
    late = fill("F1", 100, 60)
    early = fill("F2", 100, 30)
    del late["ts"], early["ts"]
    path = write(tmp_path, [order(0), late, early])
    errors, summary = run_file(path)
    expected: tuple[list[int], int] = ([], 200)
    assert expected == ([error.line for error in errors], filled(summary))


def test_line_without_ts_moves_ticks_by_the_message_time(tmp_path: Path) -> None:
    """A line recorded without ts derives ticks from the message's own ts."""
    line = fill("F1", 100, 2.5)
    del line["ts"]
    path = write(tmp_path, [order(0.5), line])
    spy = Spy()
    replay(read_input(path), spy)
    assert [at(1), at(2)] == tick_times(spy.events)


def test_journal_is_replayed_with_its_own_ticks(tmp_path: Path) -> None:
    """A journal's records are fed as journaled: its ticks only, a late fill still counted."""
    from tracker.shell.journal import Journal

    path = tmp_path / "day.sqlite"
    late = fill("F2", 50, 30)
    late["ts"] = at(65)  # received after F1, executed before it
    with Journal(path, durability="normal") as journal:
        for line in (order(0), fill("F1", 100, 60), late):
            payload = json.dumps(line["payload"]).encode()
            journal.append(line["topic"], payload, line["ts"])
        journal.append("tracker/tick", json.dumps({"type": "tick", "ts": at(70)}).encode(), at(70))
    spy = Spy()
    result = replay(read_input(path), spy)
    expected = ([], 150, [at(70)])
    assert expected == (
        [e.line for e in result.errors],
        filled(result.summary),
        tick_times(spy.events),
    )


def test_reader_keeps_raw_text_payload() -> None:
    """A line whose payload is text hands the text on as it is (it may be malformed)."""
    lines = list(read_jsonl_text('{"topic": "tracker/control", "payload": "{nope", "ts": null}'))
    assert [Record(line=1, topic="tracker/control", payload="{nope", ts=None)] == lines


def read_jsonl_text(text: str) -> list[Record | BadLine]:
    """parse lines of text as read_jsonl would."""
    from tracker.edge.recordings import parse_line

    return [parse_line(n, line) for n, line in enumerate(text.splitlines(), start=1)]


def test_reader_flags_invalid_utf8(tmp_path: Path) -> None:
    """A line that is not UTF-8 is a bad line naming the encoding."""
    path = tmp_path / "in.jsonl"
    path.write_bytes(b'{"topic": "tracker/control", "payload": "\xff"}\n')
    (line,) = list(read_jsonl(path))
    assert isinstance(line, BadLine) and "UTF-8" in line.reason


def test_missing_input_is_an_input_error(tmp_path: Path) -> None:
    """A missing input file is an InputError naming the file."""
    with pytest.raises(InputError, match=r"nothing\.jsonl"):
        read_input(tmp_path / "nothing.jsonl")


def test_replayer_rejects_a_bad_tick_interval() -> None:
    """tick_seconds must be positive."""
    with pytest.raises(InputError, match="tick_seconds"):
        Intake(make_engine(), tick_seconds=0)


def test_summary_writes_nan_as_null() -> None:
    """summary.json never holds NaN (not JSON): it becomes null."""
    expected = '{\n  "x": null\n}\n'
    assert expected == dumps_summary({"x": float("nan")})


def test_cli_writes_the_five_files(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """`tracker replay INPUT --out DIR` writes the four JSON Lines files and summary.json."""
    path = write(tmp_path, [order(0), fill("F1", 100, 60)])
    code = main(["replay", str(path), "--out", str(tmp_path / "out"), "--no-progress"])
    assert (0, sorted(OUTPUT_FILES)) == (code, sorted(p.name for p in (tmp_path / "out").iterdir()))


def test_cli_summary_lists_the_order(tmp_path: Path) -> None:
    """summary.json lists each order with the fields the desk reads."""
    path = write(tmp_path, [order(0), fill("F1", 100, 60)])
    main(["replay", str(path), "--out", str(tmp_path / "out"), "--no-progress"])
    (entry,) = json.loads((tmp_path / "out" / "summary.json").read_text())["orders"]
    expected = {"order_id", "quantity", "filled", "average_price", "arrival_price"}
    assert expected <= set(entry)


def test_cli_bad_config_exits_2(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """A config file that is not TOML is a one-line error and exit code 2."""
    path = write(tmp_path, [order(0)])
    config = tmp_path / "engine.toml"
    config.write_text("this is = = not toml\n")
    code = main(["replay", str(path), "--out", str(tmp_path / "out"), "--config", str(config)])
    expected = (2, True)
    assert expected == (code, "engine.toml" in capsys.readouterr().err)


def test_cli_profile_named_for_another_symbol_exits_2(tmp_path: Path) -> None:
    """A profile file must be named for the symbol it holds."""
    from tracker.core.profiles import default_profile

    folder = tmp_path / "profiles"
    folder.mkdir()
    (folder / "X_KALO.json").write_text(json.dumps(default_profile("X_ZEPH").to_mapping()))
    path = write(tmp_path, [order(0)])
    code = main(["replay", str(path), "--out", str(tmp_path / "out"), "--profiles", str(folder)])
    expected = 2
    assert expected == code


def test_cli_progress_on_request_goes_to_stderr(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """--progress draws the bar on stderr, never on stdout."""
    path = write(tmp_path, [order(0), fill("F1", 100, 60)])
    main(["replay", str(path), "--out", str(tmp_path / "out"), "--progress"])
    captured = capsys.readouterr()
    expected = (True, False)
    assert expected == ("2/2" in captured.err, "2/2" in captured.out)


def test_cli_no_progress_when_not_a_terminal(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """Without --progress and with stderr not a terminal, stderr stays empty."""
    path = write(tmp_path, [order(0), fill("F1", 100, 60)])
    main(["replay", str(path), "--out", str(tmp_path / "out")])
    expected = ""
    assert expected == capsys.readouterr().err


def test_cli_replays_a_journal_like_its_jsonl(tmp_path: Path) -> None:
    """A journal and a JSON Lines file with the same messages and ticks give the same outputs."""
    from tracker.shell.journal import Journal

    tick = {"topic": "tracker/tick", "payload": {"type": "tick", "ts": at(61)}, "ts": at(61)}
    lines = [order(0), fill("F1", 100, 60), tick, fill("F2", 50, 90)]
    path = write(tmp_path, lines)
    with Journal(tmp_path / "day.sqlite", durability="normal") as journal:
        for line in lines:
            journal.append(line["topic"], json.dumps(line["payload"]).encode(), line["ts"])
    main(["replay", str(path), "--out", str(tmp_path / "a"), "--no-progress"])
    main(["replay", str(tmp_path / "day.sqlite"), "--out", str(tmp_path / "b"), "--no-progress"])
    assert [(tmp_path / "a" / n).read_bytes() for n in OUTPUT_FILES] == [
        (tmp_path / "b" / n).read_bytes() for n in OUTPUT_FILES
    ]


def test_cli_config_file_sets_engine_thresholds(tmp_path: Path) -> None:
    """--config reads the [engine] table of a TOML file (as the daemon's config has it)."""
    from tracker.shell.files import load_engine_config as load_config

    config = tmp_path / "tracker.toml"
    config.write_text("[engine]\nexpiry_grace_seconds = 30\n")
    expected = (30, None)
    settings, root = load_config(config)
    assert expected == (settings.expiry_grace_seconds, root)


def test_cli_config_unknown_threshold_exits_2(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """An unknown engine threshold is a one-line error naming it, exit code 2."""
    config = tmp_path / "engine.json"
    config.write_text('{"no_such_threshold": 1}')
    path = write(tmp_path, [order(0)])
    code = main(["replay", str(path), "--out", str(tmp_path / "out"), "--config", str(config)])
    expected = (2, True)
    assert expected == (code, "no_such_threshold" in capsys.readouterr().err)


def test_cli_profiles_folder_is_used(tmp_path: Path) -> None:
    """With a profile for X_ZEPH in --profiles, the default-profile alert does not appear."""
    from tracker.core.profiles import default_profile

    folder = tmp_path / "profiles"
    folder.mkdir()
    (folder / "X_ZEPH.json").write_text(json.dumps(default_profile("X_ZEPH").to_mapping()))
    bin_line = {
        "topic": "tracker/bins/X_ZEPH",
        "payload": {
            "type": "bin",
            "symbol": "X_ZEPH",
            "start": at(0),
            "end": at(300),
            "volume": 10_000,
            "vwap": 20.0,
            "open": 20.0,
            "high": 20.1,
            "low": 19.9,
            "close": 20.0,
            "spread": 0.02,
            "ts": at(301),
        },
        "ts": at(301),
    }
    path = write(tmp_path, [order(0), bin_line])
    for name, extra in (("with", ["--profiles", str(folder)]), ("without", [])):
        main(["replay", str(path), "--out", str(tmp_path / name), "--no-progress", *extra])
    codes = {
        name: [
            json.loads(x)["code"]
            for x in (tmp_path / name / "alerts.jsonl").read_text().splitlines()
        ]
        for name in ("with", "without")
    }
    expected = (False, True)
    assert expected == ("default_profile" in codes["with"], "default_profile" in codes["without"])


def test_reader_ignores_a_byte_order_mark(tmp_path: Path) -> None:
    """A UTF-8 byte-order mark before the first line is not an error."""
    path = tmp_path / "in.jsonl"
    path.write_text("\ufeff" + json.dumps(order(0)) + "\n", encoding="utf-8")
    (line,) = list(read_jsonl(path))
    assert isinstance(line, Record)


def test_cli_takes_the_root_from_a_daemon_config(tmp_path: Path) -> None:
    """With the daemon's config file, a recording under its topic root replays without errors."""
    config = tmp_path / "tracker.toml"
    config.write_text('[daemon]\nroot = "desk7"\n\n[engine]\nexpiry_grace_seconds = 5\n')
    lines = [order(0), fill("F1", 100, 60)]
    for line in lines:
        line["topic"] = line["topic"].replace("tracker/", "desk7/", 1)
    path = write(tmp_path, lines)
    main(["replay", str(path), "--out", str(tmp_path / "out"), "--config", str(config)])
    expected = b""
    assert expected == (tmp_path / "out" / "errors.jsonl").read_bytes()


def test_cli_root_flag_names_the_engine_error_topics(tmp_path: Path) -> None:
    """--root is the root of the recording and of the topics in the engine's error records."""
    line = fill("F1", 100, 60, order_id="ORD9")
    line["topic"] = "desk7/fills/ORD9"
    line["payload"] = {
        "type": "fill_correction",
        "action": "bust",
        "fill_id": "F1",
        "order_id": "ORD9",
        "ts": at(60),
    }
    path = write(tmp_path, [line])
    main(["replay", str(path), "--out", str(tmp_path / "out"), "--root", "desk7"])
    (error,) = (tmp_path / "out" / "errors.jsonl").read_text().splitlines()
    expected = "desk7/fills/ORD9"
    assert expected == json.loads(error)["topic"]


def test_cli_bad_root_exits_2(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """A topic root with an MQTT wildcard is refused before anything is read."""
    path = write(tmp_path, [order(0)])
    code = main(["replay", str(path), "--out", str(tmp_path / "out"), "--root", "desk/#"])
    expected = (2, True)
    assert expected == (code, "--root" in capsys.readouterr().err)


def test_repeated_tick_is_not_a_redelivery(tmp_path: Path) -> None:
    """Two equal tick lines both reach the engine; neither is an error or a redelivery."""
    tick = {"topic": "tracker/tick", "payload": {"type": "tick", "ts": at(7)}, "ts": at(7)}
    path = write(tmp_path, [order(0), tick, tick])
    spy = Spy()
    result = replay(read_input(path), spy)
    expected = ([at(7), at(7)], [], 0)
    assert expected == (
        tick_times(spy.events),
        result.errors,
        result.summary["replay"]["redelivered"],
    )

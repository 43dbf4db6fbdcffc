"""The daemon's fast paths give exactly what the general paths they stand in for give.

Each fast path (a fill's payload checked without pydantic, a message written as JSON without
the intermediate dict, ...) is held here to the path it shortens, on hand-made cases and on
values hypothesis makes up: same bytes, same message, same verdict, same reason.
"""

from __future__ import annotations

import dataclasses
import enum
import json
import typing
from datetime import UTC, datetime, timedelta, timezone
from typing import Any

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from tracker.core.messages import (
    FillMessage,
    Message,
    StatusMessage,
    Tick,
    float_text,
    json_object,
    json_text,
)
from tracker.edge.wire import encode

#: Every core message class (the members of the ``Message`` union, so a new one is covered).
CLASSES: list[type[Any]] = sorted(typing.get_args(Message), key=lambda cls: cls.__name__)


def reference_encode(message: Message) -> bytes:
    """How ``encode`` wrote a message before its fast path: ``json.dumps`` of ``json_object``."""
    return json.dumps(
        json_object(message), separators=(",", ":"), ensure_ascii=False, allow_nan=False
    ).encode("utf-8")


def outcome(write: Any, message: Message) -> tuple[str, Any]:
    """What writing a message gives: its bytes, or the kind of exception it raises."""
    try:
        return ("bytes", write(message))
    except (TypeError, ValueError) as exc:  # UnicodeEncodeError is a ValueError
        return ("raises", type(exc))


class Level(enum.IntEnum):
    LOW = 1


class Name(enum.StrEnum):
    ONE = "one"


class Price(float):
    pass


ZONES = st.sampled_from([UTC, timezone(timedelta(hours=-5)), timezone(timedelta(minutes=330))])
SCALARS = st.one_of(
    st.none(),
    st.booleans(),
    st.integers(),
    st.integers(min_value=-(10**30), max_value=10**30),
    st.floats(),  # NaN, infinities, -0.0, subnormals and huge ones included
    st.floats(min_value=-1e6, max_value=1e6).map(lambda x: round(x, 9)),
    st.text(),  # any code point: lone surrogates cannot be written as UTF-8, by either path
    st.datetimes(timezones=ZONES),
    st.sampled_from([Level.LOW, Name.ONE, Price(1.23456789), np.float64(2.5), np.int64(3)]),
)
VALUES = st.recursive(
    SCALARS,
    lambda inner: st.one_of(
        st.lists(inner, max_size=3),
        st.lists(inner, max_size=3).map(tuple),
        st.dictionaries(st.text(max_size=5), inner, max_size=3),
    ),
    max_leaves=6,
)


@st.composite
def messages(draw: st.DrawFn) -> Message:
    """A message of any class with any values in its fields (dataclasses do not check them)."""
    cls = draw(st.sampled_from(CLASSES))
    names = [item.name for item in dataclasses.fields(cls) if item.name != "fields_set"]
    values = {name: draw(VALUES) for name in names}
    message: Message = cls(**values)
    return message


@settings(max_examples=3000, deadline=None)
@given(messages())
def test_json_text_writes_what_json_dumps_of_json_object_writes(message: Message) -> None:
    """encode (field by field) gives the bytes json.dumps gave, or fails the same way."""
    assert outcome(reference_encode, message) == outcome(encode, message)


def test_json_text_of_a_fill_status() -> None:
    """A status as a fill makes it: the same text, floats rounded and -0.0 written as 0.0."""
    status = StatusMessage(
        order_id="X_ZEPH-1",
        symbol="X_ZEPH",
        side="buy",
        state="working",
        quantity=40_000,
        filled=500,
        remaining=39_500,
        progress_pct=1.25,
        planned_filled=612,
        deviation_shares=-112,
        deviation_pct=-0.28,
        deviation_bins=-0.0,
        average_price=20.123456789,
        arrival_price=None,
        limit_price=21.0,
        volume_scale=1.0000001,
        expected_cost=float("nan"),
        expected_cost_bps=float("inf"),
        plan_version=3,
        max_participation=0.1,
        cap_source="order",
        ts=datetime(2026, 3, 2, 14, 35, 0, 250_000, tzinfo=UTC),
    )
    assert reference_encode(status) == json_text(status).encode("utf-8")


def reference_float(value: float) -> str:
    """How a float was written before: rounded (``_plain``), then by ``json.dumps``."""
    return json.dumps(json_object(Tick(ts=value))["ts"], allow_nan=False)  # type: ignore[arg-type]


EDGES = [0.0, -0.0, 1e-4, -1e-4, 0.0001000001, 9.9999e-5, 0.00009999995, 5e-7, 4.9e-7, 1e9, -1e9]
EDGES += [999_999_999.999_999_5, 999_999_999.999_999, 123_456_789.123_456_5, 0.1 + 0.2, 2.675]
EDGES += [float("nan"), float("inf"), -float("inf"), 1e16, 1e300, 5e-324, 0.5, 20.0]


@settings(max_examples=20_000, deadline=None)
@given(
    st.one_of(
        st.floats(),
        st.floats(min_value=-2e9, max_value=2e9),
        st.floats(min_value=-1e-3, max_value=1e-3),
        st.integers(min_value=-(10**15), max_value=10**15).map(lambda n: n / 10**6),
        st.integers(min_value=-(10**16), max_value=10**16).map(lambda n: n / 10**7),
        st.sampled_from(EDGES),
    )
)
def test_float_text_is_the_rounded_repr(value: float) -> None:
    """float_text writes a float as rounding it and json.dumps wrote it (null when not finite)."""
    assert reference_float(value) == float_text(value)


# --------------------------------------------------------------------------------------------
# A fill's payload checked without pydantic (wire._common_fill)

GOOD_FILL: dict[str, Any] = {
    "type": "fill",
    "fill_id": "F0000001",
    "order_id": "X_ZEPH-1",
    "quantity": 500,
    "price": 20.5,
    "ts": "2026-03-02T14:35:00Z",
}
ABSENT = object()  # the field is left out
JSONABLE = st.one_of(st.none(), st.booleans(), st.integers(), st.floats(), st.text())

IDS = ["X_ZEPH-1", "a", "A" * 64, "A" * 65, "", "X ZEPH", "X/ZEPH", "é", 7, None, True, ["a"]]
NUMBERS = [1, 500, 10**12, 10**12 + 1, 0, -5, 2.5, 500.0, 1e12, 1e13, -0.0, True, False, "500"]
NUMBERS += [None, 1e400, 10**400, 0.000001]
TIMES = ["2026-03-02T14:35:00Z", "2026-03-02T14:35:00+01:00", "2026-03-02T14:35:00.123456-05:00"]
TIMES += ["2026-03-02T14:35:00", "2026-03-02", "yesterday", "", 1_700_000_000, None]
TIMES += ["2026-03-02T14:35:00+24:00", "2026-02-30T14:35:00Z", "2026-03-02 14:35Z"]
SIDES = ["buy", "sell", "BUY", "short", "", None, 1, True]
FIELD_VALUES: dict[str, list[Any]] = {
    "fill_id": [ABSENT, *IDS],
    "order_id": [ABSENT, *IDS],
    "quantity": [ABSENT, *NUMBERS],
    "price": [ABSENT, *NUMBERS, 20.123456789],
    "ts": [ABSENT, *TIMES],
    "side": [ABSENT, *SIDES],
    "version": [ABSENT, "1.1", "1.0", None, 1.1, ""],
    "source": [ABSENT, "gw", "g w", None, 3, "x" * 65],
    "seq": [ABSENT, 1, 2, 10**12, 10**12 + 1, 0, -1, 1.0, True, "1", None],
    "type": ["fill"],
}


@st.composite
def fill_payloads(draw: st.DrawFn) -> dict[str, Any]:
    """A fill's payload, mostly valid: each field kept, left out or changed to an odd value."""
    payload = dict(GOOD_FILL)
    for name, choices in FIELD_VALUES.items():
        if draw(st.integers(0, 3)) == 0:  # a quarter of the fields changed, on average
            value = draw(st.sampled_from(choices))
            if value is ABSENT:
                payload.pop(name, None)
            else:
                payload[name] = value
    if draw(st.integers(0, 9)) == 0:
        payload[draw(st.sampled_from(["venue", "liquidity", "Price", "seq_no"]))] = draw(JSONABLE)
    return payload


def decoded(topic: str, payload: bytes | dict[str, Any], *, general: bool) -> tuple[Any, ...]:
    """What decode_reading says, through the fast path or (``general``) pydantic alone."""
    import unittest.mock

    from tracker.edge import wire

    fast = (lambda data: None) if general else wire._common_fill
    with unittest.mock.patch.object(wire, "_common_fill", fast):
        try:
            message, unknown, stamp = wire.decode_reading(topic, payload)
        except wire.WireError as exc:
            return ("refused", exc.reason, exc.field, exc.order_id, exc.topic)
    return ("accepted", repr(message), message, unknown, stamp)


@settings(max_examples=4000, deadline=None)
@given(fill_payloads(), st.sampled_from(["tracker/fills/X_ZEPH-1", "tracker/fills/a"]))
def test_common_fill_gives_what_pydantic_gives(payload: dict[str, Any], topic: str) -> None:
    """A fill decodes to the same message, or is refused for the same reason, either way."""
    text = json.dumps(payload, allow_nan=True).encode("utf-8")
    assert decoded(topic, text, general=True) == decoded(topic, text, general=False)
    assert decoded(topic, payload, general=True) == decoded(topic, payload, general=False)


HAND_MADE = [
    GOOD_FILL,
    {**GOOD_FILL, "side": "sell", "version": "1.1", "source": "gw", "seq": 7},
    {**GOOD_FILL, "price": 20, "quantity": 10**12},
    {**GOOD_FILL, "ts": "2026-03-02T09:35:00.5-05:00"},
    {**GOOD_FILL, "quantity": 500.0},  # whole, but a float: the general path takes it
    {**GOOD_FILL, "source": "gw"},  # half a stamp
    {**GOOD_FILL, "seq": 3},
    {**GOOD_FILL, "side": None, "version": None, "source": None, "seq": None},
    {**GOOD_FILL, "venue": "X_HLX"},  # a field beyond the contract: kept as a fact
    {**GOOD_FILL, "quantity": True},
    {**GOOD_FILL, "price": 1e400},
    {**GOOD_FILL, "ts": "2026-03-02T14:35:00"},
    {**GOOD_FILL, "order_id": "X_ZEPH-2"},  # the topic says otherwise
    {**GOOD_FILL, "fill_id": "F 1"},
    {key: value for key, value in GOOD_FILL.items() if key != "price"},
]


def test_common_fill_on_hand_made_payloads() -> None:
    """The hand-made cases: valid, odd and refused fills decode alike by both paths."""
    topic = "tracker/fills/X_ZEPH-1"
    for payload in HAND_MADE:
        text = json.dumps(payload).encode("utf-8")
        assert decoded(topic, text, general=True) == decoded(topic, text, general=False)
    texts = [b'{"type":"fill","fill_id":"F1","fill_id":"F2"}', b'{"type":"fill","price":NaN}']
    for text in texts:
        assert decoded(topic, text, general=True) == decoded(topic, text, general=False)


def test_common_fill_takes_the_usual_fill() -> None:
    """The usual fill is taken by the fast path (else it would cost what it saves)."""
    from tracker.edge import wire

    message, stamp = wire._common_fill({**GOOD_FILL, "side": "buy", "source": "gw", "seq": 2}) or (
        None,
        None,
    )
    expected = FillMessage(
        fill_id="F0000001",
        order_id="X_ZEPH-1",
        quantity=500,
        price=20.5,
        side="buy",
        ts=datetime(2026, 3, 2, 14, 35, tzinfo=UTC),
    )
    assert (expected, ("gw", 2)) == (message, stamp)


@pytest.mark.parametrize(
    "text",
    [
        "\ufeff{}",
        "{not json",
        "[1, 2",
        '{"a": NaN}',
        '{"a": -Infinity}',
        "",
        "{} x",
        '{"a":1,"a":2}',
    ],
    ids=["bom", "not-json", "cut", "nan", "infinity", "empty", "trailing", "key-twice"],
)
def test_one_decoder_says_what_json_loads_said(text: str) -> None:
    """The one JSON decoder refuses a payload with the words json.loads used for it."""
    from tracker.edge import wire

    try:
        json.loads(text, parse_constant=wire._reject_constant, object_pairs_hook=wire._unique_keys)
    except wire._DuplicateKey as exc:
        expected = f"{exc}: the key appears twice in the payload; send each field once"
    except ValueError as exc:
        expected = f"payload is not valid JSON ({exc}); send one JSON object"
    with pytest.raises(wire.WireError) as info:
        wire.decode("tracker/fills/A", text)
    assert expected == info.value.reason


def test_a_fill_set_to_its_receive_time_is_replace_s_fill() -> None:
    """The intake's spelled-out copy of a fill at its receive time keeps every field, as
    dataclasses.replace does (a field added to FillMessage would be caught here)."""
    from tracker.edge.intake import _at_time

    values: dict[str, Any] = {
        item.name: f"value-{item.name}" for item in dataclasses.fields(FillMessage)
    }
    values["extra"] = {"venue": "X_HLX"}
    fill = FillMessage(**values)
    received = datetime(2026, 3, 2, 14, 35, 1, tzinfo=UTC)
    expected = dataclasses.replace(fill, ts=received)
    actual = _at_time(fill, received)
    assert (expected, repr(expected)) == (actual, repr(actual))


# --------------------------------------------------------------------------------------------
# One event through Engine.handle_many (Engine._handle_one)


class SolveFailsAt:
    """Stands in for ``planning.solve_problems``: raises at the ``nth`` call with problems."""

    def __init__(self, nth: int) -> None:
        from tracker.core.engine import planning

        self.real = planning.solve_problems
        self.calls = 0
        self.nth = nth

    def __call__(self, problems: Any) -> Any:
        self.calls += 1
        if self.calls == self.nth:
            raise RuntimeError("injected: a solver raising what it should not")
        return self.real(problems)


def _failures() -> dict[str, tuple[str, Any]]:
    from tests.test_engine_failures import ApplyFailsOnce, FailOnce

    return {
        "none": ("", None),
        "preparing": ("build_problem", lambda: FailOnce(first_bin=6)),
        "applying": ("apply_replan", lambda: ApplyFailsOnce(nth=100)),
        "solving": ("solve_problems", lambda: SolveFailsAt(nth=40)),
    }


@pytest.mark.parametrize("failure", ["none", "preparing", "applying", "solving"])
def test_one_event_at_a_time_is_the_run_of_one(
    failure: str, monkeypatch: pytest.MonkeyPatch
) -> None:
    """The golden day one event at a time through handle_many's short way gives the outputs,
    and leaves the state, that its run of one event gives, a failure injected or none."""
    from tests.test_engine_failures import decoded_day, fingerprint
    from tracker.core.engine import Engine, planning

    events = decoded_day()
    name, make = _failures()[failure]
    results = []
    for one_at_a_time in (True, False):
        stub = make() if make is not None else None
        if stub is not None:
            monkeypatch.setattr(planning, name, stub)
        engine = Engine()
        outputs = [
            engine.handle_many([event]) if one_at_a_time else engine._handle_run([event])
            for event in events
        ]
        encoded = [[encode(out) for out in outs] for [outs] in outputs]
        results.append((encoded, fingerprint(engine), engine.summary()))
    failed = sum(b'"internal_error"' in line for outs in results[0][0] for line in outs)
    # A shared solve that fails hands its event over to handle, which solves it again.
    assert {"none": 0, "preparing": 1, "applying": 1, "solving": 0}[failure] == failed
    assert failure != "solving" or stub.calls > stub.nth  # it did fail once, and was redone
    assert results[1] == results[0]


# --------------------------------------------------------------------------------------------
# The outbox's confirmation (Outbox.done without the whole of _changed)

OUTBOX_STEPS = st.lists(
    st.one_of(
        st.tuples(st.just("extend"), st.integers(0, 4)),
        st.tuples(st.just("take"), st.integers(1, 4)),
        st.tuples(st.just("done"), st.integers(0, 12)),
        st.tuples(st.just("requeue"), st.just(0)),
    ),
    max_size=40,
)


@settings(max_examples=500, deadline=None)
@given(OUTBOX_STEPS, st.integers(1, 6))
def test_outbox_events_say_what_its_contents_say(steps: list[tuple[str, int]], cap: int) -> None:
    """After any sequence of additions, takes, confirmations (of messages in flight or not)
    and requeues, the outbox's events are what _changed makes of its contents."""
    import asyncio

    from tracker.shell.bus import Outbox, Outgoing

    async def run() -> None:
        outbox = Outbox(capacity=cap)
        made = 0
        for step, count in steps:
            if step == "extend":
                outbox.extend(Outgoing(topic=f"t/{made + i}", payload=b"") for i in range(count))
                made += count
            elif step == "take" and outbox._queue:
                await outbox.take_many(count)
            elif step == "done":
                outbox.done(count)
            elif step == "requeue":
                outbox.requeue_in_flight()
            size = len(outbox)
            expected = (bool(outbox._queue), size < cap, size == 0)
            actual = (outbox._ready.is_set(), outbox._room.is_set(), outbox._empty.is_set())
            assert expected == actual

    asyncio.run(run())


# --------------------------------------------------------------------------------------------
# A fill in time, judged by the intake's short way (Intake._judge_time)

MICRO = timedelta(microseconds=1)


@pytest.mark.parametrize(
    ("offset", "skewed"),
    [
        (timedelta(0), False),
        (timedelta(seconds=5), False),  # ts_ahead_seconds (default 5): at the bound is in time
        (timedelta(seconds=5) + MICRO, True),
        (-timedelta(seconds=3600), False),  # fill_ts_behind_seconds (default 3,600)
        (-timedelta(seconds=3600) - MICRO, True),
        (-timedelta(seconds=901), False),  # beyond ts_behind_seconds, which is not a fill's
    ],
    ids=["same", "ahead-bound", "past-ahead", "behind-bound", "past-behind", "order-bound"],
)
def test_a_fill_at_the_bounds_of_its_receive_time(offset: timedelta, skewed: bool) -> None:
    """A fill stamped within its tolerances is taken without remark, at the bounds too; a
    microsecond beyond either, it is taken with a clock_skew alert (the common rule for every
    message: the engine's settings, common practice for clocks of two machines)."""
    from tests.test_time import alerts, at, fill, order, replay

    lines = replay([(at(-30), order("A", at(-30))), (at(5), fill("F1", at(5) + offset))])
    assert skewed == bool(alerts(lines[1], "clock_skew"))


def test_common_fill_checks_every_field_of_the_model() -> None:
    """The fast path checks exactly the fields of the fill's model: a field added to the model
    must be checked there too (or the fill would pass it unchecked)."""
    from tracker.edge import wire

    assert set(wire.FillPayload.model_fields) == set(wire._FILL_FIELDS)

"""The daemon's fast paths give exactly what the general paths they stand in for give.

Each fast path (a fill's payload checked without pydantic, a message written as JSON without
the intermediate dict, ...) is held here to the path it shortens, on hand-made cases and on
values hypothesis makes up: same bytes, same message, same verdict, same reason.
"""

from __future__ import annotations

import dataclasses
import enum
import json
from datetime import UTC, datetime, timedelta, timezone
from typing import Any

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st

from tracker.core.messages import (
    AckMessage,
    AlertMessage,
    BinMessage,
    ControlMessage,
    ErrorMessage,
    FillCorrectionMessage,
    FillMessage,
    Message,
    OrderMessage,
    StatusMessage,
    TargetMessage,
    Tick,
    float_text,
    json_object,
    json_text,
)
from tracker.edge.wire import encode

CLASSES: list[type[Any]] = [
    AckMessage,
    AlertMessage,
    BinMessage,
    ControlMessage,
    ErrorMessage,
    FillCorrectionMessage,
    FillMessage,
    OrderMessage,
    StatusMessage,
    TargetMessage,
    Tick,
]


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

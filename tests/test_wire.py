"""Wire contract v1: decoding, validation errors, topics and deterministic encoding."""

from __future__ import annotations

import json
from datetime import UTC, datetime
from typing import Any

import pytest

from tracker.core.formats import rounded
from tracker.edge.wire import (
    MAX_ERROR_PAYLOAD,
    AckMessage,
    AlertMessage,
    AlertPayload,
    BinMessage,
    ControlMessage,
    ErrorMessage,
    ErrorPayload,
    FillMessage,
    OrderMessage,
    Outbound,
    StatusMessage,
    StatusPayload,
    TargetMessage,
    TargetPayload,
    Tick,
    WireError,
    decode,
    decode_output,
    decode_reading,
    encode,
    oversize_note,
    payload_text,
    to_json_object,
    topic_of,
)

TS = "2026-03-02T14:35:00Z"

ORDER: dict[str, Any] = {
    "type": "order",
    "action": "new",
    "order_id": "X_ZEPH-1",
    "symbol": "X_ZEPH",
    "side": "buy",
    "quantity": 40_000,
    "start": "2026-03-02T14:30:00Z",
    "end": "2026-03-02T21:00:00Z",
    "ts": TS,
}
FILL: dict[str, Any] = {
    "type": "fill",
    "fill_id": "f-1",
    "order_id": "X_ZEPH-1",
    "quantity": 500,
    "price": 20.5,
    "ts": TS,
}
BIN: dict[str, Any] = {
    "type": "bin",
    "symbol": "X_ZEPH",
    "start": "2026-03-02T14:30:00Z",
    "end": "2026-03-02T14:35:00Z",
    "volume": 12_000,
    "vwap": 20.4,
    "open": 20.3,
    "high": 20.6,
    "low": 20.2,
    "close": 20.5,
    "spread": 0.02,
    "ts": TS,
}
CONTROL: dict[str, Any] = {"type": "control", "command": "halt", "ts": TS}


def with_(base: dict[str, Any], **changes: Any) -> str:
    """The JSON text of ``base`` with fields changed (a value of ... removes the field)."""
    data = {**base, **changes}
    return json.dumps({key: value for key, value in data.items() if value is not ...})


VALID = [
    ("tracker/orders/X_ZEPH-1", json.dumps(ORDER), OrderMessage),
    ("tracker/fills/X_ZEPH-1", json.dumps(FILL), FillMessage),
    ("tracker/bins/X_ZEPH", json.dumps(BIN), BinMessage),
    ("tracker/control", json.dumps(CONTROL), ControlMessage),
    ("tracker/tick", json.dumps({"type": "tick", "ts": TS}), Tick),
]


@pytest.mark.parametrize(
    ("topic", "payload", "kind"), VALID, ids=["order", "fill", "bin", "control", "tick"]
)
def test_valid_messages_decode_to_their_model(topic: str, payload: str, kind: type) -> None:
    """Each valid inbound message decodes to its frozen model."""
    assert kind is type(decode(topic, payload))


def test_times_are_normalised_to_utc() -> None:
    """A time with a non-UTC offset is stored as the same instant in UTC."""
    message = decode("tracker/fills/X_ZEPH-1", with_(FILL, ts="2026-03-02T09:35:00-05:00"))
    assert datetime(2026, 3, 2, 14, 35, tzinfo=UTC) == message.ts


def test_models_are_frozen() -> None:
    """Decoded messages cannot be changed afterwards."""
    message = decode("tracker/fills/X_ZEPH-1", json.dumps(FILL))
    with pytest.raises(AttributeError):  # frozen dataclass: FrozenInstanceError
        message.quantity = 1  # type: ignore[misc]


def test_parsed_mapping_payload_is_accepted() -> None:
    """A payload already parsed into a mapping decodes like its JSON text."""
    assert decode("tracker/fills/X_ZEPH-1", json.dumps(FILL)) == decode(
        "tracker/fills/X_ZEPH-1", FILL
    )


INVALID = [
    ("tracker/fills/X_ZEPH-1", "{not json", "not valid JSON"),
    ("tracker/fills/X_ZEPH-1", b"\xff\xfe", "not UTF-8"),
    ("tracker/fills/X_ZEPH-1", "[1, 2]", "must be a JSON object"),
    ("tracker/fills/X_ZEPH-1", with_(FILL, type=...), "type: is required"),
    ("tracker/fills/X_ZEPH-1", with_(FILL, type="trade"), "unknown message type 'trade'"),
    ("tracker/orders/X_ZEPH-1", json.dumps(FILL), "publish fill messages to tracker/fills/"),
    ("tracker/fills/X_ZEPH-1", with_(FILL, quantity=-5), "quantity: must be greater than 0"),
    ("tracker/fills/X_ZEPH-1", with_(FILL, quantity=0), "quantity: must be greater than 0"),
    ("tracker/fills/X_ZEPH-1", with_(FILL, quantity=2.5), "whole shares"),
    ("tracker/fills/X_ZEPH-1", with_(FILL, quantity="500"), "must be a JSON number"),
    ("tracker/fills/X_ZEPH-1", with_(FILL, quantity=True), "must be a JSON number"),
    ("tracker/fills/X_ZEPH-1", with_(FILL, quantity=float("nan")), "NaN is not valid JSON"),
    ("tracker/fills/X_ZEPH-1", with_(FILL, price=float("inf")), "Infinity is not valid JSON"),
    ("tracker/fills/X_ZEPH-1", with_(FILL, price=0), "price: must be greater than 0"),
    ("tracker/fills/X_ZEPH-1", with_(FILL, ts="2026-03-02T14:35:00"), "must carry a UTC offset"),
    ("tracker/fills/X_ZEPH-1", with_(FILL, ts="yesterday"), "ts: must be an ISO 8601 time"),
    ("tracker/fills/X_ZEPH-1", with_(FILL, fill_id=...), "fill_id: is required"),
    (
        "tracker/fills/X_ZEPH-1",
        json.dumps(
            {
                "type": "fill_correction",
                "action": "correct",
                "fill_id": "F1",
                "order_id": "X_ZEPH-1",
                "ts": TS,
            }
        ),
        "a correction needs the new quantity, the new price or both",
    ),
    ("tracker/fills/X_ZEPH-2", json.dumps(FILL), "payload says 'X_ZEPH-1' but the topic says"),
    ("tracker/fills/X_ZEPH-1", with_(FILL, order_id="X_ZEPH 1"), "order_id: must be 1 to 64"),
    ("tracker/fills/X_ZEPH-1", with_(FILL, side="short"), "side: must be 'buy' or 'sell'"),
    ("tracker/orders/X_ZEPH-1", with_(ORDER, side=...), "missing: side"),
    ("tracker/orders/X_ZEPH-1", with_(ORDER, action="replace"), "action: must be"),
    ("tracker/orders/X_ZEPH-1", with_(ORDER, end=ORDER["start"]), "end must be after start"),
    ("tracker/orders/X_ZEPH-1", with_(ORDER, max_participation=1.5), "fraction in (0, 1]"),
    ("tracker/orders/X_ZEPH-1", with_(ORDER, limit_price=-1), "limit_price: must be greater"),
    ("tracker/orders/X_ZEPH-1", with_(ORDER, urgency="asap"), "urgency: must be"),
    (
        "tracker/orders/X_ZEPH-1",
        json.dumps({"type": "order", "action": "amend", "order_id": "X_ZEPH-1", "ts": TS}),
        "an amend must change at least one of",
    ),
    (
        "tracker/fills/X_ZEPH-1",
        json.dumps(
            {"type": "fill_correction", "action": "undo", "fill_id": "F1", "order_id": "X_ZEPH-1"}
            | {"ts": TS}
        ),
        "action: must be 'bust' or 'correct'",
    ),
    ("tracker/bins/X_ZEPH", with_(BIN, high=20.0), "high (20.0) must be at least low"),
    ("tracker/bins/X_ZEPH", with_(BIN, close=21.0), "close (21.0) must lie between"),
    ("tracker/bins/X_ZEPH", with_(BIN, volume=-1), "volume: must be 0 or more"),
    ("tracker/bins/X_ZEPH", with_(BIN, vwap=None), "vwap is required when volume > 0"),
    ("tracker/bins/X_ZEPH", with_(BIN, spread=-0.01), "spread: must be 0 or more"),
    ("tracker/control", with_(CONTROL, command="pause"), "command: must be 'halt' or 'resume'"),
    ("tracker/bins", json.dumps(BIN), "is not an inbound topic"),
    ("other/bins/X_ZEPH", json.dumps(BIN), "outside the root 'tracker'"),
    ("tracker/targets/X_ZEPH-1", json.dumps(FILL), "is not an inbound topic"),
]


@pytest.mark.parametrize(
    ("topic", "payload", "expected"),
    INVALID,
    ids=[
        "not-json",
        "not-utf8",
        "not-object",
        "no-type",
        "unknown-type",
        "wrong-topic-for-type",
        "negative-quantity",
        "zero-quantity",
        "fractional-quantity",
        "string-quantity",
        "bool-quantity",
        "nan-quantity",
        "infinite-price",
        "zero-price",
        "naive-time",
        "bad-time",
        "missing-fill-id",
        "correction-without-values",
        "topic-id-mismatch",
        "bad-id-characters",
        "bad-side",
        "new-without-side",
        "unknown-action",
        "end-before-start",
        "participation-above-one",
        "negative-limit",
        "unknown-urgency",
        "empty-amend",
        "unknown-correction-action",
        "high-below-low",
        "close-outside-range",
        "negative-volume",
        "missing-vwap",
        "negative-spread",
        "unknown-command",
        "bins-without-symbol",
        "foreign-root",
        "outbound-topic",
    ],
)
def test_invalid_message_raises_wire_error_with_reason(
    topic: str, payload: str | bytes, expected: str
) -> None:
    """Each invalid inbound message raises WireError whose reason says what to fix."""
    with pytest.raises(WireError) as info:
        decode(topic, payload)
    assert expected in info.value.reason
    assert topic == info.value.topic


def test_unknown_fields_are_accepted_named_and_kept_by_a_fill() -> None:
    """Tolerant reading: fields beyond the contract cost nothing; a fill keeps them."""
    payload = with_(FILL, venue="X_HLX", exec_id="E-7", liquidity="added")
    message, unknown, stamp = decode_reading("tracker/fills/X_ZEPH-1", payload)
    assert isinstance(message, FillMessage)
    expected = (("exec_id", "liquidity", "venue"), {"exec_id": "E-7", "liquidity": "added"}, None)
    assert expected == (unknown, {k: message.extra[k] for k in ("exec_id", "liquidity")}, stamp)


def test_sequence_stamp_is_read_not_kept_as_an_extra_field() -> None:
    """``source`` and ``seq`` are contract fields: returned as the stamp, not among the extras."""
    payload = with_(FILL, source="gw-1", seq=7)
    message, unknown, stamp = decode_reading("tracker/fills/X_ZEPH-1", payload)
    assert isinstance(message, FillMessage)
    assert ((), {}, ("gw-1", 7)) == (unknown, dict(message.extra), stamp)


def test_cancel_that_echoes_the_order_decodes() -> None:
    """A cancel repeating the order's fields (symbol, side, quantity, start, end) is a cancel."""
    message = decode("tracker/orders/X_ZEPH-1", with_(ORDER, action="cancel"))
    assert isinstance(message, OrderMessage)
    assert ("cancel", "X_ZEPH-1") == (message.action, message.order_id)


def test_custom_root_is_honoured() -> None:
    """Topics are checked against the configured root."""
    assert isinstance(decode("desk7/fills/X_ZEPH-1", json.dumps(FILL), root="desk7"), FillMessage)


def test_amend_null_limit_removes_the_limit() -> None:
    """An amend with "limit_price": null is an explicit removal of the limit."""
    payload = {"type": "order", "action": "amend", "order_id": "A", "limit_price": None, "ts": TS}
    message = decode("tracker/orders/A", payload)
    assert isinstance(message, OrderMessage)
    assert message.removes_limit


def test_encode_is_deterministic_and_rounded() -> None:
    """Encoding rounds floats, sorts nested keys, writes UTC with Z, and never writes -0.0."""
    ts = datetime(2026, 3, 2, 14, 35, tzinfo=UTC)
    alert = AlertMessage(
        order_id="A",
        code="behind_plan",
        severity="warning",
        message="m",
        details={"z": 1.23456789, "a": -1e-9},
        ts=ts,
    )
    expected = (
        b'{"type":"alert","version":"1.1","order_id":"A","symbol":null,"code":"behind_plan","severity":"warning",'
        b'"state":"raised","message":"m","details":{"a":0.0,"z":1.234568},'
        b'"ts":"2026-03-02T14:35:00Z"}'
    )
    assert expected == encode(alert)


def test_topics_of_outbound_messages() -> None:
    """Every outbound message goes to its documented topic."""
    ts = datetime(2026, 3, 2, 14, 35, tzinfo=UTC)
    target = TargetMessage(
        order_id="A",
        symbol="X_ZEPH",
        side="buy",
        bin_start=ts,
        bin_end=ts,
        quantity=1,
        cumulative_target=1,
        remaining=1,
        max_quantity=None,
        plan_version=1,
        ts=ts,
    )
    status = StatusMessage(
        order_id="A",
        symbol="X_ZEPH",
        side="buy",
        state="working",
        quantity=1,
        filled=0,
        remaining=1,
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
    order_alert = AlertMessage(order_id="A", code="c", severity="info", message="m", ts=ts)
    symbol_alert = AlertMessage(
        order_id=None, symbol="X_ZEPH", code="c", severity="info", message="m", ts=ts
    )
    engine_alert = AlertMessage(order_id=None, code="c", severity="info", message="m", ts=ts)
    error = ErrorMessage(reason="r", topic="t", payload="p", ts=ts)
    ack = AckMessage(order_id="A", action="new", result="accepted", ts=ts)
    expected = [
        "r/targets/A",
        "r/status/A",
        "r/alerts/A",
        "r/alerts/symbol/X_ZEPH",
        "r/alerts/engine/all",
        "r/errors",
        "r/acks/A",
    ]
    messages = (target, status, order_alert, symbol_alert, engine_alert, error, ack)
    actual = [topic_of(m, "r") for m in messages]
    assert expected == actual


def test_error_payload_is_truncated() -> None:
    """Raw payloads kept for error records are cut to the documented length, and say so."""
    expected = "x" * MAX_ERROR_PAYLOAD + "... [truncated: 5,000 characters in all]"
    assert expected == payload_text("x" * 5_000)


def test_error_payload_of_bytes_gives_the_size_in_bytes() -> None:
    """A raw payload of 100 MB is cut without decoding it all, and its size is given in bytes."""
    expected = "y" * MAX_ERROR_PAYLOAD + "... [truncated: 100,000,000 bytes in all]"
    assert expected == payload_text(b"y" * 100_000_000)


def test_amend_carries_the_fields_it_set() -> None:
    """An amend knows which fields its payload carried, explicit nulls included."""
    payload = {
        "type": "order",
        "action": "amend",
        "order_id": "A",
        "quantity": 500,
        "urgency": None,
        "ts": TS,
    }
    message = decode("tracker/orders/A", payload)
    assert isinstance(message, OrderMessage)
    expected = {"action", "order_id", "quantity", "urgency", "ts"}
    assert expected == set(message.fields_set)


def golden_outputs() -> list[Outbound]:
    """Every output of a replay of the golden day (all four kinds, every order state)."""
    from pathlib import Path

    from tracker.core.engine import Engine
    from tracker.shell.replay import read_input, replay

    day = Path(__file__).parent.parent / "replay_data" / "day-2026-03-10-seed7.jsonl"
    result = replay(read_input(day), Engine())
    return [*result.targets, *result.status, *result.alerts, *result.errors]


CONTRACT = {
    "target": TargetPayload,
    "status": StatusPayload,
    "alert": AlertPayload,
    "error": ErrorPayload,
}


def test_encoder_writes_what_the_contract_models_write() -> None:
    """Each output's bytes validate against its contract model, which writes the same JSON.

    The engine builds plain messages and the encoder writes them itself; the pydantic models
    are the written contract. Validating the bytes forbids unknown fields and missing ones, and
    a float field the engine filled with an int (``100`` instead of ``100.0``) would come back
    different.
    """
    outputs = golden_outputs()
    assert {"target", "status", "alert", "error"} == {o.type for o in outputs}
    for out in outputs:
        model = CONTRACT[out.type].model_validate(json.loads(encode(out)))
        written = {key: rounded(value) for key, value in model.model_dump(mode="json").items()}
        assert to_json_object(out) == written


def test_outputs_read_back_as_themselves() -> None:
    """decode_output reads an encoded output back to a message that encodes the same."""
    outputs = golden_outputs()
    assert [encode(o) for o in outputs] == [encode(decode_output(encode(o))) for o in outputs]


def test_decode_output_refuses_an_inbound_message() -> None:
    """Only targets, status, alerts and errors are outbound messages."""
    with pytest.raises(WireError, match="not an outbound message type"):
        decode_output(json.dumps(FILL))


@pytest.mark.parametrize(
    ("field", "value", "expected"),
    [
        ("quantity", int("9" * 401), "a number of 401 digits"),
        ("quantity", 1e300, "must be at most 1,000,000,000,000"),
        ("quantity", 10**12 + 1, "must be at most 1,000,000,000,000"),
        ("price", 1e13, "must be at most 1,000,000,000,000"),
        ("price", -int("9" * 40), "a number of 40 digits"),
    ],
    ids=[
        "401-digit-quantity",
        "1e300-shares",
        "just-above-the-bound",
        "huge-price",
        "huge-int-price",
    ],
)
def test_numbers_beyond_the_bound_are_refused_naming_the_field(
    field: str, value: float, expected: str
) -> None:
    """Every quantity, volume and price is at most 10^12 in size: a 401-digit integer or 1e300
    shares is refused at the edge with the field named (it never reaches numpy)."""
    payload = json.dumps({**FILL, field: value})
    with pytest.raises(WireError) as info:
        decode("tracker/fills/X_ZEPH-1", payload)
    assert expected in info.value.reason
    assert field in info.value.reason
    assert len(info.value.reason) < 300


def test_the_bound_itself_is_accepted() -> None:
    """10^12 shares is still a number the contract takes."""
    message = decode("tracker/fills/X_ZEPH-1", json.dumps({**FILL, "quantity": 10**12}))
    assert 10**12 == message.quantity  # type: ignore[union-attr]


def test_a_key_given_twice_is_refused() -> None:
    """{"quantity": 1, "quantity": 100000} is refused: which one counts is anybody's guess."""
    text = json.dumps(FILL)[:-1] + ', "quantity": 100000}'
    with pytest.raises(WireError) as info:
        decode("tracker/fills/X_ZEPH-1", text)
    assert "quantity: the key appears twice" in info.value.reason


def test_an_oversize_note_is_refused_as_too_large() -> None:
    """The daemon's stand-in for a payload over its size limit is refused as "too large", not as
    "not valid JSON"."""
    note = oversize_note(5_000_000, 65_536, '{"type": "fill", ...')
    with pytest.raises(WireError) as info:
        decode("tracker/fills/X_ZEPH-1", note)
    assert info.value.reason.startswith("too large: payload of 5000000 bytes is over the limit")

"""The core's messages: plain frozen values, written as the wire contract says.

(That no core module imports pydantic or the edge is held by tests/test_layers.py.)
"""

from __future__ import annotations

import dataclasses
from datetime import UTC, datetime

import pytest

from tracker.core.messages import (
    AlertMessage,
    FillMessage,
    OrderMessage,
    json_object,
)

TS = datetime(2026, 3, 2, 14, 35, tzinfo=UTC)


def test_messages_are_frozen() -> None:
    """A message cannot be changed once built (dataclasses.replace makes a new one)."""
    fill = FillMessage(fill_id="f1", order_id="A", quantity=100, price=20.0, ts=TS)
    with pytest.raises(dataclasses.FrozenInstanceError):
        fill.quantity = 1  # type: ignore[misc]
    assert 1 == dataclasses.replace(fill, quantity=1).quantity


def test_order_built_in_code_sets_the_fields_it_was_given() -> None:
    """Without an explicit fields_set, an order carries the fields given a value."""
    order = OrderMessage(action="amend", order_id="A", quantity=500, ts=TS)
    assert {"action", "order_id", "quantity", "ts"} == set(order.fields_set)


def test_explicit_null_limit_is_a_removal() -> None:
    """An amend that says it set limit_price, to nothing, removes the limit."""
    order = OrderMessage(action="amend", order_id="A", ts=TS, fields_set=frozenset({"limit_price"}))
    assert order.removes_limit


def test_json_object_writes_type_first_times_in_utc_and_rounded_floats() -> None:
    """type first, fields in order, a Z time, floats to six decimals, nested keys sorted."""
    alert = AlertMessage(
        order_id="A",
        code="behind_plan",
        severity="warning",
        message="m",
        details={"z": 1.23456789, "a": -1e-9},
        ts=TS,
    )
    expected = {
        "type": "alert",
        "version": "1.1",
        "order_id": "A",
        "symbol": None,
        "code": "behind_plan",
        "severity": "warning",
        "state": "raised",
        "message": "m",
        "details": {"a": 0.0, "z": 1.234568},
        "ts": "2026-03-02T14:35:00Z",
    }
    assert expected == json_object(alert)
    assert list(expected) == list(json_object(alert))


def test_json_object_of_the_fields_set_only() -> None:
    """Only the fields a message carried: an order's fields_set, else the values not None."""
    order = OrderMessage(action="cancel", order_id="A", ts=TS)
    fill = FillMessage(fill_id="f1", order_id="A", quantity=100, price=20.0, ts=TS)
    expected = (
        {"type": "order", "action": "cancel", "order_id": "A", "ts": "2026-03-02T14:35:00Z"},
        ["type", "fill_id", "order_id", "quantity", "price", "ts"],
    )
    assert expected == (
        json_object(order, only_set=True),
        list(json_object(fill, only_set=True)),
    )

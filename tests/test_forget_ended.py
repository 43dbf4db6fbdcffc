"""Ended orders are left behind when a new day's journal begins: the carried state stays the size
of what may still change, however long the daemon runs.

Each test feeds the intake as the daemon does (each record with its receive time), calls
:meth:`Intake.forget_ended` as the daemon's journal rotation does, and goes on.
"""

from __future__ import annotations

from datetime import UTC, datetime, timedelta
from typing import Any

from tracker.core.engine import Engine
from tracker.core.messages import AlertMessage, Outbound, StatusMessage
from tracker.edge.intake import Intake
from tracker.edge.records import Record

ROOT = "tracker"
OPEN = datetime(2026, 3, 2, 14, 30, tzinfo=UTC)


def at(minutes: float) -> str:
    return (OPEN + timedelta(minutes=minutes)).isoformat().replace("+00:00", "Z")


def order(order_id: str, minutes: float, **extra: Any) -> tuple[str, dict[str, Any]]:
    return f"{ROOT}/orders/{order_id}", {
        "type": "order",
        "action": "new",
        "order_id": order_id,
        "symbol": "X_ZEPH",
        "side": "buy",
        "quantity": 10_000,
        "start": at(0),
        "end": at(390),
        "max_participation": 0.2,
        "ts": at(minutes),
        **extra,
    }


def cancel(order_id: str, minutes: float) -> tuple[str, dict[str, Any]]:
    payload = {"type": "order", "action": "cancel", "order_id": order_id, "ts": at(minutes)}
    return f"{ROOT}/orders/{order_id}", payload


def fill(order_id: str, fill_id: str, minutes: float) -> tuple[str, dict[str, Any]]:
    return f"{ROOT}/fills/{order_id}", {
        "type": "fill",
        "fill_id": fill_id,
        "order_id": order_id,
        "quantity": 500,
        "price": 42.0,
        "ts": at(minutes),
    }


class Day:
    """An intake over a fresh engine, fed lines at their receive times."""

    def __init__(self) -> None:
        self.engine = Engine(root=ROOT)
        self.intake = Intake(self.engine, root=ROOT)
        self.line = 0

    def feed(self, minutes: float, *lines: tuple[str, dict[str, Any]]) -> list[Outbound]:
        records = []
        for topic, payload in lines:
            self.line += 1
            records.append(Record(line=self.line, topic=topic, payload=payload, ts=at(minutes)))
        return [out for outs in self.intake.feed_many(records) for out in outs]


def test_ended_orders_are_forgotten_and_working_ones_kept() -> None:
    """A cancelled order is dropped with everything kept for it; the pending one stays whole."""
    day = Day()
    day.feed(-30, order("A", -30), order("B", -30), fill("B", "B1", -29), cancel("B", -20))
    assert ["B"] == day.intake.forget_ended()
    assert ["A"] == [row["order_id"] for row in day.engine.summary()["orders"]]
    assert day.engine.state_of("B") is None
    assert [] == day.intake.forget_ended()  # nothing more has ended


def test_the_day_goes_on_after_forgetting() -> None:
    """Timers of a forgotten order are gone with it: the open and the end pass without it, and
    the kept order starts and expires as it would have."""
    day = Day()
    day.feed(-30, order("A", -30), order("B", -30), cancel("B", -20))
    day.intake.forget_ended()
    outputs = day.feed(400, fill("A", "A1", 399))
    statuses = [o for o in outputs if isinstance(o, StatusMessage)]
    assert {"A"} == {s.order_id for s in statuses}
    assert "expired" == day.engine.state_of("A")


def test_a_kept_order_still_knows_its_fills_again() -> None:
    """A re-sent fill of an order that is still working remains a copy after forgetting."""
    day = Day()
    day.feed(1, order("A", 1), fill("A", "A1", 1))
    day.intake.forget_ended()
    day.feed(2, fill("A", "A1", 2))
    assert (1, 500) == (day.intake.redelivered, day.engine.filled("A"))


def test_a_copy_of_a_forgotten_orders_fill_waits_as_any_fill_for_an_unknown_order() -> None:
    """Its order is gone, so the copy cannot count twice: it is parked, and said so."""
    day = Day()
    day.feed(1, order("B", 1), fill("B", "B1", 1), cancel("B", 1))
    day.intake.forget_ended()
    outputs = day.feed(3, fill("B", "B1", 1))
    codes = [o.code for o in outputs if isinstance(o, AlertMessage)]
    assert ["fill_parked"] == codes
    assert 0 == day.engine.filled("B")

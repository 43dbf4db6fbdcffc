"""The router behaviours of wire contract v1.1, as recordings: one table shared by the replay
and the live-broker conformance tests (tests/test_contract_conformance.py and
tests/test_contract_broker.py).

Each case is what an order router or a venue gateway really sends -- an echoed cancel, fills with
extra fields, a fill before its order, a fill re-sent with a new ts, a bust, a correction, a
recording merged out of time order, messages numbered by their gateway with a heartbeat between
them, a restart in the middle of a bin -- with the filled shares,
the order's state and the last target that must come out. Times are on 2026-03-10 (New York on
daylight time: the session opens at 13:30 UTC); X_ZEPH runs on the stated default profile.
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from datetime import UTC, datetime, timedelta
from typing import Any

from tracker.core.formats import utc_text

ROOT = "conf"
ORDER_ID = "A1"
START = "2026-03-10T14:00:00Z"
END = "2026-03-10T19:00:00Z"


def at(seconds: float) -> str:
    """2026-03-10 14:00:00 UTC plus ``seconds`` (negative: before), as the wire writes it."""
    moment = datetime(2026, 3, 10, 14, tzinfo=UTC) + timedelta(seconds=seconds)
    return utc_text(moment, "milliseconds" if moment.microsecond else "seconds")


def order(ts: float = -60.0, **extra: Any) -> tuple[str, dict[str, Any]]:
    """The new order A1: buy 10,000 X_ZEPH from 14:00 to 19:00 UTC, cap 20 %."""
    payload = {
        "type": "order",
        "action": "new",
        "order_id": ORDER_ID,
        "symbol": "X_ZEPH",
        "side": "buy",
        "quantity": 10_000,
        "start": START,
        "end": END,
        "max_participation": 0.2,
        "ts": at(ts),
        **extra,
    }
    return f"{ROOT}/orders/{ORDER_ID}", payload


def fill(fill_id: str, quantity: int, price: float, ts: float, **extra: Any) -> tuple[str, dict]:
    """A fill of A1."""
    payload = {
        "type": "fill",
        "fill_id": fill_id,
        "order_id": ORDER_ID,
        "quantity": quantity,
        "price": price,
        "ts": at(ts),
        **extra,
    }
    return f"{ROOT}/fills/{ORDER_ID}", payload


def correction(fill_id: str, ts: float, **values: Any) -> tuple[str, dict[str, Any]]:
    """A bust of ``fill_id`` (no values) or its correction (quantity and/or price)."""
    payload = {
        "type": "fill_correction",
        "action": "correct" if values else "bust",
        "fill_id": fill_id,
        "order_id": ORDER_ID,
        "ts": at(ts),
        **values,
    }
    return f"{ROOT}/fills/{ORDER_ID}", payload


def heartbeat(source: str, seq: int, ts: float) -> tuple[str, dict[str, Any]]:
    """A gateway's heartbeat: it takes the next number of the gateway's sequence."""
    return f"{ROOT}/control", {"type": "heartbeat", "source": source, "seq": seq, "ts": at(ts)}


def echoed_cancel(ts: float) -> tuple[str, dict[str, Any]]:
    """A cancel that repeats the order's fields, as many routers send it."""
    topic, payload = order(ts)
    return topic, {**payload, "action": "cancel"}


@dataclass(frozen=True)
class Case:
    """One router behaviour: the lines in arrival order and what must come out.

    Attributes:
        lines: ``(topic, payload, line ts)`` in arrival order (the line ts is when it was
            received; it equals the payload's ts unless the case says otherwise).
        filled: Shares filled on A1 at the end.
        state: A1's state at the end.
        target_state, target_reasons: The last target's ``state`` and its allowed ``reason``s.
        average_price: A1's average price at the end (None: not checked).
        restart_after: For the live run, restart the daemon after this many lines (0: never).
    """

    lines: list[tuple[str, dict[str, Any], str]]
    filled: int
    state: str
    target_state: str
    target_reasons: frozenset[str]
    average_price: float | None = None
    restart_after: int = 0
    info_fields: tuple[str, ...] = field(default=())


def _lines(*items: tuple[str, dict[str, Any]]) -> list[tuple[str, dict[str, Any], str]]:
    return [(topic, payload, payload["ts"]) for topic, payload in items]


WORKING = frozenset({"on_plan", "capped", "catching_up"})

CASES: dict[str, Case] = {
    "echoed-cancel": Case(
        _lines(order(), fill("F1", 1_000, 42.0, 10), echoed_cancel(20)),
        filled=1_000,
        state="cancelled",
        target_state="cancelled",
        target_reasons=frozenset({"cancelled"}),
    ),
    "extra-fields": Case(
        _lines(
            order(),
            fill("F1", 1_000, 42.0, 10, venue="X_HLX", exec_id="E-1", liquidity="added"),
        ),
        filled=1_000,
        state="working",
        target_state="working",
        target_reasons=WORKING,
        info_fields=("exec_id", "liquidity", "venue"),
    ),
    "fill-before-order": Case(
        _lines(fill("F1", 1_000, 42.0, -60.05), order(-60), fill("F2", 200, 42.0, 10)),
        filled=1_200,
        state="working",
        target_state="working",
        target_reasons=WORKING,
    ),
    "fill-resent-new-ts": Case(
        _lines(order(), fill("F1", 1_000, 42.0, 10), fill("F1", 1_000, 42.0, 15)),
        filled=1_000,
        state="working",
        target_state="working",
        target_reasons=WORKING,
    ),
    "bust": Case(
        _lines(
            order(), fill("F1", 1_000, 42.0, 10), fill("F2", 500, 42.2, 12), correction("F1", 20)
        ),
        filled=500,
        state="working",
        target_state="working",
        target_reasons=WORKING,
        average_price=42.2,
    ),
    "correction": Case(
        _lines(
            order(),
            fill("F1", 1_000, 42.0, 10),
            correction("F1", 20, quantity=800, price=42.1),
        ),
        filled=800,
        state="working",
        target_state="working",
        target_reasons=WORKING,
        average_price=42.1,
    ),
    "out-of-order-recording": Case(
        [
            (*order(), at(-60)),
            (*fill("F2", 700, 42.1, 20), at(20)),
            (*fill("F1", 300, 42.0, 10), at(10)),  # merged from another capture point
        ],
        filled=1_000,
        state="working",
        target_state="working",
        target_reasons=WORKING,
    ),
    "stamped-with-heartbeats": Case(
        _lines(
            order(source="gw", seq=1),
            fill("F1", 1_000, 42.0, 10, source="gw", seq=2),
            heartbeat("gw", 3, 15),
            fill("F2", 500, 42.0, 20, source="gw", seq=4),
        ),
        filled=1_500,
        state="working",
        target_state="working",
        target_reasons=WORKING,
    ),
    "restart-mid-bin": Case(
        _lines(order(), fill("F1", 1_000, 42.0, 10), fill("F2", 400, 42.0, 40)),
        filled=1_400,
        state="working",
        target_state="working",
        target_reasons=WORKING,
        restart_after=2,
    ),
}


def jsonl(case: Case) -> str:
    """The case as a JSON Lines recording."""
    return "".join(
        json.dumps({"topic": topic, "payload": payload, "ts": ts}) + "\n"
        for topic, payload, ts in case.lines
    )

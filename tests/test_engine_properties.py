"""Properties of the engine over random message sequences (Hypothesis).

Symbols and prices are invented test values (a made-up venue, Harbour Lane Exchange, X_HLX).
"""

from __future__ import annotations

from datetime import UTC, datetime, timedelta
from typing import Any

from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from tracker.core.engine import Engine
from tracker.core.lifecycle import TERMINAL
from tracker.edge.wire import ErrorMessage, TargetMessage, encode
from tracker.testing import Recorder

OPEN = datetime(2026, 3, 2, 14, 30, tzinfo=UTC)
ORDER_IDS = ("A", "B", "C")


def iso(moment: datetime) -> str:
    """ISO 8601 in UTC with Z."""
    return moment.isoformat().replace("+00:00", "Z")


def at(minutes: float) -> str:
    """Time ``minutes`` after the open."""
    return iso(OPEN + timedelta(minutes=minutes))


@st.composite
def step(draw: st.DrawFn) -> tuple[int, Any]:
    """(minutes to advance, builder of one message at that time): mostly valid, sometimes not.

    Time mostly moves forward (so orders start, bins close and targets flow); now and then a
    message carries an older time or a bin comes out of order, to exercise the rejections.
    """
    kind = draw(
        st.sampled_from(
            [
                "new",
                "new",
                "amend",
                "cancel",
                "fill",
                "fill",
                "fill",
                "bin",
                "bin",
                "bin",
                "control",
                "tick",
                "garbage",
            ]
        )
    )
    advance = draw(st.sampled_from([5, 5, 5, 3, 1, 0, 10, -20]))
    order_id = draw(st.sampled_from((*ORDER_IDS, "ZZ")))
    if kind == "new":
        offset = draw(st.integers(min_value=-2, max_value=6)) * 5
        length = draw(st.integers(min_value=1, max_value=40)) * 5
        side = draw(st.sampled_from(["buy", "sell"]))
        quantity = draw(st.integers(min_value=-5, max_value=200_000))
        extra: dict[str, Any] = {}
        if draw(st.booleans()):
            extra["max_participation"] = draw(st.sampled_from([0.01, 0.05, 0.2, 1.0]))
        if draw(st.booleans()):
            extra["limit_price"] = draw(st.sampled_from([19.5, 20.0, 20.5]))

        def new(minute: int) -> tuple[str, Any]:
            start = max(5 * (minute // 5) + offset, 0)
            return f"tracker/orders/{order_id}", {
                "type": "order",
                "action": "new",
                "order_id": order_id,
                "symbol": "X_ZEPH",
                "side": side,
                "quantity": quantity,
                "start": at(start),
                "end": at(start + length),
                "ts": at(minute),
                **extra,
            }

        return advance, new
    if kind in ("amend", "cancel"):
        quantity = draw(st.integers(min_value=0, max_value=200_000))

        def change(minute: int) -> tuple[str, Any]:
            payload = {"type": "order", "action": kind, "order_id": order_id, "ts": at(minute)}
            if kind == "amend":
                payload["quantity"] = quantity
            return f"tracker/orders/{order_id}", payload

        return advance, change
    if kind == "fill":
        quantity_: Any = draw(
            st.one_of(st.integers(min_value=1, max_value=20_000), st.sampled_from([-1, 0, 2.5]))
        )
        fill_id = f"f{draw(st.integers(min_value=0, max_value=6))}"
        price = draw(st.sampled_from([19.0, 19.9, 20.0, 20.1, 25.0]))

        def fill(minute: int) -> tuple[str, Any]:
            return f"tracker/fills/{order_id}", {
                "type": "fill",
                "fill_id": fill_id,
                "order_id": order_id,
                "quantity": quantity_,
                "price": price,
                "ts": at(minute),
            }

        return advance, fill
    if kind == "bin":
        shift = draw(st.sampled_from([1, 1, 1, 1, 2, 0, 5]))
        price = draw(st.sampled_from([19.6, 20.0, 20.4]))
        volume = draw(st.integers(min_value=0, max_value=80_000))
        spread = draw(st.sampled_from([0.01, 0.02, 0.2]))

        def bin_(minute: int) -> tuple[str, Any]:
            index = min(max(minute // 5 - shift, 0), 77)
            start = OPEN + timedelta(minutes=5 * index)
            return "tracker/bins/X_ZEPH", {
                "type": "bin",
                "symbol": "X_ZEPH",
                "start": iso(start),
                "end": iso(start + timedelta(minutes=5)),
                "volume": volume,
                "vwap": price,
                "open": price,
                "high": price + 0.05,
                "low": price - 0.05,
                "close": price,
                "spread": spread,
                "ts": at(minute),
            }

        return advance, bin_
    if kind == "control":
        command = draw(st.sampled_from(["halt", "resume"]))
        one = draw(st.booleans())

        def control(minute: int) -> tuple[str, Any]:
            payload = {"type": "control", "command": command, "ts": at(minute)}
            if one:
                payload["order_id"] = order_id
            return "tracker/control", payload

        return advance, control
    if kind == "tick":
        return advance, lambda minute: ("tracker/tick", {"type": "tick", "ts": at(minute)})
    topic = draw(st.sampled_from(["tracker/fills/A", "tracker/bins/X_ZEPH", "tracker/nowhere"]))
    garbage = draw(st.sampled_from(["{", "[]", '{"type": "fill"}', '{"type": "quote"}', b"\xff"]))
    return advance, lambda minute: (topic, garbage)


#: Three valid orders sent before the open, so that most sequences have working orders.
PREFIX: list[tuple[str, Any]] = [
    (
        f"tracker/orders/{order_id}",
        {
            "type": "order",
            "action": "new",
            "order_id": order_id,
            "symbol": "X_ZEPH",
            "side": side,
            "quantity": quantity,
            "start": at(0),
            "end": at(minutes),
            "ts": at(-10),
            **extra,
        },
    )
    for order_id, side, quantity, minutes, extra in (
        ("A", "buy", 50_000, 390, {}),
        ("B", "sell", 30_000, 120, {"max_participation": 0.05}),
        ("C", "buy", 5_000, 60, {"limit_price": 20.0}),
    )
]


def messages(steps: list[tuple[int, Any]]) -> list[tuple[str, Any]]:
    """The three orders, then the drawn steps on a clock starting 10 minutes before the open."""
    minute, built = -10, list(PREFIX)
    for advance, builder in steps:
        minute += advance
        built.append(builder(minute))
    return built


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(st.lists(step(), min_size=1, max_size=60))
def test_random_sequences_keep_the_invariants(steps: list[tuple[int, Any]]) -> None:
    """Random valid and invalid messages never crash the engine and keep its invariants."""
    engine = Engine()
    recorder = Recorder(engine)
    accepted_fills: dict[tuple[str, str], int] = {}
    for topic, payload in messages(steps):
        before = {order_id: engine.state_of(order_id) for order_id in ORDER_IDS}
        outputs = recorder.feed_raw(topic, payload)
        errors = [o for o in outputs if isinstance(o, ErrorMessage)]
        # At most one error record per message.
        assert len(errors) <= 1
        if (
            isinstance(payload, dict)
            and payload.get("type") == "fill"
            and not errors
            and outputs  # an exact redelivery returns nothing
        ):
            accepted_fills[(payload["order_id"], payload["fill_id"])] = payload["quantity"]
        for out in outputs:
            if not isinstance(out, TargetMessage):
                continue
            assert 0 <= out.quantity <= out.remaining
            if out.max_quantity is not None:
                assert out.quantity <= out.max_quantity
            assert out.cumulative_target <= engine._state.orders[out.order_id].quantity
            ended_before = before.get(out.order_id) in TERMINAL
            ended_now = engine.state_of(out.order_id) in TERMINAL
            if ended_before or ended_now:
                assert 0 == out.quantity
    for order_id in ORDER_IDS:
        expected = sum(q for (o, _), q in accepted_fills.items() if o == order_id)
        assert expected == engine.filled(order_id)


@settings(max_examples=40, deadline=None)
@given(st.lists(step(), min_size=1, max_size=25))
def test_same_input_same_output(steps: list[tuple[int, Any]]) -> None:
    """Two engines fed the same messages produce the same outputs."""
    runs = []
    for _ in range(2):
        recorder = Recorder(Engine())
        for topic, payload in messages(steps):
            recorder.feed_raw(topic, payload)
        runs.append([encode(o) for o in recorder.outputs])
    assert runs[0] == runs[1]

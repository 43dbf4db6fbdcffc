"""The receive time is the engine's clock: a message's own ts is data, judged at the intake.

Each case is one of the faults a probe of the daemon found (issue 12: a fill stamped four years
ahead expired every order; a bin dated tomorrow shut out today's bins; a halt dated a year ahead
made every later control "earlier than the previous one"), replayed here through the intake as
the daemon feeds it, each record carrying its receive time as the journal does.
"""

from __future__ import annotations

from datetime import UTC, datetime, timedelta
from typing import Any

from hypothesis import given, settings
from hypothesis import strategies as st

from tracker.core.engine import Engine, EngineConfig
from tracker.core.messages import AckMessage, AlertMessage, ErrorMessage, Outbound, StatusMessage
from tracker.edge.intake import Intake
from tracker.edge.records import Record

ROOT = "tracker"
OPEN = datetime(2026, 3, 2, 14, 30, tzinfo=UTC)


def at(minutes: float) -> datetime:
    return OPEN + timedelta(minutes=minutes)


def text(moment: datetime) -> str:
    return moment.isoformat().replace("+00:00", "Z")


def order(order_id: str, ts: datetime) -> tuple[str, dict[str, Any]]:
    return f"{ROOT}/orders/{order_id}", {
        "type": "order",
        "action": "new",
        "order_id": order_id,
        "symbol": "X_ZEPH",
        "side": "buy",
        "quantity": 50_000,
        "start": text(at(0)),
        "end": text(at(390)),
        "max_participation": 0.2,
        "ts": text(ts),
    }


def fill(fill_id: str, ts: datetime, quantity: int = 500) -> tuple[str, dict[str, Any]]:
    return f"{ROOT}/fills/A", {
        "type": "fill",
        "fill_id": fill_id,
        "order_id": "A",
        "quantity": quantity,
        "price": 42.0,
        "ts": text(ts),
    }


def bin_(start: datetime, ts: datetime) -> tuple[str, dict[str, Any]]:
    return f"{ROOT}/bins/X_ZEPH", {
        "type": "bin",
        "symbol": "X_ZEPH",
        "start": text(start),
        "end": text(start + timedelta(minutes=5)),
        "volume": 20_000,
        "vwap": 42.0,
        "open": 42.0,
        "high": 42.1,
        "low": 41.9,
        "close": 42.0,
        "spread": 0.02,
        "ts": text(ts),
    }


def control(command: str, ts: datetime) -> tuple[str, dict[str, Any]]:
    return f"{ROOT}/control", {
        "type": "control",
        "command": command,
        "order_id": "A",
        "ts": text(ts),
    }


def replay(
    received: list[tuple[datetime, tuple[str, dict[str, Any]]]], config: EngineConfig | None = None
) -> list[list[Outbound]]:
    """Feed ``(receive time, (topic, payload))`` pairs through the intake; outputs per line."""
    intake = Intake(Engine(config, root=ROOT), root=ROOT)
    records = [
        Record(line=n, topic=topic, payload=payload, ts=text(when))
        for n, (when, (topic, payload)) in enumerate(received, start=1)
    ]
    return intake.feed_many(records)


def alerts(outputs: list[Outbound], code: str) -> list[AlertMessage]:
    return [o for o in outputs if isinstance(o, AlertMessage) and o.code == code]


def errors(outputs: list[Outbound]) -> list[ErrorMessage]:
    return [o for o in outputs if isinstance(o, ErrorMessage) and o.severity == "error"]


def test_fill_stamped_years_ahead_counts_at_its_receive_time_and_expires_nothing() -> None:
    """The fill's shares count, a clock_skew alert says why, and the day goes on."""
    lines = replay(
        [
            (at(-30), order("A", at(-30))),
            (at(5), fill("F1", at(5) + timedelta(days=4 * 365))),
            (at(6), order("B", at(6))),
        ]
    )
    assert 1 == len(alerts(lines[1], "clock_skew"))
    assert [] == alerts([o for line in lines for o in line], "order_expired")
    assert 500 == [o for o in lines[1] if isinstance(o, StatusMessage)][-1].filled
    assert ["accepted"] == [o.result for o in lines[2] if isinstance(o, AckMessage)]


def test_order_stamped_ten_minutes_ahead_is_refused_with_its_ack() -> None:
    """An order's ts beyond ts_ahead_seconds: refused, the reason names the setting."""
    (line,) = replay([(at(-30), order("A", at(-20)))])
    (error,) = errors(line)
    assert "ts_ahead_seconds" in error.reason
    assert ["rejected"] == [o.result for o in line if isinstance(o, AckMessage)]


def test_stale_order_message_is_refused() -> None:
    """An order stamped an hour before it arrived: refused, naming ts_behind_seconds."""
    (line,) = replay([(at(-30), order("A", at(-90)))])
    assert "ts_behind_seconds" in errors(line)[0].reason


def test_bin_dated_tomorrow_is_refused_and_todays_bins_go_on() -> None:
    """A bin ending tomorrow is refused; today's next bin is taken as if it never came."""
    tomorrow = at(24 * 60)
    lines = replay(
        [
            (at(-30), order("A", at(-30))),
            (
                at(
                    5,
                )
                + timedelta(seconds=1),
                bin_(tomorrow, tomorrow + timedelta(minutes=5)),
            ),
            (at(5) + timedelta(seconds=2), bin_(at(0), at(5) + timedelta(seconds=1))),
        ]
    )
    assert "after the message was received" in errors(lines[1])[0].reason
    assert [] == errors(lines[2])


def test_halt_dated_a_year_ahead_halts_and_a_later_resume_is_taken() -> None:
    """A halt always wins (applied at its receive time); it no longer blocks later controls."""
    lines = replay(
        [
            (at(-30), order("A", at(-30))),
            (at(10), control("halt", at(10) + timedelta(days=365))),
            (at(20), control("resume", at(20))),
        ]
    )
    assert 1 == len(alerts(lines[1], "order_halted"))
    assert 1 == len(alerts(lines[1], "clock_skew"))
    assert 1 == len(alerts(lines[2], "order_resumed"))
    assert [] == errors(lines[2])


def test_message_time_setting_keeps_the_old_rule() -> None:
    """event_time = "message": the message's ts moves the clock (for tests driving a day fast)."""
    config = EngineConfig(event_time="message")
    lines = replay(
        [
            (at(-30), order("A", at(-30))),
            (at(5), fill("F1", at(5) + timedelta(days=4 * 365))),
        ],
        config,
    )
    assert [] == alerts(lines[1], "clock_skew")
    assert 1 == len(alerts(lines[1], "order_expired"))


@settings(max_examples=30, deadline=None)
@given(offsets=st.lists(st.integers(-(10**8), 10**8), min_size=3, max_size=3))
def test_expiry_and_staleness_depend_only_on_receive_times(offsets: list[int]) -> None:
    """Whatever the fills' own ts, the order expires and its data goes stale when the receive
    times say so: the same alerts, at the same times, as fills stamped at their receipt."""

    def day(shifts: list[int]) -> list[tuple[str, datetime, int]]:
        received = [
            (at(-30), order("A", at(-30))),
            (at(1), bin_(at(-5), at(0))),
            *(
                (at(m), fill(f"F{m}", at(m) + timedelta(seconds=s)))
                for m, s in zip((10, 200, 380), shifts, strict=True)
            ),
            (at(420), control("halt", at(420))),
        ]
        outputs = [o for line in replay(received) for o in line]
        timed = {"order_expired", "market_data_stale"}
        seen = [
            (o.code, o.ts, 0) for o in outputs if isinstance(o, AlertMessage) and o.code in timed
        ]
        filled = [o.filled for o in outputs if isinstance(o, StatusMessage)][-1]
        return [*seen, ("filled", at(0), filled)]

    assert day([0, 0, 0]) == day(offsets)

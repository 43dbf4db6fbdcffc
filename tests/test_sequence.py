"""Per-source sequence numbers: a jump in a source's ``seq`` is a loss on the way, said at once.

A broker with a queue limit drops messages while their sender believes them delivered (issue 12
measured 11,317 of 20,000 fills lost by a stock Mosquitto); the receiver can only see it from a
counter the sender keeps. These tests feed the intake as the daemon does.
"""

from __future__ import annotations

from datetime import UTC, datetime, timedelta
from typing import Any

from tracker.core.engine import Engine
from tracker.core.messages import AlertMessage, ErrorMessage, Outbound
from tracker.edge.intake import Intake
from tracker.edge.records import Record

ROOT = "tracker"
OPEN = datetime(2026, 3, 2, 14, 30, tzinfo=UTC)


def text(moment: datetime) -> str:
    return moment.isoformat().replace("+00:00", "Z")


def stamped_fill(fill_id: str, seq: int | None, minute: int, **stamp: Any) -> Record:
    payload: dict[str, Any] = {
        "type": "fill",
        "fill_id": fill_id,
        "order_id": "A",
        "quantity": 100,
        "price": 42.0,
        "ts": text(OPEN + timedelta(minutes=minute)),
        **stamp,
    }
    if seq is not None:
        payload |= {"source": "gw-1", "seq": seq}
    return Record(line=0, topic=f"{ROOT}/fills/A", payload=payload, ts=payload["ts"])


def feed(records: list[Record]) -> tuple[Intake, list[Outbound]]:
    intake = Intake(Engine(root=ROOT), root=ROOT)
    numbered = [
        Record(line=n, topic=r.topic, payload=r.payload, ts=r.ts)
        for n, r in enumerate(records, start=1)
    ]
    outputs = [o for line in intake.feed_many(numbered) for o in line]
    return intake, outputs


def gap_alerts(outputs: list[Outbound]) -> list[AlertMessage]:
    return [o for o in outputs if isinstance(o, AlertMessage) and o.code == "source_gap"]


def test_a_jump_raises_one_critical_alert_naming_the_missing_numbers() -> None:
    """seq 1, 2, 5: messages 3 and 4 never came; one critical alert and the summary say so."""
    intake, outputs = feed([stamped_fill(f"F{n}", n, n) for n in (1, 2, 5)])
    (alert,) = gap_alerts(outputs)
    assert ("critical", "raised") == (alert.severity, alert.state)
    assert {"source": "gw-1", "first_missing": 3, "last_missing": 4} == dict(alert.details)
    assert {"gw-1": [[3, 4]]} == intake.gaps()


def test_late_messages_fill_the_gap_and_clear_the_alert() -> None:
    """When 3 and 4 come late the gap closes: the alert is cleared once, nothing stays missing."""
    records = [stamped_fill(f"F{n}", n, minute) for minute, n in enumerate((1, 2, 5, 4, 3))]
    intake, outputs = feed(records)
    assert [("critical", "raised"), ("info", "cleared")] == [
        (a.severity, a.state) for a in gap_alerts(outputs)
    ]
    assert {} == intake.gaps()


def test_a_fill_resent_with_a_new_seq_opens_no_gap() -> None:
    """A gateway re-sending a fill under its next seq: a copy, not a new fill, and no gap."""
    records = [stamped_fill("F1", 1, 1), stamped_fill("F1", 2, 1), stamped_fill("F2", 3, 2)]
    intake, outputs = feed(records)
    assert [] == gap_alerts(outputs)
    assert 1 == intake.redelivered


def test_messages_without_a_stamp_are_not_followed() -> None:
    """The stamp is optional: unstamped messages raise nothing."""
    intake, outputs = feed([stamped_fill(f"F{n}", None, n) for n in (1, 2, 5)])
    assert ([], {}) == (gap_alerts(outputs), intake.gaps())


def test_source_without_seq_is_refused_naming_the_missing_field() -> None:
    """Half a stamp cannot be followed: the message is refused with a reason that says why."""
    _, outputs = feed([stamped_fill("F1", None, 1, source="gw-1")])
    (error,) = [o for o in outputs if isinstance(o, ErrorMessage)]
    assert error.reason.startswith("seq:")


def heartbeat(seq: int | None, minute: int, **fields: Any) -> Record:
    payload: dict[str, Any] = {"type": "heartbeat", "source": "gw-1", **fields}
    if seq is not None:
        payload["seq"] = seq
    ts = text(OPEN + timedelta(minutes=minute))
    return Record(line=0, topic=f"{ROOT}/control", payload=payload, ts=ts)


def test_a_heartbeat_reveals_the_lost_tail_of_a_source() -> None:
    """Fills 3 and 4 were the source's last (no later fill shows they are missing); its next
    heartbeat, numbered 5, does: one critical alert naming 3 to 4."""
    records = [stamped_fill(f"F{n}", n, n) for n in (1, 2)] + [heartbeat(5, 6)]
    intake, outputs = feed(records)
    (alert,) = gap_alerts(outputs)
    assert {"source": "gw-1", "first_missing": 3, "last_missing": 4} == dict(alert.details)
    assert {"gw-1": [[3, 4]]} == intake.gaps()


def test_heartbeats_in_turn_raise_nothing_and_reach_no_engine() -> None:
    """A heartbeat taking the next number is accepted, counted, and changes nothing else."""
    records = [stamped_fill("F1", 1, 1), heartbeat(2, 2), heartbeat(3, 3), stamped_fill("F2", 4, 4)]
    intake, outputs = feed(records)
    assert [] == gap_alerts(outputs)
    assert (4, 2, 0) == (intake.accepted, intake.heartbeats, intake.rejected)
    assert [] == [o for o in outputs if isinstance(o, ErrorMessage)]


def test_a_repeated_heartbeat_is_an_old_number_and_changes_nothing() -> None:
    """A broker redelivering a heartbeat (same seq) opens no gap and is no error."""
    intake, outputs = feed([heartbeat(1, 1), heartbeat(2, 2), heartbeat(2, 2), heartbeat(3, 3)])
    assert ([], {}) == (gap_alerts(outputs), intake.gaps())
    assert 0 == intake.rejected


def test_a_heartbeat_needs_its_seq() -> None:
    """A heartbeat is its number: without ``seq`` it is refused, and the reason names the field."""
    _, outputs = feed([heartbeat(None, 1)])
    (error,) = [o for o in outputs if isinstance(o, ErrorMessage)]
    assert error.reason.startswith("seq:")


def test_a_heartbeat_on_a_fill_topic_is_refused_naming_the_control_topic() -> None:
    """Heartbeats go to the control topic; elsewhere the reason says where to publish them."""
    wrong = Record(
        line=0,
        topic=f"{ROOT}/fills/A",
        payload={"type": "heartbeat", "source": "gw-1", "seq": 1},
        ts=text(OPEN),
    )
    _, outputs = feed([wrong])
    (error,) = [o for o in outputs if isinstance(o, ErrorMessage)]
    assert f"publish heartbeat messages to {ROOT}/control" in error.reason

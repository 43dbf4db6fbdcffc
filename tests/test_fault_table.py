"""The fault table of the hardening work (issue 12): one row per fault a probe of the daemon found.

Rows a message can cause run here through the intake, as the daemon feeds it (each record with
its receive time, as journaled): each asserts the outcome (refused with a reason naming what to
fix, or applied with the right alert), that nothing accepted is lost or counted twice (a good fill
after it still counts, once), and that the engine still serves (that fill gets its status).

Rows about processes, files and the broker need a real broker or process and live in the files
named in :data:`ELSEWHERE`; the last test holds that table to the test suite, so a row cannot
silently disappear.
"""

from __future__ import annotations

import ast
import json
from datetime import UTC, datetime, timedelta
from pathlib import Path

import pytest

from tracker.core.engine import Engine
from tracker.core.messages import AlertMessage, ErrorMessage, Outbound, StatusMessage
from tracker.edge.intake import Intake
from tracker.edge.records import Record
from tracker.edge.wire import oversize_note

ROOT = "tracker"
OPEN = datetime(2026, 3, 2, 14, 30, tzinfo=UTC)
TESTS = Path(__file__).parent


def at(minutes: float) -> str:
    return (OPEN + timedelta(minutes=minutes)).isoformat().replace("+00:00", "Z")


ORDER = {
    "type": "order",
    "action": "new",
    "order_id": "A",
    "symbol": "X_ZEPH",
    "side": "buy",
    "quantity": 50_000,
    "start": at(0),
    "end": at(390),
    "max_participation": 0.2,
    "ts": at(-30),
}


def fill_text(fill_id: str, ts: str, quantity: str = "300") -> str:
    return (
        f'{{"type": "fill", "fill_id": "{fill_id}", "order_id": "A", "quantity": {quantity}, '
        f'"price": 42.0, "ts": "{ts}"}}'
    )


def bin_text(start: str, end: str, ts: str) -> str:
    return json.dumps(
        {
            "type": "bin",
            "symbol": "X_ZEPH",
            "start": start,
            "end": end,
            "volume": 20_000,
            "vwap": 42.0,
            "open": 42.0,
            "high": 42.1,
            "low": 41.9,
            "close": 42.0,
            "spread": 0.02,
            "ts": ts,
        }
    )


FILLS = f"{ROOT}/fills/A"
BINS = f"{ROOT}/bins/X_ZEPH"
WIDE = json.dumps({**json.loads(fill_text("W", at(5))), **{f"x{n}": n for n in range(1000)}})

#: (id, topic, payload, receive minute, what must be said: an error's words or an alert code,
#: shares of the faulty message that count)
ROWS: list[tuple[str, str, str | bytes, float, str, int]] = [
    ("fill-4-years-ahead", FILLS, fill_text("F", "2030-03-02T14:35:00Z"), 5, "clock_skew", 300),
    ("fill-10-min-fast", FILLS, fill_text("F", at(15)), 5, "clock_skew", 300),
    (
        "halt-a-year-ahead",
        f"{ROOT}/control",
        '{"type": "control", "command": "halt", "order_id": "A", "ts": "2027-03-02T14:35:00Z"}',
        5,
        "order_halted",
        0,
    ),
    (
        "bin-dated-tomorrow",
        BINS,
        bin_text("2026-03-03T14:30:00Z", "2026-03-03T14:35:00Z", at(5)),
        5,
        "after the message was received",
        0,
    ),
    ("401-digit-quantity", FILLS, fill_text("F", at(5), "9" * 401), 5, "quantity:", 0),
    ("1e300-shares", FILLS, fill_text("F", at(5), "1e300"), 5, "quantity:", 0),
    (
        "duplicate-key",
        FILLS,
        fill_text("F", at(5)).replace('"quantity": 300', '"quantity": 1, "quantity": 100000'),
        5,
        "quantity",
        0,
    ),
    ("over-size-limit", FILLS, oversize_note(200_000, 65_536, "{"), 5, "too large", 0),
    ("1000-unknown-fields", FILLS, WIDE, 5, "not a field of wire contract", 300),
    (
        "seq-gap",
        FILLS,
        json.dumps({**json.loads(fill_text("F", at(5))), "source": "gw", "seq": 9}),
        5,
        "source_gap",
        300,
    ),
]


def run(fault: Record) -> tuple[list[Outbound], list[Outbound], list[Outbound]]:
    """Order, (for the gap row: seq 1 of the source), the fault, then one good fill."""
    first = Record(1, f"{ROOT}/orders/A", json.dumps(ORDER), at(-30))
    opener = json.dumps({**json.loads(fill_text("G0", at(2))), "source": "gw", "seq": 1})
    good = Record(4, FILLS, fill_text("G", at(10)), at(10))
    intake = Intake(Engine(root=ROOT), root=ROOT)
    lines = intake.feed_many([first, Record(2, FILLS, opener, at(2)), fault, good])
    return lines[2], lines[3], [o for line in lines for o in line]


@pytest.mark.parametrize(
    ("topic", "payload", "minute", "said", "counted"),
    [row[1:] for row in ROWS],
    ids=[row[0] for row in ROWS],
)
def test_fault_row(
    topic: str, payload: str | bytes, minute: float, said: str, counted: int
) -> None:
    """The fault is said, its shares count only when they should, and the next fill counts."""
    raw = payload.encode() if isinstance(payload, str) else payload
    fault, after, everything = run(Record(3, topic, raw, at(minute)))
    words = [o.reason for o in fault if isinstance(o, ErrorMessage)]
    codes = [o.code for o in fault if isinstance(o, AlertMessage)]
    assert said in codes or any(said in reason for reason in words), (codes, words)
    assert all(len(reason) <= 1_100 for reason in words)  # error records are capped in size
    (status,) = [o for o in after if isinstance(o, StatusMessage)][-1:]
    assert 300 + counted + 300 == status.filled  # the opener, the fault's shares, the good fill
    assert [] == [o for o in everything if getattr(o, "code", None) == "order_expired"]


#: Rows that need a broker, a process or the file system, and where they are held.
ELSEWHERE = {
    "burst through the shipped broker settings loses nothing": (
        "test_broker_contract.py",
        "test_shipped_contract_names_every_setting_the_daemon_needs",
    ),
    "kill -9 mid-day: nothing lost, nothing twice": (
        "test_daemon_faults.py",
        "test_kill_9_mid_day_and_restart_gives_the_uninterrupted_summary",
    ),
    "stock broker drops a source's last messages: its heartbeat reveals them": (
        "test_sequence_broker.py",
        "test_a_heartbeat_reveals_the_tail_a_full_queue_dropped",
    ),
    "broker restart mid-day": (
        "test_daemon_faults.py",
        "test_broker_restart_mid_day_loses_nothing",
    ),
    "journal deleted while running: stops, loses nothing": (
        "test_daemon_faults.py",
        "test_journal_deleted_while_running_stops_and_loses_nothing",
    ),
    "journal replaced while open": (
        "test_journal.py",
        "test_journal_replaced_while_open_stops_the_writer",
    ),
    "full disk / I/O error": ("test_journal.py", "test_failed_write_is_a_journal_write_error"),
    "damaged last record kept in quarantine": (
        "test_journal.py",
        "test_damaged_last_record_is_quarantined_on_open",
    ),
    "second daemon through a symlink": (
        "test_instance.py",
        "test_symlink_to_a_locked_journal_is_refused",
    ),
    "same instance id at start": (
        "test_instance.py",
        "test_second_daemon_with_the_same_instance_is_refused",
    ),
    "instance id collision while running": (
        "test_instance.py",
        "test_collision_while_running_stops_the_daemon",
    ),
    "password in the broker URL": (
        "test_config.py",
        "test_password_in_url_is_refused_and_not_repeated",
    ),
    "ticks only while time matters": (
        "test_daemon_faults.py",
        "test_no_ticks_are_journaled_while_nothing_waits_on_time",
    ),
    "restart from a snapshot publishes what a full recovery does": (
        "test_snapshot.py",
        "test_daemon_restart_from_a_snapshot_publishes_what_a_full_recovery_publishes",
    ),
    "one journal per day": (
        "test_journal_rotation.py",
        "test_the_first_record_of_a_new_day_goes_into_a_new_journal",
    ),
    "a flood is thinned, live as in replay": (
        "test_flood_broker.py",
        "test_a_flood_is_published_as_a_replay_of_the_journal_thins_it_across_a_restart",
    ),
}


def test_rows_held_elsewhere_exist() -> None:
    """Every row of the table kept in another file names a test that is there."""
    missing = []
    for row, (file, name) in ELSEWHERE.items():
        tree = ast.parse((TESTS / file).read_text(encoding="utf-8"))
        names = {node.name for node in ast.walk(tree) if isinstance(node, ast.FunctionDef)}
        if name not in names:
            missing.append(f"{row}: {file}::{name}")
    assert [] == missing

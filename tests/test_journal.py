"""The SQLite journal: append, read back, crash recovery up to the last whole record."""

from __future__ import annotations

import shutil
import sqlite3
import subprocess
import sys
import textwrap
from pathlib import Path

import pytest

from tracker.edge.records import Record
from tracker.shell.journal import (
    Journal,
    JournalError,
    JournalLost,
    JournalWriteError,
    read_journal,
    record_crc,
)

TS = "2026-03-02T14:30:00.000001Z"


def _rows(n: int) -> list[tuple[str, bytes, str]]:
    return [(f"tracker/fills/O{i}", b'{"n": %d}' % i, TS) for i in range(n)]


def test_append_returns_consecutive_sequence_numbers(tmp_path: Path) -> None:
    """Sequence numbers start at 1 and follow the order of appends."""
    with Journal(tmp_path / "j.sqlite") as journal:
        seqs = [journal.append(t, p, ts) for t, p, ts in _rows(3)]
    assert [1, 2, 3] == seqs


def test_read_journal_returns_records_as_appended(tmp_path: Path) -> None:
    """read_journal yields Records with the seq as line, raw payload bytes and the receive time."""
    path = tmp_path / "j.sqlite"
    with Journal(path) as journal:
        journal.append_many(_rows(2))
    expected = [
        Record(line=1, topic="tracker/fills/O0", payload=b'{"n": 0}', ts=TS),
        Record(line=2, topic="tracker/fills/O1", payload=b'{"n": 1}', ts=TS),
    ]
    assert expected == list(read_journal(path))


@pytest.mark.parametrize("count", [1, 127, 128, 129, 300, 1000], ids=lambda n: f"{n}-rows")
def test_a_group_of_any_size_is_journaled_whole_in_order(tmp_path: Path, count: int) -> None:
    """A group split over several INSERT statements is journaled as executemany journaled it:
    every row, in order, numbered on, each with its CRC (read back through the check)."""
    path = tmp_path / "j.sqlite"
    with Journal(path) as journal:
        journal.append_many(_rows(2))
        seqs = journal.append_many(_rows(count), published_through=1, logged_through=2)
    expected = [
        Record(line=3 + i, topic=t, payload=p, ts=ts) for i, (t, p, ts) in enumerate(_rows(count))
    ]
    assert list(range(3, 3 + count)) == seqs
    assert expected == list(read_journal(path, after=2))
    with sqlite3.connect(path) as db:
        crcs = [row[0] for row in db.execute("SELECT crc FROM journal WHERE seq > 2 ORDER BY seq")]
    assert [record_crc(t, p, ts) for t, p, ts in _rows(count)] == crcs


def test_reopen_continues_the_sequence(tmp_path: Path) -> None:
    """A reopened journal keeps its records and numbers new ones after them."""
    path = tmp_path / "j.sqlite"
    with Journal(path) as journal:
        journal.append_many(_rows(2))
    with Journal(path) as journal:
        seq = journal.append("tracker/tick", b'{"type":"tick"}', TS)
        assert (3, 3) == (seq, len(journal))


def test_published_through_is_kept_across_reopen(tmp_path: Path) -> None:
    """The published-through mark written with a group commit survives a reopen."""
    path = tmp_path / "j.sqlite"
    with Journal(path) as journal:
        journal.append_many(_rows(3), published_through=2)
    with Journal(path) as journal:
        assert 2 == journal.published_through


def test_binary_payload_round_trips(tmp_path: Path) -> None:
    """Payloads that are not UTF-8 are kept byte for byte (they are rejected later, not here)."""
    path = tmp_path / "j.sqlite"
    payload = bytes(range(256))
    with Journal(path) as journal:
        journal.append("tracker/fills/X", payload, TS)
    assert payload == next(read_journal(path)).payload


def test_not_a_journal_is_an_error_naming_the_file(tmp_path: Path) -> None:
    """An SQLite file of another application is refused with a reason."""
    path = tmp_path / "other.sqlite"
    db = sqlite3.connect(path)
    db.execute("CREATE TABLE t (x)")
    db.commit()
    db.close()
    with pytest.raises(JournalError, match="not a tracker journal"):
        list(read_journal(path))


def test_missing_journal_is_an_error(tmp_path: Path) -> None:
    """Reading a journal that does not exist says so."""
    with pytest.raises(JournalError, match="does not exist"):
        list(read_journal(tmp_path / "nope.sqlite"))


def test_damaged_last_record_is_quarantined_on_open(tmp_path: Path) -> None:
    """A last record whose checksum fails (a write cut short) is moved aside, kept byte for byte."""
    path = tmp_path / "j.sqlite"
    with Journal(path) as journal:
        journal.append_many(_rows(3))
    db = sqlite3.connect(path)
    db.execute("UPDATE journal SET payload = ? WHERE seq = 3", (b'{"n": 2',))
    db.commit()
    db.close()
    with Journal(path) as journal:
        assert ([3], 2) == (journal.quarantined, journal.last_seq)
        (kept,) = journal.quarantine()
        assert (3, b'{"n": 2') == (kept[0], kept[2])
        assert "checksum" in kept[4]
    assert [1, 2] == [r.line for r in read_journal(path)]
    with Journal(path) as journal:  # kept on the next open too, and not quarantined twice
        assert ([], 1) == (journal.quarantined, len(journal.quarantine()))


def test_journal_deleted_while_open_stops_the_writer(tmp_path: Path) -> None:
    """A journal deleted under its writer refuses the next commit (no writing into the void)."""
    path = tmp_path / "j.sqlite"
    with Journal(path) as journal:
        journal.append_many(_rows(1))
        path.unlink()
        with pytest.raises(JournalLost, match="deleted or replaced"):
            journal.append_many(_rows(1))


def test_journal_replaced_while_open_stops_the_writer(tmp_path: Path) -> None:
    """A journal replaced by another file (same name, new inode) is noticed at the next commit."""
    path = tmp_path / "j.sqlite"
    with Journal(path) as journal:
        journal.append_many(_rows(1))
        path.rename(tmp_path / "moved.sqlite")
        path.write_bytes(b"")
        with pytest.raises(JournalLost):
            journal.append_many(_rows(1))


def test_failed_write_is_a_journal_write_error(tmp_path: Path) -> None:
    """A write SQLite refuses (here: a full database, as on a full disk) says nothing was kept."""
    path = tmp_path / "j.sqlite"
    with Journal(path) as journal:
        journal.append_many(_rows(1))
        pages = journal._db.execute("PRAGMA page_count").fetchone()[0]
        journal._db.execute(f"PRAGMA max_page_count = {pages}")
        with pytest.raises(JournalWriteError, match="nothing of this group was journaled"):
            journal.append_many([("t/fills/A", b"x" * 100_000, "2026-03-10T14:30:00Z")])
        assert 1 == len(journal)


def test_damaged_record_in_the_middle_is_an_error(tmp_path: Path) -> None:
    """A damaged record that is not the last one is reported by sequence number, not skipped."""
    path = tmp_path / "j.sqlite"
    with Journal(path) as journal:
        journal.append_many(_rows(3))
    db = sqlite3.connect(path)
    db.execute("UPDATE journal SET ts = 'x' WHERE seq = 2")
    db.commit()
    db.close()
    with pytest.raises(JournalError, match="record 2 is damaged"):
        list(read_journal(path))


def test_crc_covers_topic_payload_and_time() -> None:
    """Changing any of topic, payload or time changes the checksum."""
    base = record_crc("a", b"b", "c")
    assert base not in {
        record_crc("x", b"b", "c"),
        record_crc("a", b"x", "c"),
        record_crc("a", b"b", "x"),
    }


_WRITER = textwrap.dedent(
    """
    import sys
    from tracker.shell.journal import Journal
    journal = Journal(sys.argv[1])
    for i in range(int(sys.argv[2])):
        journal.append_many([("tracker/fills/O", b"x" * 3000, "2026-03-02T14:30:00Z")])
    print("committed", flush=True)
    sys.stdin.read()  # hold the file open (no checkpoint) until killed
    """
)


def test_torn_wal_tail_is_recovered_to_last_whole_record(tmp_path: Path) -> None:
    """A WAL cut in the middle of its last frame (a crash mid-write) keeps all whole commits."""
    path = tmp_path / "j.sqlite"
    crash = tmp_path / "crash"
    crash.mkdir()
    with subprocess.Popen(
        [sys.executable, "-c", _WRITER, str(path), "10"],
        stdin=subprocess.PIPE,
        stdout=subprocess.PIPE,
    ) as writer:
        try:
            assert writer.stdout is not None
            assert b"committed\n" == writer.stdout.readline()
            # Copy the database and its WAL as a crashed writer leaves them, then cut the WAL.
            shutil.copy(path, crash / "j.sqlite")
            shutil.copy(Path(f"{path}-wal"), crash / "j.sqlite-wal")
        finally:
            writer.kill()
    wal = crash / "j.sqlite-wal"
    data = wal.read_bytes()
    wal.write_bytes(data[: len(data) - 1500])
    with Journal(crash / "j.sqlite") as journal:
        recovered = journal.last_seq
    assert 9 == recovered
    assert list(range(1, 10)) == [r.line for r in read_journal(crash / "j.sqlite")]


def test_kill_during_appends_leaves_only_whole_records(tmp_path: Path) -> None:
    """kill -9 of a process appending in a loop leaves a journal of whole, checksummed records."""
    path = tmp_path / "j.sqlite"
    script = textwrap.dedent(
        """
        import sys
        from tracker.shell.journal import Journal
        journal = Journal(sys.argv[1], durability="normal")
        i = 0
        while True:
            i += 1
            journal.append("tracker/fills/O", b"%d" % i, "2026-03-02T14:30:00Z")
            if i == 200:
                print("started", flush=True)
        """
    )
    with subprocess.Popen(
        [sys.executable, "-c", script, str(path)], stdout=subprocess.PIPE
    ) as writer:
        try:
            assert writer.stdout is not None
            assert b"started\n" == writer.stdout.readline()
        finally:
            writer.kill()
    records = list(read_journal(path))
    expected = [str(r.line).encode() for r in records]
    assert expected == [r.payload for r in records]
    assert len(records) >= 200


def _replayed(records: object) -> dict[str, list[bytes]]:
    from tracker.core.engine import Engine
    from tracker.edge.wire import encode
    from tracker.shell.replay import replay

    result = replay(records, Engine())  # type: ignore[arg-type]
    return {
        kind: [encode(m) for m in getattr(result, kind)]
        for kind in ("targets", "alerts", "status", "errors")
    }


def test_export_replays_like_the_journal(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """tracker journal export writes a JSON Lines file whose replay equals the journal's."""
    from tracker.cli import main
    from tracker.edge.recordings import read_jsonl

    order = (
        '{"type":"order","action":"new","order_id":"X_ZEPH-J1","symbol":"X_ZEPH","side":"buy",'
        '"quantity":5000,"start":"2026-03-10T14:30:00Z","end":"2026-03-10T20:00:00Z",'
        '"ts":"2026-03-10T14:29:00Z"}'
    )
    fill = (
        '{"type": "fill", "fill_id": "J1", "order_id": "X_ZEPH-J1", "quantity": 100, '
        '"price": 42.0, "ts": "2026-03-10T14:31:00Z"}'
    )
    rows = [
        (
            "tracker/tick",
            b'{"type":"tick","ts":"2026-03-10T14:29:30Z"}',
            "2026-03-10T14:29:30.000000Z",
        ),
        ("tracker/orders/X_ZEPH-J1", order.encode(), "2026-03-10T14:29:31.000000Z"),
        ("tracker/fills/X_ZEPH-J1", fill.encode(), "2026-03-10T14:31:01.000000Z"),  # spaced JSON
        ("tracker/fills/X_ZEPH-J1", b'{"type": "fill", NaN}', "2026-03-10T14:31:02.000000Z"),
        ("tracker/fills/X_ZEPH-J1", fill.encode(), "2026-03-10T14:31:03.000000Z"),  # redelivery
    ]
    journal = tmp_path / "j.sqlite"
    with Journal(journal) as writer:
        writer.append_many(rows)
    out = tmp_path / "day.jsonl"
    assert 0 == main(["journal", "export", str(journal), "-o", str(out)])
    assert "exported 5 records" in capsys.readouterr().out
    expected = _replayed(read_journal(journal))
    assert (1, True) == (len(expected["errors"]), bool(expected["status"]))
    assert expected == _replayed(read_jsonl(out))


def test_export_writes_compact_json_as_objects_and_the_rest_as_text(tmp_path: Path) -> None:
    """Compact JSON objects become objects (readable); spaced or broken payloads stay raw text."""
    from tracker.cli.journal import export_payload

    assert ({"a": 1}, True) == export_payload(b'{"a":1}')
    assert ('{"a": 1}', True) == export_payload(b'{"a": 1}')
    assert ("{oops", True) == export_payload(b"{oops")
    assert ("\ufffd", False) == export_payload(b"\xff")

"""Snapshots: a replay (and a daemon restart) from a snapshot of the state gives, for the records
after it, the very bytes a replay from the first record gives; a snapshot that does not fit the
running code, or is damaged, is never used."""

from __future__ import annotations

import asyncio
import shutil
from datetime import timedelta
from pathlib import Path

import pytest
from structlog.testing import capture_logs

from tracker.cli import main
from tracker.core.engine import EngineConfig
from tracker.core.topics import DEFAULT_ROOT, Topics
from tracker.edge.intake import Intake
from tracker.edge.recordings import parse_ts, read_jsonl
from tracker.edge.records import Record, payload_bytes
from tracker.edge.wire import Tick, encode
from tracker.errors import InputError
from tracker.shell import snapshot
from tracker.shell.config import BrokerSettings, Settings, load_settings
from tracker.shell.daemon import Daemon
from tracker.shell.journal import Journal, read_journal
from tracker.shell.replay import dumps_summary, replay
from tracker.shell.setup import Setup, engine_of, entries_of

DAY = Path(__file__).resolve().parent.parent / "replay_data" / "day-2026-03-10-seed7.jsonl"
ROOT = DEFAULT_ROOT
TICK_SECONDS = 30  # the daemon ticks only when time alone changes something; often enough here
OUTPUTS = ("targets", "alerts", "status", "errors", "acks")
SETUP = Setup(ROOT, EngineConfig(), {})


def _journal_of_the_day(path: Path) -> Path:
    """The invented golden day as the daemon journals it: its setup, then every line with its
    receive time, and a tick every TICK_SECONDS of receive time in between."""
    topics = Topics(ROOT)
    rows: list[tuple[str, bytes, str]] = []
    last = None
    for line in read_jsonl(DAY):
        assert isinstance(line, Record) and line.ts is not None
        when = parse_ts(line.ts)
        while last is not None and last + timedelta(seconds=TICK_SECONDS) < when:
            last += timedelta(seconds=TICK_SECONDS)
            stamp = last.isoformat().replace("+00:00", "Z")
            rows.append((topics.tick, encode(Tick(ts=last)), stamp))
        last = when if last is None or when > last else last
        rows.append((line.topic, payload_bytes(line.payload), line.ts))
    with Journal(path) as journal:
        journal.describe(entries_of(SETUP), rows[0][2])
        journal.append_many(rows)
    return path


def _snapshot_after(path: Path, seq: int, kind: str = "interval") -> int:
    """Store in the journal a snapshot of the state after record ``seq``, made as the daemon
    makes it (its intake over the records, then :func:`snapshot.dump`); return its id."""
    intake = Intake(engine_of(SETUP), root=ROOT, derive_ticks=False)
    records = list(read_journal(path))[:seq]
    for start in range(0, len(records), 256):
        intake.feed_many(records[start : start + 256])
    with Journal(path) as journal:
        info = journal.save_snapshot(
            after_seq=seq,
            setup_id=journal.setup_id,
            kind=kind,
            format=snapshot.format_tag(),
            state=snapshot.dump(intake),
            ts=records[-1].ts or "",
        )
    return info.id


@pytest.fixture(scope="module")
def day(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The golden day's journal (no snapshot yet)."""
    return _journal_of_the_day(tmp_path_factory.mktemp("day") / "journal.sqlite")


@pytest.fixture(scope="module")
def full(day: Path, tmp_path_factory: pytest.TempPathFactory) -> Path:
    """``tracker replay`` of the golden day's journal from its first record."""
    out = tmp_path_factory.mktemp("full")
    assert 0 == main(["replay", str(day), "--out", str(out), "--no-progress"])
    return out


def _counts_through(path: Path, seq: int) -> dict[str, int]:
    """How many outputs of each kind a replay of the records up to ``seq`` writes."""
    result = replay(list(read_journal(path))[:seq], engine_of(SETUP), ROOT)
    return {name: len(getattr(result, name)) for name in OUTPUTS}


def _copy(source: Path, target: Path) -> Path:
    return Path(shutil.copy(source, target))


def _lines(folder: Path, name: str) -> list[bytes]:
    return (folder / f"{name}.jsonl").read_bytes().splitlines()


@pytest.mark.parametrize("fraction", [0.2, 0.55, 0.9], ids=["morning", "midday", "afternoon"])
def test_replay_from_a_snapshot_gives_the_bytes_of_a_replay_from_the_start(
    day: Path, full: Path, tmp_path: Path, fraction: float
) -> None:
    """Every output file of a replay from a snapshot is, byte for byte, the tail of the replay
    from the first record, and summary.json is the same file."""
    journal = _copy(day, tmp_path / "journal.sqlite")
    seq = int(len(list(read_journal(journal))) * fraction)
    _snapshot_after(journal, seq)
    out = tmp_path / "out"
    args = ["replay", str(journal), "--out", str(out), "--from-snapshot", "--no-progress"]
    assert 0 == main(args)
    before = _counts_through(journal, seq)
    for name in OUTPUTS:
        assert _lines(full, name)[before[name] :] == _lines(out, name), name
    assert (full / "summary.json").read_bytes() == (out / "summary.json").read_bytes()


def test_from_snapshot_seq_picks_the_newest_at_or_before_it(
    day: Path, full: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """--from-snapshot SEQ starts from the newest snapshot taken at or before record SEQ."""
    journal = _copy(day, tmp_path / "journal.sqlite")
    with Journal(journal) as open_journal:  # all published: the journal keeps both snapshots
        open_journal.mark_published(open_journal.last_seq)
    _snapshot_after(journal, 400)
    _snapshot_after(journal, 900)
    out = tmp_path / "out"
    args = ["replay", str(journal), "--out", str(out), "--from-snapshot", "899", "--no-progress"]
    assert 0 == main(args)
    assert "from the snapshot after record 400:" in capsys.readouterr().out
    before = _counts_through(journal, 400)
    assert _lines(full, "targets")[before["targets"] :] == _lines(out, "targets")


def _daemon_outputs(
    journal: Path, snapshot_records: int
) -> tuple[int | None, int, list[tuple[str, bytes, bool, int]], bytes]:
    """Enter a daemon on ``journal`` (no broker: recovery only) and take what it queued to
    publish again; return where it restored from, how many records it replayed, that queue and
    its summary."""
    settings = Settings(
        journal=journal,
        broker=BrokerSettings(port=1),  # nothing listens: the start-up check says so and goes on
        root=ROOT,
        instance="snap",
        snapshot_records=snapshot_records,
    )

    async def enter() -> tuple[int | None, int, list[tuple[str, bytes, bool, int]], bytes]:
        async with Daemon(settings) as daemon:
            queued = []
            while len(daemon.outbox):
                ticket, item = await daemon.outbox.take()
                queued.append((item.topic, item.payload, item.retain, item.seq))
                daemon.outbox.done(ticket)
            summary = dumps_summary(daemon.summary()).encode()
            return daemon.restored_from, daemon.recovered, queued, summary

    return asyncio.run(enter())


def test_daemon_restart_from_a_snapshot_publishes_what_a_full_recovery_publishes(
    day: Path, tmp_path: Path
) -> None:
    """A restart that loads the snapshot and replays the tail queues, for the records past the
    published mark, the very messages a restart replaying the whole journal queues."""
    journal = _copy(day, tmp_path / "journal.sqlite")
    total = len(list(read_journal(journal)))
    seq = total // 2
    _snapshot_after(journal, seq)
    with Journal(journal) as open_journal:
        open_journal.mark_published(seq + 40)  # the outputs of the last records were not confirmed
    plain = _copy(journal, tmp_path / "plain.sqlite")
    restored, recovered, queued, summary = _daemon_outputs(journal, 10_000)
    _, replayed, expected, expected_summary = _daemon_outputs(plain, 0)
    assert (seq, total - seq) == (restored, recovered)
    assert total == replayed
    assert len(expected) > 0
    assert expected == queued
    assert expected_summary == summary


def _damage(journal: Path, snapshot_id: int, **changes: str) -> None:
    import sqlite3

    with sqlite3.connect(journal) as db:
        for column, value in changes.items():
            db.execute(f"UPDATE snapshot SET {column} = ? WHERE id = ?", (value, snapshot_id))


@pytest.mark.parametrize(
    ("changes", "reason"),
    [
        ({"sha256": "0" * 64}, "damaged: its SHA-256 does not match"),
        ({"format": snapshot.format_tag().replace("source=", "source=0")}, "source differs"),
        ({"format": "tracker-snapshot/0 tracker=0.0.1"}, "format 'tracker-snapshot/0'"),
    ],
    ids=["damaged", "other-source", "other-format"],
)
def test_an_unusable_snapshot_is_skipped_for_the_one_before(
    day: Path, tmp_path: Path, changes: dict[str, str], reason: str
) -> None:
    """The newest snapshot does not fit: the daemon says why in its log and restarts from the
    one before, with the outputs of a full recovery."""
    journal = _copy(day, tmp_path / "journal.sqlite")
    total = len(list(read_journal(journal)))
    with Journal(journal) as open_journal:  # published through both snapshots: both are kept
        open_journal.mark_published(total - 25)
    _snapshot_after(journal, 300)
    newest = _snapshot_after(journal, 1_000)
    _damage(journal, newest, **changes)
    plain = _copy(journal, tmp_path / "plain.sqlite")
    with capture_logs() as logs:
        restored, recovered, queued, summary = _daemon_outputs(journal, 10_000)
    skipped = [entry for entry in logs if entry["event"].startswith("snapshot not used")]
    _, _, expected, expected_summary = _daemon_outputs(plain, 0)
    assert [(newest, 1_000)] == [(entry["snapshot_id"], entry["after_seq"]) for entry in skipped]
    assert reason in skipped[0]["reason"]
    assert (300, total - 300) == (restored, recovered)
    assert (expected, expected_summary) == (queued, summary)


def test_replay_from_snapshot_refuses_a_journal_without_a_usable_one(
    day: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """--from-snapshot on a journal whose only snapshot is damaged: one line saying so, exit 2."""
    journal = _copy(day, tmp_path / "journal.sqlite")
    _damage(journal, _snapshot_after(journal, 500), sha256="0" * 64)
    out = tmp_path / "out"
    args = ["replay", str(journal), "--out", str(out), "--from-snapshot", "--no-progress"]
    assert 2 == main(args)
    error = capsys.readouterr().err
    assert "no snapshot that this tracker can use" in error
    assert "the one after record 500: damaged" in error


def test_a_snapshot_past_the_published_mark_is_not_used(day: Path, tmp_path: Path) -> None:
    """A snapshot taken after the last record whose outputs were confirmed is not used: the
    records between must be replayed for their outputs to be published again."""
    journal = _copy(day, tmp_path / "journal.sqlite")
    _snapshot_after(journal, 600)
    with Journal(journal) as open_journal:
        open_journal.mark_published(599)
    restored, recovered, _, _ = _daemon_outputs(journal, 10_000)
    assert (None, len(list(read_journal(journal)))) == (restored, recovered)


@pytest.mark.parametrize(
    ("value", "expected"),
    [
        ("0", 0),
        ("2500", 2500),
        ("-1", r"at least 1 \(or 0 to turn it off\)"),
        ("1.5", "must be a number"),
    ],
    ids=["off", "count", "negative", "fraction"],
)
def test_snapshot_records_setting_is_checked(value: str, expected: int | str) -> None:
    """[daemon] snapshot_records: a whole number of at least 1, or 0 for never."""
    flags = {"daemon.journal": "j.sqlite", "daemon.snapshot_records": value}
    if isinstance(expected, int):
        assert expected == load_settings(flags, {}).snapshot_records
        return
    with pytest.raises(InputError, match=expected) as caught:
        load_settings(flags, {})
    assert "daemon.snapshot_records" == caught.value.field

"""Restart time of the daemon after busy days, with and without snapshots, and references.

Invented data only: the busy day of ``bench_replay.py`` (50 made-up symbols X_HX00..X_HX49 on the
made-up venue Harbour Lane Exchange, 500 parent orders over the 09:30-16:00 session, one bin per
symbol and 5-minute bin, about 200,000 fills), repeated over consecutive days with new order ids,
journaled as the daemon journals it (each message with its receive time, a tick a minute).

The journal is built as the live daemon builds it: every record goes through the daemon's intake
and engine, and a snapshot is stored every ``--snapshot-records`` records (the daemon's default),
so the journal ends with a tail of records after its last snapshot, as after a crash. Each new
day begins as the daemon's journal rotation begins it (the default): the ended orders are left
behind and the state is stored as a ``carried`` snapshot (``--no-rotate``: every day's orders
stay in the state, as before rotation left them behind).

Figures printed, per number of days:

1. the restart (``Daemon.__aenter__``: open the journal, recover, journal the setup; no broker),
   replaying the whole journal (``snapshot_records = 0``);
2. the same restart with the snapshots: the newest loaded, then the tail replayed; and its worst
   case, measured: the newest snapshot deleted, so that the restart loads the one before it and
   replays a whole interval of tail (the day's last bin closes among them);
3. references in the same run: reading the journal's records alone, and loading the newest
   snapshot alone.

Times are wall-clock seconds (a restart is waited for in wall time) and CPU seconds of this
process beside them (the machine may be shared).

Run: ``.venv/bin/python benchmarks/bench_restart.py [--days 1 5] [--fills 200000]
[--snapshot-records 10000]``.
"""

from __future__ import annotations

import argparse
import asyncio
import gc
import json
import sqlite3
import sys
import tempfile
import time
from datetime import date, datetime, timedelta
from pathlib import Path
from typing import Any

sys.path.insert(0, str(Path(__file__).resolve().parent))

import bench_replay  # the busy day's generator

from tracker.core.topics import DEFAULT_ROOT, Topics
from tracker.edge.wire import Tick, encode
from tracker.shell import snapshot
from tracker.shell.config import BrokerSettings, Settings
from tracker.shell.daemon import Daemon, build_engine
from tracker.shell.journal import Journal

ROOT = DEFAULT_ROOT
TOPICS = Topics(ROOT)


def day_rows(day: int, fills: int) -> list[tuple[str, bytes, str]]:
    """One busy day as journal rows ``(topic, payload, receive time)``, in time order, with a
    tick every minute of receive time; order and fill ids carry the day's number."""
    bench_replay.DAY = date(2026, 3, 9) + timedelta(days=day)
    while bench_replay.DAY.weekday() >= 5:  # the session's days
        day += 1
        bench_replay.DAY = date(2026, 3, 9) + timedelta(days=day)
    rows: list[tuple[str, bytes, str]] = []
    next_tick: datetime | None = None
    suffix = f"-D{day}"
    for text in bench_replay.make_day(50, 10, fills):
        line = json.loads(text)
        payload: dict[str, Any] = line["payload"]
        topic = line["topic"]
        if "order_id" in payload:
            payload["order_id"] += suffix
            kind = "orders" if payload["type"] == "order" else "fills"
            topic = getattr(TOPICS, kind)(payload["order_id"])
        if "fill_id" in payload:
            payload["fill_id"] += suffix
        when = datetime.fromisoformat(line["ts"])
        while next_tick is not None and next_tick <= when:
            stamp = next_tick.isoformat().replace("+00:00", "Z")
            rows.append((TOPICS.tick, encode(Tick(ts=next_tick)), stamp))
            next_tick += timedelta(minutes=1)
        if next_tick is None:
            next_tick = when.replace(second=0, microsecond=0) + timedelta(minutes=1)
        rows.append((topic, json.dumps(payload, separators=(",", ":")).encode(), line["ts"]))
    # The live daemon ticks on while orders wait for their end: an hour more of ticks expires them.
    for _ in range(60):
        assert next_tick is not None
        stamp = next_tick.isoformat().replace("+00:00", "Z")
        rows.append((TOPICS.tick, encode(Tick(ts=next_tick)), stamp))
        next_tick += timedelta(minutes=1)
    return rows


def build_journal(
    path: Path, days: int, fills: int, every: int, rotate: bool = True
) -> tuple[int, int]:
    """Journal ``days`` busy days through the daemon's intake and engine, with a snapshot every
    ``every`` records; return the number of records and the seq of the last snapshot.

    With ``rotate`` each new day begins as the daemon's journal rotation begins it: the ended
    orders are left behind (:meth:`Intake.forget_ended`) and the state is stored as a
    ``carried`` snapshot. The days stay in one file here; a restart loads the newest snapshot and
    replays the records after it, as it would from the day's own journal."""
    from tracker.edge.intake import Intake
    from tracker.shell.setup import Setup, entries_of

    settings = _settings(path, every)
    engine = build_engine(settings)
    intake = Intake(engine, root=ROOT, derive_ticks=False)
    last_snapshot = 0
    last_ts = "2026-03-10T00:00:00.000000Z"
    with Journal(path, durability="normal") as journal:
        setup = Setup(ROOT, engine.config, {})
        journal.describe(entries_of(setup), "2026-03-10T00:00:00.000000Z")
        for day in range(days):
            if rotate and day > 0:
                left = intake.forget_ended()
                print(f"  day {day + 1}: {len(left):,} ended orders left behind", flush=True)
                journal.mark_published(journal.last_seq)
                journal.save_snapshot(
                    after_seq=journal.last_seq,
                    setup_id=journal.setup_id,
                    kind="carried",
                    format=snapshot.format_tag(),
                    state=snapshot.dump(intake),
                    ts=last_ts,  # the day before's last record
                )
                last_snapshot = journal.last_seq
            rows = day_rows(day, fills)
            for start in range(0, len(rows), 64):  # groups as the daemon commits them
                group = rows[start : start + 64]
                seqs = journal.append_many(group, published_through=journal.last_seq)
                records = list(journal.records(after=seqs[0] - 1))
                intake.feed_many(records)
                last_ts = group[-1][2]
                if seqs[-1] - last_snapshot >= every:
                    journal.mark_published(seqs[-1])
                    journal.save_snapshot(
                        after_seq=seqs[-1],
                        setup_id=journal.setup_id,
                        kind="interval",
                        format=snapshot.format_tag(),
                        state=snapshot.dump(intake),
                        ts=group[-1][2],
                    )
                    last_snapshot = seqs[-1]
        journal.mark_published(journal.last_seq)
        return journal.last_seq, last_snapshot


def _settings(path: Path, every: int) -> Settings:
    return Settings(
        journal=path,
        broker=BrokerSettings(port=1),  # nothing listens: the start-up check fails at once
        root=ROOT,
        instance="bench",
        snapshot_records=every,
    )


def restart(path: Path, every: int) -> tuple[float, float, int, int | None]:
    """Wall and CPU seconds of a daemon's start (recovery), the records it replayed and the
    snapshot it started from."""

    async def enter() -> tuple[float, float, int, int | None]:
        gc.collect()  # the journal's build leaves garbage; not this restart's to collect
        wall, cpu = time.perf_counter(), time.process_time()
        daemon = Daemon(_settings(path, every), freeze=True)  # as `tracker run` makes it
        await daemon.__aenter__()
        wall, cpu = time.perf_counter() - wall, time.process_time() - cpu
        recovered, restored = daemon.recovered, daemon.restored_from
        daemon._close_journal()  # not __aexit__: leave the journal as it was for the next run
        daemon._unlock()
        gc.unfreeze()  # what __aexit__ would do, so that the next restart freezes again
        return wall, cpu, recovered, restored

    return asyncio.run(enter())


def read_all(path: Path) -> float:
    """Wall seconds to read (and CRC-check) every record of the journal."""
    started = time.perf_counter()
    with Journal(path) as journal:
        count = sum(1 for _ in journal.records())
    assert count > 0
    return time.perf_counter() - started


def drop_newest_snapshot(path: Path) -> None:
    """Delete the newest snapshot, so that the next restart starts from the one before it with
    a full interval of tail: the worst case a crash just before a snapshot leaves."""
    with sqlite3.connect(path) as connection:
        connection.execute("DELETE FROM snapshot WHERE id = (SELECT MAX(id) FROM snapshot)")
    connection.close()


def load_newest(path: Path) -> tuple[float, int]:
    """Wall seconds to read and load the newest snapshot alone, and its size in bytes."""
    started = time.perf_counter()
    with Journal(path) as journal:
        info = journal.snapshots()[0]
        state = journal.snapshot_state(info.id)
    snapshot.load(state, format=info.format, sha256=info.sha256)
    return time.perf_counter() - started, len(state)


def main(argv: list[str] | None = None) -> int:
    """Build the journals, time the restarts, print the figures."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--days", type=int, nargs="+", default=[1, 5])
    parser.add_argument("--fills", type=int, default=200_000)
    default = Settings(Path(".")).snapshot_records
    parser.add_argument("--snapshot-records", type=int, default=default)
    parser.add_argument(
        "--no-rotate",
        action="store_true",
        help="keep every day's orders in the state (no journal rotation between days)",
    )
    args = parser.parse_args(argv)
    every = args.snapshot_records
    for days in args.days:
        with tempfile.TemporaryDirectory() as folder:
            path = Path(folder) / "journal.sqlite"
            started = time.perf_counter()
            total, last = build_journal(path, days, args.fills, every, not args.no_rotate)
            built = time.perf_counter() - started
            read = read_all(path)
            loaded, size = load_newest(path)
            wall, cpu, recovered, restored = restart(path, every)
            full_wall, full_cpu, full_recovered, _ = restart(path, 0)
            drop_newest_snapshot(path)
            worst_wall, worst_cpu, worst_recovered, worst_from = restart(path, every)
        assert restored == last and recovered == total - last and full_recovered == total
        assert worst_from is not None and worst_recovered == total - worst_from
        print(
            f"{days} day(s): {total:,} records, a snapshot every {every:,} (the last after record "
            f"{last:,}, {size / 1e6:.1f} MB); journal built in {built:.0f} s"
        )
        print(
            f"  restart replaying the whole journal: {full_wall:.2f} s wall ({full_cpu:.2f} s CPU)"
        )
        print(
            f"  restart from the newest snapshot + {recovered:,} records of tail: {wall:.2f} s "
            f"wall ({cpu:.2f} s CPU) = {full_wall / wall:.1f}x faster"
        )
        print(
            f"  worst case, measured: without the newest snapshot, from the one before it + "
            f"{worst_recovered:,} records of tail (the day's last bin closes among them): "
            f"{worst_wall:.2f} s wall ({worst_cpu:.2f} s CPU) (goal < 3 s)"
        )
        print(
            f"  references: reading the journal's records alone {read:.2f} s "
            f"({total / read:,.0f} records/s); loading the newest snapshot alone {loaded:.2f} s"
        )
    return 0


if __name__ == "__main__":
    sys.exit(main())

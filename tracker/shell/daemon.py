"""The live daemon: MQTT in, journal, engine, MQTT out -- and back on its feet after a crash.

Theory of operation
-------------------
Everything the engine sees passes through two stages, in one order. Stage 1 (journal):

1. take what is waiting in the bounded inbox (deliveries from :class:`tracker.shell.bus.Bus`, tick
   requests from the timer), at most ``batch_size`` at a time;
2. append them to the :class:`tracker.shell.journal.Journal` in one transaction and commit it
   (durably, per the journal's policy), each with the receive time of the daemon's clock; the
   commit runs in a worker thread, so messages keep arriving meanwhile and the next group is larger
   when the disk is slow (group commit);
3. acknowledge them to the broker, the group's acknowledgements in one write (only now: a crash
   before this line makes the broker deliver them again, and a redelivered copy changes nothing).

Stage 2 (apply), which works on one group while stage 1 commits the next:

4. feed each journaled record, exactly as journaled, to a :class:`tracker.edge.intake.Intake` --
   the same code ``tracker replay`` runs -- which decodes it (or rejects it with a reason), skips
   exact redeliveries, and hands it to :meth:`Engine.handle`;
5. put every output in the outbox, which the bus publishes at QoS 1 (status retained).

Because live processing *is* a replay of the journal as it grows, a replay of the journal gives
the same outputs, message for message. On start the daemon replays the whole journal into a fresh
engine before it connects; outputs of records after the journal's ``published_through`` mark
(which trails the broker's confirmations) are published again, so a crash loses no output either
(some may arrive twice: QoS 1 is at-least-once).

Time: the engine learns that time passes from :class:`tracker.edge.wire.Tick` events, which only
this shell makes: one when the daemon starts (so a journal always holds ticks and a replay never
invents any) and then one every ``tick_seconds`` of the daemon's clock while something waits on
time (:meth:`Engine.next_deadline <tracker.core.engine.Engine.next_deadline>` has passed: an order
to start or expire, a bin overdue); a quiet night journals none. Ticks are journaled like
messages. The clock is the wall clock in UTC, or a simulated one (``clock_start`` and
``clock_speed``, for the demo); either way the receive times it stamps never go backwards.

Limits at the edge: a payload over ``max_payload_bytes`` is journaled as a short note saying so
(not as JSON, so it is rejected, live and in replay alike, and its error record tells the sender
what happened); ids are checked by :func:`tracker.edge.wire.decode` before any is used in a topic
name; the inbox and the outbox are bounded and wait (back-pressure, logged and shown in the health
message) rather than grow. A flood of bad messages costs at most ten error records (a publication
and a log line each) per topic kind and reason in each ten seconds of receive time, plus one
record with the count of the rest: the outputs of every record pass through
:class:`tracker.edge.digest.ErrorDigest`, exactly as in a replay.

Stopping (SIGTERM / SIGINT through :meth:`Daemon.stop`): stop taking messages, finish those in the
inbox, journal and apply one more tick when the error digest holds records back (so their count
is published, and a replay of the journal counts them at the same place), wait for the outbox to
be confirmed (``flush_seconds``), publish ``offline`` on the retained health topic, disconnect,
write the summary, close the journal.
"""

from __future__ import annotations

import asyncio
import contextlib
import dataclasses
import fcntl
import gc
import os
import time as _time
from collections.abc import Callable, Iterable, Iterator
from datetime import UTC, date, datetime, timedelta
from pathlib import Path
from types import TracebackType
from typing import IO, TYPE_CHECKING, Any, Self
from zoneinfo import ZoneInfo

import aiomqtt
import structlog

from tracker.core import alerts as rules
from tracker.core.formats import utc_text
from tracker.core.topics import Topics
from tracker.edge.intake import EngineLike, Intake
from tracker.edge.records import Record
from tracker.edge.wire import (
    AlertMessage,
    ErrorMessage,
    Outbound,
    StatusMessage,
    TargetMessage,
    Tick,
    encode,
    oversize_note,
    topic_of,
)
from tracker.errors import InputError
from tracker.shell import snapshot
from tracker.shell.bus import Bus, Delivery, Outbox, Outgoing, acknowledge, probe_health
from tracker.shell.config import Settings
from tracker.shell.journal import Journal, JournalError, SnapshotInfo
from tracker.shell.replay import dumps_summary, finish_summary
from tracker.shell.setup import Setup, apply, entries_of, removed_profiles, timeline_ids

if TYPE_CHECKING:
    from tracker.core.engine import Engine

__all__ = ["Daemon", "build_engine", "format_ts", "inbound_topics"]

#: Seconds allowed, on a clean stop, for the outbox to be confirmed by the broker.
FLUSH_SECONDS = 15.0
#: Seconds allowed for each stage of a clean stop other than the flush.
STAGE_SECONDS = 15.0
#: While applying a group, the processor lets the bus publish at least this often (seconds).
YIELD_SECONDS = 0.005
#: Capacity of the outbox (outputs waiting for the broker's confirmation).
OUTBOX_CAPACITY = 20_000
#: During a burst, an interval snapshot waits until the daemon has caught up, or until applying
#: the records since the last one took this many seconds of CPU -- about what a restart would
#: spend replaying them (see ``Daemon._snapshot_now``).
SNAPSHOT_BUSY_SECONDS = 1.5
#: Seconds without a new group after which a snapshot that waited for the burst is stored.
SNAPSHOT_QUIET_SECONDS = 0.25
#: Records applied between two ``gc.freeze()`` calls (see :meth:`Daemon._settled`).
FREEZE_RECORDS = 2_048


#: Target states after which an order gets no more targets (its retained target is cleared).
_FINAL = frozenset({"done", "cancelled", "expired"})


def format_ts(moment: datetime) -> str:
    """A receive time as the journal keeps it: ISO 8601 in UTC with microseconds and a ``Z``."""
    return utc_text(moment, "microseconds")


def inbound_topics(root: str) -> tuple[str, ...]:
    """The topic filters the daemon subscribes to (never the tick topic: ticks are ours)."""
    return Topics(root).inbound


def build_engine(settings: Settings) -> Engine:
    """The engine the settings ask for: thresholds from ``[engine]``, profiles from the folder."""
    from tracker.core.engine import Engine, EngineConfig
    from tracker.shell.files import load_profiles

    config = EngineConfig.from_mapping(settings.engine) if settings.engine else None
    profiles = load_profiles(settings.profiles) if settings.profiles is not None else {}
    # The engine names the topic of errors it raises itself: it must use the daemon's root.
    return Engine(config=config, profiles=profiles, root=settings.root)


class _TickRequest:
    """A request from the timer; the processor turns it into a Tick at journal time."""

    __slots__ = ()


_TICK = _TickRequest()


class _Clock:
    """The daemon's clock: wall (UTC) or simulated; never earlier than ``floor``."""

    def __init__(
        self,
        settings: Settings,
        floor: datetime | None,
        source: Callable[[], datetime] | None = None,
    ) -> None:
        self.speed = settings.clock_speed
        self.simulated = settings.clock_start is not None or source is not None
        self._source = source
        origin = settings.clock_start
        if origin is not None and floor is not None and floor > origin:
            origin = floor  # a restarted simulation resumes where the journal stopped
        self._origin = origin
        self._started = _time.monotonic()
        self._floor = floor

    def __call__(self) -> datetime:
        if self._source is not None:
            now = self._source()
        elif self._origin is not None:
            elapsed = (_time.monotonic() - self._started) * self.speed
            now = self._origin + timedelta(seconds=elapsed)
        else:
            now = datetime.now(UTC)
        if self._floor is not None and now < self._floor:
            now = self._floor
        self._floor = now
        return now

    def wall_seconds(self, clock_seconds: float) -> float:
        """How many wall-clock seconds ``clock_seconds`` of this clock take."""
        return clock_seconds / self.speed if self.simulated else clock_seconds


class Daemon:
    """The live daemon as an async context manager (see the module docstring).

    Args:
        settings: What to connect to and where to journal.
        engine: The engine to drive; built from the settings when ``None``.
        on_output: Called with every output as it is queued for publication (the demo's live
            table uses it; also handy in tests).
        clock: The time source (UTC datetimes) when it is not the wall clock nor the simulated
            clock of the settings: the demo drives one that never runs ahead of its script.
            ``settings.clock_speed`` still tells how many of its seconds pass per real second.
        freeze: Keep what the records leave behind out of the garbage collector's reach
            (:meth:`_settled`): for a process that runs the daemon alone (``tracker run``), not
            for one that shares its interpreter with other work (tests, the demo), whose garbage
            would then be collected at unforeseeable times.

    Example::

        async with Daemon(settings) as daemon:
            loop.add_signal_handler(signal.SIGTERM, daemon.stop)
            await daemon.run()
    """

    def __init__(
        self,
        settings: Settings,
        *,
        engine: EngineLike | None = None,
        on_output: Callable[[Outbound], None] | None = None,
        clock: Callable[[], datetime] | None = None,
        freeze: bool = False,
    ) -> None:
        self.settings = settings
        self._clock_source = clock
        self.root = settings.root
        self.topics = Topics(settings.root)
        self._engine_given = engine
        self._on_output = on_output
        self._log = structlog.get_logger("tracker.shell.daemon").bind(instance=settings.instance)
        self.inbox: asyncio.Queue[Delivery | _TickRequest] = asyncio.Queue(settings.queue_size)
        self.outbox = Outbox(capacity=OUTBOX_CAPACITY)
        self._stopping = asyncio.Event()
        self._draining = False
        self._lock_file: IO[str] | None = None
        self._journal: Journal | None = None
        self._intake: Intake | None = None
        self._clock: _Clock | None = None
        self._unconfirmed: dict[int, int] = {}  # journal seq -> outputs not yet confirmed
        self._applied = 0
        # Journaled groups on their way from stage 1 to stage 2 (None: stage 1 has stopped).
        self._journaled: asyncio.Queue[list[Record] | None] = asyncio.Queue(4)
        self._persisted_mark = 0
        self.recovered = 0
        self.republished = 0
        self.received = 0  # deliveries journaled by this run
        self.commits = 0  # journal transactions of this run (received / commits = group size)
        self.stopped_cleanly = False
        self.bus = Bus(
            settings.broker,
            client_id=settings.client_id,
            subscriptions=inbound_topics(settings.root),
            inbox=self.inbox,  # type: ignore[arg-type]
            outbox=self.outbox,
            health_topic=self.topics.health(settings.instance),
            health=self.health,
            on_published=self._confirmed,
            heartbeat_seconds=settings.heartbeat_seconds,
            reconnect_min_seconds=settings.reconnect_min_seconds,
            reconnect_max_seconds=settings.reconnect_max_seconds,
            on_conflict=self._conflict,
        )
        #: Why the daemon stopped on its own (a second process with our instance id, a journal
        #: that cannot be written); ``None`` after an ordinary stop.
        self.failure: InputError | None = None
        self._journal_broken = False
        self._logged_through = 0  # journal seq up to which outputs were logged before a restart
        #: The journal seq of the snapshot the state was restored from (``None``: none used).
        self.restored_from: int | None = None
        self._snapshot_seq = 0  # the journal seq of the latest snapshot (restored or stored)
        self._snapshot_taken = _time.monotonic()
        self._applying = 0.0  # CPU seconds spent applying records since the latest snapshot
        self._journal_day: date | None = None  # the day the journal holds (rotate_journal)
        self._switching = asyncio.Lock()  # a snapshot or a rotation at a time
        # Freeze what the records leave behind (see _settled), unless the process froze objects
        # of its own; records applied since the last freeze.
        self._freezing = freeze and gc.get_freeze_count() == 0
        self._unfrozen = 0
        #: The journals closed by a rotation in this run (their dated paths).
        self.rotated: list[Path] = []

    # -- lifecycle -------------------------------------------------------------------------------

    async def __aenter__(self) -> Self:
        self._lock()
        try:
            await self._check_instance()
            self._finish_rotation()
            self._journal = Journal(self.settings.journal, durability=self.settings.durability)
            if self._journal.quarantined:
                self._log.warning(
                    "damaged last journal records kept aside in its quarantine table",
                    seqs=self._journal.quarantined,
                )
            engine = (
                self._engine_given
                if self._engine_given is not None
                else build_engine(self.settings)
            )
            self.engine: EngineLike = engine
            # What this run was given (the engine is switched to the journaled setup, or
            # replaced by a snapshot's, while it recovers; then to this, if it differs).
            self._profiles = dict(getattr(engine, "profiles", {}))
            self._config = getattr(engine, "config", None)
            self._intake = Intake(engine, root=self.root, derive_ticks=False)
            floor = _parse_ts(self._journal.last_ts) if self._journal.last_ts else None
            self._clock = _Clock(self.settings, floor, self._clock_source)
            described = self._journaled_setup(engine)
            self._recover(described)
            self._describe_setup()
            first = next(iter(self._journal.records(after=self._journal.base_seq)), None)
            if first is not None and first.ts is not None:
                self._journal_day = self._day_of(_parse_ts(first.ts))
        except BaseException:
            self._close_journal()
            self._unlock()
            raise
        return self

    async def __aexit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        tb: TracebackType | None,
    ) -> None:
        try:
            if self._journal is not None and not self._journal_broken:
                self._journal.mark_published(self.published_through, logged=self._applied)
                fresh = self._applied > self._snapshot_seq
                if self._snapshots_on and self.stopped_cleanly and fresh:
                    try:  # the next start then replays nothing
                        self._store_snapshot("stop")
                    except JournalError as error:
                        self._log.warning("snapshot not stored", error=str(error))
            if exc_type is None and self.settings.summary is not None:
                self.write_summary(self.settings.summary)
        finally:
            if self._freezing:
                gc.unfreeze()
            # The connection's garbage (futures, the paho client) collected here, not at some
            # later collection inside whatever runs next in this process: a finalizer that logs
            # (an exception never retrieved) would run inside someone else's code.
            gc.collect()
            self._close_journal()
            self._unlock()

    def _lock(self) -> None:
        # On the real path: a second daemon given a symlink to the same journal meets this lock.
        path = Path(f"{Path(self.settings.journal).resolve()}.lock")
        try:
            path.parent.mkdir(parents=True, exist_ok=True)
            handle = open(path, "w")  # noqa: SIM115 -- held open for the daemon's lifetime
        except OSError as exc:
            raise InputError(f"cannot create {path}: {exc.strerror}", field="journal") from exc
        try:
            fcntl.flock(handle.fileno(), fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError:
            handle.close()
            raise InputError(
                f"another tracker daemon is using {self.settings.journal} (it holds {path}); stop "
                "it first or give this one its own --journal",
                field="journal",
            ) from None
        handle.write(f"{os.getpid()}\n")
        handle.flush()
        self._lock_file = handle

    async def _check_instance(self) -> None:
        """Refuse to start while another process is online as this instance (see the bus)."""
        settings = self.settings
        try:
            document = await probe_health(
                settings.broker, self.bus.health_topic, settings.client_id
            )
        except aiomqtt.MqttError as exc:  # the bus keeps trying; nothing to judge by yet
            self._log.warning("cannot check the instance's health topic", error=str(exc))
            return
        if document is None or document.get("status") != "online":
            return
        seen = document.get("ts")
        age = _age_seconds(seen)
        stale = max(3.0 * settings.heartbeat_seconds, 30.0)
        if age is not None and age > stale:
            self._log.warning(
                "a stale online health message is retained for this instance; starting",
                last_heartbeat=seen,
                age_seconds=round(age, 1),
            )
            return
        raise InputError(
            f"instance {settings.instance!r} is already online on {settings.broker.url} (client "
            f"{document.get('client_id')!r}, last heartbeat {seen}); stop that daemon first, or "
            "give this one another --instance",
            field="instance",
        )

    def _conflict(self, document: dict[str, Any]) -> None:
        """Another process publishes as this instance: stop rather than fight for the session."""
        self.failure = InputError(
            f"another process (client {document.get('client_id')!r}, run "
            f"{document.get('run_id')!r}) is online as instance {self.settings.instance!r} on "
            f"{self.settings.broker.url}; this daemon stopped so that the two do not take the "
            "session from each other. Give each daemon its own --instance",
            field="instance",
        )
        self.stop()

    def _unlock(self) -> None:
        if self._lock_file is not None:
            self._lock_file.close()
            self._lock_file = None

    def _close_journal(self) -> None:
        if self._journal is not None:
            try:
                self._journal.close()
            except Exception:  # a journal that failed may fail to close too; it is reported
                if not self._journal_broken:
                    raise
            self._journal = None

    @property
    def journal(self) -> Journal:
        """The open journal."""
        assert self._journal is not None, "use the daemon inside 'async with'"
        return self._journal

    def stop(self) -> None:
        """Ask for an orderly stop (safe to call from a signal handler, more than once)."""
        if not self._stopping.is_set():
            self._log.info("stop requested")
        self._stopping.set()

    # -- recovery --------------------------------------------------------------------------------

    def _journaled_setup(self, engine: EngineLike) -> list[tuple[int, Setup, int]]:
        """The setups the journal describes, checked against this run's root.

        Returns:
            ``(after_seq, setup, last entry id)`` per setup, oldest first; empty for an engine
            of a test that cannot say what it runs with.

        Raises:
            InputError: the journal was written under another topic root.
        """
        if not hasattr(engine, "reconfigure"):
            return []  # an engine of a test that cannot say what it runs with
        described = timeline_ids(self.journal.setup())
        if not described:
            return []
        first = described[0][1]
        if first.root != self.root:
            raise InputError(
                f"{self.settings.journal} was written under the topic root {first.root!r}, not "
                f"{self.root!r}; use --root {first.root} with it, or give this root its own "
                "--journal",
                field="root",
            )
        return described

    def _describe_setup(self) -> None:
        """Journal what this run was given (only what changed), and run on with it from here."""
        config = self._config
        if not hasattr(self.engine, "reconfigure") or config is None:
            return
        assert self._clock is not None
        current = Setup(self.root, config, self._profiles)
        entries = entries_of(current) + removed_profiles(self.journal.setup(), current)
        if self.journal.describe(entries, format_ts(self._clock())):
            apply(self.engine, current)

    def _recover(self, described: list[tuple[int, Setup, int]] | None = None) -> None:
        """Rebuild the state: the newest usable snapshot, then the journal's records after it
        (all of them without one); queue the outputs not known to be published.

        ``described``: the journal's setups (:meth:`_journaled_setup`), each applied at its
        place unless the snapshot already holds it.
        """
        assert self._intake is not None
        mark = self.journal.published_through
        self._persisted_mark = mark
        # What was applied before (published, or marked logged) was logged then: not again.
        self._logged_through = max(mark, self.journal.logged_through)
        pending = list(described or [])
        start = self._restore(pending)
        if start is None:
            start = self.journal.base_seq
            if start > 0:  # a new day's journal: its records need the day before's state
                raise InputError(
                    f"{self.settings.journal} goes on from the day before's state, which it "
                    "carries as a snapshot this tracker cannot use (see the log: written by other "
                    f"code, or damaged); the days before are in {self.journal.previous}. Start "
                    "the tracker version that wrote it, or move the journal away to start afresh",
                    field="journal",
                )
            if pending:
                apply(self.engine, pending.pop(0)[1])
        self._applied = start
        replaying = _time.thread_time()
        for record in self.journal.records(after=start):
            while pending and record.line > pending[0][0]:
                apply(self.engine, pending.pop(0)[1])
            outputs = self._feed(record)
            self.recovered += 1
            if record.line > mark:
                self.republished += len(outputs)
                self._queue_now(record.line, outputs)
            self._applied = record.line
            self._settled(1)
        self._applying += _time.thread_time() - replaying  # records since the snapshot
        for _, later, _ in pending:  # described after the last record: in force from here
            apply(self.engine, later)
        if self.recovered or self.restored_from is not None:
            self._log.info(
                "recovered from journal",
                snapshot=self.restored_from,
                records=self.recovered,
                republish=self.republished,
                last_seq=self._applied,
            )

    def _restore(self, pending: list[tuple[int, Setup, int]]) -> int | None:
        """Load the newest usable snapshot into the daemon; return the record it follows.

        A snapshot is usable when it was taken at or before the published-through mark (the
        outputs of later records must be published again, so those records are replayed) and
        when it loads (:mod:`tracker.shell.snapshot`); one that does not is logged and skipped.
        ``pending`` loses the setups the snapshot already holds.

        Returns:
            The journal seq the restored state follows; ``None``: no snapshot was used.
        """
        if not self._snapshots_on or not pending:
            return None
        for info in self.journal.usable_snapshots():
            try:
                intake = snapshot.load(
                    self.journal.snapshot_state(info.id), format=info.format, sha256=info.sha256
                )
            except snapshot.SnapshotUnusable as exc:
                self._log.warning(
                    "snapshot not used; trying an earlier one, else replaying the whole journal",
                    snapshot_id=info.id,
                    after_seq=info.after_seq,
                    kind=info.kind,
                    reason=exc.reason,
                )
                continue
            self._intake = intake
            self.engine = intake.engine
            self.restored_from = self._snapshot_seq = info.after_seq
            if self._freezing:  # the loaded state lives on: no full collection scans it (_settled)
                gc.freeze()
                self._unfrozen = 0
            pending[:] = [item for item in pending if item[2] > info.setup_id]
            return info.after_seq
        return None

    # -- one journal per day ---------------------------------------------------------------------

    def _day_of(self, moment: datetime) -> date:
        return moment.astimezone(ZoneInfo(self.settings.day_timezone)).date()

    def _dated(self, day: date) -> Path:
        """Where the journal of ``day`` is kept: ``STEM-YYYY-MM-DD.SUFFIX`` beside the path."""
        path = Path(self.settings.journal)
        dated = path.with_name(f"{path.stem}-{day.isoformat()}{path.suffix}")
        number = 2
        while dated.exists():  # a day journaled twice (clock set back): never overwrite
            dated = path.with_name(f"{path.stem}-{day.isoformat()}-{number}{path.suffix}")
            number += 1
        return dated

    def _finish_rotation(self) -> None:
        """Finish or undo a rotation a crash interrupted (see :meth:`_rotate`)."""
        path = Path(self.settings.journal)
        fresh = path.with_name(path.name + ".new")
        if not fresh.exists():
            return
        if path.exists():  # the crash came before the day's journal was put aside: not rotated
            for part in ("", "-wal", "-shm"):
                Path(f"{fresh}{part}").unlink(missing_ok=True)
            self._log.warning("an unfinished journal rotation was undone", path=str(fresh))
            return
        os.replace(fresh, path)  # after it: the new day's journal takes the path
        self._log.warning("an unfinished journal rotation was completed", path=str(path))

    async def _rotate(self, now: datetime) -> None:
        """Close the day's journal, keep it under its dated name, and go on in a new one that
        starts with the setup and a ``carried`` snapshot of the state.

        Everything journaled must first be applied and its outputs confirmed (the new journal
        cannot republish the old one's); otherwise the rotation waits for a later group. Crash
        safety: the new journal is written complete as ``PATH.new`` first, then the old one is
        renamed to its dated name, then ``PATH.new`` to ``PATH``; a start finds and finishes (or
        undoes) a rotation cut short between the renames.
        """
        assert self._intake is not None and self._journal_day is not None
        waited = _time.monotonic() + 5.0
        while self._applied < self.journal.last_seq or self._unconfirmed:
            if _time.monotonic() > waited:
                self._log.info(
                    "journal rotation postponed: outputs not yet confirmed",
                    unconfirmed=len(self._unconfirmed),
                )
                return
            await asyncio.sleep(0.02)
        async with self._switching:
            # The new day carries what may still change: ended orders stay in the day's journal.
            # Here, not in the worker thread: the ticker reads the engine's timers meanwhile.
            forgotten = self._intake.forget_ended()
            await asyncio.to_thread(self._switch_journal, now, len(forgotten))

    def _switch_journal(self, now: datetime, forgotten: int) -> None:
        assert self._intake is not None and self._journal_day is not None
        path = Path(self.settings.journal)
        old = self.journal
        base = old.last_seq
        dated = self._dated(self._journal_day)
        fresh = path.with_name(path.name + ".new")
        for part in ("", "-wal", "-shm"):
            Path(f"{fresh}{part}").unlink(missing_ok=True)
        ts = format_ts(now)
        state = snapshot.dump(self._intake)
        config = getattr(self.engine, "config", None)
        with Journal(
            fresh, durability=self.settings.durability, base_seq=base, previous=dated.name
        ) as new:
            if config is not None:
                profiles = dict(getattr(self.engine, "profiles", {}))
                new.describe(entries_of(Setup(self.root, config, profiles)), ts)
            new.save_snapshot(
                after_seq=base,
                setup_id=new.setup_id,
                kind="carried",
                format=snapshot.format_tag(),
                state=state,
                ts=ts,
            )
        old.mark_published(self.published_through, logged=self._applied)
        old.close()
        self._journal = None
        os.replace(path, dated)
        for part in ("-wal", "-shm"):
            if Path(f"{path}{part}").exists():
                os.replace(f"{path}{part}", f"{dated}{part}")
        os.replace(fresh, path)
        self._journal = Journal(path, durability=self.settings.durability)
        self._log.info(
            "journal rotated: a new day",
            closed=str(dated),
            day=self._journal_day.isoformat(),
            carried_after_seq=base,
            carried_bytes=len(state),
            ended_orders_left_behind=forgotten,
        )
        self.rotated.append(dated)
        self._journal_day = self._day_of(now)
        self._snapshot_seq = base
        self._snapshot_taken = _time.monotonic()
        self._applying = 0.0

    # -- snapshots -------------------------------------------------------------------------------

    @property
    def _snapshots_on(self) -> bool:
        """Snapshots are taken and used for the engine the settings build (not one given)."""
        return self.settings.snapshot_records > 0 and self._engine_given is None

    def _settled(self, records: int) -> None:
        """Every ``FREEZE_RECORDS`` records applied, move what they left behind out of the cyclic
        garbage collector's reach (``gc.freeze()``, as ``tracker replay`` does per chunk).

        The engine's state (orders, fills, plans, the redelivery memory) grows with the day and
        lives on, yet every full collection scanned it again: about a fifth of the daemon's time
        during a burst. Objects freed by their reference counts are freed all the same; cycles
        among frozen objects wait for the next interval snapshot, which unfreezes everything
        (when the daemon has caught up), or for the stop.
        """
        if not self._freezing:
            return
        self._unfrozen += records
        if self._unfrozen >= FREEZE_RECORDS:
            gc.freeze()
            self._unfrozen = 0

    def _snapshot_due(self) -> bool:
        """Whether an interval snapshot is due: ``snapshot_records`` records or
        ``snapshot_seconds`` since the last one (see :meth:`_snapshot_now` for when)."""
        if not self._snapshots_on or self._applied <= self._snapshot_seq:
            return False
        if self._applied - self._snapshot_seq >= self.settings.snapshot_records:
            return True
        seconds = self.settings.snapshot_seconds
        return seconds > 0 and _time.monotonic() - self._snapshot_taken >= seconds

    def _snapshot_now(self, group: int) -> bool:
        """Whether a due snapshot is stored now rather than after the burst.

        During a burst -- the group just applied held more than one record, or messages wait to
        be journaled or applied -- it waits for the daemon to catch up (:meth:`_apply_stage`),
        or until applying the records since the last snapshot has taken
        ``SNAPSHOT_BUSY_SECONDS`` of CPU: a restart replays them through the same intake and
        engine, so that bounds what the wait adds to a restart. Pickling the state of a busy day
        takes the interpreter from half a second to a few seconds, as long as applying thousands
        of fills: taken every 2,500 records during a burst, it cost more than the fills
        themselves.
        """
        busy = group > 1 or self.inbox.qsize() > 0 or self._journaled.qsize() > 0
        return not busy or self._applying >= SNAPSHOT_BUSY_SECONDS

    async def _snapshot(self, kind: str) -> None:
        """Store a snapshot of the state after the records applied so far.

        Called by the apply stage between groups, so nothing changes the state meanwhile; the
        pickling, compressing and writing run in a worker thread, so the bus goes on publishing
        and stage 1 on journaling (a snapshot of a busy day's state takes a second or two).
        """
        assert self._intake is not None
        if self._freezing:
            gc.unfreeze()  # the collector may scan it all again now: cycles that died are freed
            self._unfrozen = 0
        try:
            async with self._switching:
                info = await asyncio.to_thread(self._store_snapshot, kind)
        except JournalError as exc:  # a snapshot is an optimisation: the journal still holds all
            self._log.warning("snapshot not stored", error=str(exc), after_seq=self._applied)
        else:
            self._log.info("snapshot stored", after_seq=info.after_seq, kind=kind, bytes=info.size)
        self._snapshot_seq = self._applied
        self._snapshot_taken = _time.monotonic()
        self._applying = 0.0

    def _store_snapshot(self, kind: str) -> SnapshotInfo:
        assert self._intake is not None and self._clock is not None
        return self.journal.save_snapshot(
            after_seq=self._applied,
            setup_id=self.journal.setup_id,
            kind=kind,
            format=snapshot.format_tag(),
            state=snapshot.dump(self._intake),
            ts=format_ts(self._clock()),
        )

    def _queue_now(self, seq: int, outputs: Iterable[Outbound]) -> None:
        items = [item for out in outputs for item in self._outgoings(seq, out)]
        if items:
            self._unconfirmed[seq] = self._unconfirmed.get(seq, 0) + len(items)
            self.outbox.extend(items)

    # -- the loops -------------------------------------------------------------------------------

    async def run(self) -> None:
        """Serve until :meth:`stop`; then drain, flush, go offline (see the module docstring)."""
        self._log.info(
            "starting",
            broker=self.settings.broker.url,
            root=self.root,
            journal=str(self.settings.journal),
            client_id=self.settings.client_id,
        )
        await self.inbox.put(_TICK)  # the start tick (see "Time" above)
        async with asyncio.TaskGroup() as group:
            bus = group.create_task(self.bus.run(), name="daemon.bus")
            journaler = group.create_task(self._journal_stage(), name="daemon.journal")
            applier = group.create_task(self._apply_stage(), name="daemon.apply")
            ticker = None
            if self.settings.tick_seconds > 0:
                ticker = group.create_task(self._tick(), name="daemon.ticker")
            await self._stopping.wait()
            # 1. stop taking messages (the broker keeps what it has not had our ack for)
            self.bus.stop_reading()
            if ticker is not None:
                ticker.cancel()
            # 2. finish what is in the inbox
            self._draining = True
            await _within(journaler, STAGE_SECONDS, self._log, "journaling the inbox")
            await _within(applier, STAGE_SECONDS, self._log, "applying the journaled")
            await self._close_digest(finished=not (journaler.cancelled() or applier.cancelled()))
            # 3. flush: wait for the broker to confirm every output
            if not await self.outbox.wait_empty(FLUSH_SECONDS):
                self._log.warning(
                    "outputs not confirmed by the broker; they are journaled and will be "
                    "published again on the next start",
                    pending=len(self.outbox),
                )
                self.bus.give_up()
            # 4. publish offline, disconnect
            self.bus.close()
            await _within(bus, STAGE_SECONDS, self._log, "disconnecting")
        self.stopped_cleanly = True
        self._log.info(
            "stopped", journal_seq=self._applied, published_through=self.published_through
        )

    async def _tick(self) -> None:
        assert self._clock is not None
        interval = self._clock.wall_seconds(self.settings.tick_seconds)
        while True:
            await asyncio.sleep(interval)
            if self.inbox.full():
                continue  # time still passes: the next tick says so; no need to wait in line
            if not self._tick_due():
                continue  # nothing waits on time: no tick, and nothing journaled for it
            self.inbox.put_nowait(_TICK)

    def _tick_due(self) -> bool:
        """Whether time alone would change something now (an order starts or expires, a bin is
        overdue). Outside sessions and with nothing working the journal then holds no ticks, so
        a restart has that much less to replay."""
        assert self._clock is not None
        next_deadline = getattr(self.engine, "next_deadline", None)
        if next_deadline is None:
            return True  # an engine that cannot say: tick as before
        deadline = next_deadline()
        return deadline is not None and self._clock() >= deadline

    async def _journal_stage(self) -> None:
        """Stage 1: group what waits in the inbox, journal it, acknowledge it, pass it on.

        It runs beside stage 2 (:meth:`_apply_stage`): while the engine applies one group, the
        next group is being committed, so the disk's sync time and the engine's work overlap.
        """
        batch_size = self.settings.batch_size
        while True:
            try:
                # During a burst the next group is already waiting: no task, no timer for it.
                first = self.inbox.get_nowait()
            except asyncio.QueueEmpty:
                try:
                    first = await asyncio.wait_for(self.inbox.get(), timeout=0.25)
                except TimeoutError:
                    if self._draining:
                        await self._journaled.put(None)
                        return
                    continue
            batch = [first]
            while len(batch) < batch_size:
                try:
                    batch.append(self.inbox.get_nowait())
                except asyncio.QueueEmpty:
                    break
            del first  # the group is in ``batch``; it goes once journaled (see below)
            try:
                records = await self._commit(batch)
            except JournalError as exc:
                self._journal_failed(exc)
                await self._journaled.put(None)
                return
            # Journaled: what was received is in ``records`` now (a payload over the size limit
            # only as its short note), so the deliveries go -- a 100 MB payload is not held
            # until the next message comes.
            batch.clear()
            await self._journaled.put(records)

    def _journal_failed(self, exc: JournalError) -> None:
        """The journal cannot take the group: acknowledge nothing more, say so, and stop.

        What was not journaled was not acknowledged either, so the broker keeps it for the next
        start; what was journaled before is safe. The daemon stops taking messages at once and
        then stops as on SIGTERM (publishing what it has, going offline).
        """
        self._log.critical(
            "journal failed: stopping; unacknowledged messages stay with the broker",
            error=str(exc),
            journal=str(self.settings.journal),
            kind=type(exc).__name__,
        )
        self.failure = exc
        self._journal_broken = True
        self.bus.stop_reading()
        assert self._clock is not None
        alert = rules.event(
            rules.JOURNAL_FAILED,
            f"The journal cannot be written ({exc}). The daemon stops taking messages and stops; "
            "what it did not journal stays with the broker for the next start.",
            order_id=None,
            symbol=None,
            ts=self._clock(),
            details={"journal": str(self.settings.journal), "kind": type(exc).__name__},
        )
        self._queue_now(self._applied, [alert])  # published before the daemon goes offline
        if self._on_output is not None:
            self._on_output(alert)
        self.stop()

    async def _commit(self, batch: list[Delivery | _TickRequest]) -> list[Record]:
        assert self._clock is not None
        now = self._clock()
        if self.settings.rotate_journal:
            day = self._day_of(now)
            if self._journal_day is None:
                self._journal_day = day
            elif day > self._journal_day:
                await self._rotate(now)
        ts = format_ts(now)
        rows: list[tuple[str, bytes, str]] = []
        deliveries = 0
        for item in batch:
            if isinstance(item, _TickRequest):
                tick = Tick(ts=_parse_ts(ts))
                rows.append((self.topics.tick, encode(tick), ts))
            else:
                rows.append((item.topic, self._limited(item), ts))
                deliveries += 1
        # The commit (an fsync with durability "full") runs in a worker thread: meanwhile the
        # loop keeps reading, so the next group is larger when the disk is slow (group commit).
        seqs = await asyncio.to_thread(
            self.journal.append_many,
            rows,
            published_through=self._mark_to_persist(),
            logged_through=self._applied,
        )
        self.commits += 1
        self.received += deliveries  # journaled: counted only now (tests wait on it)
        acknowledge(item for item in batch if isinstance(item, Delivery))
        return [
            Record(line=seq, topic=topic, payload=payload, ts=ts)
            for seq, (topic, payload, _) in zip(seqs, rows, strict=True)
        ]

    async def _apply_stage(self) -> None:
        """Stage 2: feed each journaled record to the engine and queue its outputs, in order.

        Between groups, an interval snapshot when one is due; one put off for a burst
        (:meth:`_snapshot_due`) is stored once no group has come for ``SNAPSHOT_QUIET_SECONDS``.
        """
        waiting = False  # a due snapshot waits for the burst to end
        while True:
            if waiting:
                try:
                    group = await asyncio.wait_for(self._journaled.get(), SNAPSHOT_QUIET_SECONDS)
                except TimeoutError:
                    waiting = False
                    await self._snapshot("interval")
                    continue
            else:
                group = await self._journaled.get()
            if group is None:
                return
            await self._apply(group)
            self._settled(len(group))
            if self._snapshot_due():
                waiting = not self._snapshot_now(len(group))
                if not waiting:
                    await self._snapshot("interval")

    async def _apply(self, records: list[Record]) -> None:
        yielded = _time.perf_counter()
        working = _time.thread_time()  # the CPU the records take (not the bus's, meanwhile)
        waiting: list[Outgoing] = []  # outputs in order, put in the outbox at each yield
        for run in _runs(records, self.topics.bins("")):
            for record, outputs in zip(run, self._feed_run(run), strict=True):
                seq = record.line
                self._applied = seq
                if outputs:
                    items = [item for out in outputs for item in self._outgoings(seq, out)]
                    self._unconfirmed[seq] = self._unconfirmed.get(seq, 0) + len(items)
                    waiting.extend(items)
            # Let the bus publish (and stage 1 read) while the engine works on what follows;
            # only every few milliseconds, so that cheap records (fills) pay nothing for it.
            # (The bus cannot publish before this anyway: the outputs go to the outbox here.)
            if _time.perf_counter() - yielded > YIELD_SECONDS:
                self._applying += _time.thread_time() - working
                await self._put_out(waiting)
                waiting = []
                await asyncio.sleep(0)
                yielded = _time.perf_counter()
                working = _time.thread_time()
        self._applying += _time.thread_time() - working
        await self._put_out(waiting)

    async def _close_digest(self, *, finished: bool) -> None:
        """On a stop: publish what the error digest holds back, through a journaled tick.

        The tick closes the digest's interval (see :mod:`tracker.edge.digest`); being journaled,
        it closes it at the same place in a replay, and after a restart nothing is counted twice.
        ``finished``: both stages ended on their own (a stage cancelled on its timeout may leave a
        commit running in its thread: then nothing more is journaled).
        """
        if self._intake is None or not self._intake.digest.holding:
            return
        if self._journal_broken or not finished:
            self._log.warning(
                "error records held back by the digest are not published now; a replay of the "
                "journal counts them",
                **self._intake.digest.counts(),
            )
            return
        try:
            records = await self._commit([_TICK])
        except JournalError as exc:
            self._journal_failed(exc)
            return
        await self._apply(records)

    def _limited(self, delivery: Delivery) -> bytes:
        """The payload to journal: as received, or a note when it is over the size limit.

        Not logged here: its error record says so (and the error digest keeps a flood of them
        from costing a log line each)."""
        limit = self.settings.max_payload_bytes
        size = len(delivery.payload)
        if size <= limit:
            return delivery.payload
        head = delivery.payload[:120].decode("utf-8", errors="replace")
        # Not JSON on purpose: it is refused as "too large" (live and in replay alike).
        return oversize_note(size, limit, head)

    def _feed(self, record: Record) -> list[Outbound]:
        """Feed one record (recovery at start)."""
        return self._feed_run([record])[0]

    def _feed_run(self, run: list[Record]) -> list[list[Outbound]]:
        """Feed records to the intake: one by one, or a run of bins together.

        The bins of one bin close arrive together; fed in one ``feed_many`` call, the engine
        re-plans all their orders in one batch solve, with exactly the outputs one by one would
        give (so a replay of the journal, which feeds it in chunks, still matches).

        A failure inside the engine is not caught here: the engine itself undoes the message and
        answers with an error record and an ``internal_error`` alert, as it does in a replay. The
        guard below is the last resort for a failure outside it (the intake); the records of such
        a run got no answer from the engine, so each gets exactly one error record here.
        """
        assert self._intake is not None
        try:
            results = [self._intake.feed(run[0])] if len(run) == 1 else self._intake.feed_many(run)
        except Exception as exc:  # a bug of ours must not stop the desk's other orders
            self._log.exception(
                "intake failed", topic=run[0].topic, seq=run[0].line, records=len(run)
            )
            reason = (
                f"internal error outside the engine while taking this message "
                f"({type(exc).__name__}); it may not have been applied -- please report it with "
                "the journal"
            )
            results = []
            for record in run:
                payload = record.payload
                if not isinstance(payload, bytes | str):
                    payload = str(payload)
                error = self.engine.reject(
                    record.topic, payload, reason, _parse_ts(record.ts or "")
                )
                results.append([dataclasses.replace(error, line=record.line)])
            # The intake's error digest thins these out as it does its own.
            digest = self._intake.digest
            results = [digest.admit(record, out) for record, out in zip(run, results, strict=True)]
        for record, outputs in zip(run, results, strict=True):
            self._report(record, outputs)
        return results

    def _report(self, record: Record, outputs: list[Outbound]) -> None:
        if record.line <= self._logged_through:  # logged before a restart: not again
            if self._on_output is not None:
                for out in outputs:
                    self._on_output(out)
            return
        for out in outputs:
            if isinstance(out, ErrorMessage):
                self._log.info(
                    "rejected",
                    topic=out.topic,
                    order_id=out.order_id,
                    reason=out.reason,
                    seq=record.line,
                )
            elif isinstance(out, AlertMessage):
                self._log.info(
                    "alert",
                    topic=record.topic,
                    order_id=out.order_id,
                    symbol=out.symbol,
                    code=out.code,
                    severity=out.severity,
                    state=out.state,
                    seq=record.line,
                )
            if self._on_output is not None:
                self._on_output(out)

    def _outgoings(self, seq: int, message: Outbound) -> list[Outgoing]:
        """What publishing ``message`` takes: targets and status are retained; an order's last
        target (done, cancelled, expired) is published once and its retained one cleared."""
        if isinstance(message, TargetMessage) and message.state in _FINAL:
            topic = topic_of(message, self.root)
            return [
                Outgoing(topic=topic, payload=encode(message), retain=False, seq=seq),
                Outgoing(topic=topic, payload=b"", retain=True, seq=seq),  # clears the retained
            ]
        return [self._outgoing(seq, message)]

    def _outgoing(self, seq: int, message: Outbound) -> Outgoing:
        return Outgoing(
            topic=topic_of(message, self.root),
            payload=encode(message),
            retain=isinstance(message, StatusMessage | TargetMessage),
            seq=seq,
        )

    async def _put_out(self, items: list[Outgoing]) -> None:
        """Put outputs in the outbox, in order; wait (and say so) while it is full."""
        if len(self.outbox) + len(items) <= self.outbox.capacity:
            self.outbox.extend(items)
            return
        self._log.warning("outbox full: back-pressure", capacity=self.outbox.capacity)
        for item in items:
            while True:
                try:
                    await self.outbox.put(item, timeout=5.0)
                    break
                except TimeoutError:
                    self._log.warning("outbox still full", connected=self.bus.connected.is_set())

    # -- confirmations ---------------------------------------------------------------------------

    def _confirmed(self, item: Outgoing) -> None:
        left = self._unconfirmed.get(item.seq)
        if left is None:
            return
        if left <= 1:
            del self._unconfirmed[item.seq]
        else:
            self._unconfirmed[item.seq] = left - 1

    @property
    def published_through(self) -> int:
        """Highest journal seq whose outputs (and all before it) the broker has confirmed."""
        if self._unconfirmed:
            return next(iter(self._unconfirmed)) - 1
        return self._applied

    def _mark_to_persist(self) -> int | None:
        mark = self.published_through
        if mark == self._persisted_mark:
            return None
        self._persisted_mark = mark
        return mark

    # -- reporting -------------------------------------------------------------------------------

    def health(self) -> dict[str, Any]:
        """The health document's live fields (the bus adds status and client id)."""
        return {
            "instance": self.settings.instance,
            "ts": format_ts(datetime.now(UTC)),
            "journal_seq": self._applied,
            "received": self.received,
            "commits": self.commits,
            "published_through": self.published_through,
            "inbox": self.inbox.qsize(),
            "inbox_capacity": self.inbox.maxsize,
            "outbox": len(self.outbox),
            "backpressure": self.bus.backpressure or self.outbox.full,
            # per source, the seq ranges that never arrived (a broker dropped them)
            "gaps": {} if self._intake is None else self._intake.gaps(),
            # sources that send heartbeats and have gone quiet (a source_silent alert stands)
            "silent": [] if self._intake is None else self._intake.silent(),
        }

    def summary(self) -> dict[str, Any]:
        """The engine's summary with the replay counts, as ``tracker replay`` writes it."""
        assert self._intake is not None
        return finish_summary(self.engine, self._intake)

    def write_summary(self, path: Path) -> Path:
        """Write :meth:`summary` as ``summary.json`` text to ``path``."""
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_text(dumps_summary(self.summary()), encoding="utf-8")
        return path


def _runs(records: list[Record], bins: str) -> Iterator[list[Record]]:
    """Split records into runs: consecutive bin records together, every other record alone."""
    run: list[Record] = []
    for record in records:
        if record.topic.startswith(bins):
            run.append(record)
            continue
        if run:
            yield run
            run = []
        yield [record]
    if run:
        yield run


async def _within(task: asyncio.Task[Any], seconds: float, log: Any, what: str) -> None:
    """Wait for a task for at most ``seconds``; cancel it (and say so) if it takes longer."""
    done, _ = await asyncio.wait({task}, timeout=seconds)
    if not done:
        log.warning("stage timed out; cancelling", stage=what, seconds=seconds)
        task.cancel()
        with contextlib.suppress(asyncio.CancelledError):
            await task


def _parse_ts(text: str) -> datetime:
    return datetime.fromisoformat(text).astimezone(UTC)


def _age_seconds(text: Any) -> float | None:
    """Seconds since a health message's ``ts`` by the wall clock (``None``: no usable ts)."""
    if not isinstance(text, str):
        return None
    try:
        return (datetime.now(UTC) - _parse_ts(text)).total_seconds()
    except ValueError:
        return None

"""The journal: every inbound message and every injected tick, in the order they were applied.

Theory of operation
-------------------
The live daemon appends each message it receives (and each tick its timer injects) to this journal
*before* the engine sees it and before the broker is told the message arrived (the MQTT
acknowledgement). So anything the broker has forgotten, the journal has. A restart reads the journal
from the start, feeds the same engine, and carries on; a replay of the journal reproduces what the
live daemon published.

Storage is one SQLite file in write-ahead-log (WAL) mode with one table::

    journal(seq INTEGER PRIMARY KEY, topic TEXT, payload BLOB, ts TEXT, crc INTEGER)

``seq`` is the order of application, ``ts`` the receive time (ISO 8601, UTC), ``crc`` a CRC-32 of
topic, payload and time, and a small ``meta`` table holds the format version and how far the
daemon's outputs are known to have been published (``published_through``).

The journal describes itself: a ``setup`` table holds what the daemon ran with -- the topic root,
the engine's settings and every liquidity profile, as canonical JSON with its SHA-256 -- each
entry with ``after_seq``, the last journal record before it took effect. The daemon writes the
entries that changed each time it starts (a profile replaced during the day is one more entry),
so a replay of the journal needs no flags (:mod:`tracker.shell.setup`)::

    setup(id INTEGER PRIMARY KEY, after_seq INTEGER, kind TEXT, name TEXT, sha256 TEXT,
          content BLOB, ts TEXT)

Durability policy (what "no fill lost" means here):

* ``durability="full"`` (the default): SQLite ``synchronous=FULL``; every commit is on disk (the WAL
  is fsynced) before :meth:`Journal.append_many` returns. The daemon acknowledges a message to the
  broker only after that, so a crash of the process *or of the machine* loses nothing the broker
  was told we have.
* ``durability="normal"``: ``synchronous=NORMAL``; commits reach the operating system but the WAL
  is fsynced only at checkpoints. A crash of the process (``kill -9``) still loses nothing; a power
  cut may lose the last commits -- which the broker then still holds only if they were not yet
  acknowledged, so prefer "full" unless the disk is the bottleneck.

The daemon commits a small group at a time: the messages that arrived together (at most the
inbound batch size), in one transaction, then acknowledges them all.

A crash in the middle of a write leaves at most a torn last transaction in the WAL; SQLite's own
frame checksums discard it when the file is next opened, so the journal is recovered up to the last
whole record. The per-record CRC catches what SQLite cannot (a damaged page): a bad *last* record
(it cannot have been acknowledged) is moved on open into the ``quarantine`` table, kept byte for
byte with the reason, never deleted; a bad record anywhere else is an error that says which sequence
number is damaged.

The journal guards itself while it is written:

* the file it opened must stay the file at its path: each commit checks the path's device and inode
  against the open file's, so a journal deleted or replaced under a running daemon stops it
  (:class:`JournalLost`) instead of letting it journal into a file nobody will ever read again;
* a failed write (a full disk, an I/O error) raises :class:`JournalWriteError`; nothing of that
  transaction was committed, so nothing of it may be acknowledged.
"""

from __future__ import annotations

import contextlib
import dataclasses
import functools
import hashlib
import os
import sqlite3
import threading
import zlib
from collections.abc import Iterable, Iterator, Sequence
from dataclasses import dataclass
from pathlib import Path
from types import TracebackType
from typing import Any, Literal, Self

from tracker.edge.records import Record
from tracker.errors import InputError

__all__ = [
    "FORMAT_VERSION",
    "READABLE_FORMATS",
    "Durability",
    "Journal",
    "JournalError",
    "JournalLost",
    "JournalWriteError",
    "SetupEntry",
    "SnapshotInfo",
    "published_through",
    "read_base_seq",
    "read_journal",
    "read_setup",
    "read_snapshot_state",
    "read_snapshots",
    "record_crc",
]

#: Version of the journal's table layout; written into ``meta`` and checked on open. Format 2
#: journals may start from a carried snapshot (the day before's state, see the module docstring);
#: format 1 journals (no snapshots yet) are read and written as they are.
FORMAT_VERSION = 2

#: The formats this tracker reads.
READABLE_FORMATS = frozenset({1, 2})

Durability = Literal["full", "normal"]

_SCHEMA = """
CREATE TABLE IF NOT EXISTS journal (
    seq INTEGER PRIMARY KEY,
    topic TEXT NOT NULL,
    payload BLOB NOT NULL,
    ts TEXT NOT NULL,
    crc INTEGER NOT NULL
);
CREATE TABLE IF NOT EXISTS meta (
    key TEXT PRIMARY KEY,
    value TEXT NOT NULL
);
"""

#: Damaged records found on open, kept as they were (added to older journals when opened).
_QUARANTINE = """
CREATE TABLE IF NOT EXISTS quarantine (
    seq INTEGER PRIMARY KEY,
    topic TEXT,
    payload BLOB,
    ts TEXT,
    crc INTEGER,
    reason TEXT NOT NULL
);
"""


#: Snapshots of the engine and its intake (added to older journals when opened; see the module
#: docstring and :mod:`tracker.shell.snapshot`).
_SNAPSHOT = """
CREATE TABLE IF NOT EXISTS snapshot (
    id INTEGER PRIMARY KEY,
    after_seq INTEGER NOT NULL,
    setup_id INTEGER NOT NULL,
    kind TEXT NOT NULL,
    format TEXT NOT NULL,
    sha256 TEXT NOT NULL,
    state BLOB NOT NULL,
    ts TEXT NOT NULL
);
"""

#: What the daemon ran with (added to older journals when opened; see the module docstring).
_SETUP = """
CREATE TABLE IF NOT EXISTS setup (
    id INTEGER PRIMARY KEY,
    after_seq INTEGER NOT NULL,
    kind TEXT NOT NULL,
    name TEXT NOT NULL,
    sha256 TEXT NOT NULL,
    content BLOB NOT NULL,
    ts TEXT NOT NULL
);
"""


@dataclass(frozen=True, slots=True)
class SetupEntry:
    """One entry of a journal's self-description.

    Attributes:
        after_seq: The last journal record before it took effect (0: from the start).
        kind: ``root``, ``engine`` or ``profile``.
        name: The profile's symbol (``""`` for root and engine).
        sha256: SHA-256 of ``content``, hex.
        content: Canonical JSON (UTF-8); empty for a profile that was taken away.
        ts: When the daemon wrote it (its clock).
    """

    after_seq: int
    kind: str
    name: str
    sha256: str
    content: bytes
    ts: str
    id: int = 0  # its row in the ``setup`` table (0: not written yet)


@dataclass(frozen=True, slots=True)
class SnapshotInfo:
    """One stored snapshot, without its state (see :meth:`Journal.snapshot_state`).

    Attributes:
        id: Its row in the ``snapshot`` table.
        after_seq: The last journal record applied to the state it holds.
        setup_id: The last ``setup`` entry in force in that state (0: none).
        kind: ``interval`` (taken every so many records), ``stop`` (at a clean stop) or
            ``carried`` (the day before's state, which a new day's journal starts from).
        format: What wrote it (:func:`tracker.shell.snapshot.format_tag`).
        sha256: SHA-256 of the state, hex.
        size: Bytes of the state.
        ts: When the daemon took it (its clock).
    """

    id: int
    after_seq: int
    setup_id: int
    kind: str
    format: str
    sha256: str
    size: int
    ts: str


class JournalError(InputError):
    """A journal file that cannot be used: not a journal, a newer format, or damaged."""

    def __init__(self, message: str) -> None:
        super().__init__(message, field="journal")


class JournalLost(JournalError):
    """The journal file was deleted or replaced while it was open for writing."""


class JournalWriteError(JournalError):
    """A commit failed (full disk, I/O error): nothing of it is in the journal."""


#: Most journal rows one INSERT statement carries (5 values each: well below SQLite's limit of
#: 999 bound values of its older releases).
_ROWS_PER_INSERT = 128


@functools.lru_cache(maxsize=_ROWS_PER_INSERT)
def _insert(rows: int) -> str:
    """The INSERT statement of ``rows`` journal records."""
    return "INSERT INTO journal(seq, topic, payload, ts, crc) VALUES " + ",".join(
        ["(?, ?, ?, ?, ?)"] * rows
    )


def record_crc(topic: str, payload: bytes, ts: str) -> int:
    """CRC-32 of one journal record (topic, payload and time, separated by NUL bytes)."""
    return zlib.crc32(b"\x00".join((topic.encode("utf-8"), payload, ts.encode("utf-8"))))


def _connect(path: Path, *, readonly: bool) -> sqlite3.Connection:
    try:
        if readonly:
            # "mode=ro" still lets SQLite recover a WAL left by a crashed writer (it needs the
            # -shm file, which it creates next to the journal when missing).
            connection = sqlite3.connect(f"{path.resolve().as_uri()}?mode=ro", uri=True)
        else:
            # The daemon commits from a worker thread (one call at a time, never concurrently),
            # so that the event loop goes on reading and publishing while the disk syncs.
            connection = sqlite3.connect(path, isolation_level=None, check_same_thread=False)
    except sqlite3.Error as exc:
        raise JournalError(f"cannot open {path}: {exc}") from exc
    return connection


def _check_format(connection: sqlite3.Connection, path: Path) -> None:
    try:
        tables = {
            row[0]
            for row in connection.execute("SELECT name FROM sqlite_master WHERE type = 'table'")
        }
    except sqlite3.DatabaseError as exc:
        raise JournalError(f"{path} is not a tracker journal (SQLite says: {exc})") from exc
    if "journal" not in tables or "meta" not in tables:
        raise JournalError(
            f"{path} is an SQLite file but not a tracker journal (no 'journal' and 'meta' tables); "
            "give the journal written by 'tracker run'"
        )
    row = connection.execute("SELECT value FROM meta WHERE key = 'format'").fetchone()
    version = int(row[0]) if row is not None else None
    if version not in READABLE_FORMATS:
        readable = " and ".join(str(v) for v in sorted(READABLE_FORMATS))
        raise JournalError(
            f"{path} is a journal of format {version}; this tracker reads formats {readable}; "
            "use the tracker version that wrote it"
        )


class Journal:
    """An append-only SQLite journal of inbound messages (see the module docstring).

    Opening a journal creates it when missing and recovers it after a crash. It is a context
    manager; use one writer per file (the daemon holds a lock file to make sure).

    Args:
        path: The journal file.
        durability: "full" (fsync every commit) or "normal" (see the module docstring).
        base_seq: For a new file: the sequence number its first record follows (a new day's
            journal goes on from the day before's last record). Ignored for an existing file.
        previous: For a new day's file: the name of the day before's journal (same folder).

    Raises:
        JournalError: The file is not a journal, has another format, or is damaged.
    """

    def __init__(
        self,
        path: str | Path,
        *,
        durability: Durability = "full",
        base_seq: int = 0,
        previous: str | None = None,
    ) -> None:
        if durability not in ("full", "normal"):
            raise InputError(
                f"must be 'full' or 'normal', got {durability!r}", field="journal.durability"
            )
        self.path = Path(path)
        self.durability: Durability = durability
        fresh = not self.path.exists() or self.path.stat().st_size == 0
        if fresh:
            try:
                self.path.parent.mkdir(parents=True, exist_ok=True)
            except OSError as exc:
                raise JournalError(f"cannot create {self.path.parent}: {exc.strerror}") from exc
        self._db = _connect(self.path, readonly=False)
        # The daemon writes from worker threads: its journal commits and, beside them, a snapshot.
        self._lock = threading.Lock()
        try:
            self._db.execute("PRAGMA journal_mode=WAL")
            self._db.execute(f"PRAGMA synchronous={durability.upper()}")
            if fresh:
                self._db.executescript(_SCHEMA)
                self._db.execute(
                    "INSERT OR IGNORE INTO meta(key, value) VALUES ('format', ?)",
                    (str(FORMAT_VERSION),),
                )
                if base_seq:
                    self._set_meta("base_seq", base_seq)
                if previous is not None:
                    self._db.execute(
                        "INSERT INTO meta(key, value) VALUES ('previous', ?)", (previous,)
                    )
            _check_format(self._db, self.path)
            self._db.executescript(_QUARANTINE)
            self._db.executescript(_SETUP)
            self._db.executescript(_SNAPSHOT)
            self.quarantined = self._quarantine_damaged_tail()
            row = self._db.execute(
                "SELECT seq, ts FROM journal ORDER BY seq DESC LIMIT 1"
            ).fetchone()
            self.base_seq: int = _meta_int(self._db, "base_seq")
        except sqlite3.Error as exc:
            self._db.close()
            raise JournalError(f"cannot use {self.path}: {exc}") from exc
        except JournalError:
            self._db.close()
            raise
        self.last_seq: int = row[0] if row else self.base_seq
        self.last_ts: str | None = row[1] if row else None
        self._identity = _identity(self.path)

    def _quarantine_damaged_tail(self) -> list[int]:
        """Move last records whose CRC does not match (a write cut short) to ``quarantine``.

        Returns:
            The sequence numbers moved, last first.
        """
        moved: list[int] = []
        while True:
            row = self._db.execute(
                "SELECT seq, topic, payload, ts, crc FROM journal ORDER BY seq DESC LIMIT 1"
            ).fetchone()
            if row is None or _valid(row):
                return moved
            with self._transaction():
                self._db.execute(
                    "INSERT OR REPLACE INTO quarantine(seq, topic, payload, ts, crc, reason) "
                    "VALUES (?, ?, ?, ?, ?, ?)",
                    (*row, "checksum mismatch in the last record (a write cut short)"),
                )
                self._db.execute("DELETE FROM journal WHERE seq = ?", (row[0],))
            moved.append(row[0])

    def quarantine(self) -> list[tuple[int, str, bytes, str, str]]:
        """The damaged records kept aside: ``(seq, topic, payload, ts, reason)`` each."""
        rows = self._db.execute(
            "SELECT seq, topic, payload, ts, reason FROM quarantine ORDER BY seq"
        ).fetchall()
        return [
            (seq, topic, bytes(payload), ts, reason) for seq, topic, payload, ts, reason in rows
        ]

    def check_file(self) -> None:
        """Raise :class:`JournalLost` unless the path still names the file that was opened."""
        if _identity(self.path) != self._identity:
            raise JournalLost(
                f"{self.path} was deleted or replaced while the daemon was writing it; what it "
                "journaled since is in the old file only. Stop, restore the journal (or move the "
                "new file away) and start again"
            )

    # -- writing ---------------------------------------------------------------------------------

    def append(self, topic: str, payload: bytes, ts: str) -> int:
        """Append one record and commit it; return its sequence number."""
        return self.append_many([(topic, payload, ts)])[0]

    def append_many(
        self,
        rows: Sequence[tuple[str, bytes, str]],
        *,
        published_through: int | None = None,
        logged_through: int | None = None,
    ) -> list[int]:
        """Append records in one transaction and commit it (durably, per the policy).

        Args:
            rows: ``(topic, payload, ts)`` per record, in order of application.
            published_through: When given, also record that the outputs of every record up to
                this sequence number have been published (same transaction).
            logged_through: When given, also record that every record up to this sequence
                number has been applied and logged (a restart does not log them again).

        Returns:
            The sequence numbers given to the rows.
        """
        self.check_file()
        # Numbered explicitly: a new day's journal goes on from the day before's numbers.
        first = self.last_seq + 1
        seqs = list(range(first, first + len(rows)))
        values: list[Any] = []
        for seq, (topic, payload, ts) in zip(seqs, rows, strict=True):
            payload = bytes(payload)
            values += (seq, topic, payload, ts, record_crc(topic, payload, ts))
        try:
            with self._transaction():
                # A few rows per statement, not one: SQLite lets the interpreter go around each
                # statement's step, and the daemon's event loop, busy meanwhile, held it up for
                # every row of a group (about 60 handovers of the interpreter per commit).
                for start in range(0, len(values), 5 * _ROWS_PER_INSERT):
                    chunk = values[start : start + 5 * _ROWS_PER_INSERT]
                    self._db.execute(_insert(len(chunk) // 5), chunk)
                if published_through is not None:
                    self._set_published_through(published_through)
                if logged_through is not None:
                    self._set_meta("logged_through", logged_through)
        except sqlite3.Error as exc:
            raise JournalWriteError(
                f"cannot write to {self.path}: {exc}; nothing of this group was journaled (free "
                "disk space or fix the disk, then start again)"
            ) from exc
        if seqs:
            self.last_seq = seqs[-1]
            self.last_ts = rows[-1][2]
        return seqs

    def describe(self, entries: Sequence[tuple[str, str, bytes]], ts: str) -> list[SetupEntry]:
        """Journal what the daemon runs with, from now on: the entries that differ from the
        journal's latest of the same kind and name (nothing when nothing changed).

        Args:
            entries: ``(kind, name, content)`` per entry (see :class:`SetupEntry`).
            ts: The daemon's clock.

        Returns:
            The entries written.
        """
        latest = {(entry.kind, entry.name): entry.sha256 for entry in self.setup()}
        written: list[SetupEntry] = []
        for kind, name, content in entries:
            digest = hashlib.sha256(content).hexdigest()
            if latest.get((kind, name)) != digest:
                written.append(SetupEntry(self.last_seq, kind, name, digest, content, ts))
        if written:
            with self._transaction():
                for index, entry in enumerate(written):
                    cursor = self._db.execute(
                        "INSERT INTO setup(after_seq, kind, name, sha256, content, ts) "
                        "VALUES (?, ?, ?, ?, ?, ?)",
                        (
                            entry.after_seq,
                            entry.kind,
                            entry.name,
                            entry.sha256,
                            entry.content,
                            entry.ts,
                        ),
                    )
                    written[index] = dataclasses.replace(entry, id=cursor.lastrowid or 0)
        return written

    def setup(self) -> list[SetupEntry]:
        """The journal's self-description, oldest first (empty for a journal without one)."""
        return _setup_rows(self._db)

    @property
    def setup_id(self) -> int:
        """The id of the latest setup entry (0: none): what a snapshot taken now was run with."""
        row = self._db.execute("SELECT MAX(id) FROM setup").fetchone()
        return int(row[0] or 0)

    # -- snapshots -------------------------------------------------------------------------------

    def save_snapshot(
        self, *, after_seq: int, setup_id: int, kind: str, format: str, state: bytes, ts: str
    ) -> SnapshotInfo:
        """Store a snapshot and drop those no restart needs any more, in one transaction.

        Kept: the newest; the two newest that a restart may use (taken at or before the
        published-through mark: see :meth:`usable_snapshots`); a ``carried`` one (a new day's
        journal starts from it). The rest are deleted.

        Raises:
            JournalWriteError: The snapshot could not be written (nothing was changed).
        """
        digest = hashlib.sha256(state).hexdigest()
        try:
            with self._transaction():
                cursor = self._db.execute(
                    "INSERT INTO snapshot(after_seq, setup_id, kind, format, sha256, state, ts) "
                    "VALUES (?, ?, ?, ?, ?, ?, ?)",
                    (after_seq, setup_id, kind, format, digest, state, ts),
                )
                snapshot_id = cursor.lastrowid or 0
                mark = _meta_int(self._db, "published_through")
                self._db.execute(
                    "DELETE FROM snapshot WHERE kind != 'carried' AND id != ? AND id NOT IN "
                    "(SELECT id FROM snapshot WHERE after_seq <= ? "
                    "ORDER BY after_seq DESC, id DESC LIMIT 2)",
                    (snapshot_id, mark),
                )
        except sqlite3.Error as exc:
            raise JournalWriteError(
                f"cannot write a snapshot to {self.path}: {exc}; the journal itself is unchanged"
            ) from exc
        return SnapshotInfo(snapshot_id, after_seq, setup_id, kind, format, digest, len(state), ts)

    def snapshots(self) -> list[SnapshotInfo]:
        """The stored snapshots, newest first."""
        return _snapshot_rows(self._db)

    def usable_snapshots(self) -> list[SnapshotInfo]:
        """The snapshots a restart may start from, newest first: those taken at or before the
        published-through mark (the outputs of the records after it must be published again,
        so they must be replayed)."""
        mark = self.published_through
        return [info for info in self.snapshots() if info.after_seq <= mark]

    def snapshot_state(self, snapshot_id: int) -> bytes:
        """The state a snapshot holds (as stored; :mod:`tracker.shell.snapshot` checks it)."""
        return _snapshot_state(self._db, self.path, snapshot_id)

    def mark_published(self, seq: int, logged: int | None = None) -> None:
        """Record that the outputs of every record up to ``seq`` have been published (and,
        when given, that every record up to ``logged`` has been applied and logged)."""
        with self._transaction():
            self._set_published_through(seq)
            if logged is not None:
                self._set_meta("logged_through", logged)

    def _set_meta(self, key: str, value: int) -> None:
        self._db.execute(
            "INSERT INTO meta(key, value) VALUES (?, ?) "
            "ON CONFLICT(key) DO UPDATE SET value = excluded.value",
            (key, str(value)),
        )

    def _set_published_through(self, seq: int) -> None:
        self._db.execute(
            "INSERT INTO meta(key, value) VALUES ('published_through', ?) "
            "ON CONFLICT(key) DO UPDATE SET value = excluded.value",
            (str(seq),),
        )

    def _transaction(self) -> _Transaction:
        return _Transaction(self._db, self._lock)

    # -- reading ---------------------------------------------------------------------------------

    @property
    def published_through(self) -> int:
        """Sequence number up to which the daemon's outputs were confirmed published (0: none;
        a new day's journal starts at its ``base_seq``)."""
        return _meta_int(self._db, "published_through") or self.base_seq

    @property
    def previous(self) -> str | None:
        """The name of the day before's journal (``None``: this one does not carry a day)."""
        row = self._db.execute("SELECT value FROM meta WHERE key = 'previous'").fetchone()
        return str(row[0]) if row else None

    @property
    def logged_through(self) -> int:
        """Sequence number up to which the daemon applied and logged the records (0: none)."""
        return _meta_int(self._db, "logged_through")

    def records(self, after: int = 0) -> Iterator[Record]:
        """The records with a sequence number above ``after``, in order (CRC-checked)."""
        return _iter_records(self._db, self.path, after)

    def __len__(self) -> int:
        row = self._db.execute("SELECT COUNT(*) FROM journal").fetchone()
        return int(row[0])

    # -- lifecycle -------------------------------------------------------------------------------

    def close(self) -> None:
        """Checkpoint the WAL into the main file and close."""
        # A busy reader keeps the WAL; it is then checkpointed on the next open.
        with contextlib.suppress(sqlite3.Error):
            self._db.execute("PRAGMA wal_checkpoint(TRUNCATE)")
        self._db.close()

    def __enter__(self) -> Self:
        return self

    def __exit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        tb: TracebackType | None,
    ) -> None:
        self.close()


class _Transaction:
    """BEGIN IMMEDIATE ... COMMIT, or ROLLBACK on error (the connection is in autocommit mode),
    holding the journal's lock (one transaction at a time, whichever thread asks)."""

    def __init__(self, db: sqlite3.Connection, lock: threading.Lock) -> None:
        self._db = db
        self._lock = lock

    def __enter__(self) -> None:
        self._lock.acquire()
        try:
            self._db.execute("BEGIN IMMEDIATE")
        except BaseException:
            self._lock.release()
            raise

    def __exit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        tb: TracebackType | None,
    ) -> None:
        try:
            if exc_type is None:
                self._db.execute("COMMIT")
            else:
                with contextlib.suppress(sqlite3.Error):  # a failed commit may have rolled back
                    self._db.execute("ROLLBACK")
        finally:
            self._lock.release()


def _identity(path: Path) -> tuple[int, int] | None:
    """Device and inode of the file at ``path`` (``None`` when there is none)."""
    try:
        status = os.stat(path)
    except OSError:
        return None
    return status.st_dev, status.st_ino


def _valid(row: tuple[int, str, bytes, str, int]) -> bool:
    _, topic, payload, ts, crc = row
    if not isinstance(payload, bytes):
        payload = str(payload).encode("utf-8")
    return record_crc(topic, payload, ts) == crc


def _iter_records(db: sqlite3.Connection, path: Path, after: int) -> Iterator[Record]:
    cursor = db.execute(
        "SELECT seq, topic, payload, ts, crc FROM journal WHERE seq > ? ORDER BY seq", (after,)
    )
    for row in _rows(cursor):
        if not _valid(row):
            raise JournalError(
                f"{path}: record {row[0]} is damaged (its checksum does not match); restore the "
                "journal from a copy, or export the records before it with 'tracker journal export'"
            )
        seq, topic, payload, ts, _ = row
        yield Record(line=seq, topic=topic, payload=bytes(payload), ts=ts)


def _rows(cursor: sqlite3.Cursor) -> Iterable[tuple[int, str, bytes, str, int]]:
    while True:
        batch = cursor.fetchmany(1024)
        if not batch:
            return
        yield from batch


def published_through(path: str | Path) -> int:
    """The journal's published-through mark, read without opening it for writing.

    Raises:
        JournalError: The file is missing or not a journal.
    """
    path = Path(path)
    if not path.is_file():
        raise JournalError(f"{path} does not exist; give the journal file written by 'tracker run'")
    db = _connect(path, readonly=True)
    try:
        _check_format(db, path)
        row = db.execute("SELECT value FROM meta WHERE key = 'published_through'").fetchone()
    except sqlite3.Error as exc:
        raise JournalError(f"cannot read {path}: {exc}") from exc
    finally:
        db.close()
    return int(row[0]) if row else 0


def _setup_rows(db: sqlite3.Connection) -> list[SetupEntry]:
    tables = {row[0] for row in db.execute("SELECT name FROM sqlite_master WHERE type = 'table'")}
    if "setup" not in tables:
        return []
    rows = db.execute(
        "SELECT after_seq, kind, name, sha256, content, ts, id FROM setup ORDER BY id"
    ).fetchall()
    return [
        SetupEntry(after_seq, kind, name, sha256, bytes(content), ts, id)
        for after_seq, kind, name, sha256, content, ts, id in rows
    ]


def _meta_int(db: sqlite3.Connection, key: str) -> int:
    row = db.execute("SELECT value FROM meta WHERE key = ?", (key,)).fetchone()
    return int(row[0]) if row else 0


def _snapshot_rows(db: sqlite3.Connection) -> list[SnapshotInfo]:
    tables = {row[0] for row in db.execute("SELECT name FROM sqlite_master WHERE type = 'table'")}
    if "snapshot" not in tables:
        return []
    rows = db.execute(
        "SELECT id, after_seq, setup_id, kind, format, sha256, LENGTH(state), ts FROM snapshot "
        "ORDER BY after_seq DESC, id DESC"
    ).fetchall()
    return [SnapshotInfo(*row) for row in rows]


def _snapshot_state(db: sqlite3.Connection, path: Path, snapshot_id: int) -> bytes:
    row = db.execute("SELECT state FROM snapshot WHERE id = ?", (snapshot_id,)).fetchone()
    if row is None:
        raise JournalError(f"{path} has no snapshot {snapshot_id}")
    return bytes(row[0])


def read_setup(path: str | Path) -> list[SetupEntry]:
    """A journal's self-description, read without opening it for writing (oldest first).

    Raises:
        JournalError: The file is missing, not a journal, or an entry's hash does not match.
    """
    path = Path(path)
    if not path.is_file():
        raise JournalError(f"{path} does not exist; give the journal file written by 'tracker run'")
    db = _connect(path, readonly=True)
    try:
        _check_format(db, path)
        entries = _setup_rows(db)
    except sqlite3.Error as exc:
        raise JournalError(f"cannot read {path}: {exc}") from exc
    finally:
        db.close()
    for entry in entries:
        if hashlib.sha256(entry.content).hexdigest() != entry.sha256:
            raise JournalError(
                f"{path}: the {entry.kind} {entry.name!r} of its self-description is damaged "
                "(its SHA-256 does not match)"
            )
    return entries


def read_snapshots(path: str | Path) -> list[SnapshotInfo]:
    """A journal's snapshots (newest first), read without opening it for writing.

    Raises:
        JournalError: The file is missing or not a journal.
    """
    with _reading(path) as (db, _):
        return _snapshot_rows(db)


def read_snapshot_state(path: str | Path, snapshot_id: int) -> bytes:
    """The state one snapshot holds, read without opening the journal for writing.

    Raises:
        JournalError: The file is missing, not a journal, or has no such snapshot.
    """
    with _reading(path) as (db, checked):
        return _snapshot_state(db, checked, snapshot_id)


def read_base_seq(path: str | Path) -> int:
    """The sequence number a journal's first record follows (0, or the day before's last record
    for a new day's journal), read without opening it for writing.

    Raises:
        JournalError: The file is missing or not a journal.
    """
    with _reading(path) as (db, _):
        return _meta_int(db, "base_seq")


@contextlib.contextmanager
def _reading(path: str | Path) -> Iterator[tuple[sqlite3.Connection, Path]]:
    path = Path(path)
    if not path.is_file():
        raise JournalError(f"{path} does not exist; give the journal file written by 'tracker run'")
    db = _connect(path, readonly=True)
    try:
        _check_format(db, path)
        yield db, path
    except sqlite3.Error as exc:
        raise JournalError(f"cannot read {path}: {exc}") from exc
    finally:
        db.close()


def read_journal(path: str | Path, after: int = 0) -> Iterator[Record]:
    """Read a journal written by the daemon, record by record, for replay or export.

    The file is opened read-only (a crashed writer's WAL is recovered, not modified), so it can be
    read while a daemon is appending to it; the records are those committed when reading started.

    Args:
        path: The journal file.
        after: Only the records numbered above this (a replay from a snapshot).

    Yields:
        :class:`tracker.edge.records.Record` per journal row: ``line`` is the sequence number,
        ``payload`` the raw bytes as received, ``ts`` the receive time.

    Raises:
        JournalError: The file is missing, not a journal, or a record is damaged.
    """
    path = Path(path)
    if not path.is_file():
        raise JournalError(f"{path} does not exist; give the journal file written by 'tracker run'")
    db = _connect(path, readonly=True)
    try:
        _check_format(db, path)
        # One read transaction: a consistent snapshot even while a writer appends.
        db.execute("BEGIN")
        yield from _iter_records(db, path, after)
    except sqlite3.Error as exc:
        raise JournalError(f"cannot read {path}: {exc}") from exc
    finally:
        db.close()

"""Replay: run the engine on recorded messages, deterministically, and keep what it said.

Theory of operation
-------------------
A recording is a sequence of :class:`~tracker.records.Record` -- the lines of a JSON Lines file
(``{"topic": ..., "payload": ..., "ts": ...}`` per line) or the rows of the daemon's SQLite journal.
:class:`Replayer` feeds them, one at a time, through the same edge the live shell uses and hands
each accepted message to :meth:`Engine.handle`. Every line (blank lines aside: they are skipped)
ends in exactly one of three ways:

* **accepted** -- it decoded, it is in time order, and the engine took it; its outputs are kept.
* **redelivered** -- it is an exact copy (same topic, same decoded message) of a line accepted
  earlier, as an MQTT broker re-sends a QoS 1 message whose acknowledgement was lost. It changes
  nothing and is not an error; it is counted in the summary. (Ticks are exempt: the shell makes
  them, and a repeated tick is simply handed to the engine, where it changes nothing.)
* **rejected** -- exactly one :class:`~tracker.wire.ErrorMessage` with ``line`` set to the input's
  1-based line number and a reason a person can act on. The checks, in order:

  1. line level (ours): not UTF-8, not JSON, not an object, no ``topic``, no ``payload``, a ``ts``
     that is not ISO 8601 with an offset;
  2. message level: :func:`tracker.wire.decode` (bad JSON in a raw payload, missing field, wrong
     type, negative or NaN quantity, unknown type, wrong topic for the payload);
  3. time order: a line whose recorded ``ts`` is earlier than that of a line before it (the
     recording is out of order). A line recorded without ``ts`` is left to the engine's own
     per-stream rules (bins per symbol, order messages per order; a late fill is legitimate). A
     journal is checked the same way: the live daemon fed each record through this same class as
     it journaled it (its receive times never go backwards), so a replay decides as it did;
  4. the engine's own verdict (a fill for an unknown order, ...): every ErrorMessage the engine
     returns while handling a line gets that line's number.

  The line's *time*, for derived ticks, is its recorded ``ts`` (when the shell received it), else
  the message's own ``ts``; time never moves backwards.

Ticks (the rule)
----------------
The live daemon injects a :class:`~tracker.wire.Tick` every ``tick_seconds`` of its clock so that
the engine can judge stale market data and expired orders with no message arriving; it journals
those ticks like any message. So:

* if the recording holds at least one line on ``{root}/tick`` (a journal always does), its ticks are
  replayed as recorded and none are invented -- doubling them would change what the engine saw;
* if it holds none (a hand-made or simulated file), the replayer derives them: before a line of
  time ``t``, it injects a tick at every whole multiple of ``tick_seconds`` since the Unix epoch
  that lies after the previous line's time and at or before ``t`` (a tick at exactly ``t`` comes
  before the line). No tick comes before the first line or after the last one. The engine then
  sees time move in the same steps as live, to within one tick interval.

Determinism: nothing here reads the clock or iterates over an unordered container, so the same input
gives the same outputs, and :func:`write_outputs` writes them byte for byte the same.
"""

from __future__ import annotations

import gc
import hashlib
import json
import math
import sys
from collections.abc import Callable, Iterable, Iterator, Mapping, Sequence
from dataclasses import dataclass, field
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any, Protocol

from tracker.errors import InputError
from tracker.records import Record
from tracker.wire import (
    AlertMessage,
    ErrorMessage,
    FillMessage,
    Inbound,
    Outbound,
    StatusMessage,
    TargetMessage,
    Tick,
    WireError,
    decode,
    encode,
    payload_text,
)

__all__ = [
    "DEFAULT_TICK_SECONDS",
    "OUTPUT_FILES",
    "SQLITE_HEADER",
    "BadLine",
    "ReplayResult",
    "Replayer",
    "dumps_summary",
    "finish_summary",
    "has_ticks",
    "is_journal",
    "parse_line",
    "read_input",
    "read_jsonl",
    "replay",
    "write_outputs",
]

#: Interval of derived ticks, in seconds (the live daemon's default tick interval).
DEFAULT_TICK_SECONDS = 1.0

#: The first 16 bytes of every SQLite database file.
SQLITE_HEADER = b"SQLite format 3\x00"

#: Output files, in the order :func:`write_outputs` writes them.
OUTPUT_FILES = ("targets.jsonl", "alerts.jsonl", "status.jsonl", "errors.jsonl", "summary.json")

_EPOCH = datetime(1970, 1, 1, tzinfo=UTC)


@dataclass(frozen=True, slots=True)
class BadLine:
    """A line of a JSON Lines recording that is not a record at all.

    Attributes:
        line: 1-based line number in the file.
        raw: The line's text (as far as it could be decoded).
        reason: What is wrong and how to fix it.
        topic: The line's topic, when it had a usable one; else ``""``.
        ts: The line's recorded time, when it had a usable one.
    """

    line: int
    raw: str
    reason: str
    topic: str = ""
    ts: str | None = None


class EngineLike(Protocol):
    """What the replayer needs from the engine (:class:`tracker.engine.Engine` has it)."""

    def handle(self, event: Inbound) -> list[Outbound]: ...

    def reject(
        self, topic: str, payload: bytes | str, reason: str, ts: datetime | None
    ) -> ErrorMessage: ...

    def summary(self) -> dict[str, Any]: ...


# --------------------------------------------------------------------------------------------------
# Reading recordings


def read_jsonl(path: str | Path) -> Iterator[Record | BadLine]:
    """Read a JSON Lines recording, one :class:`Record` per line.

    Blank lines are skipped (they carry nothing). A line that cannot be a record -- not UTF-8, not
    a JSON object, no ``topic`` string, no ``payload`` object or string, a ``ts`` that is not a
    string -- comes out as a :class:`BadLine` so the caller can report it and go on.

    Args:
        path: The file.

    Yields:
        A :class:`Record` (payload: the parsed object, or the raw text when the line holds text) or
        a :class:`BadLine`, in file order.

    Raises:
        InputError: The file cannot be opened.
    """
    try:
        handle = open(path, "rb")  # noqa: SIM115 -- closed by the ``with`` below
    except OSError as exc:
        raise InputError(f"cannot read {path}: {exc.strerror}", field="INPUT") from exc
    with handle:
        for number, raw_bytes in enumerate(handle, start=1):
            if not raw_bytes.strip():
                continue
            yield parse_line(number, raw_bytes)


def parse_line(number: int, raw_bytes: bytes | str) -> Record | BadLine:
    """Turn one line of a JSON Lines recording into a :class:`Record` or a :class:`BadLine`."""
    if isinstance(raw_bytes, bytes):
        try:
            text = raw_bytes.decode("utf-8")
        except UnicodeDecodeError as exc:
            return BadLine(
                number,
                raw_bytes.decode("utf-8", errors="replace").rstrip("\r\n"),
                f"the line is not valid UTF-8 (byte {exc.start}); re-save the file as UTF-8",
            )
    else:
        text = raw_bytes
    text = text.rstrip("\r\n")
    if number == 1:
        text = text.removeprefix("\ufeff")  # a byte-order mark some editors write
    try:
        obj = json.loads(text)
    except (json.JSONDecodeError, RecursionError) as exc:
        reason = getattr(exc, "msg", "nesting too deep")
        column = getattr(exc, "colno", 0)
        return BadLine(
            number,
            text,
            f"the line is not JSON ({reason} at column {column}); each line must be one object "
            '{"topic": ..., "payload": ..., "ts": ...}',
        )
    if not isinstance(obj, dict):
        return BadLine(
            number,
            text,
            f"the line is a JSON {_json_kind(obj)}, not an object; each line must be one object "
            '{"topic": ..., "payload": ..., "ts": ...}',
        )
    topic = obj.get("topic")
    ts = obj.get("ts")
    usable_ts = ts if isinstance(ts, str) else None
    if not isinstance(topic, str) or not topic:
        what = "has no" if topic is None else "has an empty" if topic == "" else "has a non-string"
        return BadLine(
            number,
            text,
            f"the line {what} 'topic'; give the MQTT topic the message arrived on, "
            "e.g. tracker/fills/ORDER_ID",
            ts=usable_ts,
        )
    if ts is not None and not isinstance(ts, str):
        return BadLine(
            number,
            text,
            f"'ts' is a JSON {_json_kind(ts)}; give the receive time as an ISO 8601 string with an "
            "offset, e.g. 2026-03-10T14:30:00Z, or leave it out",
            topic=topic,
        )
    if "payload" not in obj or obj["payload"] is None:
        return BadLine(
            number,
            text,
            "the line has no 'payload'; give the message object, or its raw text as a string",
            topic=topic,
            ts=usable_ts,
        )
    payload = obj["payload"]
    if not isinstance(payload, dict | str):
        return BadLine(
            number,
            text,
            f"'payload' is a JSON {_json_kind(payload)}; give the message object, or its raw text "
            "as a string",
            topic=topic,
            ts=usable_ts,
        )
    return Record(line=number, topic=topic, payload=payload, ts=usable_ts)


def is_journal(path: str | Path) -> bool:
    """Whether a file is a SQLite database (the daemon's journal), by its first 16 bytes.

    Raises:
        InputError: The file cannot be read.
    """
    try:
        with open(path, "rb") as handle:
            return handle.read(len(SQLITE_HEADER)) == SQLITE_HEADER
    except OSError as exc:
        raise InputError(f"cannot read {path}: {exc.strerror}", field="INPUT") from exc


def read_input(path: str | Path) -> Iterator[Record | BadLine]:
    """Read a recording: a SQLite journal of the daemon, or else a JSON Lines file.

    The kind is told by the file's first bytes (SQLite's header ``SQLite format 3\\0``), not by its
    name.

    Raises:
        InputError: The file cannot be read, or it is a journal and the journal reader is missing.
    """
    path = Path(path)
    if is_journal(path):
        try:
            from tracker.journal import read_journal
        except ImportError as exc:  # pragma: no cover - the journal ships with the package
            raise InputError(
                f"{path} is a SQLite journal, and reading journals needs tracker.journal, which "
                "this installation lacks; export the journal to JSON Lines or update tracker",
                field="INPUT",
            ) from exc
        return iter(read_journal(path))
    return read_jsonl(path)


def _json_kind(value: object) -> str:
    if isinstance(value, bool):
        return "boolean"
    if isinstance(value, int | float):
        return "number"
    if isinstance(value, str):
        return "string"
    if isinstance(value, list):
        return "array"
    if value is None:
        return "null"
    return "object"


# --------------------------------------------------------------------------------------------------
# Feeding the engine


@dataclass
class ReplayResult:
    """Everything a replay produced, in the order the engine produced it.

    Attributes:
        targets, alerts, status, errors: The engine's outputs by kind (errors also hold the lines
            the replayer rejected), each ErrorMessage with ``line`` set.
        summary: :meth:`Engine.summary` after the last line, plus a ``replay`` block of counts.
    """

    targets: list[TargetMessage] = field(default_factory=list)
    alerts: list[AlertMessage] = field(default_factory=list)
    status: list[StatusMessage] = field(default_factory=list)
    errors: list[ErrorMessage] = field(default_factory=list)
    summary: dict[str, Any] = field(default_factory=dict)

    def add(self, outputs: Iterable[Outbound]) -> None:
        """File each output under its kind."""
        for message in outputs:
            if isinstance(message, TargetMessage):
                self.targets.append(message)
            elif isinstance(message, AlertMessage):
                self.alerts.append(message)
            elif isinstance(message, StatusMessage):
                self.status.append(message)
            else:
                self.errors.append(message)


class Replayer:
    """Feeds records to an engine one at a time, as the live shell would, and keeps count.

    Usable incrementally (the closed-loop simulation feeds it as it goes) or through
    :func:`replay`.

    Args:
        engine: The engine to feed.
        root: The MQTT topic root the recording was made under.
        derive_ticks: Inject ticks derived from the lines' times (see the module docstring). Turn
            off when the recording holds its own ticks.
        tick_seconds: Interval of derived ticks.
        check_time: Reject a line whose recorded ``ts`` is earlier than an earlier line's (keep it
            on wherever the live daemon keeps it on, so that replays decide as live did).
    """

    def __init__(
        self,
        engine: EngineLike,
        *,
        root: str = "tracker",
        derive_ticks: bool = True,
        tick_seconds: float = DEFAULT_TICK_SECONDS,
        check_time: bool = True,
    ) -> None:
        if not (math.isfinite(tick_seconds) and tick_seconds > 0):
            raise InputError(
                f"must be a positive number of seconds, got {tick_seconds}", field="tick_seconds"
            )
        self.engine = engine
        self.root = root
        self.derive_ticks = derive_ticks
        self.check_time = check_time
        self._tick = timedelta(seconds=tick_seconds)
        self._tick_topic = f"{root}/tick"
        self._last: datetime | None = None
        self._recorded: datetime | None = None
        self._next_tick: datetime | None = None  # the first derived tick after _last
        self._seen: set[Identity] = set()
        self.lines = 0
        self.accepted = 0
        self.redelivered = 0
        self.rejected = 0
        self.ticks_derived = 0

    @property
    def now(self) -> datetime | None:
        """The latest time replayed so far (``None`` before the first timed line)."""
        return self._last

    def feed(self, record: Record | BadLine) -> list[Outbound]:
        """Handle one line; return what the engine said (and the line's error, if rejected)."""
        return self.feed_many([record])[0]

    def feed_many(self, records: Sequence[Record | BadLine]) -> list[list[Outbound]]:
        """Handle lines in order; return the outputs of each, exactly as :meth:`feed` would.

        The engine gets the accepted messages (and derived ticks) of the lines in one
        ``handle_many`` call where it has one, so that the bins of a bin close share a solve.
        """
        results: list[list[Outbound]] = [[] for _ in records]
        pending: list[tuple[int, Inbound, int, Identity | None, bool]] = []
        pending_keys: set[Identity] = set()

        def flush() -> None:
            events = [entry[1] for entry in pending]
            handle_many = getattr(self.engine, "handle_many", None)
            if handle_many is not None:
                produced_all: list[list[Outbound]] = handle_many(events)
            else:
                produced_all = [self.engine.handle(event) for event in events]
            for (index, _, line, key, is_line), produced in zip(pending, produced_all, strict=True):
                rejected = False
                for out in produced:
                    if isinstance(out, ErrorMessage):
                        rejected = True
                        out = out.model_copy(update={"line": line})
                    results[index].append(out)
                if not is_line:
                    continue  # a derived tick
                if rejected:
                    self.rejected += 1
                else:
                    self.accepted += 1
                    if key is not None:
                        self._seen.add(key)
            pending.clear()
            pending_keys.clear()

        for index, record in enumerate(records):
            self.lines += 1
            staged = self._stage(record)
            if isinstance(staged, ErrorMessage):
                results[index].append(staged)
                continue
            message, key, recorded = staged
            if key is not None and key in pending_keys:
                flush()  # whether it is a redelivery depends on the first copy's fate
            if key is not None and key in self._seen:
                self.redelivered += 1
                continue
            if not self._in_order(recorded):
                assert isinstance(record, Record)  # a BadLine never gets past _stage
                assert recorded is not None and self._recorded is not None
                results[index].append(
                    self._reject(
                        record.line,
                        record.topic,
                        payload_text(record.payload),
                        f"time goes backwards: this line's ts {_iso(recorded)} is earlier than "
                        f"{_iso(self._recorded)} of a line before it; a recording must be in "
                        "the order the messages were received -- sort the lines by 'ts' or fix "
                        "this line's ts",
                        recorded,
                    )
                )
                continue
            when = recorded if recorded is not None else _message_time(message)
            if recorded is not None:
                self._recorded = recorded
            if when is not None and (self._last is None or when > self._last):
                if self._next_tick is not None and when >= self._next_tick:
                    for tick in self._ticks_until(when):
                        pending.append((index, tick, record.line, None, False))
                    self._next_tick = None
                self._last = when
                if self.derive_ticks and self._next_tick is None:
                    self._next_tick = _EPOCH + ((when - _EPOCH) // self._tick + 1) * self._tick
            pending.append((index, message, record.line, key, True))
            if key is not None:
                pending_keys.add(key)
        flush()
        return results

    def _stage(
        self, record: Record | BadLine
    ) -> ErrorMessage | tuple[Inbound, Identity | None, datetime | None]:
        """The line's own checks: its error, or the decoded message, its identity and time."""
        if isinstance(record, BadLine):
            when = _parse_ts_or_none(record.ts)
            return self._reject(record.line, record.topic, record.raw, record.reason, when)
        recorded: datetime | None = None
        if record.ts is not None:
            try:
                recorded = _parse_ts(record.ts)
            except ValueError:
                return self._reject(
                    record.line,
                    record.topic,
                    payload_text(record.payload),
                    f"the line's 'ts' {record.ts!r} is not an ISO 8601 time with an offset; "
                    "write it like 2026-03-10T14:30:00Z, or leave it out",
                    None,
                )
        try:
            message = decode(record.topic, record.payload, root=self.root)
        except WireError as exc:
            return self._reject(
                record.line, record.topic, payload_text(record.payload), exc.reason, recorded
            )
        # Ticks are made by the shell, never redelivered by a broker; two equal ones are harmless
        # to the engine and are not remembered (a long-running daemon makes one a second).
        key = None if isinstance(message, Tick) else _identity(record.topic, message)
        return message, key, recorded

    def _in_order(self, recorded: datetime | None) -> bool:
        """False when the line's recorded time is earlier than an earlier line's."""
        return not (
            self.check_time
            and recorded is not None
            and self._recorded is not None
            and recorded < self._recorded
        )

    def _ticks_until(self, when: datetime) -> list[Tick]:
        """The derived ticks after the previous line's time and at or before ``when``."""
        assert self._last is not None
        # Whole microseconds (timedelta // timedelta): exact, no float rounding at the boundaries.
        first = (self._last - _EPOCH) // self._tick + 1
        last = (when - _EPOCH) // self._tick
        self.ticks_derived += max(last - first + 1, 0)
        return [Tick(ts=_EPOCH + k * self._tick) for k in range(first, last + 1)]

    def _reject(
        self, line: int, topic: str, raw: str, reason: str, recorded: datetime | None
    ) -> ErrorMessage:
        self.rejected += 1
        ts = recorded or self._last
        error = self.engine.reject(topic, raw, reason, ts)
        return error.model_copy(update={"line": line})

    def counts(self) -> dict[str, int]:
        """How many lines were read, accepted, redelivered and rejected; how many ticks derived."""
        return {
            "lines": self.lines,
            "accepted": self.accepted,
            "redelivered": self.redelivered,
            "rejected": self.rejected,
            "ticks_derived": self.ticks_derived,
        }


def has_ticks(records: Iterable[Record | BadLine], root: str) -> bool:
    """Whether any line of a recording is on the tick topic."""
    topic = f"{root}/tick"
    return any(r.topic == topic for r in records)


def replay(
    records: Iterable[Record | BadLine],
    engine: EngineLike,
    root: str = "tracker",
    *,
    tick_seconds: float = DEFAULT_TICK_SECONDS,
    check_time: bool = True,
    progress: Callable[[int], None] | None = None,
) -> ReplayResult:
    """Run an engine over a whole recording.

    Ticks are derived from the lines' times only when the recording has no tick line at all (see
    the module docstring).

    Args:
        records: The recording (from :func:`read_input`, or built in memory).
        engine: A fresh engine (it is fed every line).
        root: The MQTT topic root the recording was made under.
        tick_seconds: Interval of derived ticks.
        check_time: Reject lines whose recorded ts goes backwards (as the live daemon does).
        progress: Called with the number of lines done, every few thousand lines and at the end.

    Returns:
        The outputs and the summary.
    """
    lines = list(records)
    replayer = Replayer(
        engine,
        root=root,
        derive_ticks=not has_ticks(lines, root),
        tick_seconds=tick_seconds,
        check_time=check_time,
    )
    result = ReplayResult()
    chunk = 2048
    # What a chunk leaves behind (the engine's state, the outputs) lives until the replay ends,
    # yet Python's cyclic collector scans it again at every full collection, and those grow with
    # the day: about a fifth of a long replay. gc.freeze() after each chunk moves the survivors
    # out of its reach; unfreeze() at the end hands them back, with any cycles among them.
    # Left alone when the caller has frozen objects of its own.
    freeze = gc.get_freeze_count() == 0
    try:
        for start in range(0, len(lines), chunk):
            for outputs in replayer.feed_many(lines[start : start + chunk]):
                result.add(outputs)
            if freeze:
                gc.freeze()
            if progress is not None and start + chunk < len(lines):
                progress(start + chunk)
    finally:
        if freeze:
            gc.unfreeze()
    if progress is not None:
        progress(len(lines))
    result.summary = finish_summary(engine, replayer)
    return result


def finish_summary(engine: EngineLike, replayer: Replayer) -> dict[str, Any]:
    """The engine's summary with the replayer's counts added under ``replay``."""
    summary = dict(engine.summary())
    summary["replay"] = replayer.counts()
    return summary


# --------------------------------------------------------------------------------------------------
# Writing outputs


def write_outputs(result: ReplayResult, out_dir: str | Path) -> list[Path]:
    """Write targets.jsonl, alerts.jsonl, status.jsonl, errors.jsonl and summary.json.

    Each JSON Lines file holds one wire-contract message per line in the order the engine produced
    them (:func:`tracker.wire.encode`); ``summary.json`` is indented with sorted keys. Same result,
    same bytes.

    Args:
        result: What :func:`replay` returned.
        out_dir: The folder (created if missing; files in it with these names are replaced).

    Returns:
        The paths written.

    Raises:
        InputError: The folder cannot be created or written.
    """
    out = Path(out_dir)
    try:
        out.mkdir(parents=True, exist_ok=True)
        paths = []
        groups: list[tuple[str, list[Any]]] = [
            ("targets.jsonl", result.targets),
            ("alerts.jsonl", result.alerts),
            ("status.jsonl", result.status),
            ("errors.jsonl", result.errors),
        ]
        for name, messages in groups:
            path = out / name
            with open(path, "wb") as handle:
                for message in messages:
                    handle.write(encode(message).rstrip(b"\n") + b"\n")
            paths.append(path)
        path = out / "summary.json"
        path.write_text(dumps_summary(result.summary), encoding="utf-8")
        paths.append(path)
    except OSError as exc:
        raise InputError(f"cannot write to {out}: {exc.strerror}", field="--out") from exc
    return paths


def dumps_summary(summary: Mapping[str, Any]) -> str:
    """The summary as stable JSON text: sorted keys, two-space indent, no NaN, final newline."""
    return json.dumps(_finite(summary), indent=2, sort_keys=True, ensure_ascii=False) + "\n"


def _finite(value: Any) -> Any:
    """Replace NaN and infinities (not JSON) with ``None``, recursively."""
    if isinstance(value, float):
        return value if math.isfinite(value) else None
    if isinstance(value, Mapping):
        return {str(k): _finite(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [_finite(v) for v in value]
    return value


# --------------------------------------------------------------------------------------------------
# Small helpers


def _parse_ts(text: str) -> datetime:
    value = datetime.fromisoformat(text)
    if value.tzinfo is None:
        raise ValueError("no offset")
    return value


def _parse_ts_or_none(text: str | None) -> datetime | None:
    if text is None:
        return None
    try:
        return _parse_ts(text)
    except ValueError:
        return None


def _iso(value: datetime) -> str:
    return value.astimezone(UTC).isoformat().replace("+00:00", "Z")


def _message_time(message: Inbound) -> datetime | None:
    ts = getattr(message, "ts", None)
    return ts if isinstance(ts, datetime) else None


#: What tells two accepted messages apart (see :func:`_identity`).
Identity = bytes | tuple[object, ...]


def _identity(topic: str, message: Inbound) -> Identity:
    """A key that two copies of the same message share (and different messages do not).

    The key is the topic and the message's JSON text (as a digest). A fill -- nearly every line
    of a recording -- needs no text: its fields are strings, ints, positive finite floats, at
    most a side, and a UTC time, and for such values equal means equal JSON text (no -0.0, no
    NaN, no 1 vs 1.0, no two offsets of one time), so the tuple of its values decides exactly as
    the text would, about ten times cheaper. A test holds the two to the same verdicts.
    """
    if type(message) is FillMessage:
        return (topic, *message.__dict__.values())
    digest = hashlib.blake2b(topic.encode(), digest_size=16)
    digest.update(b"\x00")
    digest.update(message.model_dump_json().encode())
    return digest.digest()


def stderr_is_terminal() -> bool:
    """Whether stderr is a terminal (the progress bar shows only then, unless asked for)."""
    return sys.stderr.isatty()

"""Replay: run the engine on a whole recording, deterministically, and write what it said.

:func:`replay` feeds every record of a recording through :class:`~tracker.edge.intake.Intake` (the
same admission the live daemon uses) and :class:`~tracker.edge.digest.ErrorDigest` (which thins a
flood of error records out into counts, as the daemon does) and collects the outputs;
:func:`write_outputs` writes them.
Determinism: nothing here reads the clock or iterates over an unordered container, so the same input
gives the same outputs, and :func:`write_outputs` writes them byte for byte the same.
"""

from __future__ import annotations

import gc
import json
import math
from collections.abc import Callable, Iterable, Iterator, Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from tracker.core.formats import utc_text
from tracker.core.topics import DEFAULT_ROOT
from tracker.edge.intake import DEFAULT_TICK_SECONDS, EngineLike, Intake, has_ticks
from tracker.edge.recordings import BadLine, parse_ts_or_none, read_jsonl
from tracker.edge.records import Record
from tracker.edge.wire import (
    AckMessage,
    AlertMessage,
    ErrorMessage,
    Outbound,
    StatusMessage,
    TargetMessage,
    encode,
)
from tracker.errors import InputError
from tracker.shell.journal import read_journal

#: The first 16 bytes of every SQLite database file.
SQLITE_HEADER = b"SQLite format 3\x00"

#: Output files, in the order :func:`write_outputs` writes them.
OUTPUT_FILES = (
    "targets.jsonl",
    "alerts.jsonl",
    "status.jsonl",
    "errors.jsonl",
    "acks.jsonl",
    "summary.json",
)


@dataclass
class ReplayResult:
    """Everything a replay produced, in the order the engine produced it.

    Attributes:
        targets, alerts, status, errors, acks: The engine's outputs by kind (errors also hold
            the lines the intake rejected and its remarks, thinned out by the error digest into
            summaries during a flood), each ErrorMessage with ``line`` set; acks the one reply to
            each order message.
        summary: :meth:`Engine.summary` after the last line, plus a ``replay`` block of counts.
    """

    targets: list[TargetMessage] = field(default_factory=list)
    alerts: list[AlertMessage] = field(default_factory=list)
    status: list[StatusMessage] = field(default_factory=list)
    errors: list[ErrorMessage] = field(default_factory=list)
    acks: list[AckMessage] = field(default_factory=list)
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
            elif isinstance(message, AckMessage):
                self.acks.append(message)
            else:
                self.errors.append(message)


def replay(
    records: Iterable[Record | BadLine],
    engine: EngineLike,
    root: str = DEFAULT_ROOT,
    *,
    tick_seconds: float = DEFAULT_TICK_SECONDS,
    check_time: bool = True,
    sort: bool = False,
    changes: Sequence[tuple[int, Callable[[], None]]] = (),
    progress: Callable[[int], None] | None = None,
    intake: Intake | None = None,
) -> ReplayResult:
    """Run an engine over a whole recording.

    Ticks are derived from the lines' times only when the recording has no tick line at all (see
    the module docstring).

    Args:
        records: The recording (from :func:`read_input`, or built in memory).
        engine: A fresh engine (it is fed every line).
        root: The MQTT topic root the recording was made under.
        tick_seconds: Interval of derived ticks.
        check_time: Remark on lines whose recorded ts goes backwards (as the live daemon does);
            such a line is applied at the latest time seen either way.
        sort: Sort the recording by its lines' ``ts`` first (stable; lines without one keep
            the time of the line before them), for a recording merged from capture points.
        changes: ``(after, change)`` pairs: ``change()`` is called before the first line
            numbered above ``after`` (a journal's later setups, :mod:`tracker.shell.setup`).
        progress: Called with the number of lines done, every few thousand lines and at the end.
        intake: Go on from this intake (and its engine, which must be ``engine``): the state a
            snapshot holds (:func:`restore`); ``records`` are then the journal's records after
            it. ``None``: a fresh intake for ``engine``.

    Returns:
        The outputs and the summary.
    """
    lines = list(records)
    if sort:
        lines = sort_by_time(lines)
    if intake is None:
        intake = Intake(
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
    pending = sorted(changes, key=lambda item: item[0])
    try:
        for start in range(0, len(lines), chunk):
            block = lines[start : start + chunk]
            while pending:  # a change inside this block: feed up to it, change, go on
                cut = next((i for i, line in enumerate(block) if line.line > pending[0][0]), None)
                if cut is None:
                    break
                _feed(intake, block[:cut], result)
                pending.pop(0)[1]()
                block = block[cut:]
            _feed(intake, block, result)
            if freeze:
                gc.freeze()
            if progress is not None and start + chunk < len(lines):
                progress(start + chunk)
    finally:
        if freeze:
            gc.unfreeze()
    result.add(intake.close())  # what the error digest's last interval held back
    if progress is not None:
        progress(len(lines))
    result.summary = finish_summary(engine, intake)
    return result


@dataclass(frozen=True)
class Restored:
    """The state a journal's snapshot holds, to replay the records after it.

    Attributes:
        intake: The intake, holding the engine (:attr:`Intake.engine`).
        after_seq: The last journal record applied to it.
        setup_id: The last setup entry in force in it (:func:`tracker.shell.setup.later_changes`).
    """

    intake: Intake
    after_seq: int
    setup_id: int


def restore(path: str | Path, *, at: int | None = None, field: str = "--from-snapshot") -> Restored:
    """The newest snapshot of a journal that loads (taken at or before record ``at``, if given).

    Raises:
        InputError: No snapshot of the journal loads (each one's reason is given).
    """
    from tracker.shell import snapshot
    from tracker.shell.journal import read_snapshot_state, read_snapshots

    reasons: list[str] = []
    for info in read_snapshots(path):
        if at is not None and info.after_seq > at:
            continue
        try:
            intake = snapshot.load(
                read_snapshot_state(path, info.id), format=info.format, sha256=info.sha256
            )
        except snapshot.SnapshotUnusable as exc:
            reasons.append(f"the one after record {info.after_seq}: {exc.reason}")
            continue
        return Restored(intake, info.after_seq, info.setup_id)
    where = "" if at is None else f" at or before record {at}"
    why = f" ({'; '.join(reasons)})" if reasons else ""
    raise InputError(
        f"{path} has no snapshot{where} that this tracker can use{why}; replay it from its first "
        "record instead",
        field=field,
    )


def _feed(intake: Intake, block: Sequence[Record | BadLine], result: ReplayResult) -> None:
    """Feed lines to the intake and file their outputs (errors thinned out by its digest)."""
    for outputs in intake.feed_many(block):
        result.add(outputs)


def sort_by_time(lines: list[Record | BadLine]) -> list[Record | BadLine]:
    """The lines in the order of their recorded ``ts`` (stable: equal times keep their order; a
    line without a readable ``ts`` stays right after the line before it)."""
    keyed: list[tuple[str, int, Record | BadLine]] = []
    last = ""
    for position, line in enumerate(lines):
        when = parse_ts_or_none(line.ts) if line.ts is not None else None
        if when is not None:
            last = utc_text(when, "microseconds")
        keyed.append((last, position, line))
    keyed.sort(key=lambda item: (item[0], item[1]))
    return [line for _, _, line in keyed]


def finish_summary(engine: EngineLike, intake: Intake) -> dict[str, Any]:
    """The engine's summary with the intake's counts added under ``replay``."""
    summary = dict(engine.summary())
    summary["replay"] = intake.counts()
    summary["gaps"] = intake.gaps()  # per source, the seq ranges that never arrived
    return summary


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
        InputError: The file cannot be read.
    """
    path = Path(path)
    if is_journal(path):
        return iter(read_journal(path))
    return read_jsonl(path)


def write_outputs(result: ReplayResult, out_dir: str | Path) -> list[Path]:
    """Write targets.jsonl, alerts.jsonl, status.jsonl, errors.jsonl, acks.jsonl, summary.json.

    Each JSON Lines file holds one wire-contract message per line in the order the engine produced
    them (:func:`tracker.edge.wire.encode`); ``summary.json`` is indented with sorted keys. Same
    result, same bytes.

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
            ("acks.jsonl", result.acks),
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

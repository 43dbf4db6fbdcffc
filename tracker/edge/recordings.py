"""Recordings: JSON Lines files and journals read back as records.

A recording is a sequence of :class:`~tracker.edge.records.Record` -- the lines of a JSON Lines file
(``{"topic": ..., "payload": ..., "ts": ...}`` per line) or the rows of the daemon's SQLite journal.
A line that cannot be a record at all comes out as a :class:`BadLine`, so the reader of the
recording can report it and go on. What happens to each record is :mod:`tracker.edge.intake`'s job.
"""

from __future__ import annotations

import json
from collections.abc import Iterator
from dataclasses import dataclass
from datetime import datetime
from pathlib import Path

from tracker.edge.records import Record
from tracker.errors import InputError


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


def parse_ts(text: str) -> datetime:
    value = datetime.fromisoformat(text)
    if value.tzinfo is None:
        raise ValueError("no offset")
    return value


def parse_ts_or_none(text: str | None) -> datetime | None:
    if text is None:
        return None
    try:
        return parse_ts(text)
    except ValueError:
        return None

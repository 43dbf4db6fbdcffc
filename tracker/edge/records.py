"""One recorded inbound message, as a replay file line or a journal row holds it."""

from __future__ import annotations

import json
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any


@dataclass(frozen=True, slots=True)
class Record:
    """A message as it was received, before decoding.

    Attributes:
        line: 1-based line number of a JSON Lines file, or the journal's sequence number.
        topic: The MQTT topic it arrived on.
        payload: The payload as received: raw bytes or text (possibly malformed), or an already
            parsed JSON object when a replay line carries the object itself.
        ts: When it was received (ISO 8601 with offset), if recorded.
    """

    line: int
    topic: str
    payload: bytes | str | Mapping[str, Any]
    ts: str | None = None


def compact_json(obj: Any) -> str:
    """JSON text with no spaces and UTF-8 kept as it is: how every recording line is written."""
    return json.dumps(obj, ensure_ascii=False, separators=(",", ":"))


def payload_bytes(payload: bytes | str | Mapping[str, Any]) -> bytes:
    """A payload as the bytes to publish over MQTT (compact JSON of an object, or the raw text)."""
    if isinstance(payload, bytes):
        return payload
    if isinstance(payload, str):
        return payload.encode("utf-8")
    return compact_json(payload).encode("utf-8")


def record_line(record: Record) -> str:
    """One recording line: ``{"topic", "payload", "ts"}`` as compact JSON (no newline)."""
    payload: Any = record.payload
    if isinstance(payload, bytes):
        payload = payload.decode("utf-8", errors="replace")
    return compact_json({"topic": record.topic, "payload": payload, "ts": record.ts})


__all__ = ["Record", "compact_json", "payload_bytes", "record_line"]

"""One recorded inbound message, as a replay file line or a journal row holds it."""

from __future__ import annotations

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

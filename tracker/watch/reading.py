"""Reading the daemon's published messages tolerantly, field by field.

The view is a consumer of the wire contract, not its keeper: ``tracker.edge.wire`` validates what
the daemon *receives* and rejects unknown fields; here we read what it *publishes*, and the rule is
the opposite. A message is a JSON object; each field the view shows is taken when it is present and
of the expected kind, and left as ``None`` (shown blank) otherwise. Unknown fields are ignored, so
a daemon that publishes more (a participation rate, a reason, a contract version) never breaks the
view, and a field of the wrong kind costs that field only, never the message.
"""

from __future__ import annotations

import json
import math
from datetime import UTC, datetime
from typing import Any

__all__ = ["as_float", "as_int", "as_text", "as_time", "json_object"]


def json_object(payload: bytes | str) -> dict[str, Any] | None:
    """The payload as a JSON object, or ``None`` when it is not one (not UTF-8, not JSON, a list).

    A bare text (the contract's ``offline`` last will may be sent as plain text by other tools)
    is not an object either; callers that accept it look at the text themselves.
    """
    try:
        data = json.loads(payload)
    except (ValueError, RecursionError):
        return None
    return data if isinstance(data, dict) else None


def as_text(data: dict[str, Any], key: str) -> str | None:
    """``data[key]`` when it is a non-empty string."""
    value = data.get(key)
    return value if isinstance(value, str) and value else None


def as_float(data: dict[str, Any], key: str) -> float | None:
    """``data[key]`` as a finite float when it is a JSON number (booleans are not numbers)."""
    value = data.get(key)
    if isinstance(value, bool) or not isinstance(value, int | float):
        return None
    number = float(value)
    return number if math.isfinite(number) else None


def as_int(data: dict[str, Any], key: str) -> int | None:
    """``data[key]`` as an int when it is a whole JSON number (shares are whole)."""
    number = as_float(data, key)
    if number is None or not number.is_integer():
        return None
    return int(number)


def as_time(data: dict[str, Any], key: str) -> datetime | None:
    """``data[key]`` as an aware UTC datetime when it is ISO 8601 text with an offset."""
    value = data.get(key)
    if not isinstance(value, str):
        return None
    try:
        moment = datetime.fromisoformat(value)
    except ValueError:
        return None
    if moment.tzinfo is None:
        return None
    return moment.astimezone(UTC)

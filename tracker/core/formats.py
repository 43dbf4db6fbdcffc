"""How numbers and times are written for people and for the wire: one place for each rule.

* Times: ISO 8601 in UTC with a ``Z`` (:func:`utc_text`).
* Floats: rounded to :data:`FLOAT_DECIMALS` decimals (or fewer where a caller says so); NaN and
  infinities become ``None`` (JSON has no word for them) and ``-0.0`` becomes ``0.0``
  (:func:`rounded`). Mappings come out with their keys sorted, so the same values give the same
  text.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from datetime import UTC, datetime
from typing import Any

#: Decimals of every float written on the wire and in summaries.
FLOAT_DECIMALS = 6


def utc_text(moment: datetime, timespec: str = "auto") -> str:
    """``moment`` as ISO 8601 in UTC with a ``Z``, e.g. ``2026-03-10T14:30:00Z``.

    Args:
        moment: An aware datetime.
        timespec: As :meth:`datetime.isoformat` (``"milliseconds"`` for recordings).
    """
    return moment.astimezone(UTC).isoformat(timespec=timespec).replace("+00:00", "Z")


def rounded(value: Any, digits: int = FLOAT_DECIMALS) -> Any:
    """``value`` with every float rounded to ``digits`` decimals, recursively.

    A non-finite float becomes ``None``, ``-0.0`` becomes ``0.0``; mappings are returned as dicts
    with sorted keys, lists and tuples as lists; anything else is returned as it is.
    """
    kind = type(value)
    if kind is str or kind is int or kind is bool or value is None:
        return value  # the common case, answered before the slower isinstance checks
    if isinstance(value, float):
        if not math.isfinite(value):
            return None
        result = round(value, digits)
        return 0.0 if result == 0 else result
    if kind is dict or isinstance(value, Mapping):
        return {key: rounded(value[key], digits) for key in sorted(value)}
    if isinstance(value, list | tuple):
        return [rounded(item, digits) for item in value]
    return value


__all__ = ["FLOAT_DECIMALS", "rounded", "utc_text"]

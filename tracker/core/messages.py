"""The messages of the core: the events the engine takes and the outputs it returns.

Theory of operation
-------------------
These are plain frozen dataclasses. They hold values that are already valid: the edge
(:func:`tracker.edge.wire.decode`) checks every inbound payload against the wire contract and only
then builds one of these, and the engine builds its outputs from its own state. Nothing in the
core checks them again (and nothing here imports the wire's validation library).

Field names and their order are those of the wire contract v1, so :func:`json_object` can write any
of them as the JSON object the wire carries: ``type`` first, then the fields in declaration order,
times in UTC with a ``Z``, floats rounded (:mod:`tracker.core.formats`), nested mappings with sorted
keys. The edge's ``encode`` writes these objects as bytes; a test holds them to the wire contract's
own models.

Inbound (events): :class:`OrderMessage`, :class:`FillMessage`, :class:`BinMessage`,
:class:`ControlMessage` and :class:`Tick` (the passage of time, injected by the shells).
Outbound: :class:`TargetMessage`, :class:`StatusMessage`, :class:`AlertMessage` and
:class:`ErrorMessage`.
"""

from __future__ import annotations

import functools
import json
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field, fields
from datetime import datetime
from operator import attrgetter
from typing import Any, ClassVar, Literal

from tracker.core.formats import FLOAT_DECIMALS, rounded, utc_text

Side = Literal["buy", "sell"]
Severity = Literal["info", "warning", "critical"]
Action = Literal["new", "amend", "cancel"]
Command = Literal["halt", "resume"]

#: Raw payloads kept in error records are truncated to this many characters.
MAX_ERROR_PAYLOAD = 2_000

#: Version of the wire contract the messages follow; every outbound message carries it.
CONTRACT_VERSION = "1.1"

#: The fields an order ``amend`` can change.
AMENDABLE_FIELDS = ("quantity", "end", "limit_price", "max_participation", "urgency", "preferences")

# --------------------------------------------------------------------------------------------
# Inbound
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True, slots=True, kw_only=True)
class OrderMessage:
    """A parent order: ``new`` creates it, ``amend`` changes it, ``cancel`` stops it.

    Attributes:
        fields_set: The names of the fields the message carried, explicit nulls included (an
            amend changes exactly those; ``"limit_price": null`` removes the limit). Left empty
            when built in code, it becomes the fields given a value other than ``None``.
    """

    type: ClassVar[str] = "order"
    action: Action
    order_id: str
    symbol: str | None = None
    side: Side | None = None
    quantity: int | None = None
    start: datetime | None = None
    end: datetime | None = None
    limit_price: float | None = None
    max_participation: float | None = None
    urgency: Literal["low", "medium", "high"] | None = None
    preferences: Mapping[str, float | str | bool] | None = None
    arrival_price: float | None = None
    ts: datetime
    fields_set: frozenset[str] = frozenset()

    def __post_init__(self) -> None:
        if not self.fields_set:
            given = frozenset(
                item.name
                for item in fields(self)
                if item.name != "fields_set" and getattr(self, item.name) is not None
            )
            object.__setattr__(self, "fields_set", given)

    def sets(self, name: str) -> bool:
        """Whether the message carried field ``name`` (an explicit null counts)."""
        return name in self.fields_set

    @property
    def removes_limit(self) -> bool:
        """True for an amend that explicitly sends ``"limit_price": null``."""
        return self.limit_price is None and "limit_price" in self.fields_set


@dataclass(frozen=True, slots=True, kw_only=True)
class FillMessage:
    """An execution against a parent order (shares are positive; the order has the side)."""

    type: ClassVar[str] = "fill"
    fill_id: str
    order_id: str
    quantity: int
    price: float
    side: Side | None = None
    ts: datetime
    extra: Mapping[str, Any] = field(default_factory=dict)  # fields beyond the contract (facts)

    def same_execution(self, other: FillMessage) -> bool:
        """Whether ``other`` reports the same execution: same id, order, shares, price and side
        (its ``ts`` and extra fields may differ: a gateway re-sending it restamps them)."""
        return (
            self.fill_id == other.fill_id
            and self.order_id == other.order_id
            and self.quantity == other.quantity
            and self.price == other.price
            and (self.side is None or other.side is None or self.side == other.side)
        )


@dataclass(frozen=True, slots=True, kw_only=True)
class FillCorrectionMessage:
    """A bust (``action`` ``"bust"``: the fill ``fill_id`` did not happen) or a correction
    (``"correct"``: it happened with this ``quantity`` and/or ``price``) of an earlier fill."""

    type: ClassVar[str] = "fill_correction"
    action: Literal["bust", "correct"]
    fill_id: str
    order_id: str
    quantity: int | None = None
    price: float | None = None
    reason: str | None = None
    ts: datetime


@dataclass(frozen=True, slots=True, kw_only=True)
class BinMessage:
    """One closed market bin of a symbol; ``spread`` in currency per share, ``vwap`` null only
    when the bin had no volume."""

    type: ClassVar[str] = "bin"
    symbol: str
    start: datetime
    end: datetime
    volume: int
    vwap: float | None = None
    open: float
    high: float
    low: float
    close: float
    spread: float
    ts: datetime


@dataclass(frozen=True, slots=True, kw_only=True)
class ControlMessage:
    """Halt or resume one order (``order_id``) or every order (no ``order_id``)."""

    type: ClassVar[str] = "control"
    command: Command
    order_id: str | None = None
    ts: datetime


@dataclass(frozen=True, slots=True, kw_only=True)
class Tick:
    """The passage of time, injected by the shells (live timer, replay); carries only ``ts``."""

    type: ClassVar[str] = "tick"
    ts: datetime


# --------------------------------------------------------------------------------------------
# Outbound (the fields are described on the wire contract's models in tracker.edge.wire)
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True, slots=True, kw_only=True)
class TargetMessage:
    """What to trade in the next bin for one order."""

    type: ClassVar[str] = "target"
    order_id: str
    symbol: str
    side: Side
    bin_start: datetime | None
    bin_end: datetime | None
    quantity: int
    cumulative_target: int
    remaining: int
    max_quantity: int | None
    participation: float | None = None
    max_participation: float | None = None
    plan_version: int
    state: str = "working"
    reason: str = "on_plan"
    next_bins: tuple[Mapping[str, Any], ...] = ()
    ts: datetime


@dataclass(frozen=True, slots=True, kw_only=True)
class AlertMessage:
    """A condition the desk should know about, raised once and cleared once, or a one-shot
    event; ``order_id`` is null for alerts about a symbol as a whole."""

    type: ClassVar[str] = "alert"
    order_id: str | None
    symbol: str | None = None
    code: str
    severity: Severity
    state: Literal["raised", "cleared"] = "raised"
    message: str
    details: Mapping[str, Any] = field(default_factory=dict)
    ts: datetime


@dataclass(frozen=True, slots=True, kw_only=True)
class StatusMessage:
    """Where an order stands (retained per order on the wire)."""

    type: ClassVar[str] = "status"
    order_id: str
    symbol: str
    side: Side
    state: str
    quantity: int
    filled: int
    remaining: int
    progress_pct: float
    planned_filled: int
    deviation_shares: int
    deviation_pct: float
    deviation_bins: float | None
    average_price: float | None
    arrival_price: float | None
    limit_price: float | None
    volume_scale: float | None
    expected_cost: float | None
    expected_cost_bps: float | None
    plan_version: int
    max_participation: float | None = None
    cap_source: str | None = None
    cost_sd: float | None = None
    cost_sd_bps: float | None = None
    risk_penalty: float | None = None
    ts: datetime


@dataclass(frozen=True, slots=True, kw_only=True)
class ErrorMessage:
    """One rejected inbound message, with a reason a person can act on."""

    type: ClassVar[str] = "error"
    reason: str
    topic: str
    payload: str
    ts: datetime | None
    line: int | None = None
    order_id: str | None = None
    severity: Literal["info", "error"] = "error"


@dataclass(frozen=True, slots=True, kw_only=True)
class AckMessage:
    """The one reply to an order message (new, amend, cancel): accepted or rejected, and why.

    ``message_ts`` is the order message's own ``ts`` (with ``order_id`` and ``action``, what a
    router matches the reply by); ``reason`` is null when accepted without remark.
    """

    type: ClassVar[str] = "ack"
    order_id: str
    action: str | None
    result: Literal["accepted", "rejected"]
    reason: str | None = None
    message_ts: datetime | None = None
    ts: datetime | None


Inbound = OrderMessage | FillMessage | FillCorrectionMessage | BinMessage | ControlMessage | Tick
Outbound = TargetMessage | AlertMessage | StatusMessage | ErrorMessage | AckMessage
Message = Inbound | Outbound

# Per class, the names of the fields written on the wire, in order (computed once).
_WIRE_FIELDS: dict[type, tuple[str, ...]] = {
    cls: tuple(item.name for item in fields(cls) if item.name not in ("fields_set", "extra"))
    for cls in (
        OrderMessage,
        FillMessage,
        FillCorrectionMessage,
        BinMessage,
        ControlMessage,
        Tick,
        TargetMessage,
        AlertMessage,
        StatusMessage,
        ErrorMessage,
        AckMessage,
    )
}

#: The outbound classes: their JSON objects carry the contract version after ``type``.
_OUTBOUND = (TargetMessage, AlertMessage, StatusMessage, ErrorMessage, AckMessage)


def wire_fields(message: Message) -> tuple[str, ...]:
    """The names of a message's wire fields, in order (``type`` not included)."""
    return _WIRE_FIELDS[type(message)]


#: Types written as they are (checked by exact type first: the common case, and no ABC check).
_AS_IS = frozenset({str, int, bool, type(None)})


def _plain(value: Any) -> Any:
    kind = type(value)
    if kind in _AS_IS:
        return value
    if kind is float:  # rounded(value), inline: an output carries a dozen floats
        if value - value != 0.0:  # NaN or an infinity
            return None
        result = round(value, FLOAT_DECIMALS)
        return result if result != 0 else 0.0
    if kind is datetime:
        return _utc_text(value)
    if isinstance(value, datetime):
        return utc_text(value)
    if isinstance(value, float | Mapping | list | tuple):
        return rounded(value)
    return value


@functools.lru_cache(maxsize=4096)
def _utc_text(moment: datetime) -> str:
    """:func:`utc_text` remembered: the outputs of one journal group share their times. (Two
    aware datetimes that are equal are the same instant, so they have the same UTC text.)"""
    return utc_text(moment)


def json_object(message: Message, only_set: bool = False) -> dict[str, Any]:
    """The JSON object of a message as the wire carries it.

    ``type`` first (then, for an outbound message, ``version``: :data:`CONTRACT_VERSION`),
    then every field in declaration order; times as ISO 8601 UTC text with a
    ``Z``, floats rounded to :data:`~tracker.core.formats.FLOAT_DECIMALS` decimals (non-finite:
    ``None``), nested mapping keys sorted.

    Args:
        message: Any message of this module.
        only_set: Keep only the fields the message carried (an order's ``fields_set``; for the
            other messages the fields that are not ``None``) -- the payload as sent, as near as
            the decoded message can say.
    """
    names = _WIRE_FIELDS[type(message)]
    result: dict[str, Any] = {"type": message.type}
    if isinstance(message, _OUTBOUND):
        result["version"] = CONTRACT_VERSION
    for name in names:
        value = getattr(message, name)
        if only_set:
            if isinstance(message, OrderMessage):
                if name not in message.fields_set:
                    continue
            elif value is None:
                continue
        result[name] = _plain(value)
    return result


#: The JSON encoder of every payload: compact, UTF-8 kept as it is, no NaN (made once: the
#: keyword arguments of ``json.dumps`` would make a new encoder for every message).
_DUMPS = json.JSONEncoder(separators=(",", ":"), ensure_ascii=False, allow_nan=False).encode
#: How that encoder writes a string (``json.dumps`` with ``ensure_ascii=False`` uses it too).
_STRING: Callable[[str], str] = json.encoder.encode_basestring


# Per class, the start of its JSON object (``type`` and, outbound, ``version``), the keys of its
# wire fields with the comma before each, in order, and a getter of their values (made once).
def _head(cls: type) -> str:
    start: dict[str, str] = {"type": getattr(cls, "type")}  # noqa: B009 -- a ClassVar
    if cls in _OUTBOUND:
        start["version"] = CONTRACT_VERSION
    return _DUMPS(start)[:-1]


def _getter(names: tuple[str, ...]) -> Callable[[Any], tuple[Any, ...]]:
    """The values of ``names`` of an object, as one tuple (``attrgetter`` of one name is not)."""
    if len(names) == 1:
        single = attrgetter(names[0])
        return lambda message: (single(message),)
    return attrgetter(*names)


_HEADS: dict[type, str] = {cls: _head(cls) for cls in _WIRE_FIELDS}
_KEYS: dict[type, tuple[str, ...]] = {
    cls: tuple(f",{_STRING(name)}:" for name in names) for cls, names in _WIRE_FIELDS.items()
}
_VALUES: dict[type, Callable[[Any], tuple[Any, ...]]] = {
    cls: _getter(names) for cls, names in _WIRE_FIELDS.items()
}


def float_text(value: float) -> str:
    """A float as :func:`json_text` writes it: ``repr`` of it rounded to
    :data:`~tracker.core.formats.FLOAT_DECIMALS` decimals, ``0.0`` for zero (``-0.0`` too) and
    ``null`` for NaN and the infinities.

    Between 0.0001 and 10^9 in size (nearly every float of an output) the text is that of
    ``"%.6f"``, trailing zeros dropped: both round the exact binary value to six decimals alike
    (correctly rounded), and a decimal of at most 15 significant digits (nine before the point,
    six after) is the shortest text of the double nearest to it -- what ``repr`` writes, without
    an exponent from 0.0001 on. ``tests/test_fast_paths.py`` holds the two together.
    """
    if 1e-4 <= value < 1e9 or -1e9 < value <= -1e-4:
        text = ("%.6f" % value).rstrip("0")  # noqa: UP031 -- the fastest correct rounding
        return text + "0" if text[-1] == "." else text
    if value - value != 0.0:  # NaN or an infinity
        return "null"
    result = round(value, FLOAT_DECIMALS)
    return float.__repr__(result) if result != 0 else "0.0"


def json_text(message: Message) -> str:
    """The compact JSON text of :func:`json_object`, exactly as ``json.dumps`` writes it
    (``separators=(",", ":")``, ``ensure_ascii=False``, ``allow_nan=False``).

    Written field by field without the intermediate dict: a fill's status (two dozen fields) is
    the daemon's most frequent output. Strings, whole numbers, booleans, ``None``, floats and
    times are written here as the encoder writes them; any other value (mappings, sequences, a
    subclass) goes through :func:`_plain` and the encoder itself. ``tests/test_fast_paths.py``
    holds the two to the same bytes.
    """
    cls = type(message)
    parts = [_HEADS[cls]]
    append = parts.append
    for key, value in zip(_KEYS[cls], _VALUES[cls](message)):  # noqa: B905 -- same length
        append(key)
        kind = type(value)
        if kind is str:
            append(_STRING(value))
        elif kind is float:
            if 1e-4 <= value < 1e9 or -1e9 < value <= -1e-4:  # float_text, inline
                text = ("%.6f" % value).rstrip("0")  # noqa: UP031
                append(text + "0" if text[-1] == "." else text)
            else:
                append(float_text(value))
        elif value is None:
            append("null")
        elif kind is int:
            append(int.__repr__(value))
        elif kind is bool:
            append("true" if value else "false")
        elif kind is datetime:
            append(_STRING(_utc_text(value)))
        else:
            append(_DUMPS(_plain(value)))
    append("}")
    return "".join(parts)


def payload_text(payload: bytes | str | Mapping[str, Any]) -> str:
    """The payload as text for an error record: at most :data:`MAX_ERROR_PAYLOAD` characters of
    it, followed, when it was longer, by a marker that says so and gives its whole size (bytes
    for a raw payload, characters for text)."""
    if isinstance(payload, bytes):
        # Only the head is decoded: a payload of megabytes costs no more than a short one.
        text = payload[: 4 * MAX_ERROR_PAYLOAD].decode("utf-8", errors="replace")
        size, unit = len(payload), "bytes"
    elif isinstance(payload, str):
        text, size, unit = payload, len(payload), "characters"
    else:
        try:
            text = json.dumps(payload, sort_keys=True, default=str, allow_nan=True)
        except (TypeError, ValueError):
            text = repr(payload)
        size, unit = len(text), "characters"
    if len(text) <= MAX_ERROR_PAYLOAD and size <= 4 * MAX_ERROR_PAYLOAD:
        return text
    return f"{text[:MAX_ERROR_PAYLOAD]}... [truncated: {size:,} {unit} in all]"


__all__ = [
    "AMENDABLE_FIELDS",
    "CONTRACT_VERSION",
    "MAX_ERROR_PAYLOAD",
    "AckMessage",
    "AlertMessage",
    "BinMessage",
    "ControlMessage",
    "ErrorMessage",
    "FillCorrectionMessage",
    "FillMessage",
    "Inbound",
    "Message",
    "OrderMessage",
    "Outbound",
    "Severity",
    "Side",
    "StatusMessage",
    "TargetMessage",
    "Tick",
    "float_text",
    "json_object",
    "json_text",
    "payload_text",
    "wire_fields",
]

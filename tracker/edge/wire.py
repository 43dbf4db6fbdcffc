"""Wire contract v1.1: the JSON messages tracker reads and writes over MQTT (and in replay files).

Theory of operation: every payload crosses the boundary exactly once, in :func:`decode`, which
parses the JSON, checks that the topic fits the payload (kind and id) and validates every field
against the contract's pydantic models (``*Payload``). What passes becomes one of the core's plain
messages (:mod:`tracker.core.messages`), which the engine trusts. Anything wrong becomes a
:class:`WireError` whose ``reason`` names the field and says what is allowed, so a person can fix
the sender.

Outbound, the engine returns core messages; :func:`encode` turns them into deterministic bytes
(fields in declaration order, nested keys sorted, floats rounded to :data:`FLOAT_DECIMALS`
decimals, times in UTC with a ``Z``), so two runs on the same input write byte-identical output.
The outbound ``*Payload`` models are the written contract of those bytes (what a consumer may
rely on; :func:`decode_output` reads them back); a test holds :func:`encode` to them. pydantic is
used here, at the edge, and nowhere in the core.

Topics (``root`` defaults to ``tracker``; :class:`tracker.core.topics.Topics` names them)::

    inbound   {root}/orders/{order_id}  {root}/fills/{order_id} (fills, busts, corrections)
              {root}/bins/{symbol}      {root}/control (halts, resumes, heartbeats)
              {root}/tick   (injected by the shells, never by users)
    outbound  {root}/targets/{order_id} (retained)   {root}/status/{order_id} (retained)
              {root}/acks/{order_id}    {root}/alerts/{order_id}
              {root}/alerts/symbol/{symbol}  {root}/alerts/engine/all  {root}/errors

Quantities are whole shares, always positive on the wire: the side lives in the order.

Tolerant reading, strict writing (contract v1.1): an inbound message may carry fields the contract
does not name; they cost it nothing (:func:`decode_reading` says which, so the intake can report
each name once; a fill keeps them as facts). A message is refused only when it cannot be applied
safely -- a required field missing or invalid -- and the reason names the field. Every outbound
message carries ``"version": "1.1"`` and exactly the fields of its model here.
"""

from __future__ import annotations

import functools
import json
import math
import re
from collections.abc import Mapping
from dataclasses import dataclass
from datetime import UTC, datetime
from typing import Annotated, Any, Literal, Self

from pydantic import (
    AfterValidator,
    AwareDatetime,
    BaseModel,
    BeforeValidator,
    ConfigDict,
    Field,
    PlainSerializer,
    ValidationError,
    model_validator,
)

from tracker.core.formats import FLOAT_DECIMALS, utc_text
from tracker.core.messages import (
    AMENDABLE_FIELDS,
    CONTRACT_VERSION,
    MAX_ERROR_PAYLOAD,
    AckMessage,
    AlertMessage,
    BinMessage,
    ControlMessage,
    ErrorMessage,
    FillCorrectionMessage,
    FillMessage,
    Inbound,
    Message,
    OrderMessage,
    Outbound,
    Severity,
    Side,
    StatusMessage,
    TargetMessage,
    Tick,
    json_object,
    json_text,
    payload_text,
)
from tracker.core.topics import DEFAULT_ROOT, Topics
from tracker.errors import InputError

#: Version of the wire contract these models implement (every outbound message carries it).
WIRE_VERSION = CONTRACT_VERSION

_ID_PATTERN = re.compile(r"[A-Za-z0-9._-]{1,64}")
_ID_RULE = "1 to 64 characters of A-Z, a-z, 0-9, '.', '_' or '-'"


class WireError(InputError):
    """An inbound message that cannot be accepted.

    Attributes:
        reason: A sentence saying what is wrong and what is allowed.
        topic: The topic the message arrived on.
        order_id: The order the message names, when it could be read.
    """

    def __init__(
        self,
        reason: str,
        *,
        topic: str,
        field: str | None = None,
        order_id: str | None = None,
    ) -> None:
        super().__init__(reason, field=field)
        self.reason = reason
        self.topic = topic
        self.order_id = order_id


# --------------------------------------------------------------------------------------------
# Field types
# --------------------------------------------------------------------------------------------


def _check_id(value: Any) -> str:
    if not isinstance(value, str):
        raise ValueError(f"must be a string of {_ID_RULE}; got {type(value).__name__}")
    if not _ID_PATTERN.fullmatch(value):
        raise ValueError(f"must be {_ID_RULE}; got {value!r}")
    return value


#: The largest magnitude any quantity, volume or price may have (10^12). Beyond it a number is a
#: typo or an attack, not a trade; and an integer this size still fits the 64 bits numpy uses.
MAX_MAGNITUDE = 10**12


def _shown(value: int | float) -> str:
    """A number for an error message: a huge integer by its length, not its 400 digits."""
    if isinstance(value, int) and abs(value) >= 10**15:
        return f"a number of {len(str(abs(value)))} digits"
    return repr(value)


def _bounded(value: int | float) -> None:
    if abs(value) > MAX_MAGNITUDE:
        raise ValueError(f"must be at most {MAX_MAGNITUDE:,} in size; got {_shown(value)}")


def _whole_shares(value: Any) -> int:
    if isinstance(value, bool) or not isinstance(value, int | float):
        raise ValueError(f"must be a JSON number of whole shares; got {type(value).__name__}")
    if isinstance(value, float):
        if not math.isfinite(value):
            raise ValueError(f"must be a finite number of whole shares; got {value!r}")
        if not value.is_integer():
            raise ValueError(f"must be whole shares (an integer); got {value!r}")
    _bounded(value)
    return int(value)


def _finite_number(value: Any) -> float:
    if isinstance(value, bool) or not isinstance(value, int | float):
        raise ValueError(f"must be a JSON number; got {type(value).__name__}")
    _bounded(value)  # before float(): a 400-digit integer would overflow it
    number = float(value)
    if not math.isfinite(number):
        raise ValueError(f"must be a finite number; got {value!r}")
    return number


def _aware_time(value: Any) -> datetime:
    if isinstance(value, datetime):
        moment = value
    elif isinstance(value, str):
        try:
            moment = datetime.fromisoformat(value)
        except ValueError:
            raise ValueError(
                f"must be an ISO 8601 time with an offset, e.g. 2026-03-02T14:30:00Z; got {value!r}"
            ) from None
    else:
        raise ValueError(f"must be an ISO 8601 time string; got {type(value).__name__}")
    if moment.tzinfo is None or moment.utcoffset() is None:
        raise ValueError(f"must carry a UTC offset (e.g. 'Z' or '+00:00'); got {value!r}")
    return moment.astimezone(UTC)


def _positive(value: float) -> float:
    if value <= 0:
        raise ValueError(f"must be greater than 0; got {value!r}")
    return value


def _non_negative(value: float) -> float:
    if value < 0:
        raise ValueError(f"must be 0 or more; got {value!r}")
    return value


Id = Annotated[str, BeforeValidator(_check_id)]
Time = Annotated[datetime, BeforeValidator(_aware_time), PlainSerializer(utc_text)]
OutTime = Annotated[AwareDatetime, PlainSerializer(utc_text)]
Shares = Annotated[int, BeforeValidator(_whole_shares), AfterValidator(_positive)]
NonNegativeShares = Annotated[int, BeforeValidator(_whole_shares), AfterValidator(_non_negative)]
Price = Annotated[float, BeforeValidator(_finite_number), AfterValidator(_positive)]
NonNegative = Annotated[float, BeforeValidator(_finite_number), AfterValidator(_non_negative)]


def _participation(value: float) -> float:
    if not 0 < value <= 1:
        raise ValueError(f"must be a fraction in (0, 1], e.g. 0.1 for 10 %; got {value!r}")
    return value


Participation = Annotated[float, BeforeValidator(_finite_number), AfterValidator(_participation)]


class _Inbound(BaseModel):
    # Tolerant reading: fields the contract does not name are kept aside (``model_extra``).
    model_config = ConfigDict(frozen=True, extra="allow")

    version: str | None = None  # the contract version the sender follows (informative)
    #: Optional sequence stamp (contract v1.1): the sending process's name and its message
    #: counter (1, 2, 3, ... across every topic it publishes on). A gap in a source's ``seq``
    #: means messages between them were lost on the way (a broker dropping a queue): the intake
    #: raises a critical ``source_gap`` alert naming the source and the missing numbers.
    source: Id | None = None
    seq: Annotated[int, Field(strict=True, ge=1, le=MAX_MAGNITUDE)] | None = None

    @model_validator(mode="after")
    def _stamped_whole(self) -> Self:
        if (self.source is None) != (self.seq is None):
            missing = "seq" if self.seq is None else "source"
            raise ValueError(
                f"{missing}: 'source' and 'seq' come together (the sender's name and its "
                "message counter); send both or neither"
            )
        return self


class _Outbound(BaseModel):
    model_config = ConfigDict(frozen=True, extra="forbid")

    version: Literal["1.1"] = CONTRACT_VERSION  # type: ignore[assignment]


# --------------------------------------------------------------------------------------------
# Inbound
# --------------------------------------------------------------------------------------------

_NEW_FIELDS = ("symbol", "side", "quantity", "start", "end")
_AMENDABLE = AMENDABLE_FIELDS


class OrderPayload(_Inbound):
    """A parent order: ``new`` creates it, ``amend`` changes it, ``cancel`` stops it.

    ``new`` needs symbol, side, quantity, start and end. ``amend`` carries only what changes
    (quantity, end, limit_price, max_participation, urgency, preferences); ``"limit_price": null``
    in an amend removes the limit. ``cancel`` needs only the order id and is honoured whatever
    else it carries: echoed order fields are ignored (a symbol or side that contradicts the order
    still cancels it, with a critical alert). Symbol, side and start, when an amend carries them,
    must match the order.
    """

    type: Literal["order"] = "order"
    action: Literal["new", "amend", "cancel"]
    order_id: Id
    symbol: Id | None = None
    side: Side | None = None
    quantity: Shares | None = None
    start: Time | None = None
    end: Time | None = None
    limit_price: Price | None = None
    max_participation: Participation | None = None
    urgency: Literal["low", "medium", "high"] | None = None
    preferences: dict[str, float | str | bool] | None = None
    arrival_price: Price | None = None
    ts: Time

    @model_validator(mode="after")
    def _action_fields(self) -> OrderPayload:
        if self.action == "new":
            missing = [name for name in _NEW_FIELDS if getattr(self, name) is None]
            if missing:
                raise ValueError(
                    f"a new order needs {', '.join(_NEW_FIELDS)}; missing: {', '.join(missing)}"
                )
        if self.action == "amend":
            changes = [name for name in _AMENDABLE if name in self.model_fields_set]
            if not changes:
                raise ValueError(f"an amend must change at least one of {', '.join(_AMENDABLE)}")
        if (
            self.action != "cancel"  # a cancel's echoed times are not checked: it always wins
            and self.start is not None
            and self.end is not None
            and self.end <= self.start
        ):
            raise ValueError(f"end must be after start; got start {self.start}, end {self.end}")
        return self


class FillPayload(_Inbound):
    """An execution against a parent order (shares are positive; the order has the side)."""

    type: Literal["fill"] = "fill"
    fill_id: Id
    order_id: Id
    quantity: Shares
    price: Price
    side: Side | None = None
    ts: Time


class FillCorrectionPayload(_Inbound):
    """A bust or a correction of an earlier fill, on the fills topic of its order.

    ``{"type": "fill_correction", "action": "bust", "fill_id", "order_id", "ts"}`` says the fill
    ``fill_id`` did not happen; ``{"type": "fill_correction", "action": "correct", "fill_id",
    "order_id", "quantity"?, "price"?, "ts"}`` says it happened with this quantity and/or price
    (at least one). ``reason`` is free text for the desk. The fill keeps its id; its shares stay
    positive.
    """

    type: Literal["fill_correction"] = "fill_correction"
    action: Literal["bust", "correct"]
    fill_id: Id
    order_id: Id
    quantity: Shares | None = None
    price: Price | None = None
    reason: str | None = None
    ts: Time

    @model_validator(mode="after")
    def _needs_values(self) -> FillCorrectionPayload:
        if self.action == "correct" and self.quantity is None and self.price is None:
            raise ValueError("a correction needs the new quantity, the new price or both")
        return self


class BinPayload(_Inbound):
    """One closed market bin of a symbol: volume, prices and the average quoted spread.

    ``spread`` is in currency per share (like the prices). ``vwap`` may be null only when the
    bin had no volume.
    """

    type: Literal["bin"] = "bin"
    symbol: Id
    start: Time
    end: Time
    volume: NonNegativeShares
    vwap: Price | None = None
    open: Price
    high: Price
    low: Price
    close: Price
    spread: NonNegative
    ts: Time

    @model_validator(mode="after")
    def _consistent(self) -> BinPayload:
        if self.end <= self.start:
            raise ValueError(f"end must be after start; got start {self.start}, end {self.end}")
        if self.high < self.low:
            raise ValueError(f"high ({self.high}) must be at least low ({self.low})")
        for name in ("open", "close"):
            value = getattr(self, name)
            if not self.low <= value <= self.high:
                raise ValueError(
                    f"{name} ({value}) must lie between low ({self.low}) and high ({self.high})"
                )
        if self.vwap is None and self.volume > 0:
            raise ValueError("vwap is required when volume > 0")
        return self


class ControlPayload(_Inbound):
    """Halt or resume one order (``order_id``) or every order (no ``order_id``)."""

    type: Literal["control"] = "control"
    command: Literal["halt", "resume"]
    order_id: Id | None = None
    ts: Time


class HeartbeatPayload(_Inbound):
    """A source's sign of life (contract v1.1): it takes the next number of the source's ``seq``
    like any stamped message and changes nothing else. Sent every few seconds while the source
    has nothing else to say, it shows the loss of the *last* messages a source sent, which no
    later message would reveal (a broker dropping its queue while the daemon was down): the
    heartbeat's ``seq`` jumps past them and the ``source_gap`` alert names them. Numbering every
    message, heartbeats included, is what session protocols with sequence numbers do (common
    practice)."""

    type: Literal["heartbeat"] = "heartbeat"
    source: Id  # required here, optional on other messages
    seq: Annotated[int, Field(strict=True, ge=1, le=MAX_MAGNITUDE)]
    ts: Time | None = None


@dataclass(frozen=True, slots=True)
class Heartbeat:
    """A decoded heartbeat. It is the intake's (it follows sources' ``seq``), never the
    engine's: the core has no use for it."""

    source: str
    seq: int
    ts: datetime | None


class TickPayload(_Inbound):
    """The passage of time, injected by the shells (live timer, replay); carries only ``ts``."""

    type: Literal["tick"] = "tick"
    ts: Time


# --------------------------------------------------------------------------------------------
# Outbound
# --------------------------------------------------------------------------------------------


class NextBin(BaseModel):
    """One bin of the plan after the target's bin: its times and its planned shares."""

    model_config = ConfigDict(frozen=True, extra="forbid")

    bin_start: OutTime
    bin_end: OutTime
    quantity: int


class TargetPayload(_Outbound):
    """What to trade in the next bin for one order.

    ``quantity`` is the shares for the bin ``[bin_start, bin_end)``; ``cumulative_target`` the
    shares the order should have filled by ``bin_end``; ``remaining`` the shares still to fill;
    ``max_quantity`` the participation cap for the bin (null when uncapped).

    ``state`` is the order's lifecycle state and ``reason`` why ``quantity`` is what it is:
    ``on_plan``, ``catching_up`` (behind the baseline), ``capped`` (the participation cap binds),
    ``limit_blocked``, ``pending``, ``halted``, ``cancelled``, ``done``, ``expired``. A target in
    a final state (done, cancelled, expired) is the order's last, with ``quantity`` 0.
    ``next_bins`` holds the plan's next few bins after this one, so a router can pace across
    bins. Retained per order; cleared (empty retained payload) once the order has ended.

    ``participation`` is the rate of the bin's real volume that ``quantity`` stands for
    (``quantity`` / the bin's forecast volume) and ``max_participation`` the cap as a rate (null
    when uncapped): a router that sees the market trade more or less than forecast works
    ``participation`` x the real volume and executes never more than ``max_participation`` x the
    real volume nor ``remaining``. Within the cap, ``quantity`` is ``participation`` x the
    forecast volume.
    When the order's fills have run below its targets (the engine learns its fill ratio ``r``),
    ``quantity`` asks for the planned fills over ``r``, never more than ``max_quantity``; and
    ``participation`` may then exceed ``max_participation`` -- up to ``max_participation / r``,
    or ``/ r**2`` when the target is the cap, never above 1 -- so that a router that fills part of
    what it works still reaches the cap. The cap on what is *executed* stays
    ``max_participation`` x the real volume.
    """

    type: Literal["target"] = "target"
    order_id: str
    symbol: str
    side: Side
    bin_start: OutTime | None
    bin_end: OutTime | None
    quantity: int
    cumulative_target: int
    remaining: int
    max_quantity: int | None
    participation: float | None = None
    max_participation: float | None = None
    plan_version: int
    state: str = "working"
    reason: str = "on_plan"
    next_bins: list[NextBin] = Field(default_factory=list)
    ts: OutTime


class AlertPayload(_Outbound):
    """A condition the desk should know about; raised once and cleared once (hysteresis).

    ``state`` is ``"raised"`` or ``"cleared"`` (one-shot events such as a fill anomaly are
    ``"raised"`` only). ``order_id`` is null for alerts about a symbol as a whole.
    """

    type: Literal["alert"] = "alert"
    order_id: str | None
    symbol: str | None = None
    code: str
    severity: Severity
    state: Literal["raised", "cleared"] = "raised"
    message: str
    details: dict[str, Any] = Field(default_factory=dict)
    ts: OutTime


class StatusPayload(_Outbound):
    """Where an order stands (retained per order on the wire).

    Attributes:
        state: pending, working, halted, done, cancelled or expired.
        filled, remaining: Shares filled, and shares still to fill (never negative).
        progress_pct: Filled as % of the order (capped at 100).
        planned_filled: Shares the baseline plan (made at the start or the latest amendment)
            expected filled by the end of the last closed bin.
        deviation_shares: ``planned_filled - filled``: positive = behind plan, negative = ahead.
        deviation_pct: The same as % of the order quantity.
        deviation_bins: The same in bins of the baseline's average planned trading per bin
            (null before the order has a plan).
        volume_scale: Today's volume multiplier on the symbol's profile (1 = a normal day).
        expected_cost, expected_cost_bps: Expected cost to go of the current plan (half spread,
            fees, temporary impact and the order's own permanent impact; not the risk term), in
            currency and in basis points of the value of the remaining shares at the plan's
            price; null when the order is not live.
        cost_sd, cost_sd_bps: Standard deviation of the plan's cost to go (the timing risk of
            the market's own moves), in the same units; null when the order is not live.
        risk_penalty: The plan's risk penalty (the objective's inventory-risk and completion
            terms, currency): what the schedule's urgency trades cost against, not a cost.
        plan_version: Version of the latest plan (1 = the plan made at the start).
    """

    type: Literal["status"] = "status"
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
    cap_source: Literal["order", "default"] | None = None
    cost_sd: float | None = None
    cost_sd_bps: float | None = None
    risk_penalty: float | None = None
    ts: OutTime


class ErrorPayload(_Outbound):
    """One rejected inbound message, with a reason a person can act on.

    ``severity`` ``"error"``: the message was not applied. ``"info"``: it was applied, and this
    is a remark about it (an unknown field, reported once per name and topic kind; a line whose
    time went backwards in a recording).
    """

    type: Literal["error"] = "error"
    reason: str
    topic: str
    payload: str
    ts: OutTime | None
    line: int | None = None
    order_id: str | None = None
    severity: Literal["info", "error"] = "error"


class AckPayload(_Outbound):
    """The one reply to an order message: ``result`` accepted or rejected, ``reason`` why.

    Matched by ``order_id``, ``action`` and ``message_ts`` (the order message's own ``ts``);
    ``action`` and ``message_ts`` are null when the message could not be read that far.
    """

    type: Literal["ack"] = "ack"
    order_id: str
    action: str | None
    result: Literal["accepted", "rejected"]
    reason: str | None = None
    message_ts: OutTime | None = None
    ts: OutTime | None


_PAYLOADS: dict[str, type[_Inbound]] = {
    "order": OrderPayload,
    "fill": FillPayload,
    "fill_correction": FillCorrectionPayload,
    "bin": BinPayload,
    "control": ControlPayload,
    "heartbeat": HeartbeatPayload,
    "tick": TickPayload,
}

_OUTPUT_PAYLOADS: dict[str, type[_Outbound]] = {
    "target": TargetPayload,
    "alert": AlertPayload,
    "status": StatusPayload,
    "error": ErrorPayload,
    "ack": AckPayload,
}

# Topic kind -> (message types, payload field that must equal the topic's last level).
_TOPIC_KINDS: dict[str, tuple[tuple[str, ...], str | None]] = {
    "orders": (("order",), "order_id"),
    "fills": (("fill", "fill_correction"), "order_id"),
    "bins": (("bin",), "symbol"),
    "control": (("control", "heartbeat"), None),
    "tick": (("tick",), None),
}


def _topic_of_type(message_type: str, root: str) -> str:
    """Where messages of ``message_type`` are published, as a pattern for an error reason."""
    topics = Topics(root)
    return {
        "order": topics.orders("{order_id}"),
        "fill": topics.fills("{order_id}"),
        "fill_correction": topics.fills("{order_id}"),
        "bin": topics.bins("{symbol}"),
        "control": topics.control,
        "heartbeat": topics.control,
        "tick": topics.tick,
    }[message_type]


# --------------------------------------------------------------------------------------------
# Decode / encode
# --------------------------------------------------------------------------------------------


def _reject_constant(name: str) -> Any:
    raise ValueError(f"{name} is not valid JSON; send a finite number")


class _DuplicateKey(ValueError):
    pass


def _unique_keys(pairs: list[tuple[str, Any]]) -> dict[str, Any]:
    """A JSON object, refusing a key given twice (which value would count is anybody's guess)."""
    data = dict(pairs)
    if len(data) == len(pairs):  # no key twice (the common case, without a loop in Python)
        return data
    data = {}
    for key, value in pairs:
        if key in data:
            raise _DuplicateKey(key)
        data[key] = value
    return data


#: The decoder of every inbound payload (made once: ``json.loads`` with these keyword arguments
#: would make a new one for every message).
_DECODER = json.JSONDecoder(parse_constant=_reject_constant, object_pairs_hook=_unique_keys)


#: How the daemon journals a payload it did not read because it was over its size limit (see
#: :meth:`tracker.shell.daemon.Daemon`): the note is refused with itself as the reason.
OVERSIZE_NOTE = "payload of {size} bytes is over the limit of {limit} bytes and was not read"


def oversize_note(size: int, limit: int, head: str) -> bytes:
    """The journal's stand-in for a payload over the size limit (never valid JSON)."""
    return (
        OVERSIZE_NOTE.format(size=size, limit=limit)
        + f"; send smaller messages (it began: {head!r})"
    ).encode("utf-8")


def _parse(topic: str, payload: bytes | str | Mapping[str, Any]) -> dict[str, Any]:
    if isinstance(payload, Mapping):
        return dict(payload)
    if isinstance(payload, bytes):
        try:
            text = payload.decode("utf-8")
        except UnicodeDecodeError as exc:
            raise WireError(
                f"payload is not UTF-8 text (byte {exc.start}); send a JSON object in UTF-8",
                topic=topic,
            ) from None
    else:
        text = payload
    if text.startswith("payload of ") and " is over the limit of " in text[:120]:
        raise WireError(f"too large: {text[:300]}", topic=topic)
    try:
        if text.startswith("\ufeff"):  # as json.loads says it
            raise json.JSONDecodeError("Unexpected UTF-8 BOM (decode using utf-8-sig)", text, 0)
        data = _DECODER.decode(text)
    except _DuplicateKey as exc:
        raise WireError(
            f"{exc}: the key appears twice in the payload; send each field once", topic=topic
        ) from None
    except ValueError as exc:
        raise WireError(
            f"payload is not valid JSON ({exc}); send one JSON object", topic=topic
        ) from None
    except RecursionError:
        raise WireError(
            "payload is nested too deeply; send one flat JSON object", topic=topic
        ) from None
    if not isinstance(data, dict):
        raise WireError(
            f"payload must be a JSON object, got a JSON {type(data).__name__}", topic=topic
        )
    return data


@functools.lru_cache(maxsize=16)
def _topics(root: str) -> Topics:
    """The topics of a root (made once per root: decode runs for every message)."""
    return Topics(root)


def _split_topic(topic: str, root: str) -> tuple[str, str | None]:
    """Return (kind, last level or None) of an inbound topic, or raise WireError."""
    split = _topics(root).split_inbound(topic)
    if split is not None:
        return split
    allowed = ", ".join(_topic_of_type(kind, root) for kind in ("order", "fill", "bin", "control"))
    allowed += f" or {_topic_of_type('tick', root)}"
    if not topic.startswith(f"{root}/"):
        raise WireError(f"topic {topic!r} is outside the root {root!r}; use {allowed}", topic=topic)
    raise WireError(f"topic {topic!r} is not an inbound topic; use {allowed}", topic=topic)


def _describe(exc: ValidationError) -> tuple[str, str | None]:
    """A one-sentence reason (and the first field) from a pydantic error."""
    parts: list[str] = []
    first: str | None = None
    for error in exc.errors(include_url=False):
        loc = ".".join(str(item) for item in error["loc"] if not isinstance(item, int))
        message = str(error["msg"])
        message = message.removeprefix("Value error, ")
        kind = error["type"]
        if kind == "missing":
            message = "is required"
        elif kind == "extra_forbidden":
            message = f"is not a field of this message (wire contract v{CONTRACT_VERSION})"
        elif kind == "literal_error":
            message = message.replace("Input should be", "must be")
        if loc and first is None:
            first = loc
        parts.append(f"{loc}: {message}" if loc else message)
    return "; ".join(parts), first


def decode(
    topic: str, payload: bytes | str | Mapping[str, Any], *, root: str = DEFAULT_ROOT
) -> Inbound | Heartbeat:
    """Validate one inbound message.

    Args:
        topic: The MQTT topic it arrived on.
        payload: Raw bytes or text of a JSON object, or an already parsed object.
        root: The topic root.

    Returns:
        The core event (:mod:`tracker.core.messages`) the payload stands for, or a
        :class:`Heartbeat` (which only the intake reads).

    Raises:
        WireError: the topic, the JSON or a field is wrong; ``reason`` says what to fix.
    """
    return decode_reading(topic, payload, root=root)[0]


def decode_reading(
    topic: str, payload: bytes | str | Mapping[str, Any], *, root: str = DEFAULT_ROOT
) -> tuple[Inbound | Heartbeat, tuple[str, ...], tuple[str, int] | None]:
    """Validate one inbound message and say which fields it carried beyond the contract.

    Args:
        topic: The MQTT topic it arrived on.
        payload: Raw bytes or text of a JSON object, or an already parsed object.
        root: The topic root.

    Returns:
        The core event (or a :class:`Heartbeat`), the names of the fields the contract does not
        name (sorted; a fill keeps their values in ``extra``), and its ``(source, seq)`` stamp
        when it has one.

    Raises:
        WireError: the topic, the JSON or a required field is wrong; ``reason`` names the field.
    """
    kind, last = _split_topic(topic, root)
    data = _parse(topic, payload)
    order_id = data.get("order_id") if isinstance(data.get("order_id"), str) else None
    message_type = data.get("type")
    if message_type is None:
        raise WireError(
            f"type: is required; one of {', '.join(sorted(_PAYLOADS))}",
            topic=topic,
            field="type",
            order_id=order_id,
        )
    if not isinstance(message_type, str) or message_type not in _PAYLOADS:
        raise WireError(
            f"type: unknown message type {message_type!r}; one of {', '.join(sorted(_PAYLOADS))}",
            topic=topic,
            field="type",
            order_id=order_id,
        )
    expected_types, id_field = _TOPIC_KINDS[kind]
    if message_type not in expected_types:
        expected_type = " or ".join(expected_types)
        where = _topic_of_type(message_type, root)
        raise WireError(
            f"a {message_type} message arrived on topic {topic!r}, which takes {expected_type} "
            f"messages; publish {message_type} messages to {where}",
            topic=topic,
            field="type",
            order_id=order_id,
        )
    if message_type == "fill":
        fast = _common_fill(data)
        if fast is not None:
            fill, stamp = fast
            if fill.order_id != last:
                raise _mismatch("order_id", fill.order_id, last, topic, order_id)
            return fill, (), stamp
    try:
        valid = _PAYLOADS[message_type].model_validate(data)
    except ValidationError as exc:
        reason, field = _describe(exc)
        raise WireError(reason, topic=topic, field=field, order_id=order_id) from None
    if id_field is not None and getattr(valid, id_field) != last:
        raise _mismatch(id_field, getattr(valid, id_field), last, topic, order_id)
    extra = valid.model_extra or {}
    stamp = None if valid.source is None or valid.seq is None else (valid.source, valid.seq)
    return _event(valid, extra), tuple(sorted(extra)), stamp


def _mismatch(
    id_field: str, value: str, last: str | None, topic: str, order_id: str | None
) -> WireError:
    return WireError(
        f"{id_field}: payload says {value!r} but the topic says {last!r}; they must match",
        topic=topic,
        field=id_field,
        order_id=order_id,
    )


#: The fields :func:`_common_fill` checks: those of :class:`FillPayload`, named here so that a
#: field added to the model is not let through unchecked (a test holds the two together).
_FILL_FIELDS = frozenset(
    ("type", "fill_id", "order_id", "quantity", "price", "side", "ts", "version", "source", "seq")
)


def _common_fill(data: dict[str, Any]) -> tuple[FillMessage, tuple[str, int] | None] | None:
    """A fill of the common shape, checked as :class:`FillPayload` checks it, without pydantic.

    Nearly every message of a day is a fill: ids that match the rule, a whole number of shares
    and a price as JSON numbers in range, a time with an offset, the optional fields (side,
    version, the sequence stamp) valid or null, and no field beyond the contract. Such a fill
    becomes its message here, the same one :func:`_event` makes of the validated model. Anything
    else -- an invalid or unusual value, an unknown field -- returns ``None`` and takes the
    general path, which accepts or refuses it and words the reason (``tests/test_fast_paths.py``
    holds the two paths to the same messages and the same verdicts).
    """
    if not _FILL_FIELDS.issuperset(data):
        return None
    fill_id, order_id = data.get("fill_id"), data.get("order_id")
    quantity, price = data.get("quantity"), data.get("price")
    ts, side = data.get("ts"), data.get("side")
    version, source, seq = data.get("version"), data.get("source"), data.get("seq")
    if not (
        type(fill_id) is str
        and type(order_id) is str
        and type(quantity) is int
        and 0 < quantity <= MAX_MAGNITUDE
        and (type(price) is float or type(price) is int)
        and 0 < price <= MAX_MAGNITUDE  # NaN fails it (and JSON has none: _parse refuses it)
        and type(ts) is str
        and (side is None or side == "buy" or side == "sell")
        and (version is None or type(version) is str)
        and _ID_PATTERN.fullmatch(fill_id)
        and _ID_PATTERN.fullmatch(order_id)
    ):
        return None
    stamp = None
    if source is not None or seq is not None:
        if not (
            type(source) is str
            and _ID_PATTERN.fullmatch(source)
            and type(seq) is int
            and 1 <= seq <= MAX_MAGNITUDE
        ):
            return None
        stamp = (source, seq)
    try:
        moment = datetime.fromisoformat(ts)
    except ValueError:
        return None
    if moment.tzinfo is None or moment.utcoffset() is None:
        return None
    fill = FillMessage(
        fill_id=fill_id,
        order_id=order_id,
        quantity=quantity,
        price=float(price),
        side=side,
        ts=moment.astimezone(UTC),
        extra={},
    )
    return fill, stamp


def _values(model: BaseModel) -> dict[str, Any]:
    """A validated model's field values, without ``type`` (the core message's class says it)
    and ``version`` (the contract's, not the message's)."""
    values = dict(model.__dict__)
    del values["type"]
    values.pop("version", None)
    values.pop("source", None)
    values.pop("seq", None)
    return values


def _event(valid: _Inbound, extra: Mapping[str, Any]) -> Inbound | Heartbeat:
    """The core event of a validated inbound payload (``extra``: its fields beyond the contract)."""
    if type(valid) is FillPayload:  # nearly every message of a day: the short way first
        return FillMessage(
            fill_id=valid.fill_id,
            order_id=valid.order_id,
            quantity=valid.quantity,
            price=valid.price,
            side=valid.side,
            ts=valid.ts,
            extra=dict(extra),
        )
    if isinstance(valid, OrderPayload):
        return OrderMessage(
            **_values(valid),
            fields_set=frozenset(valid.model_fields_set - {"type", "version", "source", "seq"}),
        )
    if isinstance(valid, FillCorrectionPayload):
        return FillCorrectionMessage(**_values(valid))
    if isinstance(valid, BinPayload):
        return BinMessage(**_values(valid))
    if isinstance(valid, ControlPayload):
        return ControlMessage(**_values(valid))
    if isinstance(valid, HeartbeatPayload):
        return Heartbeat(source=valid.source, seq=valid.seq, ts=valid.ts)
    return Tick(**_values(valid))


def topic_of(message: Outbound, root: str = DEFAULT_ROOT) -> str:
    """The topic an outbound message is published on."""
    topics = _topics(root)
    if isinstance(message, TargetMessage):
        return topics.targets(message.order_id)
    if isinstance(message, StatusMessage):
        return topics.status(message.order_id)
    if isinstance(message, AlertMessage):
        if message.order_id is not None:
            return topics.alerts(message.order_id)
        return topics.symbol_alerts(message.symbol)
    if isinstance(message, AckMessage):
        return topics.acks(message.order_id)
    return topics.errors


def to_json_object(message: Message) -> dict[str, Any]:
    """The JSON object of a message, floats rounded, nested mapping keys sorted.

    The top level keeps the declared field order (readable: ``type`` first); see
    :func:`tracker.core.messages.json_object`.
    """
    return json_object(message)


def encode(message: Message) -> bytes:
    """Deterministic compact JSON bytes of a message (UTF-8, no NaN)."""
    return json_text(message).encode("utf-8")


def decode_output(payload: bytes | str) -> Outbound:
    """Read an outbound message back from its JSON bytes (as a consumer of the wire would).

    Args:
        payload: What :func:`encode` wrote for a target, status, alert or error.

    Returns:
        The core message, validated against the contract's outbound model first.

    Raises:
        WireError: not JSON, not an object, an unknown ``type``, or a field the contract does not
            allow.
    """
    data = _parse("(outbound)", payload)
    kind = data.get("type")
    model = _OUTPUT_PAYLOADS.get(kind) if isinstance(kind, str) else None
    if model is None:
        raise WireError(
            f"type: {kind!r} is not an outbound message type; one of "
            f"{', '.join(sorted(_OUTPUT_PAYLOADS))}",
            topic="(outbound)",
            field="type",
        )
    try:
        valid = model.model_validate(data)
    except ValidationError as exc:
        reason, field = _describe(exc)
        raise WireError(reason, topic="(outbound)", field=field) from None
    outbound: dict[str, type[Outbound]] = {
        "ack": AckMessage,
        "target": TargetMessage,
        "alert": AlertMessage,
        "status": StatusMessage,
        "error": ErrorMessage,
    }
    values = _values(valid)
    if kind == "target":
        bins = valid.next_bins  # type: ignore[attr-defined]
        values["next_bins"] = tuple(item.model_dump(mode="json") for item in bins)
    return outbound[kind](**values)  # type: ignore[index]


__all__ = [
    "DEFAULT_ROOT",
    "FLOAT_DECIMALS",
    "MAX_ERROR_PAYLOAD",
    "MAX_MAGNITUDE",
    "WIRE_VERSION",
    "AckMessage",
    "AckPayload",
    "AlertMessage",
    "AlertPayload",
    "BinMessage",
    "BinPayload",
    "ControlMessage",
    "ControlPayload",
    "ErrorMessage",
    "ErrorPayload",
    "FillCorrectionMessage",
    "FillCorrectionPayload",
    "FillMessage",
    "FillPayload",
    "Heartbeat",
    "HeartbeatPayload",
    "Inbound",
    "OrderMessage",
    "OrderPayload",
    "Outbound",
    "Severity",
    "Side",
    "StatusMessage",
    "StatusPayload",
    "TargetMessage",
    "TargetPayload",
    "Tick",
    "TickPayload",
    "WireError",
    "decode",
    "decode_output",
    "decode_reading",
    "encode",
    "payload_text",
    "to_json_object",
    "topic_of",
]

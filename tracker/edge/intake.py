"""Intake: every inbound record, live or recorded, admitted to the engine the same way.

Theory of operation
-------------------
A recording is a sequence of :class:`~tracker.edge.records.Record` -- the lines of a JSON Lines file
(``{"topic": ..., "payload": ..., "ts": ...}`` per line) or the rows of the daemon's SQLite journal.
:class:`Intake` feeds them, one at a time, through the same edge the live shell uses and hands
each accepted message to :meth:`Engine.handle`. Every line (blank lines aside: they are skipped)
ends in exactly one of three ways:

* **accepted** -- it decoded, it is in time order, and the engine took it; its outputs are kept.
* **redelivered** -- it is a copy (same topic, same decoded message; for a fill, the same id,
  shares, price and side whatever its ``ts``) of a line accepted earlier, as an MQTT broker
  re-sends a QoS 1 message whose acknowledgement was lost, or a gateway a fill. It changes
  nothing and is not an error; it is counted in the summary. (Ticks are exempt: the shell makes
  them, and a repeated tick is simply handed to the engine, where it changes nothing.)
* **rejected** -- exactly one :class:`~tracker.core.messages.ErrorMessage` with ``line`` set to
  the input's 1-based line number and a reason a person can act on. The checks, in order:

  1. line level (ours): not UTF-8, not JSON, not an object, no ``topic``, no ``payload``, a ``ts``
     that is not ISO 8601 with an offset;
  2. message level: :func:`tracker.edge.wire.decode` (bad JSON in a raw payload, missing field,
     wrong type, negative or NaN quantity, unknown type, wrong topic for the payload);
  3. time: the message's own ``ts`` against the line's receive time (see "Time" below);
  4. the engine's own verdict (a bin off the session's grid, ...): every ErrorMessage the engine
     returns while handling a line gets that line's number.

  A refused *order* message also gets its one :class:`~tracker.core.messages.AckMessage`
  (rejected, with the reason) when its topic names the order.

Alerts the intake raises itself: ``clock_skew`` (see "Time") and ``source_gap``: a message may
carry a sequence stamp (``source``, ``seq``); a jump in a source's ``seq`` is a loss on the way,
raised once with the missing numbers (:meth:`Intake.gaps` lists what is still missing) and
cleared when late messages fill it. The stamp is followed before the redelivery check, so a copy
re-sent under a new ``seq`` is no gap. A heartbeat (:class:`~tracker.edge.wire.Heartbeat`, on the
control topic) takes its source's next number and is accepted without reaching the engine: it is
what reveals the loss of a source's last messages, which no later message would.

``source_silent`` (warning): a source that sends heartbeats has promised to speak every so often,
so its silence is news too (a router that stopped, or a broker dropping its messages while the
daemon stays connected). A source's interval is how long it had been quiet when its latest
heartbeat came (a source sends one when it has had nothing else to say for a while); once it has
sent nothing new for :data:`SILENT_INTERVALS` intervals (and at least :data:`SILENT_MIN_SECONDS`)
of receive time, the alert is raised, judged at most once a second as lines (the daemon's ticks
among them) arrive; it is cleared by the source's next new number. A source that never sent a
heartbeat is never judged: silence is normal for it. :meth:`Intake.silent` lists the silent ones.

Remarks (``info`` error records; the line is accepted all the same):

* a field the contract does not name (tolerant reading: the message is applied; a fill keeps the
  field): reported once per field name and topic kind, not per message;
* time going backwards: a line whose recorded ``ts`` is earlier than that of a line before it (a
  recording merged from two capture points) is applied with its time clamped to the latest seen,
  and a remark says so. Nothing is dropped for it (sort the recording first with ``tracker
  replay --sort`` to apply it in time order instead). A line recorded without ``ts`` is left to
  the engine's own per-stream rules (bins per symbol, order messages per order; a late fill is
  legitimate).

  The line's *time*, for derived ticks, is its recorded ``ts`` (when the shell received it), else
  the message's own ``ts``; time never moves backwards.

Time: the receive time is the clock
-----------------------------------
A line's recorded ``ts`` is when the shell received it (the daemon stamps it from its own clock
before journaling). With the engine's ``event_time = "receive"`` (the default,
:class:`~tracker.core.engine.EngineConfig`), that receive time is the engine's clock: the message
is handed over with its ``ts`` set to it, so no message's own stamp can move the clock, expire an
order or date a day. The message's own ``ts`` is data, judged against the receive time first:

* it (and a bin's ``end``) may be at most ``ts_ahead_seconds`` after the receive time (5 s: clocks
  of two machines differ a little), and at most ``ts_behind_seconds`` before it (900 s; for fills
  and fill corrections ``fill_ts_behind_seconds``, 3,600 s);
* outside that, an order, amend, resume or bin is **refused** (the reason names the stamp, the
  receive time and the setting), while a fill or fill correction (its shares count), a cancel and
  a halt (safety actions always win) are **applied at the receive time** with a ``clock_skew``
  warning alert -- once per order and kind; the summary counts every one (``clock_skew``).

A line recorded without ``ts`` (a hand-made file) has no receive time: its message's own ``ts``
is used, as with ``event_time = "message"``, which turns all of this off (for driving a daemon
with a recorded day faster than its clock, as some tests do). The settings are journaled with the
engine's, so a replay of a journal judges every line as the daemon did.

Redelivery: why here
--------------------
The memory of accepted messages (to tell a redelivery from a new message) is kept here, at the
edge, and only here. Redelivery is a property of the transport (MQTT's QoS 1 delivers at least
once), judged on what arrived: the topic and the decoded message. The core judges messages by
what they mean instead -- a fill id counts once, a closed bin cannot change, an order id is
created once -- and every shell (the daemon, ``tracker replay``, the simulated day) feeds the
engine through this class, so one memory serves them all.

Ticks (the rule)
----------------
The live daemon injects a :class:`~tracker.core.messages.Tick` every ``tick_seconds`` of its
clock so that the engine can judge stale market data and expired orders with no message arriving;
it journals those ticks like any message. So:

* if the recording holds at least one line on ``{root}/tick`` (a journal always does), its ticks are
  replayed as recorded and none are invented -- doubling them would change what the engine saw;
* if it holds none (a hand-made or simulated file), the intake derives them: before a line of
  time ``t``, it injects a tick at every whole multiple of ``tick_seconds`` since the Unix epoch
  that lies after the previous line's time and at or before ``t`` (a tick at exactly ``t`` comes
  before the line). No tick comes before the first line or after the last one. The engine then
  sees time move in the same steps as live, to within one tick interval.

Determinism: nothing here reads the clock or iterates over an unordered container, so the same input
gives the same outputs, and :func:`write_outputs` writes them byte for byte the same.
"""

from __future__ import annotations

import functools
import json
import math
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field, replace
from datetime import UTC, datetime, timedelta
from typing import Any, Protocol

from tracker.core.alerts import CLOCK_SKEW, SOURCE_GAP, SOURCE_SILENT
from tracker.core.alerts import event as rules_event
from tracker.core.formats import utc_text
from tracker.core.messages import (
    AckMessage,
    AlertMessage,
    BinMessage,
    ControlMessage,
    ErrorMessage,
    FillCorrectionMessage,
    FillMessage,
    Inbound,
    OrderMessage,
    Outbound,
    Tick,
    payload_text,
    wire_fields,
)
from tracker.core.topics import DEFAULT_ROOT, Topics
from tracker.edge.digest import ErrorDigest
from tracker.edge.recordings import BadLine, parse_ts, parse_ts_or_none
from tracker.edge.records import Record
from tracker.edge.wire import Heartbeat, WireError, decode_reading
from tracker.errors import InputError

#: Interval of derived ticks, in seconds (the live daemon's default tick interval).
DEFAULT_TICK_SECONDS = 1.0

_EPOCH = datetime(1970, 1, 1, tzinfo=UTC)


class EngineLike(Protocol):
    """What the intake needs from the engine (:class:`tracker.core.engine.Engine` has it)."""

    def handle(self, event: Inbound) -> list[Outbound]: ...

    def reject(
        self, topic: str, payload: bytes | str, reason: str, ts: datetime | None
    ) -> ErrorMessage: ...

    def summary(self) -> dict[str, Any]: ...


class Intake:
    """Feeds records to an engine one at a time, as the live shell would, and keeps count.

    Usable incrementally (the closed-loop simulation feeds it as it goes) or through
    :func:`replay`.

    Args:
        engine: The engine to feed.
        root: The MQTT topic root the recording was made under.
        derive_ticks: Inject ticks derived from the lines' times (see the module docstring). Turn
            off when the recording holds its own ticks.
        tick_seconds: Interval of derived ticks.
        check_time: Remark on a line whose recorded ``ts`` is earlier than an earlier line's (its
            time is clamped to the latest seen either way; keep it on wherever the live daemon
            keeps it on, so that replays say what live said).
    """

    def __init__(
        self,
        engine: EngineLike,
        *,
        root: str = DEFAULT_ROOT,
        derive_ticks: bool = True,
        tick_seconds: float = DEFAULT_TICK_SECONDS,
        check_time: bool = True,
        digest: ErrorDigest | None = None,
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
        self._last: datetime | None = None
        self._recorded: datetime | None = None
        self._next_tick: datetime | None = None  # the first derived tick after _last
        self._seen: set[Identity] = set()
        self._unknown: set[tuple[str, str]] = set()  # (topic kind, field) already remarked on
        self.lines = 0
        self.accepted = 0
        self.redelivered = 0
        self.rejected = 0
        self.ticks_derived = 0
        #: Thins out floods of error records (:mod:`tracker.edge.digest`); kept here so that
        #: every shell thins them alike and a snapshot of the intake holds its counts.
        self.digest = digest if digest is not None else ErrorDigest(root)
        self.gaps_opened = 0  # jumps in a source's seq (each raised a source_gap alert)
        self.heartbeats = 0  # heartbeat lines (accepted; they only move their source's seq)
        self.skewed = 0  # lines applied at their receive time with a clock_skew alert
        self._skew_told: set[tuple[str | None, str]] = set()  # (order id, kind) alerted on
        self._sequences: dict[str, Sequenced] = {}  # per source: its counter and its gaps
        self._rules_of: object = None  # the settings _rules_now was read from
        self._rules_now: TimeRules | None = None
        self._silence_due: datetime | None = None  # when sources' silence is judged next
        self._judged_at: datetime | None = None  # when sources' silence was last judged
        self._listening: datetime | None = None  # since when lines arrive without a long pause

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
                        rejected = rejected or out.severity == "error"
                        out = replace(out, line=line)
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
            if isinstance(staged, list):
                results[index].extend(staged)
                continue
            message, key, recorded, unknown, stamp = staged
            if stamp is not None:  # arrived, whatever becomes of it: a copy, refused or taken
                results[index].extend(
                    self._sequence(
                        stamp,
                        recorded or _message_time(message),
                        heartbeat=isinstance(message, Heartbeat),
                    )
                )
            if recorded is not None and (
                self._silence_due is None or recorded >= self._silence_due
            ):
                results[index].extend(self._silences(recorded))
            if isinstance(message, Heartbeat):  # its number was all it had to say
                self.accepted += 1
                self.heartbeats += 1
                continue
            if key is not None and key in pending_keys:
                flush()  # whether it is a redelivery depends on the first copy's fate
            if key is not None and key in self._seen:
                self.redelivered += 1
                continue
            assert isinstance(record, Record)  # a BadLine never gets past _stage
            judged = self._judge_time(record, message, recorded)
            if isinstance(judged, list):  # refused for its time
                results[index].extend(judged)
                continue
            message, skew = judged
            results[index].extend(skew)
            for name in unknown:
                kind = _split(self.root, record.topic)
                where = kind[0] if kind is not None else record.topic
                if (where, name) not in self._unknown:
                    results[index].append(self._remark_unknown(record, name, recorded))
            if recorded is not None and self._recorded is not None and recorded < self._recorded:
                if self.check_time:
                    results[index].append(
                        self._remark(
                            record,
                            f"time goes backwards: this line's ts {utc_text(recorded)} is "
                            f"earlier than {utc_text(self._recorded)} of a line before it; it was "
                            "applied at the latest time seen (nothing is dropped for it). Sort "
                            "the recording by 'ts' (tracker replay --sort) to apply it in time "
                            "order",
                            self._recorded,
                        )
                    )
                recorded = self._recorded  # clamped: time never moves back
            when = recorded if recorded is not None else _message_time(message)
            if recorded is not None:
                self._recorded = recorded
                if self._by_receipt(message):
                    message = _at_time(message, recorded)  # the clock is the receive time
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
        return [self.digest.admit(r, out) for r, out in zip(records, results, strict=True)]

    def close(self) -> list[Outbound]:
        """The error digest's summaries of what its open interval held back (at the end of a
        recording; the daemon closes it with a journaled tick instead)."""
        return self.digest.close()

    def _stage(
        self, record: Record | BadLine
    ) -> (
        list[Outbound]
        | tuple[
            Inbound | Heartbeat,
            Identity | None,
            datetime | None,
            tuple[str, ...],
            tuple[str, int] | None,
        ]
    ):
        """The line's own checks: its error (and ack), or the decoded message, its identity, its
        time, the fields it carried beyond the contract and its ``(source, seq)`` stamp."""
        if isinstance(record, BadLine):
            when = parse_ts_or_none(record.ts)
            return self._reject(record.line, record.topic, record.raw, record.reason, when)
        recorded: datetime | None = None
        if record.ts is not None:
            try:
                recorded = parse_ts(record.ts)
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
            message, unknown, stamp = decode_reading(record.topic, record.payload, root=self.root)
        except WireError as exc:
            return self._reject(
                record.line, record.topic, payload_text(record.payload), exc.reason, recorded
            )
        # Ticks are made by the shell, never redelivered by a broker; two equal ones are harmless
        # to the engine and are not remembered (a long-running daemon makes one a second).
        # A heartbeat is no event: a copy of one is an old number, which changes nothing.
        key = None if isinstance(message, Tick | Heartbeat) else _identity(record.topic, message)
        return message, key, recorded, unknown, stamp

    def _sequence(
        self, stamp: tuple[str, int], when: datetime | None, *, heartbeat: bool = False
    ) -> list[Outbound]:
        """Follow a source's counter: a jump opens a gap (a critical ``source_gap`` alert naming
        the missing numbers); a late message fills its place, and a gap filled whole is cleared.
        A new number is the source speaking (:meth:`_speaks`)."""
        source, seq = stamp
        ts = when or self._last or _EPOCH
        known = self._sequences.get(source)
        if known is None:
            if len(self._sequences) >= MAX_SOURCES:
                return []  # beyond the bound a source is not followed (the summary says so)
            self._sequences[source] = Sequenced(last=seq, heard=when)
            return []
        if seq == known.last + 1:
            known.last = seq
            return self._speaks(source, known, when, heartbeat)
        if seq > known.last + 1:
            first, last = known.last + 1, seq - 1
            known.last = seq
            known.open(first, last)
            self.gaps_opened += 1
            count = last - first + 1
            span = f"{first}" if first == last else f"{first} to {last}"
            return [
                *self._speaks(source, known, when, heartbeat),
                rules_event(
                    SOURCE_GAP,
                    f"Source {source!r} skipped seq {span} ({count:,} message"
                    f"{'s' if count > 1 else ''}): they never arrived, so fills, orders or bins "
                    "may be missing. Check the broker (a queue limit drops messages) and have the "
                    "source re-send them; they are applied when they come.",
                    order_id=None,
                    symbol=None,
                    ts=ts,
                    details={"source": source, "first_missing": first, "last_missing": last},
                ),
            ]
        if known.fill(seq) and not known.gaps:  # the last missing message came late
            return [
                _cleared(SOURCE_GAP, source, "every skipped message has now arrived", ts),
            ]
        return []

    def _speaks(
        self, source: str, known: Sequenced, when: datetime | None, heartbeat: bool
    ) -> list[Outbound]:
        """``source`` sent a new number at ``when``: a heartbeat sets its interval (how long it
        had been quiet); a silent source is heard again (the ``source_silent`` alert clears)."""
        if when is None:
            return []
        if heartbeat and known.heard is not None and when > known.heard:
            known.every = (when - known.heard).total_seconds()
        if known.heard is None or when > known.heard:
            known.heard = when
        if not known.silent:
            return []
        known.silent = False
        return [_cleared(SOURCE_SILENT, source, "it is sending again", when)]

    def _silences(self, now: datetime) -> list[Outbound]:
        """Raise ``source_silent`` for each source that sends heartbeats and has sent nothing new
        for :data:`SILENT_INTERVALS` of its intervals (at least :data:`SILENT_MIN_SECONDS`) by
        ``now``, a line's receive time (called for the first line a second or more after the
        previous judgement).

        Only time the intake was listening counts: after more than :data:`SILENT_MIN_SECONDS`
        without a line (the daemon was down, or idle with nothing working and so no ticks), every
        source's silence is counted from the line that ended the pause, so a restart does not
        call every source silent before the broker has handed over what it kept for the daemon.
        """
        previous = self._judged_at
        self._judged_at = now
        self._silence_due = now + SILENCE_CHECK
        if previous is not None and (now - previous).total_seconds() > SILENT_MIN_SECONDS:
            self._listening = now
        raised: list[Outbound] = []
        for source, known in self._sequences.items():  # insertion order: deterministic
            if known.every is None or known.heard is None or known.silent:
                continue
            limit = max(SILENT_INTERVALS * known.every, SILENT_MIN_SECONDS)
            since = known.heard
            if self._listening is not None and self._listening > since:
                since = self._listening
            quiet = (now - since).total_seconds()
            if quiet <= limit:
                continue
            known.silent = True
            raised.append(
                rules_event(
                    SOURCE_SILENT,
                    f"Source {source!r} has sent nothing for {quiet:,.0f} s (its heartbeats come "
                    f"about every {known.every:,.0f} s; silent after {limit:,.0f} s): it may have "
                    "stopped, or the broker may be dropping its messages, and fills it sent "
                    "meanwhile may be missing. Check the source and the broker; the alert clears "
                    "when it sends again.",
                    order_id=None,
                    symbol=None,
                    ts=now,
                    details={
                        "source": source,
                        "last_heard": utc_text(known.heard),
                        "quiet_seconds": round(quiet, 3),
                        "interval_seconds": round(known.every, 3),
                    },
                )
            )
        return raised

    def silent(self) -> list[str]:
        """The sources judged silent now (their ``source_silent`` alert stands)."""
        return sorted(source for source, known in self._sequences.items() if known.silent)

    def forget_ended(self) -> list[str]:
        """Drop the orders the engine has ended (:meth:`Engine.forget_ended
        <tracker.core.engine.Engine.forget_ended>`) and what the intake keeps for them: the
        identities of their messages and fills. Return their ids.

        The daemon calls it when a new day's journal begins, so the state it carries stays the
        size of what is still working. A copy of a forgotten order's fill that comes later is no
        longer known as one: it waits for its order like any fill and is then reported as
        unassigned (nothing is counted twice: its order is gone).
        """
        forget = getattr(self.engine, "forget_ended", None)
        ended: list[str] = forget() if forget is not None else []
        if not ended:
            return []
        gone = set(ended)
        order_of = Topics(self.root).order_id_of
        self._seen = {key for key in self._seen if order_of(str(key[0])) not in gone}
        self._skew_told = {told for told in self._skew_told if told[0] not in gone}
        return ended

    def gaps(self) -> dict[str, list[list[int]]]:
        """Per source, the ranges ``[first, last]`` of sequence numbers still missing."""
        return {
            source: [list(gap) for gap in known.gaps]
            for source, known in sorted(self._sequences.items())
            if known.gaps
        }

    def _rules(self) -> TimeRules | None:
        """The engine's time tolerances, or ``None`` when its clock is the messages' own ts
        (read from its settings, which a journal's later setup can change)."""
        config = getattr(self.engine, "config", None)
        if config is not self._rules_of:
            self._rules_of = config
            self._rules_now = None
            if config is not None and getattr(config, "event_time", "message") == "receive":
                self._rules_now = TimeRules(
                    ahead=timedelta(seconds=config.ts_ahead_seconds),
                    behind=timedelta(seconds=config.ts_behind_seconds),
                    fill_behind=timedelta(seconds=config.fill_ts_behind_seconds),
                )
        return self._rules_now

    def _by_receipt(self, message: Inbound) -> bool:
        """Whether the engine takes ``message`` at its receive time (not its own ts)."""
        return not isinstance(message, Tick) and self._rules() is not None

    def _judge_time(
        self, record: Record, message: Inbound, received: datetime | None
    ) -> list[Outbound] | tuple[Inbound, list[Outbound]]:
        """A message's own ``ts`` judged against its receive time (see "Time" in the module
        docstring): the line's error when it is refused, else the message and any
        ``clock_skew`` alert."""
        rules = self._rules()
        if rules is None or received is None or isinstance(message, Tick):
            return message, []
        if type(message) is FillMessage and (
            received - rules.fill_behind <= message.ts <= received + rules.ahead
        ):
            return message, []  # a fill in time: nearly every line (the checks below agree)
        fill_like = isinstance(message, FillMessage | FillCorrectionMessage)
        safety = (isinstance(message, OrderMessage) and message.action == "cancel") or (
            isinstance(message, ControlMessage) and message.command == "halt"
        )
        behind = rules.fill_behind if fill_like else rules.behind
        stamps = [("ts", message.ts)]
        if isinstance(message, BinMessage):
            stamps.append(("end", message.end))
        problem = None
        for name, stamp in stamps:
            if stamp > received + rules.ahead:
                problem = (
                    f"{name}: {utc_text(stamp)} is {_seconds(stamp - received)} after the message "
                    f"was received ({utc_text(received)}); at most "
                    f"{_seconds(rules.ahead)} ahead is allowed (ts_ahead_seconds)"
                )
                break
            if stamp < received - behind:
                setting = "fill_ts_behind_seconds" if fill_like else "ts_behind_seconds"
                problem = (
                    f"{name}: {utc_text(stamp)} is {_seconds(received - stamp)} before the "
                    f"message was received ({utc_text(received)}); at most "
                    f"{_seconds(behind)} behind is allowed ({setting})"
                )
                break
        if problem is None:
            return message, []
        if not (fill_like or safety):
            return self._reject(
                record.line,
                record.topic,
                payload_text(record.payload),
                f"{problem}. Check the sending machine's clock and send it again with the time "
                "it was sent",
                received,
            )
        self.skewed += 1
        order_id = getattr(message, "order_id", None)
        what = "fill" if fill_like else "cancel" if isinstance(message, OrderMessage) else "halt"
        alert = rules_event(
            CLOCK_SKEW,
            f"A {what} was stamped outside the tolerance around its receive time ({problem}); "
            "it was applied at its receive time all the same. Check the sending machine's "
            "clock. Said once per order; the summary counts every such message (clock_skew).",
            order_id=order_id,
            symbol=None,
            ts=received,
            details={"message_ts": utc_text(message.ts), "received": utc_text(received)},
        )
        return message, [alert]

    def _remark(self, record: Record, reason: str, when: datetime | None) -> ErrorMessage:
        """An ``info`` error record about an accepted line."""
        error = self.engine.reject(record.topic, payload_text(record.payload), reason, when)
        return replace(error, line=record.line, severity="info")

    def _remark_unknown(self, record: Record, name: str, when: datetime | None) -> ErrorMessage:
        """The one remark about a field the contract does not name, per topic kind (or not)."""
        kind = Topics(self.root).split_inbound(record.topic)
        where = kind[0] if kind is not None else record.topic
        self._unknown.add((where, name))
        return self._remark(
            record,
            f"{name}: not a field of wire contract v1.1 for {where} messages; the message was "
            "accepted and the field kept as sent (reported once per field and topic kind)",
            when or self._last,
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
    ) -> list[Outbound]:
        """The error record of a refused line; for an order message, its rejected ack first."""
        self.rejected += 1
        ts = recorded or self._last
        error = replace(self.engine.reject(topic, raw, reason, ts), line=line)
        kind = Topics(self.root).split_inbound(topic)
        if kind is None or kind[0] != "orders" or error.order_id is None:
            return [error]
        ack = AckMessage(
            order_id=error.order_id,
            action=_action_of(raw),
            result="rejected",
            reason=reason,
            message_ts=None,
            ts=ts,
        )
        return [ack, error]

    def counts(self) -> dict[str, int]:
        """How many lines were read, accepted, redelivered and rejected; how many ticks derived."""
        return {
            "lines": self.lines,
            "accepted": self.accepted,
            "redelivered": self.redelivered,
            "rejected": self.rejected,
            "ticks_derived": self.ticks_derived,
            "clock_skew": self.skewed,
            "gaps_opened": self.gaps_opened,
            "heartbeats": self.heartbeats,
            "sources": len(self._sequences),
        }


#: At most this many sources are followed (a bound on memory); a source beyond it is not.
MAX_SOURCES = 10_000
#: A source that sends heartbeats is silent after this many of its intervals without a new
#: number (the interval: how long it had been quiet when its latest heartbeat came). Three, so
#: that one late or lost heartbeat is no alarm (common practice for liveness checks, from memory).
SILENT_INTERVALS = 3.0
#: ... and never before this many seconds (a source beating every second would otherwise be
#: called silent by a daemon busy for three seconds).
SILENT_MIN_SECONDS = 10.0
#: How often, in receive time, sources' silence is judged at most.
SILENCE_CHECK = timedelta(seconds=1)
#: At most this many open gaps are kept per source; beyond it the oldest is forgotten (its alert
#: stands; the summary's ``gaps_opened`` still counts it).
MAX_GAPS = 1_000


@dataclass(slots=True)
class Sequenced:
    """One source's counter: the highest ``seq`` seen and the ranges still missing; when its
    newest number arrived, its heartbeat interval in seconds (``None`` until a heartbeat shows
    it) and whether it is judged silent."""

    last: int
    gaps: list[tuple[int, int]] = field(default_factory=list)
    heard: datetime | None = None
    every: float | None = None
    silent: bool = False

    def open(self, first: int, last: int) -> None:
        self.gaps.append((first, last))
        if len(self.gaps) > MAX_GAPS:
            del self.gaps[0]

    def fill(self, seq: int) -> bool:
        """Take a late ``seq`` out of its gap; whether it was missing."""
        for index, (first, last) in enumerate(self.gaps):
            if first <= seq <= last:
                rest = [(a, b) for a, b in ((first, seq - 1), (seq + 1, last)) if a <= b]
                self.gaps[index : index + 1] = rest
                return True
        return False


@dataclass(frozen=True, slots=True)
class TimeRules:
    """How far a message's own ``ts`` may stray from its receive time (from the engine's
    settings ``ts_ahead_seconds``, ``ts_behind_seconds`` and ``fill_ts_behind_seconds``)."""

    ahead: timedelta
    behind: timedelta
    fill_behind: timedelta


def _seconds(span: timedelta) -> str:
    """A duration as a person reads it: ``4.0 s``, ``12 min``, ``3.2 h``, ``1,461 days``."""
    seconds = span.total_seconds()
    if seconds < 120:
        return f"{seconds:g} s"
    if seconds < 7200:
        return f"{seconds / 60:.0f} min"
    if seconds < 172_800:
        return f"{seconds / 3600:.1f} h"
    return f"{seconds / 86_400:,.0f} days"


@functools.lru_cache(maxsize=4096)
def _split(root: str, topic: str) -> tuple[str, str | None] | None:
    """:meth:`Topics.split_inbound <tracker.core.topics.Topics.split_inbound>`, remembered for
    the topics of a day."""
    return Topics(root).split_inbound(topic)


def _at_time(message: Inbound, ts: datetime) -> Inbound:
    """``message`` with its ``ts`` set to ``ts`` (``dataclasses.replace``, spelled out for a
    fill: nearly every line of a day, and replace costs three times as much)."""
    if type(message) is FillMessage:
        return FillMessage(
            fill_id=message.fill_id,
            order_id=message.order_id,
            quantity=message.quantity,
            price=message.price,
            side=message.side,
            ts=ts,
            extra=message.extra,
        )
    return replace(message, ts=ts)


def _cleared(code: str, source: str, what: str, ts: datetime) -> AlertMessage:
    """The ``info`` clear of a source's alert ``code``, saying ``what`` ended it."""
    return AlertMessage(
        order_id=None,
        code=code,
        severity="info",
        state="cleared",
        message=f"Source {source!r}: {what}.",
        details={"source": source},
        ts=ts,
    )


def has_ticks(records: Iterable[Record | BadLine], root: str) -> bool:
    """Whether any line of a recording is on the tick topic."""
    topic = Topics(root).tick
    return any(r.topic == topic for r in records)


def _message_time(message: Inbound | Heartbeat) -> datetime | None:
    ts = getattr(message, "ts", None)
    return ts if isinstance(ts, datetime) else None


#: What tells two accepted messages apart (see :func:`_identity`).
Identity = tuple[object, ...]


def _identity(topic: str, message: Inbound) -> Identity:
    """A key that two copies of the same message share (and different messages do not).

    The key is the topic and the message's values: a decoded message's values are normalised by
    validation (floats are floats, times UTC, no NaN), so equal values mean equal JSON text. A
    fill -- nearly every line of a recording -- is spelled out, the others go field by field
    (mappings as their sorted items; an order also by the fields it carried, so an amend that
    removes the limit is not a copy of one that leaves it). A test holds the key to the text.
    """
    if type(message) is FillMessage:  # the execution, not its stamp (ts) or extra fields
        return (
            topic,
            message.fill_id,
            message.order_id,
            message.quantity,
            message.price,
            message.side,
        )
    values: list[object] = [topic, message.type]
    for name in wire_fields(message):
        value = getattr(message, name)
        values.append(tuple(sorted(value.items())) if isinstance(value, Mapping) else value)
    if isinstance(message, OrderMessage):
        values.append(tuple(sorted(message.fields_set)))
    return tuple(values)


def _action_of(raw: str) -> str | None:
    """The ``action`` of a raw order payload that did not decode, when it can still be read."""
    try:
        data = json.loads(raw)
    except ValueError:
        return None
    action = data.get("action") if isinstance(data, dict) else None
    return action if isinstance(action, str) and len(action) <= 16 else None

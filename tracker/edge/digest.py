"""The error digest: a flood of bad messages becomes a few error records and a count.

Theory of operation
-------------------
Every rejected line gets an :class:`~tracker.core.messages.ErrorMessage`, and every error record is
a publication and a log line in the daemon. One client sending 10,000 malformed messages would so
make 10,000 of each, and every good message from every other client would wait behind them. The
digest sits after the intake (the same for the daemon and ``tracker replay``) and thins the error
records out; nothing else passes through it changed (targets, alerts, status and acks are never
held back), and the journal keeps every message whatever the digest does.

Error records are grouped by *class*: the topic kind of the line (``orders``, ``fills``, ``bins``,
``control``, ``tick``, or ``other``), the record's severity, and its reason with the particulars
taken out (quoted values, numbers, parenthesised details), so that ``quantity: must be greater
than 0; got -400`` and ``... got -7`` are one class. Time is cut into intervals of
``interval_seconds`` (whole multiples since the Unix epoch) of the lines' *receive* times -- the
``ts`` the daemon stamps in the journal, never the clock of whoever runs the digest -- so the
daemon and a replay of its journal thin out the same records the same way. In each interval:

* the first ``full_per_class`` records of a class pass in full;
* the rest are counted (how many, first and last line, first and last receive time, the last
  one's reason and payload as an example);
* at most ``classes_per_kind`` classes are told apart per topic kind and severity; records of
  any further class are one class, ``(other reasons)``, so varying the reason does not get a
  flood through either.

An interval closes at the first line received at or after its end, or at a line on the tick
topic (the daemon journals one when it stops while the digest holds counts, so what it held back is
published before it goes offline, and a replay of the journal closes at the same line). Closing
emits one summary error record per class that held records back, placed before the outputs of
the line that closed it. :meth:`ErrorDigest.close` closes the last interval at the end of a replay.

Size: every error record that passes is capped: its reason at :data:`REASON_CHARS` characters,
its payload at :data:`~tracker.core.messages.MAX_ERROR_PAYLOAD` (cut by
:func:`~tracker.core.messages.payload_text`, which says so in the text and gives the original size),
each with a marker saying what was cut.

Determinism: the digest reads no clock and iterates over insertion-ordered dicts only; the same
lines and outputs in the same order give the same records.
"""

from __future__ import annotations

import re
from collections.abc import Sequence
from dataclasses import dataclass, replace
from datetime import UTC, datetime, timedelta

from tracker.core.formats import utc_text
from tracker.core.messages import MAX_ERROR_PAYLOAD, ErrorMessage, Outbound
from tracker.core.topics import DEFAULT_ROOT, Topics
from tracker.edge.recordings import BadLine, parse_ts_or_none
from tracker.edge.records import Record
from tracker.errors import InputError

__all__ = [
    "CLASSES_PER_KIND",
    "DIGEST_SECONDS",
    "FULL_PER_CLASS",
    "REASON_CHARS",
    "ErrorDigest",
    "reason_class",
]

#: Length of an interval, in seconds of receive time.
DIGEST_SECONDS = 10.0
#: Error records of one class published in full per interval.
FULL_PER_CLASS = 10
#: Classes told apart per topic kind and severity per interval (the rest are one class).
CLASSES_PER_KIND = 16
#: Most characters of a reason kept in an error record.
REASON_CHARS = 1_000

_EPOCH = datetime(1970, 1, 1, tzinfo=UTC)
_OTHER = "(other reasons)"
_PARENS = re.compile(r"\([^()]*\)")
_QUOTED = re.compile(r"'[^']*'|\"[^\"]*\"")
_NUMBER = re.compile(r"[-+]?\d[\d_,]*(?:\.\d+)?(?:[eE][-+]?\d+)?")


def reason_class(reason: str) -> str:
    """A reason without its particulars: what two records of the same mistake share.

    Parenthesised details become ``()``, quoted values ``'.'``, numbers ``#``, and the result is
    cut at 120 characters. ``"quantity: must be greater than 0; got -400"`` gives
    ``"quantity: must be greater than #; got #"``.
    """
    text = reason[:400]
    for _ in range(4):  # nested parentheses, innermost first
        text, cut = _PARENS.subn("\x00", text)
        if not cut:
            break
    text = text.replace("\x00", "()")
    text = _QUOTED.sub("'.'", text)
    text = _NUMBER.sub("#", text)
    return text[:120]


@dataclass(slots=True)
class _Held:
    """The records of one class counted (not published) in the open interval."""

    count: int
    first_line: int | None
    last_line: int | None
    first_ts: datetime | None
    example: ErrorMessage


@dataclass(slots=True)
class _Class:
    """One class in the open interval: how many records it had, and those it held back."""

    seen: int = 0
    held: _Held | None = None


class ErrorDigest:
    """Thins out error records per topic kind, reason and interval (see the module docstring).

    Args:
        root: The MQTT topic root (to tell topic kinds and the tick topic).
        interval_seconds: Length of an interval of receive time.
        full_per_class: Records of a class published in full per interval (at least 1).
        classes_per_kind: Classes told apart per topic kind and severity per interval.

    Raises:
        InputError: A limit is not positive.
    """

    def __init__(
        self,
        root: str = DEFAULT_ROOT,
        *,
        interval_seconds: float = DIGEST_SECONDS,
        full_per_class: int = FULL_PER_CLASS,
        classes_per_kind: int = CLASSES_PER_KIND,
    ) -> None:
        if not interval_seconds > 0:
            raise InputError(
                f"must be a positive number of seconds, got {interval_seconds}",
                field="interval_seconds",
            )
        for name, value in (
            ("full_per_class", full_per_class),
            ("classes_per_kind", classes_per_kind),
        ):
            if value < 1:
                raise InputError(f"must be at least 1, got {value}", field=name)
        self._topics = Topics(root)
        self._interval = timedelta(seconds=interval_seconds)
        self.full_per_class = full_per_class
        self.classes_per_kind = classes_per_kind
        self._window: int | None = None  # index of the open interval
        self._classes: dict[tuple[str, str, str], _Class] = {}
        self._per_kind: dict[tuple[str, str], int] = {}  # (kind, severity) -> classes told apart
        self._last_text: str | None = None
        self._last_window: int | None = None
        self.published = 0  # error records let through in full
        self.held = 0  # error records counted instead
        self.summaries = 0  # summary records emitted

    @property
    def holding(self) -> bool:
        """Whether the open interval holds records back (a summary is due when it closes)."""
        return any(entry.held is not None for entry in self._classes.values())

    def admit(self, record: Record | BadLine, outputs: Sequence[Outbound]) -> list[Outbound]:
        """What to publish of one line's outputs, after the summaries of an interval it closes.

        Args:
            record: The line (its topic and its receive time ``ts`` drive the intervals).
            outputs: What the intake returned for it.

        Returns:
            The outputs to publish, in order: the summaries of the interval this line closed (if
            any), then the line's outputs with its error records capped or held back.
        """
        window = self._window_of(record.ts)
        closed: list[Outbound] = []
        if record.topic == self._topics.tick or (
            window is not None and self._window is not None and window > self._window
        ):
            closed = self.close()
        if window is not None:
            self._window = window
        if not closed and not any(type(out) is ErrorMessage for out in outputs):
            return outputs if isinstance(outputs, list) else list(outputs)
        kept = closed
        for out in outputs:
            if type(out) is not ErrorMessage:
                kept.append(out)
            elif self._let_through(record, out):
                kept.append(_capped(out))
        return kept

    def close(self) -> list[Outbound]:
        """Close the open interval: one summary record per class that held records back."""
        summaries: list[Outbound] = []
        for (kind, _, name), entry in self._classes.items():
            if entry.held is not None:
                summaries.append(self._summary(kind, name, entry.held))
        self.summaries += len(summaries)
        self._classes.clear()
        self._per_kind.clear()
        return summaries

    def counts(self) -> dict[str, int]:
        """Error records published in full, held back (counted in a summary), and summaries."""
        return {"published": self.published, "held": self.held, "summaries": self.summaries}

    # -- inside ----------------------------------------------------------------------------------

    def _window_of(self, ts: str | None) -> int | None:
        """The interval index of a receive time (``None``: no usable time; it closes nothing)."""
        if ts is None:
            return None
        if ts == self._last_text:  # the lines of one journal group share their receive time
            return self._last_window
        when = parse_ts_or_none(ts)
        window = None if when is None else (when - _EPOCH) // self._interval
        self._last_text, self._last_window = ts, window
        return window

    def _let_through(self, record: Record | BadLine, error: ErrorMessage) -> bool:
        split = self._topics.split_inbound(error.topic)
        kind = split[0] if split is not None else "other"
        name = reason_class(error.reason)
        key = (kind, error.severity, name)
        entry = self._classes.get(key)
        if entry is None:
            told = self._per_kind.get((kind, error.severity), 0)
            if told >= self.classes_per_kind:
                key = (kind, error.severity, _OTHER)
                entry = self._classes.get(key)
            else:
                self._per_kind[(kind, error.severity)] = told + 1
            if entry is None:
                entry = self._classes[key] = _Class()
        entry.seen += 1
        if entry.seen <= self.full_per_class:
            self.published += 1
            return True
        self.held += 1
        line = error.line if error.line is not None else record.line
        if entry.held is None:
            entry.held = _Held(1, line, line, error.ts, error)
        else:
            entry.held.count += 1
            entry.held.last_line = line
            entry.held.example = error
        return False

    def _summary(self, kind: str, name: str, held: _Held) -> ErrorMessage:
        example = held.example
        lines = (
            f"line {held.first_line}"
            if held.first_line == held.last_line
            else f"lines {held.first_line} to {held.last_line}"
        )
        times = ""
        if held.first_ts is not None and example.ts is not None:
            times = f", received {utc_text(held.first_ts)} to {utc_text(example.ts)}"
        what = "rejected" if example.severity == "error" else "remarked on"
        seconds = self._interval.total_seconds()
        reason = (
            f"{held.count:,} more {kind} message{'s' if held.count != 1 else ''} {what} for "
            f"{'the same reason' if name != _OTHER else 'other reasons'} ({lines}{times}) were "
            f"counted here instead of one error record each: the first {self.full_per_class} "
            f"of each topic kind and reason in {seconds:g} s are published in full, so that a "
            f"flood of bad messages cannot delay good ones; the journal (or recording) keeps every "
            f"message. "
            f"The last one: {example.reason}"
        )
        return _capped(replace(example, reason=reason, line=held.last_line))


def _capped(error: ErrorMessage) -> ErrorMessage:
    """The record with its reason and payload cut to size, each with a marker when cut."""
    reason, payload = error.reason, error.payload
    if len(reason) <= REASON_CHARS and len(payload) <= MAX_ERROR_PAYLOAD + 64:
        return error
    if len(reason) > REASON_CHARS:
        reason = f"{reason[:REASON_CHARS]}... [reason cut: {len(error.reason):,} characters in all]"
    if len(payload) > MAX_ERROR_PAYLOAD + 64:  # payload_text cuts (with its marker) before this
        payload = (
            f"{payload[:MAX_ERROR_PAYLOAD]}... [truncated: {len(error.payload):,} characters "
            "in all]"
        )
    return replace(error, reason=reason, payload=payload)

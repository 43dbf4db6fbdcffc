"""The error digest: a flood of bad messages becomes a few error records and an exact count.

What is checked is bookkeeping, not a number from outside: every rejected line is either
published in full or counted in exactly one summary (nothing dropped, nothing counted twice), and
the thinning depends only on the lines and their receive times. Limiting a flood of identical
reports to the first few per interval plus a count is common practice for log and alert rate
limits (syslog's "last message repeated N times").
"""

from __future__ import annotations

import json
import re
from datetime import UTC, datetime, timedelta
from typing import Any

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from tracker.core.engine import Engine
from tracker.core.messages import (
    MAX_ERROR_PAYLOAD,
    AckMessage,
    AlertMessage,
    ErrorMessage,
    Outbound,
)
from tracker.edge.digest import (
    CLASSES_PER_KIND,
    DIGEST_SECONDS,
    FULL_PER_CLASS,
    REASON_CHARS,
    ErrorDigest,
    reason_class,
)
from tracker.edge.records import Record
from tracker.shell.replay import replay

ROOT = "tracker"
T0 = datetime(2026, 3, 10, 14, 30, tzinfo=UTC)  # an invented day
FILLS = f"{ROOT}/fills/X_ZEPH-B1"
COUNT = re.compile(r"^([\d,]+) more ")


def _ts(seconds: float) -> str:
    return (T0 + timedelta(seconds=seconds)).isoformat().replace("+00:00", "Z")


def _error(line: int, reason: str, seconds: float = 0.0, topic: str = FILLS) -> ErrorMessage:
    return ErrorMessage(
        reason=reason,
        topic=topic,
        payload="{not json",
        ts=T0 + timedelta(seconds=seconds),
        line=line,
    )


def _record(line: int, seconds: float, topic: str = FILLS) -> Record:
    return Record(line=line, topic=topic, payload=b"{not json", ts=_ts(seconds))


def _flood(digest: ErrorDigest, times: list[float], reason: str = "bad") -> list[Outbound]:
    """Feed one rejected line per time; return everything the digest let out, closing at the end."""
    out: list[Outbound] = []
    for line, seconds in enumerate(times, start=1):
        out += digest.admit(_record(line, seconds), [_error(line, reason, seconds)])
    return out + digest.close()


def _summaries(out: list[Outbound]) -> list[int]:
    """The counts of the summary records among ``out``."""
    counts = []
    for message in out:
        if isinstance(message, ErrorMessage) and (match := COUNT.match(message.reason)):
            counts.append(int(match.group(1).replace(",", "")))
    return counts


def test_a_flood_in_one_interval_is_the_first_records_and_one_count() -> None:
    """1,000 rejected fills within a second: the first ten in full, then one summary of 990."""
    out = _flood(ErrorDigest(ROOT), [i / 1000 for i in range(1000)])
    expected = (FULL_PER_CLASS + 1, [1000 - FULL_PER_CLASS])
    assert expected == (len(out), _summaries(out))


def test_the_summary_names_the_lines_and_the_last_reason() -> None:
    """A summary says which lines it counts and ends with the last one's reason."""
    digest = ErrorDigest(ROOT, full_per_class=2)
    out = _flood(digest, [0.0, 0.1, 0.2, 0.3, 0.4], reason="quantity: must be > 0; got -4")
    summary = out[-1]
    assert isinstance(summary, ErrorMessage)
    expected = (3, 5, True, True)
    actual = (
        _summaries(out)[0],
        summary.line,
        "(lines 3 to 5, received 2026-03-10T14:30:00.200000Z to" in summary.reason,
        summary.reason.endswith("The last one: quantity: must be > 0; got -4"),
    )
    assert expected == actual


def test_the_next_interval_publishes_its_first_records_again() -> None:
    """Each interval of receive time lets its own first records through."""
    times = [0.0] * 15 + [DIGEST_SECONDS + 1] * 15
    out = _flood(ErrorDigest(ROOT), times)
    expected = [5, 5]
    assert expected == _summaries(out)
    first_in_second = [m.line for m in out if isinstance(m, ErrorMessage)][FULL_PER_CLASS + 1]
    assert 16 == first_in_second  # the summary of the first interval comes before it


def test_the_summary_comes_before_the_outputs_of_the_line_that_closes_the_interval() -> None:
    """A good line after the interval gets the summary first, then its own outputs."""
    digest = ErrorDigest(ROOT, full_per_class=1)
    before = [digest.admit(_record(n, 0.1 * n), [_error(n, "bad", 0.1 * n)]) for n in range(1, 4)]
    assert [1, 0, 0] == [len(out) for out in before]
    alert = AlertMessage(
        order_id="X_ZEPH-B1",
        code="behind_plan",
        severity="warning",
        message="behind",
        details={},
        ts=T0 + timedelta(seconds=DIGEST_SECONDS),
    )
    out = digest.admit(_record(4, DIGEST_SECONDS), [alert])
    expected = ([2], alert)
    assert expected == (_summaries(out), out[-1])


def test_a_tick_line_closes_the_interval() -> None:
    """A journaled tick (the daemon's stop) closes the interval wherever it falls."""
    digest = ErrorDigest(ROOT, full_per_class=1)
    for n in range(1, 4):
        digest.admit(_record(n, 0.1), [_error(n, "bad", 0.1)])
    out = digest.admit(_record(4, 0.2, topic=f"{ROOT}/tick"), [])
    expected = ([2], False)
    assert expected == (_summaries(out), digest.holding)


def test_other_outputs_are_never_held_back() -> None:
    """Alerts and acks of a flood all pass; only its error records are thinned out."""
    digest = ErrorDigest(ROOT, full_per_class=1)
    out: list[Outbound] = []
    for n in range(1, 101):
        ack = AckMessage(order_id=f"X_ZEPH-{n}", action="new", result="rejected", ts=T0)
        out += digest.admit(_record(n, 0.0), [ack, _error(n, "bad")])
    expected = (100, 1)
    actual = (
        sum(isinstance(m, AckMessage) for m in out),
        sum(isinstance(m, ErrorMessage) for m in out),
    )
    assert expected == actual


@pytest.mark.parametrize(
    ("reason", "expected"),
    [
        (
            "quantity: must be greater than 0; got -400",
            "quantity: must be greater than #; got #",
        ),
        (
            "payload is not valid JSON (Expecting value: line 1 column 2 (char 1)); send one",
            "payload is not valid JSON (); send one",
        ),
        (
            "symbol: payload says 'X_MIRA' but the topic says 'X_KALO'; they must match",
            "symbol: payload says '.' but the topic says '.'; they must match",
        ),
        ("quantity: 1.5e+300 is above 1,000,000,000,000", "quantity: # is above #"),
    ],
    ids=["number", "parenthesised", "quoted", "float-and-grouped"],
)
def test_the_reason_class_drops_the_particulars(reason: str, expected: str) -> None:
    """Two records of the same mistake with other values are one class."""
    assert expected == reason_class(reason)


def test_reasons_that_differ_in_form_are_counted_apart() -> None:
    """Two kinds of mistake in one flood: each gets its first records and its own count."""
    digest = ErrorDigest(ROOT, full_per_class=2)
    out: list[Outbound] = []
    for n in range(1, 21):
        reason = "payload is not valid JSON (x)" if n % 2 else f"quantity: got {-n}"
        out += digest.admit(_record(n, 0.0), [_error(n, reason)])
    out += digest.close()
    expected = [8, 8]
    assert expected == _summaries(out)


def test_varying_the_reason_does_not_get_a_flood_through() -> None:
    """Past the limit of classes per topic kind, every further reason is one class."""
    digest = ErrorDigest(ROOT, full_per_class=1)
    out: list[Outbound] = []
    for n in range(1, 501):
        out += digest.admit(_record(n, 0.0), [_error(n, f"field_{'x' * (n % 97)}: bad")])
    out += digest.close()
    published = sum(1 for m in out if isinstance(m, ErrorMessage) and not COUNT.match(m.reason))
    expected = (CLASSES_PER_KIND + 1, 500)
    assert expected == (published, published + sum(_summaries(out)))


def test_topic_kinds_are_counted_apart() -> None:
    """A flood on the fills topics does not use up the error records of bins."""
    digest = ErrorDigest(ROOT, full_per_class=1)
    out: list[Outbound] = []
    for n in range(1, 11):
        topic = FILLS if n <= 5 else f"{ROOT}/bins/X_ZEPH"
        out += digest.admit(_record(n, 0.0, topic), [_error(n, "bad", topic=topic)])
    topics = [m.topic for m in out if isinstance(m, ErrorMessage)]
    assert [FILLS, f"{ROOT}/bins/X_ZEPH"] == topics


def test_a_long_reason_is_cut_and_says_so() -> None:
    """A reason of 50,000 characters is kept to its first REASON_CHARS, with its length."""
    digest = ErrorDigest(ROOT)
    (out,) = digest.admit(_record(1, 0.0), [_error(1, "r" * 50_000)])
    assert isinstance(out, ErrorMessage)
    expected = "r" * REASON_CHARS + "... [reason cut: 50,000 characters in all]"
    assert expected == out.reason


@settings(max_examples=60, deadline=None)
@given(
    gaps=st.lists(st.floats(min_value=0.0, max_value=7.0), min_size=1, max_size=300),
    ticks=st.sets(st.integers(min_value=1, max_value=300), max_size=5),
    full=st.integers(min_value=1, max_value=5),
)
def test_every_rejected_line_is_published_or_counted_exactly_once(
    gaps: list[float], ticks: set[int], full: int
) -> None:
    """For any receive times and ticks: records in full plus the counts equal the lines."""
    digest = ErrorDigest(ROOT, full_per_class=full)
    out: list[Outbound] = []
    seconds = 0.0
    rejected = 0
    for line, gap in enumerate(gaps, start=1):
        seconds += gap
        if line in ticks:
            out += digest.admit(_record(line, seconds, topic=f"{ROOT}/tick"), [])
            continue
        rejected += 1
        out += digest.admit(_record(line, seconds), [_error(line, "bad", seconds)])
    out += digest.close()
    published = sum(1 for m in out if isinstance(m, ErrorMessage) and not COUNT.match(m.reason))
    assert rejected == published + sum(_summaries(out))
    assert (published, rejected - published) == (digest.published, digest.held)


def _fill_line(n: int, seconds: float, *, good: bool) -> dict[str, Any]:
    payload: Any = {
        "type": "fill",
        "fill_id": f"F{n}",
        "order_id": "X_ZEPH-B1",
        "quantity": 10 if good else -10,
        "price": 20.0,
        "ts": _ts(seconds),
    }
    return {"topic": FILLS, "payload": payload, "ts": _ts(seconds)}


def test_a_replay_thins_out_a_flood_and_still_applies_every_good_line() -> None:
    """A replay of 2,000 bad fills among 20 good ones: every good fill counts, errors are few."""
    lines = []
    for n in range(2_020):
        good = n % 101 == 0
        lines.append(_fill_line(n, n * 0.001, good=good))
    records = [
        Record(line=i, topic=d["topic"], payload=json.dumps(d["payload"]), ts=d["ts"])
        for i, d in enumerate(lines, start=1)
    ]
    result = replay(records, Engine(root=ROOT), ROOT)
    expected = (20, 2_000, FULL_PER_CLASS + 1, [2_000 - FULL_PER_CLASS])
    actual = (
        result.summary["replay"]["accepted"],
        result.summary["replay"]["rejected"],
        len(result.errors),
        _summaries(list(result.errors)),
    )
    assert expected == actual


def test_payload_of_a_summary_is_capped() -> None:
    """The example payload a summary echoes is no longer than any error record's."""
    digest = ErrorDigest(ROOT, full_per_class=1)
    big = ErrorMessage(reason="bad", topic=FILLS, payload="p" * 10_000, ts=T0, line=2)
    digest.admit(_record(1, 0.0), [_error(1, "bad")])
    digest.admit(_record(2, 0.0), [big])
    (summary,) = digest.close()
    assert isinstance(summary, ErrorMessage)
    assert summary.payload.endswith("... [truncated: 10,000 characters in all]")
    assert len(summary.payload) < MAX_ERROR_PAYLOAD + 64

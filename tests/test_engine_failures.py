"""One failure path for the engine: a failure inside it undoes the event, live and in replay alike.

An exception while the engine handles an event (a bug, a solver raising what it should not) must
not leave an order half-changed. The engine undoes the event, answers with an error record and an
``internal_error`` alert, and tries the re-plans the event asked for again with the next event.
Because the daemon and ``tracker replay`` feed the same engine through the same intake, a replay
of a journal still says what the daemon published.
"""

from __future__ import annotations

import json
import pickle
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any

import pytest

from tracker.cli import main
from tracker.core import formulation
from tracker.core.engine import Engine, outputs, planning
from tracker.core.formats import utc_text
from tracker.edge.intake import Intake
from tracker.edge.recordings import read_jsonl
from tracker.edge.records import Record
from tracker.edge.wire import (
    AckMessage,
    AlertMessage,
    ErrorMessage,
    Inbound,
    Outbound,
    StatusMessage,
    TargetMessage,
    WireError,
    decode,
    encode,
)

DAY = Path(__file__).resolve().parent.parent / "replay_data" / "day-2026-03-10-seed7.jsonl"
KINDS = ("targets", "alerts", "status", "errors", "acks")


class FailOnce:
    """Stands in for ``planning.build_problem``: raises once, at the first problem from bin
    ``first_bin`` on, then builds problems as usual."""

    def __init__(self, first_bin: int) -> None:
        self.first_bin = first_bin
        self.failed = False
        self.real = formulation.build_problem

    def __call__(self, **kwargs: Any) -> Any:
        if not self.failed and kwargs["first_bin"] >= self.first_bin:
            self.failed = True
            raise RuntimeError("injected: a bug while building the problem")
        return self.real(**kwargs)


def day_with_ticks(tmp_path: Path) -> Path:
    """The seed-7 day as a journal would hold it: a tick line every minute between messages."""
    lines: list[str] = []
    last: datetime | None = None
    for text in DAY.read_text(encoding="utf-8").splitlines():
        try:
            when = datetime.fromisoformat(json.loads(text)["ts"]).astimezone(UTC)
        except (ValueError, KeyError, TypeError):
            when = None
        if when is not None:
            tick = (last or when).replace(second=0, microsecond=0) + timedelta(minutes=1)
            while last is not None and tick <= when:
                stamp = utc_text(tick)
                lines.append(
                    json.dumps(
                        {
                            "topic": "tracker/tick",
                            "payload": {"type": "tick", "ts": stamp},
                            "ts": stamp,
                        }
                    )
                )
                tick += timedelta(minutes=1)
            last = when if last is None else max(last, when)
        lines.append(text)
    path = tmp_path / "journal.jsonl"
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return path


def live(records: list[Record]) -> list[list[Outbound]]:
    """What the daemon publishes: the intake it builds, fed as it feeds it (a run of bins
    together, everything else one by one)."""
    intake = Intake(Engine(), root="tracker", derive_ticks=False)
    results: list[list[Outbound]] = []
    run: list[Record] = []
    for record in [*records, None]:
        if record is not None and "/bins/" in record.topic:
            run.append(record)
            continue
        if run:
            results += intake.feed_many(run) if len(run) > 1 else [intake.feed(run[0])]
            run = []
        if record is not None:
            results.append(intake.feed(record))
    return results


def by_kind(produced: list[Outbound]) -> dict[str, list[bytes]]:
    """Outputs encoded, in order, per output file of a replay."""
    kinds = {
        TargetMessage: "targets",
        AlertMessage: "alerts",
        StatusMessage: "status",
        AckMessage: "acks",
    }
    files: dict[str, list[bytes]] = {kind: [] for kind in KINDS}
    for out in produced:
        files[kinds.get(type(out), "errors")].append(encode(out))
    return files


def live_and_replayed(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> tuple[list[list[Outbound]], dict[str, list[bytes]]]:
    """The day with one failure injected, as the daemon publishes it and as ``tracker replay``
    of its journal writes it."""
    journal = day_with_ticks(tmp_path)
    records = [r for r in read_jsonl(journal) if isinstance(r, Record)]
    monkeypatch.setattr(planning, "build_problem", FailOnce(first_bin=6))
    published = live(records)
    monkeypatch.setattr(planning, "build_problem", FailOnce(first_bin=6))
    assert 0 == main(["replay", str(journal), "--out", str(tmp_path / "out"), "--no-progress"])
    written = {kind: (tmp_path / "out" / f"{kind}.jsonl").read_text() for kind in KINDS}
    replayed = {
        kind: [line.encode() for line in text.splitlines()] for kind, text in written.items()
    }
    return published, replayed


def test_live_and_replay_give_the_same_outputs_around_a_failure(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """The daemon's intake and ``tracker replay`` of the same journal fail alike."""
    published, replayed = live_and_replayed(tmp_path, monkeypatch)
    flat = [o for outputs in published for o in outputs]
    failures = [o for o in flat if isinstance(o, AlertMessage) and o.code == "internal_error"]
    assert (replayed, 1) == (by_kind(flat), len(failures))


def test_failed_message_is_reported_and_the_next_one_replans(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """The failed message gets an error record and an internal_error alert (critical); the next
    message re-plans every order it had asked to re-plan."""
    published, _ = live_and_replayed(tmp_path, monkeypatch)
    failed = next(
        i
        for i, outs in enumerate(published)
        if any(isinstance(o, ErrorMessage) and "internal error" in o.reason for o in outs)
    )
    error, alert = published[failed]
    assert isinstance(alert, AlertMessage)
    retried = sorted(alert.details["retry"])
    following = next(outs for outs in published[failed + 1 :] if outs)
    expected = ("error", "internal_error", "critical", retried)
    actual = (
        error.type,
        alert.code,
        alert.severity,
        sorted(o.order_id for o in following if isinstance(o, TargetMessage)),
    )
    assert retried and expected == actual


def test_order_is_left_as_it_was_and_replanned_on_the_next_event(
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    """A re-plan failing at an order's start leaves it pending; the next tick plans it."""
    from tracker.testing import order, tick

    engine = Engine()
    engine.handle(
        order(
            "A",
            "X_ZEPH",
            "buy",
            40_000,
            "2026-03-02T14:30:00Z",
            "2026-03-02T21:00:00Z",
            ts="2026-03-02T14:00:00Z",
        )
    )
    monkeypatch.setattr(planning, "build_problem", FailOnce(first_bin=0))
    failed = engine.handle(tick("2026-03-02T14:31:00Z"))
    state_after_failure = engine.state_of("A")
    following = engine.handle(tick("2026-03-02T14:32:00Z"))
    expected = (["error", "alert"], "pending", ["target", "status"], 1)
    actual = (
        [o.type for o in failed],
        state_after_failure.value if state_after_failure else None,
        [o.type for o in following],
        next(o.plan_version for o in following if isinstance(o, TargetMessage)),
    )
    assert expected == actual


def decoded_day() -> list[Inbound]:
    """The seed-7 day's valid messages, in order."""
    events: list[Inbound] = []
    for record in read_jsonl(DAY):
        if isinstance(record, Record):
            try:
                events.append(decode(record.topic, record.payload))
            except WireError:
                continue
    return events


def fingerprint(engine: Engine) -> tuple[bytes, frozenset[tuple[str, str]]]:
    """Everything the engine keeps about orders, symbols and time (the alert counts aside)."""
    state = engine._state  # white-box: the test is about the state itself
    kept = (
        state.orders,
        state.symbols,
        state.clock,
        state.last_tick,
        state.last_control,
        state.halt_all,
        state.stale_due,
        sorted(state.starts),
        sorted(state.ends),
    )
    return pickle.dumps(kept), frozenset(state.book._raised)


def test_a_failure_at_the_end_of_any_event_undoes_all_of_it(
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    """Failing after everything is applied (when the outputs are sorted) restores every record.

    Each event of the day is handled twice: first with a failure injected at its very end (the
    state must come back exactly), then normally; the normal outputs are those of a run that
    never failed.
    """
    events = decoded_day()
    reference = [encode(o) for outs in Engine().handle_many(events) for o in outs]
    engine = Engine()
    real_key = outputs.order_key
    produced: list[bytes] = []
    failures = 0

    def broken_key(message: Outbound) -> str:
        raise RuntimeError("injected: a bug at the very end of an event")

    for event in events:
        before = fingerprint(engine)
        monkeypatch.setattr(outputs, "order_key", broken_key)
        failed = engine.handle(event)
        monkeypatch.setattr(outputs, "order_key", real_key)
        if any(isinstance(o, ErrorMessage) and "internal error" in o.reason for o in failed):
            failures += 1
            assert before == fingerprint(engine)
        produced += [encode(o) for o in engine.handle(event)]
    assert failures > 100
    assert reference == produced


APPLY_REPLAN = planning.apply_replan


class ApplyFailsOnce:
    """Stands in for ``planning.apply_replan``: raises once, at the ``nth`` call."""

    def __init__(self, nth: int) -> None:
        self.calls = 0
        self.nth = nth

    def __call__(self, *args: Any) -> None:
        self.calls += 1
        if self.calls == self.nth:
            raise RuntimeError("injected: a bug while applying a re-plan")
        APPLY_REPLAN(*args)


@pytest.mark.parametrize(
    ("name", "make"),
    [
        ("build_problem", lambda: FailOnce(first_bin=6)),
        ("apply_replan", lambda: ApplyFailsOnce(nth=100)),
    ],
    ids=["while-preparing-a-bin", "while-applying-a-solved-run"],
)
def test_handle_many_fails_as_handle_does(
    monkeypatch: pytest.MonkeyPatch, name: str, make: Any
) -> None:
    """A failure inside a run of bins sharing a solve gives the outputs one by one would."""
    events = decoded_day()
    monkeypatch.setattr(planning, name, make())
    engine = Engine()
    one_by_one = [[encode(o) for o in engine.handle(e)] for e in events]
    monkeypatch.setattr(planning, name, make())
    together = [[encode(o) for o in outs] for outs in Engine().handle_many(events)]
    failed = sum(b'"internal_error"' in line for outs in together for line in outs)
    assert (one_by_one, 1) == (together, failed)

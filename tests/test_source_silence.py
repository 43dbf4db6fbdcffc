"""A source that sends heartbeats and then goes quiet: the ``source_silent`` alert.

A gateway that numbers its messages and sends a heartbeat when it has had nothing else to say
has promised to be heard from every so often; when it is not, it may have stopped, or a broker may
be dropping its messages while the daemon stays connected, and only its silence shows it. These
tests feed the intake as the daemon does: every line with its receive time, the daemon's ticks
among them (one a second while something is working).

Sources of the rule: a liveness check raises after several missed intervals, not one, so that a
single late or lost heartbeat is no alarm (common practice, from memory); our three intervals and
ten-second floor are stated in :mod:`tracker.edge.intake` and checked here against the time
arithmetic of :mod:`datetime` alone.
"""

from __future__ import annotations

from datetime import UTC, datetime, timedelta
from typing import Any

from tracker.core.engine import Engine
from tracker.core.messages import AlertMessage, Outbound
from tracker.edge.intake import SILENT_INTERVALS, SILENT_MIN_SECONDS, Intake
from tracker.edge.records import Record

ROOT = "tracker"
OPEN = datetime(2026, 3, 2, 14, 30, tzinfo=UTC)


def text(second: float) -> str:
    return (OPEN + timedelta(seconds=second)).isoformat().replace("+00:00", "Z")


def heartbeat(seq: int, second: float, source: str = "gw-1") -> Record:
    payload: dict[str, Any] = {"type": "heartbeat", "source": source, "seq": seq}
    return Record(line=0, topic=f"{ROOT}/control", payload=payload, ts=text(second))


def tick(second: float) -> Record:
    return Record(
        line=0, topic=f"{ROOT}/tick", payload={"type": "tick", "ts": text(second)}, ts=text(second)
    )


def ticks(first: int, last: int) -> list[Record]:
    return [tick(s) for s in range(first, last + 1)]


def stamped_fill(seq: int, second: float) -> Record:
    payload: dict[str, Any] = {
        "type": "fill",
        "fill_id": f"F{seq}",
        "order_id": "A",
        "quantity": 100,
        "price": 42.0,
        "ts": text(second),
        "source": "gw-1",
        "seq": seq,
    }
    return Record(line=0, topic=f"{ROOT}/fills/A", payload=payload, ts=text(second))


def numbered(records: list[Record]) -> list[Record]:
    return [
        Record(line=n, topic=r.topic, payload=r.payload, ts=r.ts)
        for n, r in enumerate(records, start=1)
    ]


def feed(records: list[Record]) -> tuple[Intake, list[list[Outbound]]]:
    intake = Intake(Engine(root=ROOT), root=ROOT, derive_ticks=False)
    return intake, intake.feed_many(numbered(records))


def silence(per_line: list[list[Outbound]]) -> list[tuple[int, str, str]]:
    """(line, severity, state) of each source_silent alert."""
    return [
        (line, out.severity, out.state)
        for line, outputs in enumerate(per_line, start=1)
        for out in outputs
        if isinstance(out, AlertMessage) and out.code == "source_silent"
    ]


def test_a_source_quiet_for_three_of_its_intervals_is_called_silent_once() -> None:
    """Heartbeats at 0, 5 and 10 s (an interval of 5 s), then nothing: silent once the daemon's
    tick finds it quiet for more than max(3 x 5, 10) = 15 s, i.e. at the tick of 26 s; one
    warning, however many ticks follow."""
    assert SILENT_INTERVALS * 5 >= SILENT_MIN_SECONDS  # the rule this case exercises
    records = [heartbeat(1, 0), heartbeat(2, 5), heartbeat(3, 10), *ticks(11, 60)]
    intake, per_line = feed(records)
    tick_26 = 3 + (26 - 11) + 1  # three heartbeats, then the ticks from 11 s on
    assert [(tick_26, "warning", "raised")] == silence(per_line)
    (alert,) = [o for o in per_line[tick_26 - 1] if isinstance(o, AlertMessage)]
    assert {
        "source": "gw-1",
        "last_heard": text(10),
        "quiet_seconds": 16.0,
        "interval_seconds": 5.0,
    } == dict(alert.details)
    assert "'gw-1' has sent nothing for 16 s" in alert.message
    assert ["gw-1"] == intake.silent()


def test_the_next_number_clears_it() -> None:
    """The source speaks again: the alert is cleared (info) and the source is no longer silent;
    a later silence is raised again."""
    records = [heartbeat(1, 0), heartbeat(2, 5), *ticks(6, 30), heartbeat(3, 31), *ticks(32, 60)]
    intake, per_line = feed(records)
    states = [(severity, state) for _, severity, state in silence(per_line)]
    # raised at 21 s, cleared at 31 s; the heartbeat at 31 came after 26 s of quiet, which is
    # its interval now (limit 78 s), so the ticks up to 60 s raise nothing more
    assert [("warning", "raised"), ("info", "cleared")] == states
    assert [] == intake.silent()


def test_a_source_that_never_sent_a_heartbeat_is_never_judged() -> None:
    """Stamped fills alone promise nothing: a quiet hour of such a source raises nothing."""
    intake, per_line = feed([stamped_fill(1, 0), *ticks(1, 3600)])
    assert ([], []) == (silence(per_line), intake.silent())


def test_a_pause_of_the_daemon_itself_does_not_count_as_the_source_silence() -> None:
    """No line at all for five minutes (the daemon was down; the broker kept the source's
    messages): the clock of silence restarts at the first line after the pause, so the source
    has its 15 s to be heard again before it is called silent."""
    records = [heartbeat(1, 0), heartbeat(2, 5), *ticks(6, 8), *ticks(300, 314)]
    _, per_line = feed(records)
    assert [] == silence(per_line)
    records = [heartbeat(1, 0), heartbeat(2, 5), *ticks(6, 8), *ticks(300, 320)]
    _, per_line = feed(records)
    assert [(2 + 3 + 17, "warning", "raised")] == silence(per_line)  # the tick of 316 s


def test_the_interval_is_the_quiet_before_a_heartbeat() -> None:
    """A gateway sending a fill every second up to 29 s, then a heartbeat at 59 s after 30 s with
    nothing to say, has an interval of 30 s: silent only after 3 x 30 = 90 s, not after 15 (the
    tick of 150 s: 91 s after the heartbeat of 59 s)."""
    records = [*(stamped_fill(n, n) for n in range(1, 30)), heartbeat(30, 59), *ticks(60, 200)]
    _, per_line = feed(records)
    assert [(29 + 1 + (150 - 60) + 1, "warning", "raised")] == silence(per_line)


def test_line_by_line_and_in_one_batch_agree() -> None:
    """The daemon feeds groups of lines and a replay whole chunks: the alerts are the same."""
    records = numbered([heartbeat(1, 0), heartbeat(2, 5), *ticks(6, 40), heartbeat(3, 41)])
    whole = Intake(Engine(root=ROOT), root=ROOT, derive_ticks=False).feed_many(records)
    single = Intake(Engine(root=ROOT), root=ROOT, derive_ticks=False)
    one_by_one = [single.feed(record) for record in records]
    assert silence(whole) == silence(one_by_one) != []

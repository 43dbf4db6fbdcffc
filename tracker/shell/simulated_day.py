"""The invented day run in-process: scenario, intake and engine in a closed loop, recorded.

:func:`run_day` drives :class:`tracker.sim.scenario.Scenario` against an engine through the same
intake a replay uses, so that the recording it makes (:func:`write_day`) replays to the same
outputs byte for byte. ``tracker simulate day`` writes such a recording; ``tracker demo`` runs the
same scenario against the live daemon instead.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import date
from pathlib import Path
from typing import Any

from tracker.core.topics import DEFAULT_ROOT
from tracker.edge.intake import DEFAULT_TICK_SECONDS, Intake
from tracker.edge.recordings import parse_line
from tracker.edge.records import Record, record_line
from tracker.errors import InputError
from tracker.shell.replay import ReplayResult, finish_summary
from tracker.sim.scenario import DAY, Scenario

__all__ = ["DayRun", "run_day", "write_day"]


@dataclass
class DayRun:
    """A closed-loop day: the recording (lines as sent) and what the engine said."""

    records: list[Record]
    lines: list[str]
    result: ReplayResult


def run_day(
    seed: int = 7,
    *,
    engine: Any = None,
    day: date = DAY,
    root: str = DEFAULT_ROOT,
    tick_seconds: float | None = None,
) -> DayRun:
    """Run the invented day in-process: the scenario feeds the engine, the router sees its targets.

    Each message goes through exactly the path a replay of the written file takes (the line's JSON
    text is parsed back), with ticks derived the same way, so replaying the recording reproduces
    these outputs byte for byte.

    Args:
        seed: The scenario's seed.
        engine: The engine (default: a fresh :class:`tracker.core.engine.Engine` with default
            settings and this root).
        day: The trading day.
        root: MQTT topic root.
        tick_seconds: Interval of derived ticks (default: the replay default).

    Returns:
        The recording and the engine's outputs.
    """
    if engine is None:
        from tracker.core.engine import Engine

        engine = Engine(root=root)
    scenario = Scenario(seed, day=day, root=root)
    intake = Intake(engine, root=root, tick_seconds=tick_seconds or DEFAULT_TICK_SECONDS)
    result = ReplayResult()
    records: list[Record] = []
    lines: list[str] = []
    while (due := scenario.next_time()) is not None:
        for record in scenario.inbound_until(due):
            text = record_line(record)
            records.append(record)
            lines.append(text)
            outputs = intake.feed(parse_line(record.line, text))
            result.add(outputs)
            for message in outputs:
                scenario.on_output(message)
    result.add(intake.close())  # as a replay of the recording ends
    result.summary = finish_summary(engine, intake)
    return DayRun(records=records, lines=lines, result=result)


def write_day(run: DayRun, path: str | Path) -> Path:
    """Write a day's recording as a JSON Lines replay file.

    Raises:
        InputError: The file cannot be written.
    """
    path = Path(path)
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_text("".join(line + "\n" for line in run.lines), encoding="utf-8")
    except OSError as exc:
        raise InputError(f"cannot write {path}: {exc.strerror}", field="-o") from exc
    return path

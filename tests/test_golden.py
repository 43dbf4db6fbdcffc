"""Golden regression: replaying the shipped invented day gives the shipped outputs, byte for byte.

The day (replay_data/day-*.jsonl) is invented: made-up symbols X_ZEPH, X_KALO and X_MIRA on the
made-up venue Harbour Lane Exchange (X_HLX), recorded by `tracker simulate day`. When a change to
the engine is meant to change its outputs, regenerate the golden files as replay_data/GOLDEN.md says
and review the diff.
"""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from tracker.core.engine import Engine
from tracker.edge.wire import WireError, decode
from tracker.shell.replay import OUTPUT_FILES, read_input, replay, write_outputs

DATA = Path(__file__).resolve().parent.parent / "replay_data"
DAY = DATA / "day-2026-03-10-seed7.jsonl"
GOLDEN = DATA / "golden"
REGENERATE = f"python -m tracker replay {DAY.relative_to(DATA.parent)} --out replay_data/golden"


@pytest.fixture(scope="module")
def replayed(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The shipped day replayed into a fresh folder."""
    out = tmp_path_factory.mktemp("golden")
    write_outputs(replay(read_input(DAY), Engine()), out)
    return out


@pytest.mark.parametrize("name", OUTPUT_FILES)
def test_output_matches_golden(replayed: Path, name: str) -> None:
    """Each output file of the replay equals the golden file byte for byte."""
    expected = (GOLDEN / name).read_bytes()
    actual = (replayed / name).read_bytes()
    assert expected == actual, f"{name} differs from the golden file; if intended: {REGENERATE}"


def test_errors_are_exactly_the_bad_lines(replayed: Path) -> None:
    """errors.jsonl has one record per line the wire rejects (a fill for an order nobody sent
    is parked, then unassigned in the summary: not an error)."""
    bad: list[int] = []
    for number, text in enumerate(DAY.read_text(encoding="utf-8").splitlines(), start=1):
        line = json.loads(text)
        try:
            decode(line["topic"], line["payload"])
        except WireError:
            bad.append(number)
    errors = (replayed / "errors.jsonl").read_text(encoding="utf-8").splitlines()
    assert bad == [json.loads(error)["line"] for error in errors]
    summary = json.loads((replayed / "summary.json").read_text(encoding="utf-8"))
    assert ["X_ORIN-B9"] == [row["order_id"] for row in summary["unassigned_fills"]]


def test_the_day_has_targets_and_alerts(replayed: Path) -> None:
    """The engine worked the day: targets for every order and some alerts."""
    targets = (replayed / "targets.jsonl").read_text(encoding="utf-8").splitlines()
    orders = {json.loads(t)["order_id"] for t in targets}
    alerts = (replayed / "alerts.jsonl").read_text(encoding="utf-8").splitlines()
    expected = ({"X_ZEPH-B1", "X_KALO-S1", "X_MIRA-B1", "X_ZEPH-S2"}, True)
    assert expected == (orders, len(alerts) > 0)


def test_replay_in_another_process_matches_golden(tmp_path: Path) -> None:
    """`python -m tracker replay` under another hash seed writes the golden files exactly."""
    import os
    import subprocess
    import sys

    env = {**os.environ, "PYTHONHASHSEED": "12345"}
    subprocess.run(
        [sys.executable, "-m", "tracker", "replay", str(DAY), "--out", str(tmp_path)],
        check=True,
        env=env,
        capture_output=True,
    )
    differing = [
        n for n in OUTPUT_FILES if (tmp_path / n).read_bytes() != (GOLDEN / n).read_bytes()
    ]
    expected: list[str] = []
    assert expected == differing

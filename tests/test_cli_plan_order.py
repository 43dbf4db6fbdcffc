"""``tracker plan --order``: the header a trader reads, warnings, --compare and --chart."""

from __future__ import annotations

import json
import re
import xml.etree.ElementTree as ET
from pathlib import Path
from typing import Any

import pytest

from tracker.cli import main

ORDER: dict[str, Any] = {
    "type": "order",
    "action": "new",
    "order_id": "X_ZEPH-B1",
    "symbol": "X_ZEPH",
    "side": "buy",
    "quantity": 120_000,
    "start": "2026-03-10T09:30:00-04:00",
    "end": "2026-03-10T16:00:00-04:00",
    "max_participation": 0.2,
    "urgency": "medium",
    "arrival_price": 25.40,
    "ts": "2026-03-10T09:29:00-04:00",
}
BEFORE = "2026-03-10T09:00:00-04:00"  # --now before the start: no "has passed" warning


def write(tmp_path: Path, **changes: Any) -> Path:
    path = tmp_path / "order.json"
    path.write_text(json.dumps({**ORDER, **changes}), encoding="utf-8")
    return path


def run(tmp_path: Path, capsys: pytest.CaptureFixture[str], *args: str, **changes: Any) -> str:
    code = main(["plan", "--order", str(write(tmp_path, **changes)), *args])
    out = capsys.readouterr().out
    assert code == 0
    return out


def test_header_states_date_zone_window_size_participation_milestones_and_costs(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """The header names every fact a trader reads first, in words."""
    out = run(tmp_path, capsys, "--now", BEFORE)
    for needle in (
        "date: 2026-03-10 (Tuesday)",
        "America/New_York",
        "window: 09:30 to 16:00, 78 bins of 5 minutes",
        "% of the forecast volume in the window",
        "participation: average",
        "cap 20.0 %",
        "done: 25 % by ",
        "expected cost (half spread, fees and impact; positive = a cost)",
        "standard deviation of that cost",
        "risk term of the optimiser (a penalty it weighs, not money paid)",
    ):
        assert needle in out, needle
    assert "warning" not in out


def test_no_scientific_notation_in_the_text(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """Numbers meant for people are never written as 1.2e-05."""
    out = run(tmp_path, capsys, "--now", BEFORE, quantity=7)
    assert re.search(r"\d[eE][+-]?\d", out) is None


WARNINGS = [
    (
        "clipped-start",
        {"start": "2026-03-10T08:00:00-04:00"},
        "2026-03-10T07:00:00-04:00",
        "before the session opens",
    ),
    ("clipped-end", {"end": "2026-03-10T17:30:00-04:00"}, BEFORE, "after the session closes"),
    ("start-passed", {}, "2026-03-10T11:00:00-04:00", "has passed"),
    ("no-cap", {"max_participation": None}, BEFORE, "no participation cap"),
    ("limit-below-market", {"limit_price": 25.0}, BEFORE, "cannot trade until the price crosses"),
    ("limit-far", {"limit_price": 40.0}, BEFORE, "far from the market"),
]


@pytest.mark.parametrize(
    ("changes", "now", "needle"), [w[1:] for w in WARNINGS], ids=[w[0] for w in WARNINGS]
)
def test_warnings(
    tmp_path: Path,
    capsys: pytest.CaptureFixture[str],
    changes: dict[str, Any],
    now: str,
    needle: str,
) -> None:
    """Each risky window or limit is named in a warning line."""
    out = run(tmp_path, capsys, "--now", now, **changes)
    warnings = [line for line in out.splitlines() if line.startswith("warning:")]
    assert (1, True) == (len(warnings), needle in warnings[0])


def test_json_carries_the_header_fields(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """--format json has the window, volume share, milestones, expected cost and its sd."""
    out = json.loads(run(tmp_path, capsys, "--now", BEFORE, "--format", "json"))
    assert {"timezone", "window", "volume_share", "milestones", "cost_std", "warnings"} <= set(out)
    assert out["expected_cost"]["currency"] == pytest.approx(
        out["expected_cost"]["breakdown"]["spread"]["currency"]
        + out["expected_cost"]["breakdown"]["impact"]["currency"]
    )
    assert list(out["milestones"]) == ["25%", "50%", "75%"]


def test_compare_rows_follow_the_efficient_frontier(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """More urgency: higher expected cost, lower sd (Almgren and Chriss 2000, the frontier)."""
    out = json.loads(
        run(
            tmp_path,
            capsys,
            "--now",
            BEFORE,
            "--compare",
            "high,low,medium,1000",
            "--format",
            "json",
        )
    )
    plans = out["plans"]
    aversions = [p["risk_aversion"] for p in plans]
    costs = [p["expected_cost"]["currency"] for p in plans]
    stds = [p["cost_std"]["currency"] for p in plans]
    assert aversions == [10.0, 100.0, 500.0, 1000.0]
    assert costs == sorted(costs) and stds == sorted(stds, reverse=True)
    assert len(set(costs)) == 4


def test_compare_table(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """The table form lists one row per preference and names the trade-off."""
    out = run(tmp_path, capsys, "--now", BEFORE, "--compare")
    assert [w in out for w in ("low", "medium", "high", "efficient frontier")] == [True] * 4


def test_compare_rejects_a_bad_item(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """An item that is no urgency and no number is one line naming --compare, exit 2."""
    code = main(["plan", "--order", str(write(tmp_path)), "--compare", "low,urgent"])
    assert (2, True) == (code, "--compare" in capsys.readouterr().err)


def test_svg_chart_holds_the_plan_volume_participation_and_cap(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """The SVG parses and holds the cumulative plan, the volume curve, 78 bars and the cap."""
    chart = tmp_path / "plan.svg"
    run(tmp_path, capsys, "--now", BEFORE, "--chart", str(chart))
    root = ET.parse(chart).getroot()
    ids = {element.get("id") for element in root.iter()}
    bars = {i for i in ids if i and i.startswith("participation-")}
    assert {"plan-cumulative", "volume-cumulative", "cap"} <= ids
    assert len(bars) == 78


def test_png_chart_is_a_png_with_the_plan_line(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """The PNG decodes (800 x 600) and has pixels of the plan's colour."""
    import matplotlib.image

    from tracker.report.plan_chart import PLAN_COLOUR

    chart = tmp_path / "plan.png"
    run(tmp_path, capsys, "--now", BEFORE, "--chart", str(chart))
    image = matplotlib.image.imread(chart)
    colour = tuple(int(PLAN_COLOUR[i : i + 2], 16) / 255 for i in (1, 3, 5))
    close = (abs(image[..., :3] - colour) < 0.02).all(axis=-1)
    assert (image.shape[:2], bool(close.sum() > 500)) == ((600, 800), True)


def test_compare_chart_holds_the_frontier(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """With --compare the SVG holds the frontier and one cumulative plan per preference."""
    chart = tmp_path / "frontier.svg"
    run(tmp_path, capsys, "--now", BEFORE, "--compare", "--chart", str(chart))
    ids = {element.get("id") for element in ET.parse(chart).getroot().iter()}
    assert {"frontier", "plan-low", "plan-medium", "plan-high", "volume-cumulative"} <= ids


def test_chart_extension_is_checked_first(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """--chart plan.pdf is refused with a one-line reason and exit 2."""
    code = main(["plan", "--order", str(write(tmp_path)), "--chart", str(tmp_path / "p.pdf")])
    assert (2, True) == (code, ".svg or .png" in capsys.readouterr().err)

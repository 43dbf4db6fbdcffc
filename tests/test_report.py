"""``tracker report``: what the end-of-day review says, checked against the data it came from."""

from __future__ import annotations

import json
import re
import xml.etree.ElementTree as ET
from datetime import time
from pathlib import Path
from typing import Any

import pytest

from tests.test_report_days import DayOrder, at, closed_loop_day, invented_market, iso, write_day
from tracker.cli import main
from tracker.report.analysis import OrderReview
from tracker.report.review import Report, anchor, build_report

ROOT = Path(__file__).resolve().parent.parent
GOLDEN_DAY = ROOT / "replay_data" / "day-2026-03-10-seed7.jsonl"
GOLDEN_OUTPUTS = ROOT / "replay_data" / "golden"
SVG = "{http://www.w3.org/2000/svg}"


@pytest.fixture(scope="module")
def golden(tmp_path_factory: pytest.TempPathFactory) -> Report:
    return build_report(GOLDEN_DAY, tmp_path_factory.mktemp("golden-report"))


def by_id(report: Report) -> dict[str, OrderReview]:
    return {r.order_id: r for r in report.orders}


# ------------------------------------------------------------------------ cost attribution

ORDER = {
    "type": "order",
    "action": "new",
    "order_id": "HW-1",
    "symbol": "ZZHW",
    "quantity": 1_000,
    "start": iso(at(time(9, 30))),
    "end": iso(at(time(9, 40))),
    "arrival_price": 10.00,
    "ts": iso(at(time(9, 29))),
}


def _bin(
    start: time, end: time, vwap: float, spread: float, o: float, h: float, lo: float, c: float
) -> dict[str, Any]:
    return {
        "topic": "tracker/bins/ZZHW",
        "ts": iso(at(end)),
        "payload": {
            "type": "bin",
            "symbol": "ZZHW",
            "start": iso(at(start)),
            "end": iso(at(end)),
            "volume": 50_000,
            "vwap": vwap,
            "open": o,
            "high": h,
            "low": lo,
            "close": c,
            "spread": spread,
            "ts": iso(at(end)),
        },
    }


def _fill(fill_id: str, clock: time, quantity: int, price: float) -> dict[str, Any]:
    return {
        "topic": "tracker/fills/HW-1",
        "ts": iso(at(clock)),
        "payload": {
            "type": "fill",
            "fill_id": fill_id,
            "order_id": "HW-1",
            "quantity": quantity,
            "price": price,
            "ts": iso(at(clock)),
        },
    }


def hand_day(tmp_path: Path, side: str) -> Path:
    """Two bins; 400 shares at 10.02 in the first, 300 at 10.06 in the second; 300 left."""
    lines = [
        {"topic": "tracker/orders/HW-1", "ts": ORDER["ts"], "payload": {**ORDER, "side": side}},
        _fill("F1", time(9, 32), 400, 10.02),
        _bin(time(9, 30), time(9, 35), 10.01, 0.02, 10.00, 10.03, 9.99, 10.02),
        _fill("F2", time(9, 37), 300, 10.06),
        _bin(time(9, 35), time(9, 40), 10.05, 0.04, 10.02, 10.09, 10.02, 10.08),
    ]
    path = tmp_path / "hand.jsonl"
    path.write_text("".join(json.dumps(line) + "\n" for line in lines), encoding="utf-8")
    return path


# Worked by hand (the module docstring of tracker.report.analysis gives the formulas):
# P0 = 10.00, X = 1,000; fill 1: q = 400, p = 10.02, V = 10.01, S = 0.02;
# fill 2: q = 300, p = 10.06, V = 10.05, S = 0.04; F = 700, P_end = 10.08 (last close).
# buy (s = +1):
#   spread      = 400 x 0.02/2 + 300 x 0.04/2                       =  4 +  6 = 10
#   impact      = 400 x (10.02 - 10.01) + 300 x (10.06 - 10.05) - 10 =  4 +  3 - 10 = -3
#   timing      = 400 x (10.01 - 10.00) + 300 x (10.05 - 10.00)      =  4 + 15 = 19
#   opportunity = 300 x (10.08 - 10.00)                              = 24
#   total       = 10 - 3 + 19 + 24 = 50 = 400 x 0.02 + 300 x 0.06 + 24 = 8 + 18 + 24;
#   in bps of X P0 = 10,000: 50 bps.
# sell (s = -1): spread 10 (always paid), impact -(4 + 3) - 10 = -17, timing -19,
#   opportunity -24, total -50 (a sell that sold below a rising price gained).
HAND = {
    "buy": {"spread": 10.0, "impact": -3.0, "timing": 19.0, "opportunity": 24.0, "total": 50.0},
    "sell": {
        "spread": 10.0,
        "impact": -17.0,
        "timing": -19.0,
        "opportunity": -24.0,
        "total": -50.0,
    },
}


@pytest.mark.parametrize("side", ["buy", "sell"])
def test_cost_attribution_worked_by_hand(tmp_path: Path, side: str) -> None:
    """Spread, impact, timing and opportunity of a two-bin order, as computed by hand above."""
    report = build_report(hand_day(tmp_path, side), tmp_path / "out")
    attribution = by_id(report)["HW-1"].attribution
    assert attribution is not None
    actual = {p.name: round(p.currency, 6) for p in attribution.parts}
    actual["total"] = round(attribution.total, 6)
    assert HAND[side] == actual
    assert pytest.approx(HAND[side]["total"] / 10_000 * 1e4) == attribution.total_bps


def test_parts_add_up_and_the_fills_agree_with_the_engine_summary(golden: Report) -> None:
    """Every order: the parts sum to the total; spread + impact + timing over the filled value
    is the engine summary's shortfall_bps (computed by the engine from its own fill book)."""
    for review in golden.orders:
        a = review.attribution
        assert a is not None and review.arrival_price and review.filled
        assert sum(p.currency for p in a.parts) == pytest.approx(a.total, abs=1e-6)
        executed_bps = a.executed / (review.filled * review.arrival_price) * 1e4
        assert executed_bps == pytest.approx(review.shortfall_bps, abs=1e-3), review.order_id


def test_parts_add_up_on_a_simulated_day_with_a_residual(tmp_path: Path) -> None:
    """A closed-loop day with a limit that leaves a residual: the parts still add up, and the
    opportunity part is the residual valued at the end price."""
    lines = closed_loop_day(
        [DayOrder("ZZ-L1", "ZZTA", "buy", 60_000, limit_price=20.05)],
        market=invented_market(["ZZTA"], drift=lambda k: 0.0004),
    )
    report = build_report(write_day(lines, tmp_path / "day.jsonl"), tmp_path / "out")
    review = by_id(report)["ZZ-L1"]
    a = review.attribution
    assert a is not None and review.residual > 0 and review.arrival_price
    parts = {p.name: p.currency for p in a.parts}
    expected = review.residual * (a.end_price - review.arrival_price)
    assert (sum(parts.values()), parts["opportunity"]) == (
        pytest.approx(a.total),
        pytest.approx(expected),
    )


# ------------------------------------------------------------------------------ findings


def test_router_filling_80_percent_in_the_afternoon_is_reported(tmp_path: Path) -> None:
    """The router fills every target until noon and 80 % after: one finding says so."""
    lines = closed_loop_day(
        [DayOrder("ZZ-B1", "ZZTA", "buy", 80_000, max_participation=0.25)],
        fill_rate=lambda clock: 1.0 if clock < time(12, 0) else 0.8,
    )
    report = build_report(write_day(lines, tmp_path / "day.jsonl"), tmp_path / "out")
    texts = [f.text for f in by_id(report)["ZZ-B1"].findings]
    runs = [
        re.match(r"From (\d\d:\d\d) to (\d\d:\d\d) the router filled ([\d.]+) %", t) for t in texts
    ]
    found = [(m.group(1), m.group(2), float(m.group(3))) for m in runs if m]
    assert [(start, end) for start, end, _ in found] == [("12:00", "16:00")], texts
    assert found[0][2] == pytest.approx(80.0, abs=0.5)


@pytest.fixture(scope="module")
def desk_day(tmp_path_factory: pytest.TempPathFactory) -> Report:
    """A day with a limit that blocks, a halt and resume, an amend and a cancel."""
    folder = tmp_path_factory.mktemp("desk-day")
    orders = [
        DayOrder("ZZ-L1", "ZZTA", "buy", 60_000, limit_price=20.05),
        DayOrder("ZZ-H1", "ZZTB", "sell", 20_000, urgency="low"),
        DayOrder("ZZ-C1", "ZZTB", "buy", 15_000, start=time(10, 0), end=time(15, 0)),
    ]
    desk = [
        (time(11, 0), "control", {"type": "control", "command": "halt", "order_id": "ZZ-H1"}),
        (time(11, 30), "control", {"type": "control", "command": "resume", "order_id": "ZZ-H1"}),
        (
            time(12, 0),
            "orders/ZZ-H1",
            {"type": "order", "action": "amend", "order_id": "ZZ-H1", "quantity": 25_000},
        ),
        (time(13, 0), "orders/ZZ-C1", {"type": "order", "action": "cancel", "order_id": "ZZ-C1"}),
    ]
    lines = closed_loop_day(
        orders, desk=desk, market=invented_market(["ZZTA", "ZZTB"], drift=lambda k: 0.0004)
    )
    return build_report(write_day(lines, folder / "day.jsonl"), folder / "out")


def test_desk_actions_and_causes_are_found(desk_day: Report) -> None:
    """Limit, halt, resume, amend, cancel and the residuals' causes appear in the findings."""
    text = {r.order_id: " ".join(f.text for f in r.findings) for r in desk_day.orders}
    expected = [True] * 7
    actual = [
        "The limit price 20.0500 blocked trading" in text["ZZ-L1"],
        "the limit blocked" in text["ZZ-L1"],
        "11:00: halted" in text["ZZ-H1"],
        "11:30: resumed" in text["ZZ-H1"],
        "12:00: amended (quantity 20,000 to 25,000)" in text["ZZ-H1"],
        "13:00: cancelled by the desk" in text["ZZ-C1"],
        "the desk cancelled the order" in text["ZZ-C1"],
    ]
    assert expected == actual, text


def test_orders_with_problems_come_first(desk_day: Report) -> None:
    """The desk table lists orders with problems before the others."""
    flags = [bool(r.problems) for r in desk_day.orders]
    assert flags == sorted(flags, reverse=True) and flags[0]


# ------------------------------------------------------------------------------ the page


def test_every_order_has_its_section_charts_and_cost_table(golden: Report) -> None:
    """Each order: a linked section, five charts (inline and as files), a cost table."""
    html = golden.html.read_text(encoding="utf-8")
    for review in golden.orders:
        section = html.split(f'id="{anchor(review.order_id)}"', 1)[1].split("</section>", 1)[0]
        assert f'href="#{anchor(review.order_id)}"' in html
        assert section.count('<figure class="chart"') == 5
        assert '<table class="cost">' in section
    assert len(golden.charts) == 5 * len(golden.orders)


def test_progress_chart_holds_every_plan_version(golden: Report) -> None:
    """The progress SVG parses and holds the first plan, realized, market volume and one faint
    path per re-plan (X_ZEPH-B1 was planned 78 times: 77 re-plans)."""
    path = next(p for p in golden.charts if p.name == "X_ZEPH-B1-progress.svg")
    root = ET.parse(path).getroot()
    groups = {g.get("id"): g for g in root.iter(f"{SVG}g")}
    replans = groups["replans"].find(f"{SVG}path")
    assert replans is not None
    assert {"first-plan", "realized", "market-volume", "replans"} <= set(groups)
    assert replans.get("d", "").count("M") == 77


def test_no_outside_reference_and_no_script(golden: Report) -> None:
    """The page loads nothing: no script, no link, no http(s) URL outside the SVG namespace."""
    html = golden.html.read_text(encoding="utf-8")
    urls = set(re.findall(r"https?://[^\s\"'<>]+", html)) - {"http://www.w3.org/2000/svg"}
    assert ("<script" in html, "<link" in html, urls) == (False, False, set())


def test_times_are_venue_local_with_the_zone_named(golden: Report) -> None:
    """X_ZEPH-B1 starts 09:30 New York time (13:30 UTC on the wire); the zone is named."""
    html = golden.html.read_text(encoding="utf-8")
    assert "2026-03-10 09:30 to 16:00 America/New_York" in html
    assert "Times are venue local time: America/New_York" in html


def test_an_output_folder_says_what_is_not_available(tmp_path: Path) -> None:
    """From the golden output folder: sections and the fill-rate finding, but no attribution."""
    report = build_report(GOLDEN_OUTPUTS, tmp_path)
    html = report.html.read_text(encoding="utf-8")
    zeph = by_id(report)["X_ZEPH-B1"]
    assert (zeph.attribution, "Cost attribution: not available" in html) == (None, True)
    assert any("the router filled" in f.text.lower() for f in zeph.findings)
    assert len(report.orders) == 4


def test_cli_writes_the_report_and_names_the_problems(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """tracker report prints the count and the orders with problems; exit 0."""
    code = main(["report", str(GOLDEN_OUTPUTS), "--out", str(tmp_path)])
    out = capsys.readouterr().out
    assert (code, "4 orders" in out, (tmp_path / "report.html").exists()) == (0, True, True)


def test_cli_missing_input_is_one_line_and_exit_2(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """A path that does not exist: one line naming INPUT, exit code 2."""
    code = main(["report", str(tmp_path / "nope.jsonl"), "--out", str(tmp_path / "o")])
    err = capsys.readouterr().err
    assert (code, "INPUT" in err, len(err.strip().splitlines())) == (2, True, 1)


def test_tolerant_reading_of_outputs(tmp_path: Path) -> None:
    """Unknown fields are ignored, missing optional ones handled, bad lines skipped."""
    folder = tmp_path / "outputs"
    folder.mkdir()
    for name in ("targets", "alerts", "errors"):
        (folder / f"{name}.jsonl").write_text(
            (GOLDEN_OUTPUTS / f"{name}.jsonl").read_text(encoding="utf-8"), encoding="utf-8"
        )
    status = []
    for line in (GOLDEN_OUTPUTS / "status.jsonl").read_text(encoding="utf-8").splitlines():
        item = json.loads(line)
        item["future_field"] = {"nested": 1}
        item.pop("deviation_bins", None)
        status.append(json.dumps(item))
    status.append("not json")
    (folder / "status.jsonl").write_text("\n".join(status) + "\n", encoding="utf-8")
    report = build_report(folder, tmp_path / "out")
    assert (len(report.orders), report.day.skipped) == (4, 1)


def test_a_journal_gives_the_same_review_as_its_recording(golden: Report, tmp_path: Path) -> None:
    """The golden day written to a daemon journal: same orders, findings and cost totals."""
    from tracker.edge.records import payload_bytes
    from tracker.shell.journal import Journal

    path = tmp_path / "journal.sqlite"
    with Journal(path) as journal:
        for line in GOLDEN_DAY.read_text(encoding="utf-8").splitlines():
            item = json.loads(line)
            journal.append(item["topic"], payload_bytes(item["payload"]), item["ts"])
    report = build_report(path, tmp_path / "out")

    def facts(r: Report) -> list[tuple[str, list[str], float | None]]:
        return [
            (o.order_id, [f.text for f in o.findings], o.attribution and o.attribution.total)
            for o in r.orders
        ]

    assert (report.day.source, facts(report)) == ("journal", facts(golden))


def test_the_observed_replay_writes_the_golden_files(tmp_path: Path) -> None:
    """--keep-replay: the replay under the report's observer is byte for byte the golden one."""
    assert 0 == main(["report", str(GOLDEN_DAY), "--out", str(tmp_path), "--keep-replay"])
    names = ("targets.jsonl", "alerts.jsonl", "status.jsonl", "errors.jsonl", "summary.json")
    written = [(tmp_path / "replay" / name).read_bytes() for name in names]
    assert [(GOLDEN_OUTPUTS / name).read_bytes() for name in names] == written


def test_no_scientific_notation_in_what_the_report_writes(golden: Report) -> None:
    """Findings, cost tables, facts and axis labels are plain numbers (1,234.5, never 1.2e+03).

    The engine's own alert messages are quoted as they are and left out of this check.
    """
    html = golden.html.read_text(encoding="utf-8")
    mine = [f.text for r in golden.orders for f in r.findings]
    tables = re.findall(r'<table class="(?:cost|bins)">.*?</table>', html, flags=re.S)
    labels = re.findall(r"<text[^>]*>([^<]*)</text>", html)
    found = [t for t in (*mine, *tables, *labels) if re.search(r"\d[eE][+-]?\d", t)]
    assert found == []

"""The review opened in a real browser (headless Chromium): it renders, logs no error, fetches
nothing outside the file, and shows every order's section, charts and cost table.

Chromium runs with no network of its own: every host name resolves to nothing except 127.0.0.1,
and its background services are off. Requests are read from its network log (``--log-net-log``):
a request made for the page carries the page's ``file://`` origin in its network isolation key.
Console messages come from its log (``--enable-logging=stderr``). A control page with a console
error and an image on 127.0.0.1 shows that both checks can fail.
"""

from __future__ import annotations

import json
import shutil
import subprocess
from datetime import time
from html.parser import HTMLParser
from pathlib import Path

import pytest

from tests.test_report_days import DayOrder, closed_loop_day, invented_market, write_day
from tracker.report.review import Report, anchor, build_report

ROOT = Path(__file__).resolve().parent.parent
GOLDEN_DAY = ROOT / "replay_data" / "day-2026-03-10-seed7.jsonl"
CHROMIUM = shutil.which("chromium") or shutil.which("chromium-browser")

pytestmark = pytest.mark.skipif(
    CHROMIUM is None,
    reason="headless Chromium is not installed (Debian: apt-get install -y chromium)",
)

FLAGS = [
    "--headless",
    "--no-sandbox",
    "--disable-gpu",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
    "--no-first-run",
    "--host-resolver-rules=MAP * ~NOTFOUND, EXCLUDE 127.0.0.1",
]


def browse(page: Path, work: Path, *extra: str) -> subprocess.CompletedProcess[str]:
    """Run headless Chromium on a file with a fresh profile; return the finished process."""
    assert CHROMIUM is not None
    profile = work / f"profile-{len(list(work.glob('profile-*')))}"
    return subprocess.run(
        [CHROMIUM, *FLAGS, f"--user-data-dir={profile}", *extra, page.resolve().as_uri()],
        capture_output=True,
        text=True,
        timeout=120,
        check=False,
    )


def console_messages(stderr: str) -> list[str]:
    """The page's console messages in Chromium's log."""
    return [line for line in stderr.splitlines() if ":CONSOLE" in line]


def page_requests(net_log: Path) -> list[str]:
    """URLs the page asked for that are not files (from Chromium's network log)."""
    data = json.loads(net_log.read_text(encoding="utf-8"))
    start_job = data["constants"]["logEventTypes"]["URL_REQUEST_START_JOB"]
    urls = []
    for event in data["events"]:
        params = event.get("params") or {}
        if event.get("type") != start_job or "url" not in params:
            continue
        if "file://" in str(params.get("network_isolation_key", "")) and not str(
            params["url"]
        ).startswith("file:"):
            urls.append(str(params["url"]))
    return urls


def open_page(page: Path, work: Path) -> tuple[Path, list[str], list[str], str]:
    """Screenshot, console messages, outside requests and the DOM of a page."""
    shot, net = work / f"{page.stem}.png", work / f"{page.stem}-net.json"
    shown = browse(
        page,
        work,
        "--enable-logging=stderr",
        "--log-level=0",
        f"--log-net-log={net}",
        "--window-size=1280,2200",
        f"--screenshot={shot}",
    )
    assert shot.exists(), shown.stderr[-2000:]
    dom = browse(page, work, "--dump-dom").stdout
    return shot, console_messages(shown.stderr), page_requests(net), dom


class Elements(HTMLParser):
    """Ids of sections, and per section the charts and cost tables it holds."""

    def __init__(self) -> None:
        super().__init__()
        self.current: str | None = None
        self.found: dict[str, dict[str, int]] = {}

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        values = dict(attrs)
        if tag == "section" and values.get("class") == "order":
            self.current = values.get("id")
            self.found[self.current or ""] = {"svg": 0, "cost": 0}
        elif self.current is not None and tag == "svg":
            self.found[self.current]["svg"] += 1
        elif self.current is not None and tag == "table" and values.get("class") == "cost":
            self.found[self.current]["cost"] += 1


def check(report: Report, work: Path) -> Path:
    shot, console, requests, dom = open_page(report.html, work)
    parser = Elements()
    parser.feed(dom)
    expected = {anchor(r.order_id): {"svg": 5, "cost": 1} for r in report.orders}
    assert (console, requests) == ([], [])
    assert expected == parser.found
    import matplotlib.image

    image = matplotlib.image.imread(shot)
    assert image.shape[1] == 1280 and float(image[..., :3].std()) > 0.05  # not a blank page
    return shot


def test_the_checks_catch_a_console_error_and_an_outside_request(tmp_path: Path) -> None:
    """Control: a page that logs an error and loads an image from 127.0.0.1 fails both checks."""
    page = tmp_path / "control.html"
    page.write_text(
        '<!DOCTYPE html><html><body><script>console.error("control error")</script>'
        '<img src="http://127.0.0.1:9/outside.png"></body></html>',
        encoding="utf-8",
    )
    _, console, requests, _ = open_page(page, tmp_path)
    assert (len(console), requests) == (1, ["http://127.0.0.1:9/outside.png"])


def test_golden_day_report_in_a_browser(tmp_path: Path) -> None:
    """The golden day's review renders cleanly with every order's section, charts and costs."""
    report = build_report(GOLDEN_DAY, tmp_path / "report")
    check(report, tmp_path)


def test_desk_day_report_in_a_browser(tmp_path: Path) -> None:
    """A day with a limit, a halt, an amend, a cancel and residuals renders cleanly too."""
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
    report = build_report(write_day(lines, tmp_path / "day.jsonl"), tmp_path / "report")
    check(report, tmp_path)

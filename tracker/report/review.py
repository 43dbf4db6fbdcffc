"""The end-of-day review: one self-contained HTML file and the charts as SVG files.

:func:`build_report` reads the input (:mod:`tracker.report.day`), works out every order
(:mod:`tracker.report.analysis`), draws its charts (:mod:`tracker.report.charts`) and writes
``DIR/report.html`` (CSS and charts inline, no script, no link leaving the file) and
``DIR/charts/ORDER-NAME.svg``. The first section is the desk's table of every order, problems
first, each linking to the order's section. Times are the venue's local time, with the zone named.
"""

from __future__ import annotations

import re
from collections.abc import Mapping
from dataclasses import dataclass
from datetime import datetime
from html import escape
from pathlib import Path
from typing import Any

from tracker.core.profiles import Profile
from tracker.errors import InputError
from tracker.report.analysis import BinRow, OrderReview, review_day
from tracker.report.charts import CHARTS
from tracker.report.day import ReviewDay, parse_time, read_outputs, read_recording

NOT_AVAILABLE = "not available"

STYLE = """
body{font-family:system-ui,-apple-system,"Segoe UI",sans-serif;margin:0 auto;max-width:1100px;
padding:16px 24px;color:#222;line-height:1.4}
h1{font-size:1.5em;margin:.2em 0}h2{font-size:1.25em;margin-top:1.6em;border-bottom:2px solid #ccd}
h3{font-size:1.05em;margin:1.1em 0 .4em}
table{border-collapse:collapse;font-size:.86em;margin:.4em 0}
th,td{border:1px solid #ccd;padding:2px 6px;text-align:right;white-space:nowrap}
th{background:#eef1f7}td.l,th.l{text-align:left;white-space:normal}
tr.problem td{background:#fff1ec}tr.problem td:first-child{border-left:4px solid #d9480f}
.tag{display:inline-block;background:#d9480f;color:#fff;border-radius:3px;padding:0 5px;
margin-right:3px;font-size:.85em}
.note{color:#555;font-size:.9em}.na{color:#888;font-style:italic}
ul.findings li.problem{color:#a52a00;font-weight:600}
figure{margin:.6em 0}svg{max-width:100%;height:auto}
dl.facts{display:grid;grid-template-columns:max-content auto;gap:2px 14px;margin:.4em 0}
dl.facts dt{color:#555}dl.facts dd{margin:0}
section.order{border-top:1px solid #ccd;margin-top:2em}
a.back{font-size:.85em}
"""


@dataclass(frozen=True)
class Report:
    """What :func:`build_report` wrote."""

    html: Path
    charts: list[Path]
    orders: list[OrderReview]
    day: ReviewDay


def load(
    path: Path,
    out_dir: Path,
    *,
    profiles: Mapping[str, Profile] | None = None,
    config: Any = None,
    root: str | None = None,
    keep_replay: bool = False,
) -> ReviewDay:
    """Read INPUT: a replay output folder, or a recording/journal to replay first.

    Raises:
        InputError: The input does not exist or cannot be read.
    """
    if path.is_dir():
        return read_outputs(path, profiles)
    if not path.exists():
        raise InputError(
            f"{path} does not exist: give a replay output folder, a recording (.jsonl) or a "
            "journal",
            field="INPUT",
        )
    return read_recording(
        path, out_dir, profiles=profiles, config=config, root=root, keep_replay=keep_replay
    )


def build_report(
    path: Path,
    out_dir: Path,
    *,
    profiles: Mapping[str, Profile] | None = None,
    config: Any = None,
    root: str | None = None,
    keep_replay: bool = False,
) -> Report:
    """Write ``out_dir/report.html`` and ``out_dir/charts/*.svg`` for the day in ``path``.

    Args:
        path: A replay output folder, a JSON Lines recording or a daemon journal.
        out_dir: The report folder (created).
        profiles: Liquidity profiles by symbol (their sessions set the venue's timezone).
        config: Engine settings for the replay of a recording.
        root: MQTT topic root of the recording.
        keep_replay: For a recording, also write the replay's files to ``out_dir/replay``.

    Returns:
        The paths written and the reviews.

    Raises:
        InputError: The input cannot be read or the folder written.
    """
    try:
        out_dir.mkdir(parents=True, exist_ok=True)
        (out_dir / "charts").mkdir(exist_ok=True)
    except OSError as exc:
        raise InputError(f"cannot write to {out_dir}: {exc.strerror}", field="--out") from exc
    day = load(path, out_dir, profiles=profiles, config=config, root=root, keep_replay=keep_replay)
    reviews = review_day(day)
    written: list[Path] = []
    sections: list[str] = []
    for review in reviews:
        svgs: list[tuple[str, str | None]] = []
        for name, draw in CHARTS:
            svg = draw(review)
            svgs.append((name, svg))
            if svg is not None:
                target = out_dir / "charts" / f"{_file_id(review.order_id)}-{name}.svg"
                _write(target, svg)
                written.append(target)
        sections.append(_order_section(day, review, svgs))
    html = _page(day, reviews, sections)
    report = out_dir / "report.html"
    _write(report, html)
    return Report(html=report, charts=written, orders=reviews, day=day)


def _write(path: Path, text: str) -> None:
    try:
        path.write_text(text, encoding="utf-8")
    except OSError as exc:
        raise InputError(f"cannot write {path}: {exc.strerror}", field="--out") from exc


def _file_id(order_id: str) -> str:
    return re.sub(r"[^A-Za-z0-9._-]", "_", order_id) or "order"


def anchor(order_id: str) -> str:
    """The id of an order's section in the page."""
    return f"order-{_file_id(order_id)}"


# ------------------------------------------------------------------------------ formatting


def _shares(value: float | int | None) -> str:
    return NOT_AVAILABLE if value is None else f"{value:,.0f}"


def _money(value: float | None) -> str:
    return NOT_AVAILABLE if value is None else f"{value:,.2f}"


def _price(value: float | None) -> str:
    return NOT_AVAILABLE if value is None else f"{value:,.4f}"


def _bps(value: float | None) -> str:
    return NOT_AVAILABLE if value is None else f"{value:,.1f}"


def _pct(value: float | None) -> str:
    return NOT_AVAILABLE if value is None else f"{100 * value:.1f} %"


_PLAIN = re.compile(r"[-0-9.,% ]*")


def _cell(text: str, left: bool = False) -> str:
    if text == NOT_AVAILABLE:
        return f'<td class="{"l na" if left else "na"}">{NOT_AVAILABLE}</td>'
    if not left and _PLAIN.fullmatch(text):  # a number: nothing to escape
        return f"<td>{text}</td>"
    return f"<td{' class=l' if left else ''}>{escape(text)}</td>"


def _local(day: ReviewDay, symbol: str, value: Any) -> str:
    ts = value if isinstance(value, datetime) else parse_time(value)
    if ts is None:
        return NOT_AVAILABLE
    return f"{day.session(symbol).local(ts):%H:%M:%S}"


# ------------------------------------------------------------------------------ the page


def _page(day: ReviewDay, reviews: list[OrderReview], sections: list[str]) -> str:
    zones = sorted({r.timezone for r in reviews}) or [day.session("?").timezone]
    dates = sorted({f"{r.bins[0].start:%Y-%m-%d}" for r in reviews if r.bins})
    title = f"End-of-day review {', '.join(dates) or ''}".strip()
    source = {
        "outputs": "a replay output folder (market bins, fills and plan versions are not in it)",
        "recording": "a recording, replayed for this report",
        "journal": "a daemon journal, replayed for this report",
    }.get(day.source, day.source)
    problems = sum(1 for r in reviews if r.problems)
    head = (
        f"<h1>{escape(title)}</h1>"
        f'<p class="note">Input: {escape(str(day.input))} ({escape(source)}). Times are venue '
        f"local time: {escape(', '.join(zones))}. Costs are positive when they cost, for buys "
        "and sells alike; bps are basis points of the order's value at its arrival price."
        + (f" {day.skipped} unreadable output lines were skipped." if day.skipped else "")
        + "</p>"
        f"<p>{len(reviews)} orders, {problems} with problems (listed first).</p>"
    )
    return (
        '<!DOCTYPE html><html lang="en"><head><meta charset="utf-8">'
        '<meta name="viewport" content="width=device-width, initial-scale=1">'
        f"<title>{escape(title)}</title><style>{STYLE}</style></head><body>"
        f'<header id="top">{head}</header>'
        f"{_desk_table(day, reviews)}{_day_notes(day)}{''.join(sections)}"
        '<p class="note">tracker advises; it does not place orders. This review is for '
        "supervised use by an execution desk.</p></body></html>\n"
    )


def _desk_table(day: ReviewDay, reviews: list[OrderReview]) -> str:
    rows = []
    for r in reviews:
        a = r.attribution
        cost = _bps(a.total_bps) if a is not None else _bps(r.shortfall_bps)
        expected = (
            f"{_bps(a.expected_bps)} ± {_bps(a.expected_std_bps)}"
            if a is not None and a.expected_bps is not None and a.expected_std_bps is not None
            else _bps(a.expected_bps)
            if a is not None
            else NOT_AVAILABLE
        )
        tags = "".join(f'<span class="tag">{escape(t)}</span>' for t in r.problems) or "none"
        rows.append(
            f"<tr{' class=problem' if r.problems else ''}>"
            f'<td class="l"><a href="#{anchor(r.order_id)}">{escape(r.order_id)}</a></td>'
            + _cell(r.symbol, True)
            + _cell(r.side, True)
            + _cell(_shares(r.quantity))
            + _cell(_shares(r.filled))
            + _cell(_shares(r.residual))
            + _cell(r.state, True)
            + _cell(cost)
            + _cell(expected)
            + _cell(str(len(r.critical_alerts)))
            + _cell(str(len(r.errors)))
            + f'<td class="l">{tags}</td></tr>'
        )
    cost_note = (
        "cost against arrival, bps (fills and the unexecuted shares at the end price)"
        if day.source != "outputs"
        else "shortfall of the fills against arrival, bps (engine summary)"
    )
    return (
        '<section id="desk"><h2>Every order, problems first</h2>'
        '<p class="note">Problems: a residual (shares not executed), a critical alert, a cost '
        "more "
        "than two standard deviations above the plan's expected cost, rejected messages. "
        f"Cost: {escape(cost_note)}; expected: the first plan's expected cost ± its standard "
        "deviation, bps.</p>"
        "<table><thead><tr><th class=l>order</th><th class=l>symbol</th><th class=l>side</th>"
        "<th>quantity</th><th>filled</th><th>residual</th><th class=l>state</th>"
        "<th>cost bps</th><th>expected bps</th><th>critical alerts</th><th>errors</th>"
        f"<th class=l>problems</th></tr></thead><tbody>{''.join(rows)}</tbody></table></section>"
    )


def _day_notes(day: ReviewDay) -> str:
    """Errors that name no order and alerts about a symbol as a whole."""
    orphan = [e for e in day.errors if not isinstance(e.get("order_id"), str)]
    symbol_alerts = [a for a in day.alerts if not isinstance(a.get("order_id"), str)]
    if not orphan and not symbol_alerts:
        return ""
    parts = ['<section id="day"><h2>The day as a whole</h2>']
    if symbol_alerts:
        parts.append(_alert_table(day, symbol_alerts, "Alerts about a symbol"))
    if orphan:
        parts.append(_error_table(day, orphan, "Rejected messages that name no order", "?"))
    parts.append("</section>")
    return "".join(parts)


def _order_section(day: ReviewDay, review: OrderReview, svgs: list[tuple[str, str | None]]) -> str:
    verb = "buy" if review.side == "buy" else "sell"
    facts = [
        ("state", review.state),
        ("filled", f"{review.filled:,} of {review.quantity:,} shares"),
        ("window", _window(review)),
        ("arrival price", _price(review.arrival_price)),
        ("average fill price", _price(review.average_price)),
        ("limit price", "none" if review.limit_price is None else _price(review.limit_price)),
        (
            "participation cap",
            "none" if review.max_participation is None else _pct(review.max_participation),
        ),
        ("fills against arrival (engine)", f"{_bps(review.shortfall_bps)} bps"),
        ("fills against interval VWAP (engine)", f"{_bps(review.vwap_bps)} bps"),
        ("plan versions", str(len(review.plans)) if review.plans else NOT_AVAILABLE),
    ]
    fact_list = "".join(f"<dt>{escape(k)}</dt><dd>{escape(v)}</dd>" for k, v in facts)
    findings = "".join(
        f"<li{' class=problem' if f.problem else ''}>{escape(f.text)}</li>" for f in review.findings
    )
    figures = []
    for name, svg in svgs:
        if svg is None:
            figures.append(
                f'<p class="na">Chart "{escape(name)}": {NOT_AVAILABLE} (the input holds no '
                "market bins or fills).</p>"
            )
        else:
            figures.append(f'<figure class="chart" data-chart="{escape(name)}">{svg}</figure>')
    symbol_alerts = [
        a
        for a in day.alerts
        if not isinstance(a.get("order_id"), str) and a.get("symbol") == review.symbol
    ]
    return (
        f'<section class="order" id="{anchor(review.order_id)}">'
        f"<h2>{escape(review.order_id)}: {verb} {review.quantity:,} {escape(review.symbol)}"
        f"{''.join(f' <span class=tag>{escape(t)}</span>' for t in review.problems)}</h2>"
        f'<dl class="facts">{fact_list}</dl>'
        f'<h3>What happened</h3><ul class="findings">{findings}</ul>'
        f"<h3>Cost against arrival</h3>{_cost_table(day, review)}"
        f"<h3>Charts</h3>{''.join(figures)}"
        f"{_bin_table(day, review)}"
        f"{_alert_table(day, review.alerts + symbol_alerts, 'Alert timeline')}"
        f"{_error_table(day, review.errors, 'Rejected messages naming the order', review.symbol)}"
        '<p><a class="back" href="#desk">back to every order</a></p></section>'
    )


def _window(review: OrderReview) -> str:
    if review.start is None or review.end is None:
        if review.bins:
            return (
                f"{review.bins[0].start:%Y-%m-%d %H:%M} to {review.bins[-1].end:%H:%M} "
                f"{review.timezone} (from the targets)"
            )
        return NOT_AVAILABLE
    return f"{review.start:%Y-%m-%d %H:%M} to {review.end:%H:%M} {review.timezone}"


def _cost_table(day: ReviewDay, review: OrderReview) -> str:
    a = review.attribution
    if a is None:
        reason = (
            "the input is a replay output folder, which holds no fills or market bins; give the "
            "recording to attribute the cost"
            if day.source == "outputs"
            else "no arrival price or no market bins for the order"
        )
        return (
            f'<p class="na" data-cost="{NOT_AVAILABLE}">Cost attribution: {NOT_AVAILABLE} '
            f"({escape(reason)}). The engine's summary: fills {_bps(review.shortfall_bps)} bps "
            f"against arrival, {_bps(review.vwap_bps)} bps against the interval VWAP.</p>"
        )
    rows = "".join(
        "<tr>"
        + _cell(p.name, True)
        + _cell(_money(p.currency))
        + _cell(_bps(p.bps))
        + _cell(p.meaning, True)
        + "</tr>"
        for p in a.parts
    )
    expected = ""
    if a.expected is not None:
        std = (
            f", standard deviation {_money(a.expected_std)} ({_bps(a.expected_std_bps)} bps)"
            if a.expected_std is not None
            else f", standard deviation {NOT_AVAILABLE}"
        )
        expected = (
            f"<p>The first plan expected {_money(a.expected)} ({_bps(a.expected_bps)} bps: half "
            f"spread, fees and impact, not the risk term){std}. "
            f"The day cost {_bps(a.total_bps)} bps"
            + (": far above expected." if a.far_above_expected else ".")
            + "</p>"
        )
    unpriced = (
        f'<p class="note">{a.unpriced_fills} fills fell outside every recorded bin: counted '
        "wholly as timing.</p>"
        if a.unpriced_fills
        else ""
    )
    return (
        '<table class="cost"><thead><tr><th class=l>part</th><th>currency</th><th>bps</th>'
        f"<th class=l>what it is (positive = a cost)</th></tr></thead><tbody>{rows}"
        f"<tr><th class=l>total</th><th>{_money(a.total)}</th><th>{_bps(a.total_bps)}</th>"
        '<th class="l">shortfall against arrival: the parts add up to it</th></tr></tbody>'
        f"</table>{expected}{unpriced}"
    )


def _bin_table(day: ReviewDay, review: OrderReview) -> str:
    if not review.bins:
        return f'<p class="na">Per bin: {NOT_AVAILABLE} (no targets or window).</p>'
    market = review.has_market
    head = [
        "time",
        "target",
        "cap (shares)",
        "filled",
        "fill rate",
    ]
    if market:
        head += [
            "forecast volume",
            "market volume",
            "participation",
            "fill price",
            "bin VWAP",
            "fills vs VWAP bps",
            "forecast spread",
            "spread",
        ]
    head.append("notes")
    rows = []
    sign = 1.0 if review.side == "buy" else -1.0
    for r in review.bins:
        cells = [
            _cell(f"{r.start:%H:%M}-{r.end:%H:%M}", True),
            _cell(_shares(r.target)),
            _cell("none" if r.cap_quantity is None else _shares(r.cap_quantity)),
            _cell(_shares(r.filled)),
            _cell("" if r.fill_rate is None else _pct(r.fill_rate)),
        ]
        if market:
            versus = (
                sign * (r.fill_price - r.vwap) / r.vwap * 1e4
                if r.fill_price is not None and r.vwap
                else None
            )
            cells += [
                _cell(_shares(r.forecast_volume)),
                _cell(_shares(r.volume)),
                _cell(_pct(r.participation)),
                _cell("" if r.fill_price is None else _price(r.fill_price)),
                _cell(_price(r.vwap)),
                _cell("" if versus is None else _bps(versus)),
                _cell(_price(r.forecast_spread)),
                _cell(_price(r.spread)),
            ]
        cells.append(_cell(_notes(r), True))
        low = r.fill_rate is not None and r.fill_rate < 0.95 and not r.halted
        rows.append(f"<tr{' class=problem' if low else ''}>{''.join(cells)}</tr>")
    note = (
        ""
        if market
        else f'<p class="na">Forecast and market volume, participation, fill prices, VWAP and '
        f"spread: {NOT_AVAILABLE} (the input is a replay output folder; filled per bin comes "
        "from the status messages).</p>"
    )
    header = "".join(f"<th{' class=l' if h in ('time', 'notes') else ''}>{h}</th>" for h in head)
    return (
        f"<details><summary>Per bin ({len(review.bins)} bins; under-filled bins marked)"
        f'</summary>{note}<table class="bins"><thead><tr>{header}</tr></thead>'
        f"<tbody>{''.join(rows)}</tbody></table></details>"
    )


def _notes(row: BinRow) -> str:
    notes = []
    if row.cap_bound:
        notes.append("cap bound")
    if row.limit_bound:
        notes.append("limit bound")
    if row.halted:
        notes.append("halted")
    return ", ".join(notes)


def _alert_table(day: ReviewDay, alerts: list[dict[str, Any]], title: str) -> str:
    if not alerts:
        return f"<h3>{escape(title)}</h3><p>None.</p>"
    ordered = sorted(alerts, key=lambda a: str(a.get("ts", "")))
    rows = "".join(
        "<tr>"
        + _cell(_local(day, str(a.get("symbol") or "?"), a.get("ts")), True)
        + _cell(str(a.get("code", "")), True)
        + _cell(str(a.get("severity", "")), True)
        + _cell(str(a.get("state", "raised")), True)
        + _cell(str(a.get("message", "")), True)
        + "</tr>"
        for a in ordered
    )
    return (
        f'<h3>{escape(title)}</h3><table class="alerts"><thead><tr><th class=l>time</th>'
        "<th class=l>code</th><th class=l>severity</th><th class=l>raised or cleared</th>"
        f"<th class=l>message</th></tr></thead><tbody>{rows}</tbody></table>"
    )


def _error_table(day: ReviewDay, errors: list[dict[str, Any]], title: str, symbol: str) -> str:
    if not errors:
        return f"<h3>{escape(title)}</h3><p>None.</p>"
    rows = "".join(
        "<tr>"
        + _cell(_local(day, symbol, e.get("ts")), True)
        + _cell(str(e.get("line", "")))
        + _cell(str(e.get("topic", "")), True)
        + _cell(str(e.get("reason", "")), True)
        + "</tr>"
        for e in errors
    )
    return (
        f'<h3>{escape(title)}</h3><table class="errors"><thead><tr><th class=l>time</th>'
        "<th>line</th><th class=l>topic</th><th class=l>reason</th></tr></thead>"
        f"<tbody>{rows}</tbody></table>"
    )

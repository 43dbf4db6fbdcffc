"""The charts of one order in the review: progress, bins, participation and prices (SVG text).

Each function returns the SVG of one chart (:class:`tracker.report.svg.Chart`), or ``None`` when the
data it needs is not in the input. Series ids (``<g id=...>``) name what they hold.
"""

from __future__ import annotations

from tracker.report.analysis import OrderReview
from tracker.report.svg import Chart

PLAN = "#1f5fa8"
REPLAN = "#6b8fc4"
REALIZED = "#d9480f"
MARKET = "#8a8a8a"
TARGET = "#a9c4e8"
FILLED = "#1f5fa8"
CAP = "#c0392b"
LIMIT = "#7b2cbf"
ARRIVAL = "#2b8a3e"


def _chart(review: OrderReview, title: str, y_label: str, height: int = 260) -> Chart | None:
    if not review.bins:
        return None
    start, end = review.bins[0].start, review.bins[-1].end
    return Chart(title, y_label, start, end, start.tzinfo or end.tzinfo, height=height)  # type: ignore[arg-type]


def progress(review: OrderReview) -> str | None:
    """Cumulative % of the order: every plan version faint, the first plan and realized strong,
    and the market's cumulative volume (% of the window's volume) on the same axis."""
    chart = _chart(review, f"{review.order_id}: plan against realized", "% of the order")
    if chart is None or review.quantity <= 0:
        return None
    scale = 100.0 / review.quantity
    chart.include(0.0, 100.0)
    market = [(t, 100.0 * v) for t, v in review.market_curve]
    plans = review.plans
    for plan in plans:
        chart.include(float(plan.values.min()) * scale, float(plan.values.max()) * scale)
    realized = [(t, v * scale) for t, v in review.realized]
    chart.include(*(v for _, v in realized))
    baseline = [(t, v * scale) for t, v in review.baseline]
    if not plans:
        chart.include(*(v for _, v in baseline))
    if market:
        label = "market volume, % of the window's"
        if "profile" in review.market_curve_source:
            label += " (profile)"
        chart.line(market, gid="market-volume", colour=MARKET, width=1.5, dash="3 3", label=label)
    if len(plans) > 1:
        chart.edge_paths(
            review.edges,
            [(p.first_edge, p.values * scale) for p in plans[1:]],
            gid="replans",
            colour=REPLAN,
            width=1.0,
            opacity=0.25,
            label=f"re-plans ({len(plans) - 1})",
        )
    if plans:
        first = [(t, v * scale) for t, v in plans[0].points(review.edges)]
        chart.line(first, gid="first-plan", colour=PLAN, width=2.5, label="first plan")
    elif baseline:
        chart.line(
            baseline,
            gid="first-plan",
            colour=PLAN,
            width=2.5,
            steps=True,
            label="baseline plan (from the status; re-plans not available)",
        )
    chart.line(realized, gid="realized", colour=REALIZED, width=2.5, label="realized")
    return chart.render()


def bins(review: OrderReview) -> str | None:
    """Per bin: the target and what was filled (shares), and the cap in shares."""
    chart = _chart(review, f"{review.order_id}: target and filled per bin", "shares per bin")
    if chart is None:
        return None
    rows = review.bins
    chart.include(0.0, *(r.target for r in rows), *(r.filled for r in rows))
    chart.include(*(r.cap_quantity for r in rows if r.cap_quantity is not None))
    chart.bars(
        [(r.start, r.end, float(r.target or 0)) for r in rows],
        gid="target",
        colour=TARGET,
        label="target",
        share=(0.0, 0.5),
    )
    chart.bars(
        [(r.start, r.end, float(r.filled)) for r in rows],
        gid="filled",
        colour=FILLED,
        label="filled",
        share=(0.5, 1.0),
    )
    caps = [(r.start, r.end, float(r.cap_quantity)) for r in rows if r.cap_quantity is not None]
    if caps:
        points = [p for start, end, v in caps for p in ((start, v), (end, v))]
        chart.line(points, gid="cap", colour=CAP, width=1.2, dash="4 3", label="cap (shares)")
    return chart.render()


def participation(review: OrderReview) -> str | None:
    """Per bin: filled as % of the market's volume, against the cap; None without market bins."""
    if not review.has_market:
        return None
    chart = _chart(review, f"{review.order_id}: participation", "% of the bin's volume", 220)
    if chart is None:
        return None
    rows = [r for r in review.bins if r.participation is not None]
    values = [(r.start, r.end, 100.0 * (r.participation or 0.0)) for r in rows]
    chart.include(0.0, *(v for _, _, v in values))
    if review.max_participation is not None:
        chart.include(100.0 * review.max_participation)
    chart.bars(values, gid="participation", colour=FILLED, label="filled / market volume")
    if review.max_participation is not None:
        chart.rule(100.0 * review.max_participation, gid="cap", colour=CAP, label="cap")
    return chart.render()


def volume(review: OrderReview) -> str | None:
    """Per bin: the market's volume against the forecast the plan used; None without bins."""
    if not review.has_market:
        return None
    chart = _chart(review, f"{review.order_id}: market volume", "shares per bin", 220)
    if chart is None:
        return None
    rows = review.bins
    chart.include(0.0, *(r.volume for r in rows), *(r.forecast_volume for r in rows))
    chart.bars(
        [(r.start, r.end, float(r.volume or 0.0)) for r in rows if r.volume is not None],
        gid="volume",
        colour=MARKET,
        label="market volume",
    )
    forecast = [
        p
        for r in rows
        if r.forecast_volume is not None
        for p in ((r.start, r.forecast_volume), (r.end, r.forecast_volume))
    ]
    chart.line(forecast, gid="forecast", colour=PLAN, width=1.5, label="forecast before the bin")
    return chart.render()


def prices(review: OrderReview) -> str | None:
    """Bin VWAP and range, the fills, the arrival price and the limit; None without bins."""
    if not review.has_market:
        return None
    chart = _chart(review, f"{review.order_id}: fills against the bin VWAP", "price", 260)
    if chart is None:
        return None
    rows = [r for r in review.bins if r.vwap is not None]
    vwap = [(r.start + (r.end - r.start) / 2, float(r.vwap or 0.0)) for r in rows]
    chart.include(*(r.low for r in rows), *(r.high for r in rows))
    chart.include(*(f.price for f in review.fills), review.arrival_price, review.limit_price)
    lows = [(r.start + (r.end - r.start) / 2, float(r.low or 0.0)) for r in rows]
    highs = [(r.start + (r.end - r.start) / 2, float(r.high or 0.0)) for r in rows]
    chart.paths(
        [lows, highs], gid="range", colour=MARKET, width=0.8, opacity=0.6, label="bin low and high"
    )
    chart.line(vwap, gid="vwap", colour=MARKET, width=2.0, label="bin VWAP")
    chart.dots([(f.ts, f.price) for f in review.fills], gid="fills", colour=REALIZED, label="fills")
    if review.arrival_price is not None:
        chart.rule(review.arrival_price, gid="arrival", colour=ARRIVAL, label="arrival price")
    if review.limit_price is not None:
        chart.rule(review.limit_price, gid="limit", colour=LIMIT, label="limit")
    return chart.render()


#: The charts of an order, in the order the report shows them: (name, function).
CHARTS = (
    ("progress", progress),
    ("bins", bins),
    ("participation", participation),
    ("volume", volume),
    ("prices", prices),
)

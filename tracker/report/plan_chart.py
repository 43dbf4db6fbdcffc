"""Pictures of an order plan: the cumulative plan against the volume curve, participation against
the cap, and the cost/risk trade-off of several urgencies (matplotlib, drawn off-screen).

``tracker plan --order ... --chart FILE`` writes these as SVG or PNG (told by the file's
extension). matplotlib is imported only here and only when a chart is asked for; the figures are
built with the object-oriented API (no pyplot, no GUI backend, no global state).
"""

from __future__ import annotations

from collections.abc import Sequence
from pathlib import Path
from typing import Any

from tracker.core.formulation import OrderPlan
from tracker.errors import InputError

#: The file types a chart can be written as, by extension.
CHART_FORMATS = ("svg", "png")

#: Colours of the series (also what a test looks for in a PNG).
PLAN_COLOUR = "#1f5fa8"
VOLUME_COLOUR = "#8a8a8a"
CAP_COLOUR = "#c0392b"


def chart_format(path: Path) -> str:
    """The format of a chart file from its extension.

    Raises:
        InputError: The extension is neither ``.svg`` nor ``.png``.
    """
    suffix = path.suffix.lower().lstrip(".")
    if suffix not in CHART_FORMATS:
        raise InputError(
            f"must end in .svg or .png (the chart's format); got {str(path)!r}", field="--chart"
        )
    return suffix


def _figure(width: float, height: float) -> Any:
    from matplotlib.figure import Figure

    return Figure(figsize=(width, height), dpi=100, layout="constrained")


def _save(figure: Any, path: Path) -> Path:
    fmt = chart_format(path)
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        figure.savefig(path, format=fmt, metadata={"Date": None} if fmt == "svg" else None)
    except OSError as exc:
        raise InputError(f"cannot write {path}: {exc.strerror}", field="--chart") from exc
    return path


def _clock_axis(axis: Any, plan: OrderPlan) -> None:
    labels = [f"{b.end:%H:%M}" for b in plan.bins]
    step = max(1, len(labels) // 8)
    ticks = list(range(0, len(labels), step))
    axis.set_xticks(ticks, [labels[i] for i in ticks])
    axis.set_xlabel(f"end of bin, {plan.timezone} (venue time)")


def draw_plan(plan: OrderPlan, path: Path, title: str) -> Path:
    """The plan of one order: cumulative plan against the volume curve, participation per bin.

    Top: the planned shares done by the end of each bin as % of the order (``plan-cumulative``)
    and the market's forecast cumulative volume over the window as % of the window's volume
    (``volume-cumulative``): a plan above the volume curve is ahead of it. Bottom: planned
    participation per bin (``participation-0``, ``participation-1``, ...) against the cap
    (``cap``). The SVG groups carry these ids.

    Raises:
        InputError: A bad extension or an unwritable path.
    """
    chart_format(path)
    figure = _figure(8.0, 6.0)
    top, bottom = figure.subplots(2, 1, sharex=True, height_ratios=(3, 2))
    x = list(range(len(plan.bins)))
    done = 0
    cumulative = []
    for item in plan.bins:
        done += item.quantity
        cumulative.append(100.0 * done / plan.quantity)
    total = plan.window_volume
    seen = 0.0
    volume = []
    for item in plan.bins:
        seen += item.forecast_volume
        volume.append(100.0 * seen / total if total > 0 else 0.0)
    top.plot(x, volume, color=VOLUME_COLOUR, linewidth=1.5, label="market volume (forecast)")[
        0
    ].set_gid("volume-cumulative")
    top.plot(x, cumulative, color=PLAN_COLOUR, linewidth=2.2, label="plan")[0].set_gid(
        "plan-cumulative"
    )
    top.set_ylabel("% done by the end of the bin")
    top.set_ylim(0, 105)
    top.grid(alpha=0.3)
    top.legend(loc="upper left")
    top.set_title(title, loc="left")
    bars = bottom.bar(x, [100.0 * b.participation for b in plan.bins], color=PLAN_COLOUR, width=0.8)
    for n, bar in enumerate(bars):
        bar.set_gid(f"participation-{n}")
    if plan.max_participation is not None:
        bottom.axhline(
            100.0 * plan.max_participation, color=CAP_COLOUR, linestyle="--", label="cap"
        ).set_gid("cap")
        bottom.legend(loc="upper right")
    bottom.set_ylabel("% of forecast volume")
    bottom.grid(alpha=0.3)
    _clock_axis(bottom, plan)
    return _save(figure, path)


def draw_frontier(
    plans: Sequence[OrderPlan], labels: Sequence[str], path: Path, title: str
) -> Path:
    """The cost/risk trade-off of the same order under several preferences.

    Left: expected cost against its standard deviation, in bps of the arrival value, one point
    per plan joined in order (``frontier``): the efficient frontier of Almgren and Chriss (2000),
    where more urgency buys less risk with more expected cost. Right: each plan's cumulative
    schedule (``plan-<label>``) against the forecast volume curve (``volume-cumulative``).

    Raises:
        InputError: A bad extension or an unwritable path.
    """
    chart_format(path)
    figure = _figure(11.0, 4.8)
    left, right = figure.subplots(1, 2, width_ratios=(1, 1.3))
    std = [p.cost_std_bps for p in plans]
    cost = [p.cost_bps["expected"] for p in plans]
    left.plot(std, cost, color=PLAN_COLOUR, marker="o", linewidth=1.5)[0].set_gid("frontier")
    for s, c, label in zip(std, cost, labels, strict=True):
        left.annotate(label, (s, c), textcoords="offset points", xytext=(6, 4))
    left.set_xlabel("standard deviation of the cost, bps")
    left.set_ylabel("expected cost, bps (positive = a cost)")
    left.grid(alpha=0.3)
    left.set_title(title, loc="left")
    reference = plans[0]
    x = list(range(len(reference.bins)))
    total = reference.window_volume
    seen = 0.0
    volume = []
    for item in reference.bins:
        seen += item.forecast_volume
        volume.append(100.0 * seen / total if total > 0 else 0.0)
    right.plot(x, volume, color=VOLUME_COLOUR, linewidth=1.5, label="market volume")[0].set_gid(
        "volume-cumulative"
    )
    for plan, label in zip(plans, labels, strict=True):
        done = 0
        cumulative = []
        for item in plan.bins:
            done += item.quantity
            cumulative.append(100.0 * done / plan.quantity)
        right.plot(x, cumulative, linewidth=1.8, label=label)[0].set_gid(f"plan-{label}")
    right.set_ylabel("% done by the end of the bin")
    right.set_ylim(0, 105)
    right.grid(alpha=0.3)
    right.legend(loc="lower right")
    _clock_axis(right, reference)
    return _save(figure, path)

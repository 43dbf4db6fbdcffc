"""A small chart of one order drawn with characters: filled so far, the baseline plan, the targets.

The horizontal axis is time (in the venue's zone), the vertical one shares, from the lowest to the
highest value drawn (not from zero: a few bins' progress stays visible). Columns of blocks are the
shares filled (from the order's status messages, with eighth-of-a-cell steps), dots the
baseline plan's filled shares at the same time, and ``+`` the cumulative shares each target aimed
at by the end of its bin: the latest plan version bright, earlier ones dim, so a re-plan that moved
shows as a change of aim. Only what this view has seen since it started can be drawn.
"""

from __future__ import annotations

import bisect
from collections.abc import Sequence
from datetime import datetime, timedelta, tzinfo

from rich.text import Text

from tracker.watch.board import OrderView

__all__ = ["progress_chart"]

_EIGHTHS = " ▁▂▃▄▅▆▇█"


def _step_value(
    times: Sequence[datetime], values: Sequence[int | None], at: datetime
) -> int | None:
    index = bisect.bisect_right(times, at) - 1
    return values[index] if index >= 0 else None


def progress_chart(view: OrderView, width: int, height: int, zone: tzinfo) -> Text:
    """The chart of one order as styled text (``width`` x ``height`` cells plus axes).

    Args:
        view: The order.
        width, height: The plotting area in cells (at least 10 x 3).
        zone: The time zone of the axis labels.

    Returns:
        The chart, or a sentence saying there is nothing to draw yet.
    """
    width, height = max(10, width), max(3, height)
    history = list(view.history)
    targets = [t for t in view.targets if t.bin_end is not None and t.cumulative is not None]
    if not history and not targets:
        return Text("No fills or targets seen yet for this order.", style="dim")
    stamps = [p.ts for p in history] + [t.bin_end for t in targets if t.bin_end is not None]
    stamps += [t.bin_start for t in targets if t.bin_start is not None]
    start, end = min(stamps), max(stamps)
    span = max((end - start).total_seconds(), 1.0)
    values = (
        [p.filled for p in history]
        + [p.planned for p in history if p.planned is not None]
        + [t.cumulative for t in targets if t.cumulative is not None]
    )
    # The axis spans what is drawn (not 0 .. quantity): a few bins' progress stays visible.
    bottom, top = min(values), max(values)
    if top - bottom < 8:
        bottom, top = max(0, bottom - 4), bottom + 4
    cells = [[(" ", "")] * width for _ in range(height)]
    times = [p.ts for p in history]
    filled = [p.filled for p in history]
    planned = [p.planned for p in history]

    def column_time(column: int) -> datetime:
        return start + timedelta(seconds=span * (column + 1) / width)

    def scaled(value: float) -> float:
        return (value - bottom) / (top - bottom) * height

    def row_of(value: float) -> int:
        return min(height - 1, max(0, round(scaled(value) - 0.5)))

    for column in range(width):
        at = column_time(column)
        value = _step_value(times, filled, at) if history else None
        if value is not None:
            eighths = max(1, round(scaled(value) * 8))
            for row in range(height):
                level = min(8, max(0, eighths - row * 8))
                if level:
                    cells[row][column] = (_EIGHTHS[level], "cyan")
        plan = _step_value(times, planned, at) if history else None
        if plan is not None:
            row = row_of(plan)
            if cells[row][column][0] in (" ", ""):
                cells[row][column] = ("·", "magenta")
    latest = max((t.plan_version or 0 for t in targets), default=0)
    for target in targets:
        assert target.bin_end is not None and target.cumulative is not None
        column = int((target.bin_end - start).total_seconds() / span * width) - 1
        column = min(width - 1, max(0, column))
        row = row_of(target.cumulative)
        style = "bold yellow" if (target.plan_version or 0) == latest else "yellow dim"
        cells[row][column] = ("+", style)

    label_width = len(f"{top:,}")
    chart = Text()
    for row in range(height - 1, -1, -1):
        if row == height - 1:
            label = f"{top:,}"
        elif row == 0:
            label = f"{bottom:,}"
        elif row == height // 2:
            label = f"{(top + bottom) // 2:,}"
        else:
            label = ""
        chart.append(label.rjust(label_width) + " │", style="dim")
        for char, style in cells[row]:
            chart.append(char, style=style or None)
        chart.append("\n")
    chart.append(" " * label_width + " └" + "─" * width + "\n", style="dim")
    first = start.astimezone(zone).strftime("%H:%M")
    last = end.astimezone(zone).strftime("%H:%M")
    chart.append(
        " " * (label_width + 2) + first + last.rjust(width - len(first)) + "\n", style="dim"
    )
    chart.append(" " * (label_width + 2))
    chart.append("█ shares filled", style="cyan")
    chart.append("   · baseline plan", style="magenta")
    chart.append(f"   + target aim (plan v{latest}", style="bold yellow")
    chart.append("; dim: earlier versions)", style="yellow dim")
    return chart

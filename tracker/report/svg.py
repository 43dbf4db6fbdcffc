"""A small SVG chart writer: lines, bars, dots and rules on a time axis, as plain text.

The review draws several charts for every order of a day (a thousand orders make thousands of
charts), so they are written directly as SVG text: a chart takes well under a millisecond, needs
no font or backend, and reads the same in any browser with no script. Each series is a ``<g>``
with an ``id`` (``class="series"``) so that tests and readers can find it.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from datetime import datetime, tzinfo
from html import escape
from typing import Any

import numpy as np


def nice_ticks(low: float, high: float, count: int = 5) -> list[float]:
    """Round tick values covering [low, high] (steps of 1, 2 or 5 times a power of ten)."""
    if not (math.isfinite(low) and math.isfinite(high)) or high <= low:
        return [low]
    raw = (high - low) / max(count, 1)
    power = 10 ** math.floor(math.log10(raw))
    step = next(m * power for m in (1, 2, 5, 10) if m * power >= raw)
    first = math.ceil(low / step) * step
    ticks = []
    value = first
    while value <= high + step * 1e-9:
        ticks.append(round(value, 10))
        value += step
    return ticks


def plain(value: float) -> str:
    """A number for an axis label: thousands separators, never scientific notation."""
    if abs(value) >= 100 or value == int(value):
        return f"{value:,.0f}"
    if abs(value) >= 1:
        return f"{value:,.2f}".rstrip("0").rstrip(".")
    return f"{value:.4f}".rstrip("0").rstrip(".")


@dataclass
class Chart:
    """One chart: a time axis, a value axis and the series drawn on them.

    Args:
        title: Shown at the top left.
        y_label: What the values are (with their units).
        start, end: The time axis.
        zone: The venue's timezone, for the clock labels.
        width, height: Size in pixels.
    """

    title: str
    y_label: str
    start: datetime
    end: datetime
    zone: tzinfo
    width: int = 760
    height: int = 260
    y_low: float = math.inf
    y_high: float = -math.inf
    parts: list[str] = field(default_factory=list)
    legend: list[tuple[str, str, str]] = field(default_factory=list)
    left: int = 64
    right: int = 16
    top: int = 40
    bottom: int = 34
    _scale: tuple[float, float] | None = None
    _xs: dict[datetime, float] = field(default_factory=dict)

    def include(self, *values: float | None) -> None:
        """Widen the value axis to hold these values (before anything is drawn).

        Raises:
            RuntimeError: Something was drawn already (its place on the axis is fixed).
        """
        if self.parts:
            raise RuntimeError("include() every value before drawing the first series")
        finite = [v for v in values if v is not None and math.isfinite(v)]
        if finite:
            self.y_low = min(self.y_low, min(finite))
            self.y_high = max(self.y_high, max(finite))

    def _x(self, moment: datetime) -> float:
        x = self._xs.get(moment)  # the points of a day fall on a few dozen bin edges
        if x is None:
            span = (self.end - self.start).total_seconds() or 1.0
            share = (moment - self.start).total_seconds() / span
            x = self.left + share * (self.width - self.left - self.right)
            self._xs[moment] = x
        return x

    def _y(self, value: float) -> float:
        if self._scale is None:  # fixed at the first series drawn (include() then refuses)
            low, high = self._range()
            pixels = self.height - self.top - self.bottom
            self._scale = (low, pixels / (high - low))
        low, per_unit = self._scale
        return self.height - self.bottom - (value - low) * per_unit

    def _range(self) -> tuple[float, float]:
        low, high = self.y_low, self.y_high
        if not (math.isfinite(low) and math.isfinite(high)):
            return 0.0, 1.0
        if high <= low:
            return low - 1.0, high + 1.0
        pad = (high - low) * 0.04
        return low - (pad if low != 0 else 0.0), high + pad

    def line(
        self,
        points: Sequence[tuple[datetime, float]],
        *,
        gid: str,
        colour: str,
        width: float = 2.0,
        opacity: float = 1.0,
        dash: str | None = None,
        label: str | None = None,
        steps: bool = False,
    ) -> None:
        """A polyline through the points (``steps``: hold each value until the next time)."""
        self.paths(
            [points],
            gid=gid,
            colour=colour,
            width=width,
            opacity=opacity,
            dash=dash,
            label=label,
            steps=steps,
        )

    def paths(
        self,
        lines: Sequence[Sequence[tuple[datetime, float]]],
        *,
        gid: str,
        colour: str,
        width: float = 1.0,
        opacity: float = 1.0,
        dash: str | None = None,
        label: str | None = None,
        steps: bool = False,
    ) -> None:
        """Several polylines as one series (one ``<path>``)."""
        commands: list[str] = []
        digits = 0 if len(lines) > 4 else 1  # many faint lines: whole pixels keep the file small
        for points in lines:
            previous: float | None = None
            for n, (moment, value) in enumerate(points):
                x, y = self._x(moment), self._y(value)
                if steps and previous is not None:
                    commands.append(f"L{x:.{digits}f},{previous:.{digits}f}")
                commands.append(f"{'M' if n == 0 else 'L'}{x:.{digits}f},{y:.{digits}f}")
                previous = y
        if not commands:
            return
        extra = f' stroke-dasharray="{dash}"' if dash else ""
        self.parts.append(
            f'<g id="{escape(gid)}" class="series"><path d="{"".join(commands)}" fill="none" '
            f'stroke="{colour}" stroke-width="{width}" stroke-opacity="{opacity}"{extra}/></g>'
        )
        if label:
            self.legend.append((label, colour, dash or ""))

    def edge_paths(
        self,
        edges: Sequence[datetime],
        lines: Sequence[tuple[int, Any]],
        *,
        gid: str,
        colour: str,
        width: float = 1.0,
        opacity: float = 1.0,
        label: str | None = None,
    ) -> None:
        """Many polylines on shared times (``(first edge, values)`` each) as one series, in
        whole pixels: the fast path for every plan version of an order."""
        if not lines:
            return
        xs = np.rint([self._x(moment) for moment in edges]).astype(np.int64)
        self._y(0.0)  # fix the scale
        assert self._scale is not None
        low, per_unit = self._scale
        base = self.height - self.bottom
        commands: list[str] = []
        for first, values in lines:
            ys = np.rint(base - (np.asarray(values) - low) * per_unit).astype(np.int64)
            x = xs[first : first + ys.size].tolist()
            pairs = [f"{a},{b}" for a, b in zip(x, ys[: len(x)].tolist(), strict=True)]
            if len(pairs) > 1:
                commands.append("M" + "L".join(pairs))
        self.parts.append(
            f'<g id="{escape(gid)}" class="series"><path d="{"".join(commands)}" fill="none" '
            f'stroke="{colour}" stroke-width="{width}" stroke-opacity="{opacity}"/></g>'
        )
        if label:
            self.legend.append((label, colour, ""))

    def bars(
        self,
        spans: Sequence[tuple[datetime, datetime, float]],
        *,
        gid: str,
        colour: str,
        label: str | None = None,
        inset: float = 0.1,
        share: tuple[float, float] = (0.0, 1.0),
    ) -> None:
        """A bar per (start, end, value); ``share`` places it in a part of the bin's width."""
        rects = []
        base = self._y(max(self._range()[0], 0.0))
        for start, end, value in spans:
            x0, x1 = self._x(start), self._x(end)
            width = (x1 - x0) * (1 - 2 * inset)
            left = x0 + (x1 - x0) * inset + width * share[0]
            span = width * (share[1] - share[0])
            y = self._y(value)
            top, height = min(y, base), abs(base - y)
            rects.append(
                f'<rect x="{left:.1f}" y="{top:.1f}" width="{max(span, 0.5):.1f}" '
                f'height="{height:.1f}"/>'
            )
        self.parts.append(
            f'<g id="{escape(gid)}" class="series" fill="{colour}">{"".join(rects)}</g>'
        )
        if label:
            self.legend.append((label, colour, "bar"))

    def dots(
        self,
        points: Sequence[tuple[datetime, float]],
        *,
        gid: str,
        colour: str,
        radius: float = 2.2,
        label: str | None = None,
    ) -> None:
        """A dot per point."""
        span = (self.end - self.start).total_seconds() or 1.0
        origin = self.start.timestamp()
        per_second = (self.width - self.left - self.right) / span
        circles = "".join(
            f'<circle cx="{self.left + (m.timestamp() - origin) * per_second:.1f}" '
            f'cy="{self._y(v):.1f}" r="{radius}"/>'
            for m, v in points
        )
        self.parts.append(
            f'<g id="{escape(gid)}" class="series" fill="{colour}" fill-opacity="0.7">{circles}</g>'
        )
        if label:
            self.legend.append((label, colour, "dot"))

    def rule(self, value: float, *, gid: str, colour: str, label: str, dash: str = "6 4") -> None:
        """A horizontal line across the chart at ``value``."""
        self.line(
            [(self.start, value), (self.end, value)],
            gid=gid,
            colour=colour,
            width=1.5,
            dash=dash,
            label=label,
        )

    def render(self) -> str:
        """The chart as an ``<svg>`` element (UTF-8 text)."""
        low, high = self._range()
        inner_right = self.width - self.right
        grid: list[str] = []
        for value in nice_ticks(low, high):
            y = self._y(value)
            grid.append(
                f'<line x1="{self.left}" x2="{inner_right}" y1="{y:.1f}" y2="{y:.1f}" '
                'stroke="#ddd"/>'
                f'<text x="{self.left - 6}" y="{y + 4:.1f}" text-anchor="end">'
                f"{escape(plain(value))}</text>"
            )
        span = (self.end - self.start).total_seconds()
        hours = max(span / 3600.0, 1e-9)
        step = 30 if hours <= 3 else 60 if hours <= 7 else 120
        local = self.start.astimezone(self.zone)
        minute = local.hour * 60 + local.minute
        first = (minute + step - 1) // step * step - minute
        offset = first * 60.0
        while offset <= span:
            moment = self.start + (self.end - self.start) * (offset / span if span else 0)
            x = self._x(moment)
            text = f"{moment.astimezone(self.zone):%H:%M}"
            grid.append(
                f'<line x1="{x:.1f}" x2="{x:.1f}" y1="{self.top}" '
                f'y2="{self.height - self.bottom}" stroke="#eee"/>'
                f'<text x="{x:.1f}" y="{self.height - self.bottom + 16}" '
                f'text-anchor="middle">{text}</text>'
            )
            offset += step * 60.0
        legend: list[str] = []
        x = self.left
        for label, colour, kind in self.legend:
            if kind == "bar":
                mark = f'<rect x="{x}" y="22" width="12" height="9" fill="{colour}"/>'
            elif kind == "dot":
                mark = f'<circle cx="{x + 6}" cy="27" r="3.5" fill="{colour}"/>'
            else:
                dash = f' stroke-dasharray="{kind}"' if kind else ""
                mark = (
                    f'<line x1="{x}" x2="{x + 14}" y1="27" y2="27" stroke="{colour}" '
                    f'stroke-width="2.5"{dash}/>'
                )
            legend.append(f'{mark}<text x="{x + 18}" y="31">{escape(label)}</text>')
            x += 26 + 6.2 * len(label)
        zone = getattr(self.zone, "key", str(self.zone))
        return (
            f'<svg xmlns="http://www.w3.org/2000/svg" width="{self.width}" '
            f'height="{self.height}" viewBox="0 0 {self.width} {self.height}" '
            f'font-family="sans-serif" font-size="11" role="img">'
            f"<title>{escape(self.title)}</title>"
            f'<rect width="{self.width}" height="{self.height}" fill="#fff"/>'
            f'<text x="{self.left}" y="14" font-size="13" font-weight="bold">'
            f"{escape(self.title)}</text>"
            f'<text x="{inner_right}" y="14" text-anchor="end" fill="#555">'
            f"{escape(self.y_label)}; time in {escape(zone)}</text>"
            f"{''.join(grid)}{''.join(self.parts)}{''.join(legend)}"
            f'<rect x="{self.left}" y="{self.top}" width="{inner_right - self.left}" '
            f'height="{self.height - self.top - self.bottom}" fill="none" stroke="#999"/>'
            "</svg>"
        )

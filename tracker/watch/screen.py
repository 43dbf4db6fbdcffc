"""What the view draws: one frame from the board, the link and the view's own state.

The screen, top to bottom:

* a title line: the root, the broker and whether we are connected, the venue's clock, the sort and
  filter, whether sending is on;
* banners, one per condition that needs the desk at once: a daemon offline or silent, data
  stopped, the bus down;
* the orders, one row each (columns below), as many as fit, the selected one marked;
* the alerts feed, newest first, critical ones highlighted;
* the daemons with their last heartbeat;
* the prompt line: a question waiting for an answer, the result of the last action, or the keys.

Numbers are written for reading at a glance: shares with thousands separators, the gap to plan in
words ("behind 3,778 (3.1 %)"), costs in basis points with "saves" for a negative cost. A value
the daemon did not send is blank.

The detail screen (one order) adds everything its status says, the chart of
:mod:`tracker.watch.chart`, its plan versions, its last fills and its alerts.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from datetime import datetime, tzinfo

from rich import box
from rich.console import Group, RenderableType
from rich.table import Table
from rich.text import Text

from tracker.watch.board import AlertEntry, Board, OrderView, TargetPoint
from tracker.watch.chart import progress_chart
from tracker.watch.link import LinkStatus
from tracker.watch.ordering import SORT_WORDS, Filter, attention, rows

__all__ = ["KEYS", "ViewState", "render"]

#: The keys, as the help screen lists them.
KEYS: tuple[tuple[str, str], ...] = (
    ("up / down, j / k", "select an order (page up / page down, home / end)"),
    ("enter", "open the selected order's detail; esc or enter goes back"),
    ("o", "next sort order (needs attention, order id, symbol, behind, least filled, cost)"),
    ("/", "filter by symbol: type the start of a symbol, enter (empty: no filter)"),
    ("t", "next state filter (all, working, halted, pending, done, cancelled, expired)"),
    ("a", "acknowledge the selected order's critical alerts (in this view only)"),
    ("h / r", "halt / resume the selected order (asks first; needs --allow-control)"),
    ("H / R", "halt / resume ALL orders (asks first; needs --allow-control)"),
    ("?", "this help; any key closes it"),
    ("q", "quit"),
)

_STATE_STYLE = {
    "working": "green",
    "halted": "bold yellow",
    "pending": "dim",
    "done": "blue",
    "cancelled": "dim",
    "expired": "dim",
}
_SEVERITY_STYLE = {"critical": "bold white on red", "warning": "yellow", "info": ""}
_BANNER_STYLE = {
    "offline": "bold white on red",
    "silent": "bold black on yellow",
    "stale": "bold black on yellow",
    "bus": "bold white on red",
    "lost": "bold white on red",
    "source": "bold black on yellow",
}
_RANK_MARK = {0: "!!", 1: "! ", 2: "! "}


@dataclass
class ViewState:
    """What the person chose: sort, filter, selection, screen, and what the prompt line shows.

    Attributes:
        mode: ``list``, ``detail`` (of :attr:`selected`) or ``help``.
        prompt: A question or an input line waiting for keys (``None``: none).
        notice: The result of the last action; ``notice_style`` how to show it.
    """

    sort: str = "attention"
    keep: Filter = field(default_factory=Filter)
    selected: str | None = None
    mode: str = "list"
    prompt: str | None = None
    notice: str | None = None
    notice_style: str = ""
    allow_control: bool = False
    title: str = "tracker watch"


def shares(value: int | None) -> str:
    """Whole shares with separators; blank when unknown."""
    return "" if value is None else f"{value:,}"


def against_plan(view: OrderView) -> Text:
    """The gap to the baseline plan in words: behind / ahead N shares (x %), or on plan."""
    gap = view.deviation_shares
    if gap is None:
        return Text("")
    pct = f" ({abs(view.deviation_pct):.1f} %)" if view.deviation_pct is not None else ""
    if gap > 0:
        return Text(f"behind {gap:,}{pct}", style="yellow")
    if gap < 0:
        return Text(f"ahead {-gap:,}{pct}", style="cyan")
    return Text("on plan", style="green")


def bps(value: float | None) -> str:
    """A cost in basis points; a negative cost reads "saves"."""
    if value is None:
        return ""
    if value < 0:
        return f"saves {-value:.1f}"
    return f"{value:.1f}"


def participation(view: OrderView) -> str:
    """The last bin's share of the market volume against the cap (rates in %)."""
    rate = "" if view.participation is None else f"{view.participation * 100:.1f} %"
    cap = "" if view.max_participation is None else f"{view.max_participation * 100:.0f} %"
    if rate and cap:
        return f"{rate} (cap {cap})"  # not "x of y": that reads as a product
    if cap:
        return f"(cap {cap})"
    return rate


def this_bin(view: OrderView) -> str:
    """Shares of this bin's target filled so far, "F of T"."""
    target = view.target
    if target is None or target.quantity is None:
        return ""
    if target.quantity == 0:
        return "none"
    done = view.bin_filled
    return f"{shares(done) or '?'} of {target.quantity:,}"


def bar(filled: int | None, quantity: int | None, width: int = 10) -> Text:
    """A progress bar of filled over quantity, in eighths of a cell."""
    if filled is None or not quantity:
        return Text(" " * width)
    fraction = min(1.0, max(0.0, filled / quantity))
    eighths = round(fraction * width * 8)
    full, part = divmod(eighths, 8)
    text = "█" * full + (" ▏▎▍▌▋▊▉"[part] if part and full < width else "")
    return Text(text.ljust(width), style="cyan")


def clock(moment: datetime | None, zone: tzinfo) -> str:
    """HH:MM:SS in the venue's zone; blank when unknown."""
    return "" if moment is None else moment.astimezone(zone).strftime("%H:%M:%S")


def last_alert(entry: AlertEntry | None, zone: tzinfo) -> Text:
    """The order's last alert: code in words, raised or cleared, and when."""
    if entry is None:
        return Text("")
    words = entry.code.replace("_", " ")  # its time is in the alerts feed
    if entry.state == "cleared":
        return Text(f"cleared: {words}", style="dim")  # "cleared" first: not read as raised
    return Text(words, style=_SEVERITY_STYLE.get(entry.severity, ""))


# -- the frame -----------------------------------------------------------------------------------


def render(
    board: Board,
    state: ViewState,
    link: LinkStatus,
    *,
    now: float,
    wall: datetime,
    zone: tzinfo,
    width: int,
    height: int,
) -> RenderableType:
    """One frame (see the module docstring).

    Args:
        board: What the bus said.
        state: What the person chose.
        link: The connection.
        now: The view's monotonic clock (seconds); ages are measured on it.
        wall: The wall clock (UTC), for the title.
        zone: The venue's time zone.
        width, height: The terminal's size in cells.
    """
    parts: list[RenderableType] = [_title(board, state, link, wall, zone)]
    banners = _banners(board, link, now)
    parts.extend(banners)
    footer = _footer(state)
    health = _health(board, now, zone)
    if state.mode == "help":
        parts.append(_help())
    elif state.mode == "detail" and state.selected in board.orders:
        used = len(parts) + 2
        parts.append(_detail(board, board.orders[state.selected], zone, width, height - used))
    else:
        feed_lines = max(3, min(8, height // 6))
        room = height - len(parts) - feed_lines - 2 - len(health) - 1 - 3
        parts.append(_orders(board, state, zone, max(1, room), width))
        parts.append(_feed(board, zone, feed_lines))
    parts.extend(health)
    parts.append(footer)
    return Group(*parts)


def _title(board: Board, state: ViewState, link: LinkStatus, wall: datetime, zone: tzinfo) -> Text:
    title = Text(no_wrap=True, overflow="ellipsis")
    title.append(f" {state.title} ", style="bold reverse")
    title.append(f"  root {board.root}  {link.url} ")
    title.append(link.state, style="green" if link.state == "connected" else "bold red")
    zone_name = getattr(zone, "key", str(zone))
    title.append(f"  {wall.astimezone(zone):%H:%M:%S} {zone_name}")
    known = [v for v in board.orders.values() if v.state is not None]
    live = [v for v in known if not v.finished]
    plural = "" if len(known) == 1 else "s"
    title.append(f"  {len(known)} order{plural}, {len(live)} live")
    unknown = len(board.orders) - len(known)
    if unknown:
        title.append(f", {unknown} id{'' if unknown == 1 else 's'} with alerts only", style="bold")
    title.append(f"  sorted {SORT_WORDS[state.sort]}")
    described = state.keep.describe()
    if described:
        title.append(f"  showing {described}", style="bold")
    title.append("  sending ")
    title.append(
        "ON" if state.allow_control else "off", style="bold red" if state.allow_control else ""
    )
    return title


def _banners(board: Board, link: LinkStatus, now: float) -> list[Text]:
    lines = []
    if link.state != "connected":
        wait = (
            "" if link.retry_at is None else f", next try in {max(0.0, link.retry_at - now):.0f} s"
        )
        what = "CONNECTING" if link.state == "connecting" else "BUS DOWN, RECONNECTING"
        error = f": {link.error}" if link.error else ""
        lines.append(
            Text(
                f" {what} to {link.url} (attempt {link.attempts}{wait}){error}; "
                "figures below are the last received ",
                style=_BANNER_STYLE["bus"],
            )
        )
    elif link.refused:
        lines.append(
            Text(f" the broker refused: {', '.join(link.refused)} (shown blank) ", style="yellow")
        )
    if link.state == "connected" and not board.instances:
        lines.append(
            Text(f" no daemon has announced itself on {board.root}/health yet ", style="yellow")
        )
    for banner in board.banners(now):
        lines.append(Text(f" {banner.text} ", style=_BANNER_STYLE.get(banner.kind, "bold")))
    return lines


#: The order columns: header, justification, and the rank in which a narrow terminal drops them
#: (0: never; higher numbers go first) so that the last alert keeps :data:`ALERT_WIDTH` cells.
_COLUMNS: tuple[tuple[str, str, int], ...] = (
    ("", "left", 0),
    ("order", "left", 0),
    ("symbol", "left", 0),
    ("side", "left", 3),
    ("state", "left", 0),
    ("filled\nof quantity", "right", 0),
    ("", "left", 4),
    ("against\nbaseline plan", "left", 0),
    ("this bin:\nfilled of target", "right", 1),
    ("participation\nlast bin", "right", 5),
    ("cost to go\nbps", "right", 2),
    ("cost so far\nbps", "right", 6),
)
ALERT_WIDTH = 18


def _alert_cell(view: OrderView, board: Board, zone: tzinfo) -> Text:
    """The last alert; but when a critical one is what ranks the order first, that one."""
    critical = view.critical_open()
    if critical:
        return Text(" ".join(critical).replace("_", " "), style=_SEVERITY_STYLE["critical"])
    symbol_wide = [] if view.finished else board.symbol_critical(view.symbol)
    if symbol_wide:
        words = " ".join(symbol_wide).replace("_", " ")
        return Text(f"{words} ({view.symbol})", style=_SEVERITY_STYLE["critical"])
    return last_alert(view.last_alert, zone)


def _cells(view: OrderView, board: Board, selected: bool) -> list[Text | str]:
    rank = attention(view, board)
    filled = (
        f"{shares(view.filled)} of {shares(view.quantity)}"
        if view.filled is not None and view.quantity is not None
        else shares(view.filled)
    )
    return [
        Text("> " if selected else _RANK_MARK.get(rank, ""), style="bold red"),
        view.order_id,
        view.symbol or "",
        view.side or "",
        Text(view.state or "no status", style=_STATE_STYLE.get(view.state or "", "dim")),
        filled,
        bar(view.filled, view.quantity, 8),
        against_plan(view),
        "" if view.finished else this_bin(view),
        participation(view),
        bps(view.expected_cost_bps),
        bps(view.realized_bps),
    ]


def _orders(board: Board, state: ViewState, zone: tzinfo, room: int, width: int) -> Group:
    """The order rows that fit, as lines laid out here (a rich Table of 60 rows costs several
    times as much to lay out, twice a second, for the same picture)."""
    listed = rows(board, state.sort, state.keep)
    ids = [view.order_id for view in listed]
    if state.selected not in ids:
        state.selected = ids[0] if ids else None
    index = ids.index(state.selected) if state.selected in ids else 0
    first = max(0, min(index - room // 2, len(listed) - room))
    shown = listed[first : first + room]
    cells = [_cells(view, board, view.order_id == state.selected) for view in shown]
    # Natural width of each column (its longest header line or cell, plus two spaces).
    natural = [
        2 + max([len(line) for line in header.split("\n")] + [len(str(row[i])) for row in cells])
        for i, (header, _, _) in enumerate(_COLUMNS)
    ]
    natural[6] = 10 if natural[6] > 2 else 0  # the bar
    keep = list(range(len(_COLUMNS)))
    for drop in sorted((-rank, i) for i, (_, _, rank) in enumerate(_COLUMNS) if rank):
        if sum(natural[i] for i in keep) + ALERT_WIDTH <= width:
            break
        keep.remove(drop[1])
    alert_width = max(1, width - 1 - sum(natural[i] for i in keep))

    def line(parts: list[tuple[Text | str, int, str]], style: str | None = None) -> Text:
        out = Text(" ", no_wrap=True, overflow="crop")
        for content, cell_width, justify in parts:
            cell = content.copy() if isinstance(content, Text) else Text(content)
            cell.truncate(cell_width, overflow="ellipsis")
            cell.align(justify, cell_width)  # type: ignore[arg-type]
            out.append_text(cell)
        out.truncate(width, pad=True)
        if style:
            out.stylize(style)
        return out

    headers = [(_COLUMNS[i][0].split("\n"), natural[i], _COLUMNS[i][1]) for i in keep]
    lines = []
    for level in (0, 1):
        parts: list[tuple[Text | str, int, str]] = []
        for words, cell_width, justify in headers:
            text = words[level] if len(words) == 2 else ("" if level == 0 else words[0])
            parts.append((f"{text}  " if justify == "right" else text, cell_width, justify))
        parts.append(("" if level == 0 else "last alert", alert_width, "left"))
        lines.append(line(parts, "bold"))
    lines.append(Text(" " + "─" * (width - 2), style="dim", no_wrap=True))
    for view, row in zip(shown, cells, strict=True):
        rank = attention(view, board)
        selected = view.order_id == state.selected
        cells_out: list[tuple[Text | str, int, str]] = []
        for i in keep:
            cell, justify = row[i], _COLUMNS[i][1]
            piece = cell.copy() if isinstance(cell, Text) else Text(cell)
            if justify == "right":
                piece.append("  ")
            cells_out.append((piece, natural[i], justify))
        cells_out.append((_alert_cell(view, board, zone), alert_width, "left"))
        lines.append(
            line(cells_out, "reverse" if selected else ("on dark_red" if rank == 0 else None))
        )
    if not listed:
        message = "no order matches the filter" if state.keep.describe() else "no order seen yet"
        lines.append(Text(f"   {message}", style="dim"))
    if len(shown) < len(listed):
        caption = f"{first + 1}-{first + len(shown)} of {len(listed)}"
        lines.append(Text(caption.rjust(width - 1), style="dim"))
    lines.append(Text(""))
    return Group(*lines)


def _feed(board: Board, zone: tzinfo, lines: int) -> Table:
    table = Table(box=box.SIMPLE_HEAD, expand=True, pad_edge=False, padding=(0, 1), show_edge=False)
    table.add_column("alert time", no_wrap=True)
    table.add_column("severity", no_wrap=True)
    table.add_column("", no_wrap=True)
    table.add_column("order / symbol", no_wrap=True)
    table.add_column("code", no_wrap=True)
    table.add_column("message", no_wrap=True, overflow="ellipsis", ratio=1)
    recent = list(board.alerts)[-lines:][::-1]
    for entry in recent:
        style = _SEVERITY_STYLE.get(entry.severity, "") if entry.state == "raised" else "dim"
        table.add_row(
            clock(entry.ts, zone),
            entry.severity,
            entry.state,
            entry.order_id or (f"symbol {entry.symbol}" if entry.symbol else ""),
            entry.code,
            entry.message,
            style=style or None,
        )
    for _ in range(lines - len(recent)):
        table.add_row("", "", "", "", "", "")
    return table


def _health(board: Board, now: float, zone: tzinfo) -> list[Text]:
    line = Text(" daemons: ", style="bold")
    if not board.instances:
        line.append("none seen", style="dim")
    for name in sorted(board.instances):
        instance = board.instances[name]
        line.append(f"{name} ")
        if instance.online:
            line.append("online", style="green")
        else:
            line.append("OFFLINE", style="bold white on red")
        beat = clock(instance.heartbeat, zone)
        if beat:
            line.append(f", last heartbeat {beat}")
        line.append(f" ({now - instance.seen:.0f} s ago)   ", style="dim")
    return [line]


def _footer(state: ViewState) -> Text:
    if state.prompt is not None:
        return Text(f" {state.prompt}", style="bold black on yellow", no_wrap=True)
    line = Text(no_wrap=True, overflow="ellipsis")
    if state.notice:
        line.append(f" {state.notice} ", style=state.notice_style or "bold")
        line.append("  ")
    if state.mode == "detail":
        line.append("esc back  h halt  r resume  a acknowledge  q quit", style="dim")
    else:
        line.append(
            "↑↓ select  enter detail  o sort  / symbol  t state  a acknowledge  "
            "h/r halt/resume  H/R all  ? help  q quit",
            style="dim",
        )
    return line


def _help() -> Table:
    table = Table(title="keys", box=box.SIMPLE, show_header=False)
    table.add_column("key", style="bold", no_wrap=True)
    table.add_column("what it does")
    for key, what in KEYS:
        table.add_row(key, what)
    table.add_row("", "")
    table.add_row("!!", "marks a raised critical alert on the order or its symbol")
    table.add_row("!", "marks an order behind plan, or halted or expired with shares left")
    table.add_row("", "")
    table.add_row(
        "",
        Text(
            "Sending halt or resume is off unless the view was started with --allow-control; "
            "each asks for a y before anything is sent.",
            style="dim",
        ),
    )
    return table


def _bins_words(gap: float | None) -> str:
    """The gap to plan in bins of planned trading, in words (no sign to misread)."""
    if gap is None:
        return ""
    if abs(gap) < 0.05:
        return "on plan"
    return f"{'behind' if gap > 0 else 'ahead'} {abs(gap):.1f} bins of planned trading"


def _target_words(view: OrderView) -> str:
    """What a daemon that states it says of the target: its planned rate and its reason."""
    words = []
    if view.target_rate is not None:
        words.append(f"planned {view.target_rate * 100:.1f} % of volume")
    if view.target_reason:
        words.append(view.target_reason.replace("_", " "))
    return f" ({', '.join(words)})" if words else ""


def _detail(board: Board, view: OrderView, zone: tzinfo, width: int, height: int) -> Group:
    head = Table(box=None, show_header=False, padding=(0, 2), expand=False)
    for _ in range(4):
        head.add_column(no_wrap=True)
    cap = "" if view.max_participation is None else f"{view.max_participation * 100:.0f} %"
    fields = [
        ("order", view.order_id),
        ("symbol / side", f"{view.symbol or ''} {view.side or ''}"),
        ("state", view.state or ""),
        ("plan version", "" if view.plan_version is None else str(view.plan_version)),
        ("filled", f"{shares(view.filled)} of {shares(view.quantity)}"),
        ("remaining", shares(view.remaining)),
        ("baseline plan filled", shares(view.planned_filled)),
        ("against plan", against_plan(view).plain),
        ("in bins of plan", _bins_words(view.deviation_bins)),
        ("this bin", "" if view.finished else this_bin(view) + _target_words(view)),
        ("participation", participation(view)),
        ("cap", cap),
        ("average price", "" if view.average_price is None else f"{view.average_price:.4f}"),
        ("arrival price", "" if view.arrival_price is None else f"{view.arrival_price:.4f}"),
        ("cost so far", f"{bps(view.realized_bps)} bps" if view.realized_bps is not None else ""),
        (
            "cost to go",
            ""
            if view.expected_cost_bps is None
            else f"{bps(view.expected_cost_bps)} bps"
            + ("" if view.expected_cost is None else f" ({view.expected_cost:,.0f} in currency)"),
        ),
        ("status time", clock(view.ts, zone)),
        ("open alerts", ", ".join(sorted(view.open_alerts)) or "none"),
    ]
    for index in range(0, len(fields), 2):
        (k1, v1), (k2, v2) = fields[index], fields[index + 1]
        head.add_row(Text(k1, style="dim"), v1, Text(k2, style="dim"), v2)
    chart_height = max(4, min(14, height - len(fields) // 2 - 14))
    chart = progress_chart(view, max(20, width - 20), chart_height, zone)
    versions = Table(
        box=box.SIMPLE_HEAD, title="plan versions (first target of each)", padding=(0, 1)
    )
    for name in ("version", "made", "bin", "target", "aims at"):
        versions.add_column(name, justify="right", no_wrap=True)
    first_of: dict[int | None, TargetPoint] = {}
    for target in view.targets:
        first_of.setdefault(target.plan_version, target)
    for target in list(first_of.values())[-6:][::-1]:
        versions.add_row(
            "" if target.plan_version is None else str(target.plan_version),
            clock(target.ts, zone),
            f"{clock(target.bin_start, zone)[:5]}-{clock(target.bin_end, zone)[:5]}",
            shares(target.quantity),
            shares(target.cumulative),
        )
    fills = Table(box=box.SIMPLE_HEAD, title="last fills", padding=(0, 1))
    for name in ("time", "shares", "price"):
        fills.add_column(name, justify="right", no_wrap=True)
    for ts, quantity, price in list(view.fills)[-6:][::-1]:
        fills.add_row(clock(ts, zone), shares(quantity), "" if price is None else f"{price:.4f}")
    lower = Table.grid(padding=(0, 4))
    lower.add_row(versions, fills)
    alerts = [e for e in board.alerts if e.order_id == view.order_id][-4:][::-1]
    feed = Text()
    for entry in alerts:
        style = _SEVERITY_STYLE.get(entry.severity, "") if entry.state == "raised" else "dim"
        feed.append(
            f"{clock(entry.ts, zone)} {entry.severity} {entry.state} {entry.code}: "
            f"{entry.message}\n",
            style=style or None,
        )
    return Group(head, Text(""), chart, lower, feed)

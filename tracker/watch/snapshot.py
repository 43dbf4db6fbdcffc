"""``tracker watch --once``: what the broker holds now, printed once, for scripts and a glance.

The view connects, subscribes to the retained topics (every order's status and every daemon's
health), waits until the retained messages have arrived -- the broker sends them right after the
subscription; we wait until none came for :data:`SETTLE_SECONDS` -- and prints them:

* ``table``: one line per order (the columns of the live view that a status carries; targets are
  not retained, so "this bin" is not shown) and one line per daemon;
* ``json``: ``{"root", "broker", "taken_at", "statuses": [...], "health": {...}}`` where
  ``statuses`` are the status objects exactly as the broker holds them (sorted by order id, unknown
  fields kept) and ``health`` the health documents by instance.
"""

from __future__ import annotations

import asyncio
import contextlib
import json
import time
from datetime import UTC, datetime, tzinfo
from typing import Any

from rich import box
from rich.table import Table

from tracker.core.formats import utc_text
from tracker.core.topics import Topics
from tracker.errors import InputError
from tracker.shell.config import BrokerSettings
from tracker.watch.board import Board
from tracker.watch.link import Link
from tracker.watch.ordering import rows
from tracker.watch.screen import against_plan, bps, clock, shares

__all__ = ["SETTLE_SECONDS", "once_json", "once_table", "take_snapshot"]

#: Seconds without a new retained message after which the snapshot is complete.
SETTLE_SECONDS = 0.5


async def take_snapshot(broker: BrokerSettings, root: str, *, timeout: float = 10.0) -> Board:
    """Connect, collect the retained statuses and health, disconnect.

    Raises:
        InputError: The broker could not be reached within ``timeout`` seconds.
    """
    topics = Topics(root)
    board = Board(root, started=time.monotonic())
    last = [time.monotonic()]

    def take(topic: str, payload: bytes, retained: bool) -> None:
        board.take(topic, payload, retained=retained, now=time.monotonic())
        last[0] = time.monotonic()

    link = Link(
        broker,
        root,
        take,
        filters=((topics.status(), 1), (topics.health(), 1)),
        reconnect_max_seconds=1.0,
    )
    task = asyncio.create_task(link.run())
    try:
        try:
            await asyncio.wait_for(link.subscribed.wait(), timeout)
        except TimeoutError:
            raise InputError(
                f"cannot reach the broker at {broker.url} within {timeout:g} s "
                f"({link.status.error or 'no answer'}); check --broker and that it runs",
                field="broker.url",
            ) from None
        last[0] = time.monotonic()
        deadline = time.monotonic() + timeout
        while time.monotonic() - last[0] < SETTLE_SECONDS and time.monotonic() < deadline:
            await asyncio.sleep(0.05)
    finally:
        task.cancel()
        with contextlib.suppress(asyncio.CancelledError):
            await task
    return board


def once_json(board: Board, broker: BrokerSettings, wall: datetime) -> dict[str, Any]:
    """The JSON document of ``--once --format json`` (see the module docstring)."""
    health: dict[str, Any] = {}
    for name in sorted(board.instances):
        instance = board.instances[name]
        health[name] = instance.document or {"status": "online" if instance.online else "offline"}
    return {
        "root": board.root,
        "broker": broker.url,
        "taken_at": utc_text(wall.astimezone(UTC), "seconds"),
        "statuses": board.statuses(),
        "health": health,
    }


def once_table(board: Board, zone: tzinfo) -> Table:
    """The plain table of ``--once`` (orders needing attention first)."""
    table = Table(box=box.SIMPLE_HEAD, pad_edge=False)
    for name, justify in (
        ("order", "left"),
        ("symbol", "left"),
        ("side", "left"),
        ("state", "left"),
        ("filled of quantity", "right"),
        ("filled %", "right"),
        ("against plan", "left"),
        ("cost to go bps", "right"),
        ("cost so far bps", "right"),
        ("status time", "left"),
    ):
        table.add_column(name, justify=justify, no_wrap=True)  # type: ignore[arg-type]
    for view in rows(board):
        progress = (
            f"{min(100.0, 100.0 * view.filled / view.quantity):.1f}"
            if view.filled is not None and view.quantity
            else ""
        )
        table.add_row(
            view.order_id,
            view.symbol or "",
            view.side or "",
            view.state or "",
            f"{shares(view.filled)} of {shares(view.quantity)}",
            progress,
            against_plan(view).plain,
            bps(view.expected_cost_bps),
            bps(view.realized_bps),
            clock(view.ts, zone),
        )
    return table


def health_lines(board: Board, zone: tzinfo) -> list[str]:
    """One line per daemon: online or OFFLINE, and its last heartbeat."""
    lines = []
    for name in sorted(board.instances):
        instance = board.instances[name]
        state = "online" if instance.online else "OFFLINE"
        beat = clock(instance.heartbeat, zone)
        lines.append(f"daemon {name}: {state}" + (f", last heartbeat {beat}" if beat else ""))
    return lines or ["no daemon health message on the broker"]


def dumps(document: dict[str, Any]) -> str:
    """The JSON text (indented, keys of the statuses in their wire order)."""
    return json.dumps(document, indent=2, ensure_ascii=False)

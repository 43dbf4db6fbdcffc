"""The interactive view: the link feeds the board, keys change the view, frames go out at a pace.

Theory of operation
-------------------
One event loop runs three things: the :class:`~tracker.watch.link.Link` (every message goes
straight into the :class:`~tracker.watch.board.Board`), the keys
(:class:`~tracker.watch.terminal.Keys`) and the drawing loop, which renders at most ``refresh``
frames a second and only when something changed (or once a second, for the clock and the ages).
Rendering shows only the rows that fit, so its cost does not grow with the number of orders beyond
one sort; writing is the :class:`~tracker.watch.terminal.FrameWriter`'s thread's business.

Control messages (halt, resume, for one order or all) go to ``{root}/control`` only when the view
was started with ``allow_control``, and only after the person answered ``y`` to a question that
names the command and the order. The prompt line then follows what happened: published (the
broker acknowledged it), applied (the order's status shows the new state), refused (the daemon
published an error for the control topic, whose reason is shown), or no answer in
:data:`ANSWER_SECONDS`.

The message's ``ts`` is the daemon's clock as seen on the bus (:meth:`Board.daemon_clock`): the
daemon checks a control message's time against its own and moves its clock forward to it, so a
view whose wall clock differs from a daemon on a simulated clock must not send its own time.
"""

from __future__ import annotations

import asyncio
import contextlib
import json
import os
import signal
import time
from collections.abc import Coroutine
from dataclasses import dataclass, field, replace
from datetime import UTC, datetime, tzinfo
from typing import Any

from tracker.core.formats import utc_text
from tracker.core.topics import Topics
from tracker.shell.config import BrokerSettings
from tracker.watch.board import Board
from tracker.watch.link import Link
from tracker.watch.ordering import SORTS, STATES, rows
from tracker.watch.screen import ViewState, render
from tracker.watch.terminal import ENTER_SCREEN, LEAVE_SCREEN, FrameWriter, Keys, frame_text

__all__ = ["ANSWER_SECONDS", "Watch", "control_payload"]

#: Seconds to wait for the daemon's answer to a control message before saying there was none.
ANSWER_SECONDS = 15.0
#: A frame at least this often (seconds), for the clock and the ages.
IDLE_FRAME_SECONDS = 1.0


def control_payload(command: str, order_id: str | None, ts: datetime) -> bytes:
    """The control message of wire contract v1 (``order_id`` left out: every order)."""
    message: dict[str, object] = {"type": "control", "command": command}
    if order_id is not None:
        message["order_id"] = order_id
    message["ts"] = utc_text(ts, "milliseconds")
    return json.dumps(message, separators=(",", ":")).encode("utf-8")


@dataclass
class _Sent:
    """A control message on its way: what, for which order, and since when."""

    command: str
    order_id: str | None
    at: float
    published: bool = False
    applied: list[str] = field(default_factory=list)
    errors_before: int = 0


class Watch:
    """``tracker watch`` on a terminal.

    Args:
        broker: The broker settings.
        root: The topic root.
        zone: The venue's time zone.
        allow_control: Whether halt / resume may be sent.
        stale_after: Seconds without data before the banner (``None``: two bins).
        refresh: Most frames per second drawn for new data (keys redraw at once).
        input_fd, output_fd: The terminal.
    """

    def __init__(
        self,
        broker: BrokerSettings,
        root: str,
        *,
        zone: tzinfo,
        allow_control: bool = False,
        stale_after: float | None = None,
        refresh: float = 2.0,
        input_fd: int = 0,
        output_fd: int = 1,
    ) -> None:
        self.root = root
        self.zone = zone
        self.refresh = refresh
        self.board = Board(root, stale_after=stale_after, started=time.monotonic())
        self.link = Link(broker, root, self._message)
        self.state = ViewState(allow_control=allow_control)
        self.input_fd = input_fd
        self.output_fd = output_fd
        self._changed = asyncio.Event()  # a message changed the board
        self._poke = asyncio.Event()  # a key or a result: draw now
        self._quit = asyncio.Event()
        self._confirm: tuple[str, str | None] | None = None
        self._typing: str | None = None  # the symbol filter being typed
        self._sent: _Sent | None = None
        self._tasks: set[asyncio.Task[None]] = set()
        self.frames = 0

    # -- running ---------------------------------------------------------------------------------

    async def run(self) -> int:
        """Show the view until ``q`` (or SIGINT / SIGTERM); return the exit code (0)."""
        loop = asyncio.get_running_loop()
        writer = FrameWriter(self.output_fd)
        writer.start(ENTER_SCREEN)
        for signum in (signal.SIGINT, signal.SIGTERM, signal.SIGHUP):  # SIGHUP: terminal gone
            loop.add_signal_handler(signum, self._quit.set)
        loop.add_signal_handler(signal.SIGWINCH, self._redraw)
        try:
            with Keys(self.input_fd, self._key):
                link = asyncio.create_task(self.link.run(), name="watch.link")
                draw = asyncio.create_task(self._draw(writer), name="watch.draw")
                await self._quit.wait()
                for task in (link, draw, *self._tasks):
                    task.cancel()
                for task in (link, draw, *self._tasks):
                    with contextlib.suppress(asyncio.CancelledError):
                        await task
        finally:
            for signum in (signal.SIGINT, signal.SIGTERM, signal.SIGHUP, signal.SIGWINCH):
                loop.remove_signal_handler(signum)
            writer.close(LEAVE_SCREEN)
        return 0

    async def _draw(self, writer: FrameWriter) -> None:
        """Draw when something changed: at once after a key, at most ``refresh`` a second for
        data, and once a second anyway (the clock and the ages move)."""
        drawn_version = -1
        drawn_at = 0.0
        pace = 1.0 / self.refresh
        while True:
            if writer.failed is not None or not os.isatty(self.output_fd):
                self._quit.set()  # the terminal went away (and no SIGHUP said so)
                return
            now = time.monotonic()
            if self.board.version != drawn_version or now - drawn_at >= IDLE_FRAME_SECONDS:
                drawn_version = self.board.version
                drawn_at = now
                self._follow_up(now)
                writer.show(self.frame(now))
                self.frames += 1
            self._poke.clear()
            with contextlib.suppress(TimeoutError):  # pacing, which a key cuts short
                await asyncio.wait_for(self._poke.wait(), pace)
            if self._poke.is_set() or self.board.version != drawn_version:
                continue
            self._changed.clear()
            with contextlib.suppress(TimeoutError):  # nothing new yet: wait for it
                await asyncio.wait_for(self._changed.wait(), max(0.0, IDLE_FRAME_SECONDS - pace))

    def frame(self, now: float) -> str:
        """The current frame as terminal text."""
        try:
            size = os.get_terminal_size(self.output_fd)
            width, height = size.columns, size.lines
        except OSError:
            width, height = 120, 40
        renderable = render(
            self.board,
            self.state,
            self.link.status,
            now=now,
            wall=datetime.now(UTC),
            zone=self.zone,
            width=width,
            height=height,
        )
        return frame_text(renderable, width, height, color="NO_COLOR" not in os.environ)

    def _message(self, topic: str, payload: bytes, retained: bool) -> None:
        self.board.take(topic, payload, retained=retained, now=time.monotonic())
        if not self._changed.is_set():
            self._changed.set()

    def _redraw(self) -> None:
        """Draw again at once (after a key or a result)."""
        self.board.version += 1
        self._changed.set()
        self._poke.set()

    # -- keys ------------------------------------------------------------------------------------

    def _key(self, key: str) -> None:
        state = self.state
        if key in ("ctrl-c", "eof"):
            self._quit.set()
        elif self._confirm is not None:
            self._answer(key)
        elif self._typing is not None:
            self._type(key)
        elif state.mode == "help":
            state.mode = "list"
        elif key == "q":
            self._quit.set()
        elif key == "?":
            state.mode = "help"
        elif key in ("up", "k", "down", "j", "pageup", "pagedown", "home", "end"):
            self._move(key)
        elif key == "enter" or (key == "esc" and state.mode == "detail"):
            if state.mode == "detail" or state.selected is not None:
                state.mode = "list" if state.mode == "detail" else "detail"
                self._spawn(self._follow_fills())
        elif key == "o":
            names = list(SORTS)
            state.sort = names[(names.index(state.sort) + 1) % len(names)]
        elif key == "t":
            index = STATES.index(state.keep.state)
            state.keep = replace(state.keep, state=STATES[(index + 1) % len(STATES)])
        elif key == "/":
            self._typing = ""
            state.prompt = "symbol starts with: _   (enter: apply, empty: all, esc: cancel)"
        elif key == "a" and state.selected is not None:
            count = self.board.acknowledge(state.selected)
            self._notice(f"{count} critical alert(s) of {state.selected} acknowledged in this view")
        elif key in ("h", "r", "H", "R"):
            self._ask(key)
        self._redraw()

    def _move(self, key: str) -> None:
        listed = [view.order_id for view in rows(self.board, self.state.sort, self.state.keep)]
        if not listed:
            return
        index = listed.index(self.state.selected) if self.state.selected in listed else 0
        step = {"up": -1, "k": -1, "down": 1, "j": 1, "pageup": -20, "pagedown": 20}
        if key == "home":
            index = 0
        elif key == "end":
            index = len(listed) - 1
        else:
            index = min(len(listed) - 1, max(0, index + step[key]))
        self.state.selected = listed[index]

    def _type(self, key: str) -> None:
        assert self._typing is not None
        if key == "esc":
            self._typing = None
            self.state.prompt = None
            return
        if key == "enter":
            text = self._typing.strip()
            self.state.keep = replace(self.state.keep, symbol=text or None)
            self._typing = None
            self.state.prompt = None
            return
        if key == "backspace":
            self._typing = self._typing[:-1]
        elif len(key) == 1 and key.isprintable() and len(self._typing) < 16:
            self._typing += key
        self.state.prompt = (
            f"symbol starts with: {self._typing.upper()}_   (enter: apply, empty: all, esc: cancel)"
        )

    def _ask(self, key: str) -> None:
        command = "halt" if key in ("h", "H") else "resume"
        everything = key in ("H", "R")
        if not self.state.allow_control:
            self._notice(
                "sending is off: start tracker watch with --allow-control to send halt or resume",
                "bold yellow",
            )
            return
        if self._sent is not None and not self._sent.applied and self._sent.published is False:
            self._notice("a control message is still on its way; wait for its result", "yellow")
            return
        order_id = None if everything else self.state.selected
        if not everything and order_id is None:
            self._notice("no order selected", "yellow")
            return
        what = "ALL ORDERS" if order_id is None else f"order {order_id}"
        self._confirm = (command, order_id)
        self.state.prompt = (
            f"Send {command.upper()} for {what} to {Topics(self.root).control}? "
            "y: send   any other key: cancel"
        )

    def _answer(self, key: str) -> None:
        assert self._confirm is not None
        command, order_id = self._confirm
        self._confirm = None
        self.state.prompt = None
        if key != "y":
            self._notice(f"{command} not sent")
            return
        self._spawn(self._send(command, order_id))

    def _spawn(self, work: Coroutine[Any, Any, None]) -> None:
        task = asyncio.get_running_loop().create_task(work)
        self._tasks.add(task)
        task.add_done_callback(self._tasks.discard)

    async def _follow_fills(self) -> None:
        """The detail screen shows its order's fills: read them while it is open."""
        order_id = self.state.selected if self.state.mode == "detail" else None
        await self.link.follow(None if order_id is None else Topics(self.root).fills(order_id))

    async def _send(self, command: str, order_id: str | None) -> None:
        what = "all orders" if order_id is None else order_id
        now = time.monotonic()
        ts = self.board.daemon_clock(now, datetime.now(UTC))
        sent = _Sent(command, order_id, now, errors_before=self.board.error_count)
        self._sent = sent
        self._notice(f"sending {command} for {what} ...", "bold")
        try:
            await self.link.publish(
                Topics(self.root).control, control_payload(command, order_id, ts)
            )
        except Exception as exc:
            self._sent = None
            self._notice(f"{command} for {what} NOT sent: {exc}", "bold white on red")
            return
        sent.published = True
        self._notice(
            f"{command} for {what} delivered to the broker; waiting for the daemon's status",
            "bold",
        )

    def _follow_up(self, now: float) -> None:
        """Turn what the board shows since a control message was sent into its result."""
        sent = self._sent
        if sent is None or not sent.published:
            return
        what = "all orders" if sent.order_id is None else sent.order_id
        control = Topics(self.root).control
        for number, error in self.board.errors:
            if number > sent.errors_before and error.get("topic") == control:
                self._sent = None
                self._notice(
                    f"the daemon refused {sent.command} for {what}: {error.get('reason', '')}",
                    "bold white on red",
                )
                return
        wanted = ("halted",) if sent.command == "halt" else ("working", "pending")
        if sent.order_id is not None:
            view = self.board.orders.get(sent.order_id)
            if view is not None and view.state in wanted:
                self._sent = None
                self._notice(
                    f"{sent.command} applied: {sent.order_id} is {view.state} "
                    f"(status of {view.ts.astimezone(self.zone):%H:%M:%S})"
                    if view.ts is not None
                    else f"{sent.command} applied: {sent.order_id} is {view.state}",
                    "bold green",
                )
                return
        else:
            live = [
                v for v in self.board.orders.values() if v.state in ("pending", "working", "halted")
            ]
            done = [v.order_id for v in live if v.state in wanted]
            if live and len(done) == len(live):
                self._sent = None
                self._notice(f"{sent.command} applied: all {len(done)} live orders", "bold green")
                return
        if now - sent.at > ANSWER_SECONDS:
            self._sent = None
            self._notice(
                f"no answer from the daemon to {sent.command} for {what} in "
                f"{ANSWER_SECONDS:.0f} s: check the daemons line",
                "bold black on yellow",
            )

    def _notice(self, text: str, style: str = "") -> None:
        self.state.notice = text
        self.state.notice_style = style
        self._redraw()

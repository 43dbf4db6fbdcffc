"""The terminal: keys in, frames out, and neither may hold up the view.

Theory of operation
-------------------
Keys: standard input is put in cbreak mode (each key arrives at once, not echoed; Ctrl-C still
interrupts) and read by the event loop only when bytes are waiting (``add_reader``), so reading
never blocks. :func:`parse_keys` turns the bytes into key names (``up``, ``enter``, ``esc``, ``q``).

Frames: a frame is rendered to text in memory (:func:`frame_text`) and handed to
:class:`FrameWriter`, whose own thread writes it to the terminal. A slow terminal (a congested SSH
link, a paused pane) only slows that thread: the event loop never waits on a write, so the MQTT
connection, its keep-alive and the board go on. While a frame is being written, a newer frame
*replaces* the one waiting (frames are dropped, never queued), so a slow terminal sees fewer,
always current frames, and memory stays bounded.

The view uses the terminal's alternate screen, so the shell's screen is back as it was on exit.
"""

from __future__ import annotations

import asyncio
import io
import os
import termios
import threading
import tty
from collections.abc import Callable
from types import TracebackType
from typing import Self

from rich.console import Console, RenderableType

__all__ = ["FrameWriter", "Keys", "frame_text", "parse_keys"]

ENTER_SCREEN = "\x1b[?1049h\x1b[?25l\x1b[H\x1b[2J"
LEAVE_SCREEN = "\x1b[?25h\x1b[?1049l"

_SEQUENCES = {
    "\x1b[A": "up",
    "\x1b[B": "down",
    "\x1b[C": "right",
    "\x1b[D": "left",
    "\x1bOA": "up",
    "\x1bOB": "down",
    "\x1b[5~": "pageup",
    "\x1b[6~": "pagedown",
    "\x1b[H": "home",
    "\x1b[F": "end",
    "\x1bOH": "home",
    "\x1bOF": "end",
    "\x1b[1~": "home",
    "\x1b[4~": "end",
}
_SINGLE = {"\r": "enter", "\n": "enter", "\x7f": "backspace", "\x08": "backspace", "\x03": "ctrl-c"}


def parse_keys(data: str) -> list[str]:
    """Key names in a chunk of terminal input (unknown escape sequences are skipped).

    A lone ESC is ``esc``; an arrow is ``up`` / ``down``; Enter is ``enter``; any other
    character is itself.
    """
    keys: list[str] = []
    index = 0
    while index < len(data):
        char = data[index]
        if char == "\x1b":
            for sequence, name in _SEQUENCES.items():
                if data.startswith(sequence, index):
                    keys.append(name)
                    index += len(sequence)
                    break
            else:
                if index + 1 < len(data) and data[index + 1] in "[O":
                    end = index + 2
                    while end < len(data) and not ("@" <= data[end] <= "~"):
                        end += 1
                    index = end + 1  # an escape sequence we do not use
                else:
                    keys.append("esc")
                    index += 1
            continue
        keys.append(_SINGLE.get(char, char))
        index += 1
    return keys


def frame_text(renderable: RenderableType, width: int, height: int, *, color: bool = True) -> str:
    """The renderable as one full-screen frame: cursor home, each line cleared to its end.

    Args:
        renderable: What to draw.
        width, height: The terminal size; lines past ``height`` are cut.
        color: Write colours and styles (``NO_COLOR`` in the environment turns them off too).
    """
    console = Console(
        file=io.StringIO(),
        width=width,
        height=height,
        force_terminal=True,
        color_system="256" if color else None,
        legacy_windows=False,
        highlight=False,
        emoji=False,
    )
    console.print(renderable, end="", crop=True, overflow="crop")
    text = console.file.getvalue()  # type: ignore[attr-defined]
    lines = text.split("\n")[:height]
    return "\x1b[H" + "\x1b[K\r\n".join(lines) + "\x1b[K\x1b[J"


class FrameWriter:
    """Writes frames from a thread of its own; a newer frame replaces one not yet written.

    Args:
        fd: The terminal's file descriptor.

    Attributes:
        written: Frames written. dropped: Frames replaced before they were written.
        failed: The error that ended writing (the terminal went away), or ``None``.
    """

    def __init__(self, fd: int) -> None:
        self.fd = fd
        self.written = 0
        self.dropped = 0
        self.failed: OSError | None = None
        self._pending: str | None = None
        self._closing = False
        self._ready = threading.Condition()
        self._thread = threading.Thread(target=self._work, name="watch-frames", daemon=True)

    def start(self, first: str = "") -> None:
        """Start the thread; ``first`` is written before any frame (e.g. the screen switch)."""
        if first:
            self.show(first)
        self._thread.start()

    def show(self, frame: str) -> None:
        """Hand over a frame (returns at once)."""
        with self._ready:
            if self._pending is not None:
                self.dropped += 1
            self._pending = frame
            self._ready.notify()

    def close(self, last: str = "", timeout: float = 2.0) -> None:
        """Write ``last`` after the frame in hand and stop (waits at most ``timeout`` seconds)."""
        with self._ready:
            self._pending = (self._pending or "") + last if last else self._pending
            self._closing = True
            self._ready.notify()
        if self._thread.is_alive():
            self._thread.join(timeout)

    def _work(self) -> None:
        while True:
            with self._ready:
                while self._pending is None and not self._closing:
                    self._ready.wait()
                frame, self._pending = self._pending, None
                closing = self._closing
            if frame:
                data = frame.encode("utf-8", "replace")
                try:
                    while data:
                        count = os.write(self.fd, data)
                        data = data[count:]
                except OSError as exc:  # the terminal is gone (hung up, closed)
                    self.failed = exc
                    return
                self.written += 1
            if closing:
                with self._ready:
                    if self._pending is None:
                        return


class Keys:
    """Keys from a terminal in cbreak mode, delivered to ``on_key`` by the event loop.

    Use as a context manager inside a running event loop; on exit the terminal's mode is
    restored. When ``fd`` is not a terminal, nothing is read.
    """

    def __init__(self, fd: int, on_key: Callable[[str], None]) -> None:
        self.fd = fd
        self._on_key = on_key
        self._saved: list[object] | None = None
        self._loop: asyncio.AbstractEventLoop | None = None

    def __enter__(self) -> Self:
        if not os.isatty(self.fd):
            return self
        self._saved = termios.tcgetattr(self.fd)
        tty.setcbreak(self.fd)
        self._loop = asyncio.get_running_loop()
        self._loop.add_reader(self.fd, self._read)
        return self

    def _read(self) -> None:
        try:
            data = os.read(self.fd, 1024)
        except (BlockingIOError, InterruptedError):
            return
        except OSError:
            data = b""
        if not data:  # the terminal went away
            if self._loop is not None:
                self._loop.remove_reader(self.fd)
            self._on_key("eof")
            return
        for key in parse_keys(data.decode("utf-8", "replace")):
            self._on_key(key)

    def __exit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        tb: TracebackType | None,
    ) -> None:
        if self._loop is not None:
            self._loop.remove_reader(self.fd)
        if self._saved is not None:
            termios.tcsetattr(self.fd, termios.TCSADRAIN, self._saved)  # type: ignore[arg-type]

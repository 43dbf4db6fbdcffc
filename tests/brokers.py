"""A private Mosquitto broker on a free loopback port, for tests that need a clean broker.

``PrivateMosquitto`` writes a temporary config (listener on 127.0.0.1, anonymous allowed,
persistence in the temp folder so that a stop/start keeps sessions and queued messages, no limit on
messages queued for a disconnected client), starts ``mosquitto -c``, and waits until the port
accepts connections. ``stop()`` sends SIGTERM (Mosquitto then saves its state) and ``start()``
brings it back on the same port. Use it as a context manager or through a fixture, so it is
stopped even when a test fails.
"""

from __future__ import annotations

import shutil
import signal
import socket
import subprocess
import time
from pathlib import Path
from types import TracebackType
from typing import Self

import pytest

MOSQUITTO = shutil.which("mosquitto") or "/usr/sbin/mosquitto"
START_TIMEOUT = 20.0
STOP_TIMEOUT = 20.0


def free_port() -> int:
    """A TCP port on 127.0.0.1 that was free a moment ago."""
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as sock:
        sock.bind(("127.0.0.1", 0))
        return int(sock.getsockname()[1])


def port_open(port: int, host: str = "127.0.0.1") -> bool:
    """Whether something accepts TCP connections on the port."""
    try:
        with socket.create_connection((host, port), timeout=0.5):
            return True
    except OSError:
        return False


def require_mosquitto() -> None:
    """Skip the calling test when the mosquitto binary is not installed."""
    if not Path(MOSQUITTO).exists():
        pytest.skip("mosquitto is not installed (apt-get install mosquitto)")


class PrivateMosquitto:
    """One mosquitto process with its own config, data and log under ``folder``."""

    def __init__(self, folder: Path, *, port: int | None = None) -> None:
        self.folder = folder
        self.folder.mkdir(parents=True, exist_ok=True)
        self.port = port or free_port()
        self.config = folder / "mosquitto.conf"
        self.log = folder / "mosquitto.log"
        self._process: subprocess.Popen[bytes] | None = None
        self.config.write_text(
            "\n".join(
                [
                    f"listener {self.port} 127.0.0.1",
                    "allow_anonymous true",
                    "persistence true",
                    f"persistence_location {folder}/",
                    "autosave_interval 1",
                    "max_queued_messages 0",
                    "max_inflight_messages 20",
                    f"log_dest file {self.log}",
                    "log_type error",
                    "log_type warning",
                    "log_type notice",
                    "",
                ]
            )
        )

    @property
    def url(self) -> str:
        """``mqtt://127.0.0.1:PORT``."""
        return f"mqtt://127.0.0.1:{self.port}"

    def start(self) -> None:
        """Start mosquitto and wait until it accepts connections."""
        require_mosquitto()
        self._process = subprocess.Popen(
            [MOSQUITTO, "-c", str(self.config)],
            stdout=subprocess.DEVNULL,
            stderr=subprocess.DEVNULL,
        )
        deadline = time.monotonic() + START_TIMEOUT
        while not port_open(self.port):
            if self._process.poll() is not None:
                log = self.log.read_text() if self.log.exists() else ""
                raise RuntimeError(f"mosquitto exited with {self._process.returncode}: {log}")
            if time.monotonic() > deadline:
                self.stop()
                raise RuntimeError(f"mosquitto did not open port {self.port}")
            time.sleep(0.05)

    def stop(self) -> None:
        """Stop mosquitto with SIGTERM (it saves sessions and queued messages), or kill it."""
        process, self._process = self._process, None
        if process is None or process.poll() is not None:
            return
        process.send_signal(signal.SIGTERM)
        try:
            process.wait(timeout=STOP_TIMEOUT)
        except subprocess.TimeoutExpired:
            process.kill()
            process.wait(timeout=STOP_TIMEOUT)

    @property
    def running(self) -> bool:
        """Whether the process is alive."""
        return self._process is not None and self._process.poll() is None

    def __enter__(self) -> Self:
        self.start()
        return self

    def __exit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        tb: TracebackType | None,
    ) -> None:
        self.stop()

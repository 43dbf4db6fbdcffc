"""A private Mosquitto broker on a free loopback port, for tests that need a clean broker.

``PrivateMosquitto`` writes a temporary config (listener on 127.0.0.1, anonymous allowed,
persistence in the temp folder, and the broker contract of the shipped ``deploy/mosquitto.conf``:
persistence, no limit on messages queued for a disconnected client, a packet size limit), starts
``mosquitto -c``, and waits until the port
accepts connections. ``stop()`` sends SIGTERM (Mosquitto then saves its state) and ``start()``
brings it back on the same port. Use it as a context manager or through a fixture, so it is
stopped even when a test fails.
"""

from __future__ import annotations

import asyncio
import contextlib
import functools
import getpass
import json
import os
import shutil
import signal
import socket
import subprocess
import sys
import time
from collections.abc import Callable
from datetime import datetime, timedelta
from pathlib import Path
from types import TracebackType
from typing import Any, Self

import pytest

MOSQUITTO = shutil.which("mosquitto") or "/usr/sbin/mosquitto"
#: The broker configuration the project ships for the daemon's broker.
SHIPPED_CONFIG = Path(__file__).resolve().parent.parent / "deploy" / "mosquitto.conf"
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


def contract_lines(path: Path = SHIPPED_CONFIG) -> list[str]:
    """The settings of the shipped configuration's contract section (what the daemon needs)."""
    text = path.read_text(encoding="utf-8")
    section = text.split("# --- contract", 1)[1]
    return [
        line.strip()
        for line in section.splitlines()[1:]
        if line.strip() and not line.lstrip().startswith("#")
    ]


def require_mosquitto() -> None:
    """Skip the calling test when the mosquitto binary is not installed."""
    if not Path(MOSQUITTO).exists():
        pytest.skip("mosquitto is not installed (apt-get install mosquitto)")


class PrivateMosquitto:
    """One mosquitto process with its own config, data and log under ``folder``.

    ``contract`` replaces the shipped contract lines (``[]``: a stock broker's defaults, as a
    desk that skipped the shipped configuration would run).
    """

    def __init__(
        self,
        folder: Path,
        *,
        port: int | None = None,
        max_inflight: int | None = None,
        password_file: Path | None = None,
        listener_options: tuple[str, ...] = (),
        contract: list[str] | None = None,
    ) -> None:
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
                    *listener_options,
                    # Started as root, mosquitto would switch to user "mosquitto", which cannot
                    # write its log or its saved sessions in our temp folder.
                    f"user {getpass.getuser()}",
                    "allow_anonymous true" if password_file is None else "allow_anonymous false",
                    "" if password_file is None else f"password_file {password_file}",
                    f"persistence_location {folder}/",
                    *(contract if contract is not None else contract_lines()),
                    *([] if max_inflight is None else [f"max_inflight_messages {max_inflight}"]),
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


# ------------------------------------------------------------------------------------------------
# Daemons, publishers and collectors shared by the daemon tests


def wait_until(predicate: Callable[[], bool], timeout: float, what: str) -> None:
    """Poll ``predicate`` every 50 ms until it holds; fail the test after ``timeout`` seconds."""
    deadline = time.monotonic() + timeout
    while not predicate():
        if time.monotonic() > deadline:
            pytest.fail(f"timed out after {timeout} s waiting for {what}")
        time.sleep(0.05)


async def async_wait_until(predicate: Callable[[], bool], timeout: float, what: str) -> None:
    """The asyncio form of :func:`wait_until`."""
    deadline = time.monotonic() + timeout
    while not predicate():
        if time.monotonic() > deadline:
            pytest.fail(f"timed out after {timeout} s waiting for {what}")
        await asyncio.sleep(0.05)


@functools.lru_cache(maxsize=1)
def _day() -> tuple[tuple[str, bytes, str], ...]:
    from tracker.shell.simulated_day import run_day

    rows = []
    for record in run_day().records:
        payload = record.payload
        if isinstance(payload, str):
            data = payload.encode("utf-8")
        else:
            data = json.dumps(payload, separators=(",", ":")).encode("utf-8")
        rows.append((record.topic, data, record.ts or ""))
    return tuple(rows)


def day_messages(root: str) -> list[tuple[str, bytes]]:
    """The invented demo day (tracker.sim.scenario) as ``(topic, payload)`` under ``root``.

    It is the closed-loop day recorded in-process, published open-loop: orders, bins, fills, the
    scenario's deliberately malformed messages and its one exact redelivery.
    """
    return [(root + topic[len("tracker") :], payload) for topic, payload, _ in _day()]


def day_start() -> str:
    """An instant one second before the day's first message (for a simulated daemon clock)."""
    first = datetime.fromisoformat(_day()[0][2])
    return (first - timedelta(seconds=1)).isoformat()


def journaled(path: Path, root: str) -> list[tuple[str, bytes]]:
    """The non-tick records of a journal as ``(topic, payload)``, in order (read-only)."""
    from tracker.shell.journal import read_journal

    if not path.exists():
        return []
    tick = f"{root}/tick"
    return [
        (r.topic, bytes(r.payload))  # type: ignore[arg-type]
        for r in read_journal(path)
        if r.topic != tick
    ]


def has_all(path: Path, root: str, messages: list[tuple[str, bytes]]) -> bool:
    """Whether the journal holds every distinct message (redelivered copies may add more)."""
    try:
        return set(messages) <= set(journaled(path, root))
    except Exception:  # a journal being created can be briefly unreadable
        return False


class DaemonProcess:
    """``python -m tracker run`` in a subprocess, for kill -9 and signal tests."""

    def __init__(
        self,
        folder: Path,
        broker_url: str,
        *,
        root: str,
        instance: str,
        journal: Path | None = None,
        summary: Path | None = None,
        extra: tuple[str, ...] = (),
        env: dict[str, str] | None = None,
        event_time: str | None = None,
    ) -> None:
        self.env = env
        self.folder = folder
        folder.mkdir(parents=True, exist_ok=True)
        self.journal = journal or folder / "journal.sqlite"
        self.summary = summary or folder / "summary.json"
        self.log = folder / "daemon.log"
        self.args = [
            sys.executable,
            "-m",
            "tracker",
            "run",
            "--broker",
            broker_url,
            "--root",
            root,
            "--instance",
            instance,
            "--journal",
            str(self.journal),
            "--summary",
            str(self.summary),
            "--clock-start",
            day_start(),
            "--clock-speed",
            "1",
            "--log-format",
            "json",
            *extra,
        ]
        if event_time is not None:  # "message": a day published at once, faster than the clock
            config = folder / "daemon.toml"
            config.write_text(f'[engine]\nevent_time = "{event_time}"\n')
            self.args += ["--config", str(config)]
        self.process: subprocess.Popen[bytes] | None = None
        self._log_handle: Any = None

    def start(self) -> None:
        """Start the daemon (its log appends to ``daemon.log``)."""
        self._log_handle = open(self.log, "ab")  # noqa: SIM115 -- closed in wait()/kill()
        env = None if self.env is None else {**os.environ, **self.env}
        self.process = subprocess.Popen(
            self.args, stdout=self._log_handle, stderr=subprocess.STDOUT, cwd=self.folder, env=env
        )

    def wait_connected(self, timeout: float = 60.0) -> None:
        """Wait until the log says the daemon is connected."""

        def connected() -> bool:
            assert self.process is not None
            if self.process.poll() is not None:
                pytest.fail(f"daemon exited with {self.process.returncode}: {self.log_text()}")
            return b'"connected"' in self.log.read_bytes()

        wait_until(connected, timeout, "the daemon to connect")

    def log_text(self) -> str:
        """The daemon's log so far."""
        return self.log.read_text(errors="replace") if self.log.exists() else ""

    def terminate(self, timeout: float = 60.0) -> int:
        """SIGTERM and wait; return the exit code."""
        assert self.process is not None
        self.process.send_signal(signal.SIGTERM)
        return self.wait(timeout)

    def kill(self) -> None:
        """kill -9 (and the log closed, whether it still ran or not)."""
        if self.process is not None and self.process.poll() is None:
            self.process.kill()
        if self.process is not None:
            self.wait(30)

    def wait(self, timeout: float) -> int:
        """Wait for the process to exit; return its exit code."""
        assert self.process is not None
        try:
            code = self.process.wait(timeout=timeout)
        finally:
            if self._log_handle is not None:
                self._log_handle.close()
                self._log_handle = None
        return code

    def cleanup(self) -> None:
        """Kill the process if it still runs (fixture teardown)."""
        self.kill()


async def publish_all(port: int, messages: list[tuple[str, bytes]], *, client_id: str) -> None:
    """Publish every message at QoS 1, in order, and wait for each acknowledgement."""
    import aiomqtt

    async with aiomqtt.Client("127.0.0.1", port, identifier=client_id, timeout=30) as client:
        for topic, payload in messages:
            await client.publish(topic, payload, qos=1)


class Collector:
    """Subscribes to a root's output topics and keeps every message, in arrival order."""

    KINDS = ("targets", "alerts", "status", "errors", "acks")

    def __init__(self, port: int, root: str, *, client_id: str) -> None:
        self.port = port
        self.root = root
        self.client_id = client_id
        self.messages: list[tuple[str, bytes, bool]] = []
        self._task: asyncio.Task[None] | None = None
        self._client: Any = None
        self.last = time.monotonic()

    async def __aenter__(self) -> Collector:
        import aiomqtt

        self._client = aiomqtt.Client("127.0.0.1", self.port, identifier=self.client_id, timeout=30)
        await self._client.__aenter__()
        for kind in self.KINDS:
            await self._client.subscribe(f"{self.root}/{kind}/#", qos=1)
        await self._client.subscribe(f"{self.root}/errors", qos=1)
        await self._client.subscribe(f"{self.root}/health/#", qos=1)
        self._task = asyncio.create_task(self._listen())
        return self

    async def _listen(self) -> None:
        async for message in self._client.messages:
            payload = message.payload
            assert isinstance(payload, bytes | bytearray)
            self.messages.append((message.topic.value, bytes(payload), bool(message.retain)))
            self.last = time.monotonic()

    async def settle(self, quiet: float = 0.5, timeout: float = 60.0) -> None:
        """Wait until nothing arrived for ``quiet`` seconds."""
        await async_wait_until(
            lambda: time.monotonic() - self.last >= quiet, timeout, "the outputs to settle"
        )

    def outputs(self) -> dict[str, list[bytes]]:
        """Live (not retained) outputs by topic, in arrival order (without the empty payloads
        that clear an ended order's retained target)."""
        by_topic: dict[str, list[bytes]] = {}
        for topic, payload, retained in self.messages:
            if retained or "/health/" in topic or not payload:
                continue
            by_topic.setdefault(topic, []).append(payload)
        return by_topic

    async def __aexit__(self, *exc: object) -> None:
        assert self._task is not None
        self._task.cancel()
        with contextlib.suppress(asyncio.CancelledError):
            await self._task
        await self._client.__aexit__(None, None, None)


def replay_by_topic(journal: Path, root: str) -> tuple[dict[str, list[bytes]], dict[str, Any]]:
    """Replay a journal with a fresh engine: outputs by topic (encoded) and the summary."""
    from tracker.core.engine import Engine
    from tracker.edge.wire import encode, topic_of
    from tracker.shell.journal import read_journal, read_setup
    from tracker.shell.replay import replay
    from tracker.shell.setup import engine_of, timeline

    setups = timeline(read_setup(journal))  # the settings the daemon ran with
    engine = engine_of(setups[0][1]) if setups else Engine(root=root)
    result = replay(read_journal(journal), engine, root)
    by_topic: dict[str, list[bytes]] = {}
    for message in [*result.targets, *result.alerts, *result.status, *result.errors, *result.acks]:
        by_topic.setdefault(topic_of(message, root), []).append(encode(message))
    # replay groups by kind; within one topic the order is the engine's order either way
    return by_topic, result.summary

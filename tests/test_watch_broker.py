"""tracker watch against a real daemon on a private Mosquitto, driven in tmux like a person would.

The daemon runs as ``tracker run`` in its own process; the view runs as ``tracker watch`` in a
tmux pane on a private tmux server (its own socket, so no one else's sessions are touched); the
test types keys with ``send-keys`` and reads the screen with ``capture-pane``. What the screen
should say is taken from the broker itself (the retained statuses read with ``mosquitto_sub``).
"""

from __future__ import annotations

import asyncio
import json
import os
import shutil
import subprocess
import sys
import time
import uuid
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest

from tests.brokers import (
    DaemonProcess,
    PrivateMosquitto,
    day_messages,
    has_all,
    publish_all,
    wait_until,
)

pytestmark = [pytest.mark.broker, pytest.mark.slow]

ROOT = "desk"
#: The first part of the invented day: three orders working, X_ZEPH-S2 not yet sent.
MORNING = 300
REPO = Path(__file__).resolve().parent.parent


class Tmux:
    """One tmux pane on a private tmux server (``tmux -L``), killed with the server at the end."""

    def __init__(self, width: int = 200, height: int = 50) -> None:
        if shutil.which("tmux") is None:
            pytest.skip("tmux is not installed (apt-get install tmux)")
        self.socket = f"tracker-watch-test-{uuid.uuid4().hex[:8]}"
        self.width, self.height = width, height

    def _tmux(self, *args: str) -> str:
        done = subprocess.run(
            ["tmux", "-L", self.socket, *args], capture_output=True, text=True, check=True
        )
        return done.stdout

    def start(self, command: list[str]) -> None:
        """Run ``command`` in a new detached session of the given size."""
        line = " ".join(_quote(part) for part in command)
        self._tmux(
            "new-session", "-d", "-s", "view", "-x", str(self.width), "-y", str(self.height), line
        )

    def screen(self) -> str:
        """The pane's text as shown now."""
        return self._tmux("capture-pane", "-p", "-t", "view")

    def keys(self, *keys: str) -> None:
        """Type keys (tmux key names: Enter, Escape, or literal text)."""
        self._tmux("send-keys", "-t", "view", *keys)

    def wait_for(self, text: str, timeout: float = 30.0) -> str:
        """Wait until the screen shows ``text``; return the screen."""
        wait_until(lambda: text in self.screen(), timeout, f"{text!r} on the screen")
        return self.screen()

    def close(self) -> None:
        subprocess.run(["tmux", "-L", self.socket, "kill-server"], capture_output=True, check=False)


def _quote(part: str) -> str:
    return "'" + part.replace("'", "'\\''") + "'"


def watch_command(url: str, *extra: str) -> list[str]:
    return [sys.executable, "-m", "tracker", "watch", "--broker", url, "--root", ROOT, *extra]


@pytest.fixture
def mosquitto(tmp_path: Path) -> Iterator[PrivateMosquitto]:
    """A private Mosquitto, stopped even when the test fails."""
    with PrivateMosquitto(tmp_path / "mosquitto") as broker:
        yield broker


@pytest.fixture
def tmux() -> Iterator[Tmux]:
    """A private tmux server, killed even when the test fails."""
    pane = Tmux()
    try:
        yield pane
    finally:
        pane.close()


@pytest.fixture
def daemon(tmp_path: Path, mosquitto: PrivateMosquitto) -> Iterator[DaemonProcess]:
    """``tracker run`` on the private broker, connected."""
    process = DaemonProcess(
        tmp_path / "daemon", mosquitto.url, root=ROOT, instance="t1", event_time="message"
    )
    process.start()
    try:
        process.wait_connected()
        yield process
    finally:
        process.cleanup()


def retained(port: int, topic: str) -> list[dict[str, Any]]:
    """The retained messages on ``topic`` (a filter), read with Mosquitto's own client."""
    done = subprocess.run(
        ["mosquitto_sub", "-p", str(port), "-t", topic, "--retained-only", "-W", "2", "-F", "%p"],
        capture_output=True,
        text=True,
        check=False,
    )
    return [json.loads(line) for line in done.stdout.splitlines() if line.strip()]


def statuses(port: int) -> dict[str, dict[str, Any]]:
    return {status["order_id"]: status for status in retained(port, f"{ROOT}/status/+")}


def play_morning(mosquitto: PrivateMosquitto, daemon: DaemonProcess) -> dict[str, dict[str, Any]]:
    """Publish the morning of the invented day; return the retained statuses once they settle."""
    messages = day_messages(ROOT)[:MORNING]
    asyncio.run(publish_all(mosquitto.port, messages, client_id="morning"))
    wait_until(lambda: has_all(daemon.journal, ROOT, messages), 60, "the daemon to journal all")
    previous: dict[str, dict[str, Any]] = {}
    deadline = time.monotonic() + 30
    while time.monotonic() < deadline:
        now = statuses(mosquitto.port)
        if now and now == previous:
            return now
        previous = now
        time.sleep(0.5)
    pytest.fail("the retained statuses did not settle")


def row(screen: str, order_id: str) -> str:
    """The screen line of an order's row."""
    lines = [line for line in screen.splitlines() if f" {order_id} " in line]
    assert lines, f"no row for {order_id} on the screen:\n{screen}"
    return lines[0]


def test_the_view_shows_the_day_raises_halts_and_sees_the_daemon_go(
    mosquitto: PrivateMosquitto, daemon: DaemonProcess, tmux: Tmux
) -> None:
    """Rows with the broker's states and fills; a new alert; a halt sent from the view; offline."""
    expected = play_morning(mosquitto, daemon)
    assert {"X_ZEPH-B1", "X_MIRA-B1", "X_KALO-S1"} == set(expected)
    tmux.start(watch_command(mosquitto.url, "--allow-control"))
    for order_id, status in expected.items():
        filled = f"{status['filled']:,} of {status['quantity']:,}"
        wait_until(
            lambda o=order_id, f=filled: f in tmux.screen() and f" {o} " in tmux.screen(),
            30,
            f"{order_id}'s row",
        )
        line = row(tmux.screen(), order_id)
        assert filled in line
        assert status["state"] in line

    # A fill for an order the daemon does not know: it raises an alert at once (which one is
    # the engine's business: the screen must show what the daemon published).
    raised = subprocess.Popen(
        ["mosquitto_sub", "-p", str(mosquitto.port), "-t", f"{ROOT}/alerts/GHOST-1", "-C", "1"],
        stdout=subprocess.PIPE,
        text=True,
    )
    try:
        time.sleep(0.5)  # let it subscribe
        ghost = {"type": "fill", "fill_id": "G1", "order_id": "GHOST-1", "quantity": 100}
        ghost |= {"price": 42.0, "ts": "2026-03-10T15:30:00Z"}
        asyncio.run(
            publish_all(
                mosquitto.port,
                [(f"{ROOT}/fills/GHOST-1", json.dumps(ghost).encode())],
                client_id="ghost",
            )
        )
        alert_text, _ = raised.communicate(timeout=30)
    finally:
        raised.kill()
    alert = json.loads(alert_text)
    screen = tmux.wait_for(alert["code"])
    feed_line = next(line for line in screen.splitlines() if alert["code"] in line)
    assert alert["severity"] in feed_line
    assert "raised" in feed_line

    # Halt X_ZEPH-B1 from the view: filter on X_ZEPH (its only order now), h, y.
    tmux.keys("/", "X_ZEPH", "Enter")
    tmux.wait_for("showing symbol X_ZEPH*")
    next_target = subprocess.Popen(
        # -R: not a retained target from before (a daemon may retain targets for routers)
        [
            "mosquitto_sub",
            "-p",
            str(mosquitto.port),
            "-t",
            f"{ROOT}/targets/X_ZEPH-B1",
            "-R",
            "-C",
            "1",
        ],
        stdout=subprocess.PIPE,
        text=True,
    )
    try:
        time.sleep(0.5)  # let it subscribe
        tmux.keys("h")
        tmux.wait_for("Send HALT for order X_ZEPH-B1")
        tmux.keys("y")
        screen = tmux.wait_for("halt applied: X_ZEPH-B1 is halted")
        target_text, _ = next_target.communicate(timeout=30)
    finally:
        next_target.kill()
    assert "halted" in row(screen, "X_ZEPH-B1")
    assert "halted" == statuses(mosquitto.port)["X_ZEPH-B1"]["state"]
    assert 0 == json.loads(target_text)["quantity"]

    # The daemon stops: its last will says offline, and the view says so across the top.
    assert 0 == daemon.terminate()
    screen = tmux.wait_for("daemon t1 is OFFLINE")
    assert "OFFLINE" in next(line for line in screen.splitlines() if "daemons:" in line)
    tmux.keys("q")


def test_the_view_reconnects_after_a_broker_restart(
    mosquitto: PrivateMosquitto, tmux: Tmux
) -> None:
    """The broker goes away: the view says it is reconnecting; it comes back: new data shows."""

    def publish_status(filled: int) -> None:
        status = {"type": "status", "order_id": "X_ZEPH-B1", "symbol": "X_ZEPH", "side": "buy"}
        status |= {"state": "working", "quantity": 10_000, "filled": filled}
        subprocess.run(
            [
                "mosquitto_pub",
                "-p",
                str(mosquitto.port),
                "-r",
                "-q",
                "1",
                "-t",
                f"{ROOT}/status/X_ZEPH-B1",
                "-m",
                json.dumps(status),
            ],
            check=True,
        )

    publish_status(1_000)
    tmux.start(watch_command(mosquitto.url))
    tmux.wait_for("1,000 of 10,000")
    mosquitto.stop()
    screen = tmux.wait_for("BUS DOWN, RECONNECTING")
    assert "1,000 of 10,000" in screen  # what it had stays on the screen
    mosquitto.start()
    wait_until(lambda: port_listening(mosquitto.port), 10, "the broker to listen")
    publish_status(2_500)
    screen = tmux.wait_for("2,500 of 10,000", timeout=60)
    assert "RECONNECTING" not in screen
    tmux.keys("q")


def port_listening(port: int) -> bool:
    from tests.brokers import port_open

    return port_open(port)


def test_once_json_equals_the_retained_statuses(
    mosquitto: PrivateMosquitto, daemon: DaemonProcess
) -> None:
    """``--once --format json`` prints the status objects exactly as the broker holds them."""
    expected = play_morning(mosquitto, daemon)
    done = subprocess.run(
        watch_command(mosquitto.url, "--once", "--format", "json"),
        capture_output=True,
        text=True,
        check=True,
        cwd=REPO,
        env={**os.environ, "NO_COLOR": "1"},
    )
    snapshot = json.loads(done.stdout)
    assert [expected[key] for key in sorted(expected)] == snapshot["statuses"]
    assert "online" == snapshot["health"]["t1"]["status"]


def test_once_connects_with_tls_and_a_password_as_run_does(tmp_path: Path) -> None:
    """mqtts:// with --ca, --username and --password-file: the settings tracker run reads."""
    if shutil.which("openssl") is None or shutil.which("mosquitto_passwd") is None:
        pytest.skip("openssl and mosquitto_passwd are needed")
    from tests.test_daemon_broker import _certificates

    ca, cert, key = _certificates(tmp_path / "pki")
    passwords = tmp_path / "passwords"
    subprocess.run(
        ["mosquitto_passwd", "-c", "-b", str(passwords), "desk", "Wh1sper-x9"], check=True
    )
    secret = tmp_path / "secret"
    secret.write_text("Wh1sper-x9\n")
    options = (f"cafile {ca}", f"certfile {cert}", f"keyfile {key}")
    with PrivateMosquitto(
        tmp_path / "tls", listener_options=options, password_file=passwords
    ) as broker:
        status = {"type": "status", "order_id": "X_ZEPH-B1", "state": "working", "filled": 5}
        subprocess.run(
            [
                "mosquitto_pub",
                "-h",
                "127.0.0.1",
                "-p",
                str(broker.port),
                "--cafile",
                str(ca),
                "-u",
                "desk",
                "-P",
                "Wh1sper-x9",
                "-r",
                "-q",
                "1",
                "-t",
                f"{ROOT}/status/X_ZEPH-B1",
                "-m",
                json.dumps(status),
            ],
            check=True,
        )
        done = subprocess.run(
            [
                sys.executable,
                "-m",
                "tracker",
                "watch",
                "--broker",
                f"mqtts://127.0.0.1:{broker.port}",
                "--root",
                ROOT,
                "--ca",
                str(ca),
                "--username",
                "desk",
                "--password-file",
                str(secret),
                "--once",
                "--format",
                "json",
            ],
            capture_output=True,
            text=True,
            check=False,
            cwd=REPO,
        )
    assert 0 == done.returncode, done.stderr
    assert [status] == json.loads(done.stdout)["statuses"]
    assert "Wh1sper-x9" not in done.stdout + done.stderr

"""End to end with outside clients: Mosquitto's mosquitto_pub and mosquitto_sub drive the daemon."""

from __future__ import annotations

import json
import shutil
import subprocess
from collections.abc import Iterator
from pathlib import Path

import pytest

from tests.brokers import DaemonProcess, PrivateMosquitto, journaled, wait_until
from tracker.errors import InputError

pytestmark = pytest.mark.broker

ROOT = "cli"
ORDER = {
    "type": "order",
    "action": "new",
    "order_id": "X_ZEPH-C1",
    "symbol": "X_ZEPH",
    "side": "buy",
    "quantity": 5_000,
    "start": "2026-03-10T14:30:00Z",
    "end": "2026-03-10T20:00:00Z",
    "ts": "2026-03-10T14:29:00Z",
}


def _fill(n: int) -> str:
    return json.dumps(
        {
            "type": "fill",
            "fill_id": f"C{n}",
            "order_id": "X_ZEPH-C1",
            "quantity": 250,
            "price": 42.05,
            "ts": f"2026-03-10T14:31:{n:02d}Z",
        }
    )


@pytest.fixture
def tools() -> None:
    """Skip when Debian's mosquitto-clients are not installed."""
    if shutil.which("mosquitto_pub") is None or shutil.which("mosquitto_sub") is None:
        pytest.skip("mosquitto_pub/mosquitto_sub missing (apt-get install mosquitto-clients)")


@pytest.fixture
def setup(tmp_path: Path, tools: None) -> Iterator[tuple[PrivateMosquitto, DaemonProcess]]:
    """A private Mosquitto and a daemon subprocess, both stopped whatever the test does."""
    with PrivateMosquitto(tmp_path / "mosquitto") as broker:
        daemon = DaemonProcess(
            tmp_path / "daemon", broker.url, root=ROOT, instance="cli", event_time="message"
        )
        daemon.start()
        try:
            daemon.wait_connected()
            yield broker, daemon
        finally:
            daemon.cleanup()


def _pub(port: int, topic: str, *, message: str | None = None, lines: str | None = None) -> None:
    args = ["mosquitto_pub", "-h", "127.0.0.1", "-p", str(port), "-q", "1", "-t", topic]
    args += ["-l"] if lines is not None else ["-m", message or ""]
    subprocess.run(args, input=lines, text=True, check=True, timeout=60)


def _sub_retained(port: int, topic: str) -> dict[str, object]:
    """The retained message of a topic, read by mosquitto_sub."""
    args = ["mosquitto_sub", "-h", "127.0.0.1", "-p", str(port), "-q", "1", "-t", topic]
    done = subprocess.run(
        [*args, "-C", "1", "-W", "30", "--retained-only"],
        capture_output=True,
        text=True,
        check=True,
        timeout=60,
    )
    message: dict[str, object] = json.loads(done.stdout)
    return message


def _watcher(port: int, *extra: str) -> list[str]:
    """mosquitto_sub as a persistent client ``cli-watcher`` on the errors and targets topics."""
    args = ["mosquitto_sub", "-h", "127.0.0.1", "-p", str(port), "-q", "1", "-c"]
    args += ["-i", "cli-watcher", "-t", f"{ROOT}/errors", "-t", f"{ROOT}/targets/+", *extra]
    return args


def test_mosquitto_clients_drive_the_daemon(setup: tuple[PrivateMosquitto, DaemonProcess]) -> None:
    """mosquitto_pub sends an order, fills and junk; mosquitto_sub gets status, target, error."""
    broker, daemon = setup
    # -E: subscribe (a persistent session) and leave; the broker keeps what comes for it.
    subprocess.run(_watcher(broker.port, "-E"), check=True, timeout=60)
    _pub(broker.port, f"{ROOT}/orders/X_ZEPH-C1", message=json.dumps(ORDER))
    _pub(broker.port, f"{ROOT}/fills/X_ZEPH-C1", lines="\n".join(_fill(n) for n in range(4)))
    _pub(broker.port, f"{ROOT}/fills/X_ZEPH-C1", message='{"type": "fill", "quantity": -1')
    wait_until(lambda: _journaled(daemon) >= 6, 60, "six messages in the journal")
    status = _sub_retained(broker.port, f"{ROOT}/status/X_ZEPH-C1")
    health = _sub_retained(broker.port, f"{ROOT}/health/cli")
    # Back as the same persistent client: what was published meanwhile comes now (-W ends it).
    queued = subprocess.run(
        _watcher(broker.port, "-v", "-W", "3"), capture_output=True, text=True, timeout=60
    )
    seen = [line.split(" ", 1) for line in queued.stdout.splitlines()]
    topics = {topic for topic, _ in seen}
    errors = [json.loads(body) for topic, body in seen if topic == f"{ROOT}/errors"]
    assert (1_000, "working") == (status["filled"], status["state"])
    assert "online" == health["status"]
    assert f"{ROOT}/targets/X_ZEPH-C1" in topics
    assert 1 == len(errors)
    assert "not valid JSON" in str(errors[0]["reason"])
    assert 0 == daemon.terminate()
    assert "offline" == _sub_retained(broker.port, f"{ROOT}/health/cli")["status"]


def _journaled(daemon: DaemonProcess) -> int:
    try:
        return len(journaled(daemon.journal, ROOT))
    except InputError:  # the journal is being created
        return 0

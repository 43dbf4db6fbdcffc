"""Wire contract v1.1 conformance against the live daemon on a real Mosquitto, driven the way a
router and a gateway drive it: mosquitto_pub sends, mosquitto_sub reads.

The same router behaviours as tests/test_contract_conformance.py (tests/contract_cases.py), each
run live: the retained status gives the filled shares and the state, a persistent mosquitto_sub
session the targets and acks; then ``tracker replay`` of the daemon's journal, with no flags,
must say the same.
"""

from __future__ import annotations

import json
import shutil
import subprocess
from collections.abc import Iterator
from pathlib import Path

import pytest

from tests.brokers import DaemonProcess, PrivateMosquitto, journaled, wait_until
from tests.contract_cases import CASES, ORDER_ID, ROOT, Case
from tracker.cli import main
from tracker.errors import InputError

pytestmark = pytest.mark.broker

#: The daemon's simulated clock starts at the orders' start (the cases' times are around it).
CLOCK_START = "2026-03-10T14:00:00+00:00"
WATCHED = (f"{ROOT}/targets/+", f"{ROOT}/acks/+", f"{ROOT}/errors", f"{ROOT}/alerts/#")


@pytest.fixture
def broker(tmp_path: Path) -> Iterator[PrivateMosquitto]:
    """A private Mosquitto (skipped without Debian's mosquitto-clients)."""
    if shutil.which("mosquitto_pub") is None or shutil.which("mosquitto_sub") is None:
        pytest.skip("mosquitto_pub/mosquitto_sub missing (apt-get install mosquitto-clients)")
    with PrivateMosquitto(tmp_path / "mosquitto") as running:
        yield running


def _daemon(folder: Path, broker: PrivateMosquitto, journal: Path | None = None) -> DaemonProcess:
    """A daemon subprocess, connected (a restart gets its own folder, so its own log)."""
    daemon = DaemonProcess(
        folder,
        broker.url,
        root=ROOT,
        instance="conf",
        journal=journal,
        extra=("--clock-start", CLOCK_START),
    )
    daemon.start()
    daemon.wait_connected()
    return daemon


def _pub(port: int, topic: str, payload: str) -> None:
    args = ["mosquitto_pub", "-h", "127.0.0.1", "-p", str(port), "-q", "1", "-t", topic]
    subprocess.run([*args, "-m", payload], check=True, timeout=60)


def _sub(port: int, *args: str) -> list[tuple[str, str]]:
    """``(topic, payload)`` lines mosquitto_sub prints (-v), until it stops (-W or -C)."""
    base = ["mosquitto_sub", "-h", "127.0.0.1", "-p", str(port), "-q", "1", "-v"]
    done = subprocess.run([*base, *args], capture_output=True, text=True, timeout=60)
    lines = [line.split(" ", 1) for line in done.stdout.splitlines()]
    # An empty payload (a cleared retained target) prints as nothing, or as "(null)".
    return [
        (parts[0], parts[1] if len(parts) > 1 and parts[1] != "(null)" else "") for parts in lines
    ]


def _watcher(port: int, *extra: str) -> list[tuple[str, str]]:
    """A persistent session (client ``conf-router``) on the targets, acks, errors and alerts."""
    topics = [arg for topic in WATCHED for arg in ("-t", topic)]
    return _sub(port, "-c", "-i", "conf-router", *topics, *extra)


def _retained(port: int, topic: str) -> dict[str, object] | None:
    """The retained message of a topic (``None`` when there is none)."""
    seen = _sub(port, "-t", topic, "--retained-only", "-C", "1", "-W", "3")
    return json.loads(seen[0][1]) if seen and seen[0][1] else None


def _count(daemon: DaemonProcess) -> int:
    try:
        return len(journaled(daemon.journal, ROOT))
    except InputError:  # the journal is being created
        return 0


def _publish(broker: PrivateMosquitto, daemon: DaemonProcess, case: Case, lines: range) -> None:
    for index in lines:
        topic, payload, _ = case.lines[index]
        _pub(broker.port, topic, json.dumps(payload))
    wait_until(lambda: _count(daemon) >= lines.stop, 60, f"{lines.stop} messages journaled")


@pytest.mark.parametrize("case", CASES.values(), ids=CASES.keys())
def test_router_behaviour_live(tmp_path: Path, broker: PrivateMosquitto, case: Case) -> None:
    """Live over Mosquitto: filled shares, state, targets and acks as the contract says; the
    journal replayed with no flags says the same."""
    _watcher(broker.port, "-E")  # subscribe the router's session, then leave it waiting
    folder = tmp_path / "daemon"
    daemon = _daemon(folder, broker)
    try:
        split = case.restart_after or len(case.lines)
        _publish(broker, daemon, case, range(split))
        if case.restart_after:
            # Journaled is not yet published: wait until the retained target has settled.
            reads: list[dict[str, object] | None] = [None]

            def settled() -> bool:
                reads.append(_retained(broker.port, f"{ROOT}/targets/{ORDER_ID}"))
                return reads[-1] is not None and reads[-1] == reads[-2]

            wait_until(settled, 30, "the retained target to settle")
            before = reads[-1]
            assert 0 == daemon.terminate()
            daemon = _daemon(tmp_path / "restarted", broker, folder / "journal.sqlite")
            # A router restarting mid-bin reads the latest target at once (retained).
            after = _retained(broker.port, f"{ROOT}/targets/{ORDER_ID}")
            assert before is not None and before == after
            _publish(broker, daemon, case, range(split, len(case.lines)))
        wait_until(
            lambda: (
                (_retained(broker.port, f"{ROOT}/status/{ORDER_ID}") or {}).get("filled")
                == case.filled
            ),
            30,
            "the status to show the fills",
        )
        status = _retained(broker.port, f"{ROOT}/status/{ORDER_ID}")
        target_left = _retained(broker.port, f"{ROOT}/targets/{ORDER_ID}")
        assert 0 == daemon.terminate()
    finally:
        daemon.cleanup()
    seen = _watcher(broker.port, "-W", "3")
    targets = [json.loads(body) for topic, body in seen if "/targets/" in topic and body]
    acks = [json.loads(body) for topic, body in seen if "/acks/" in topic]
    errors = [json.loads(body) for topic, body in seen if topic == f"{ROOT}/errors"]
    assert status is not None
    assert (case.filled, case.state) == (status["filled"], status["state"])
    assert case.target_state == targets[-1]["state"]
    assert targets[-1]["reason"] in case.target_reasons
    ended = case.state in ("done", "cancelled", "expired")
    assert ended == (target_left is None)  # an ended order's retained target is cleared
    order_messages = [p for t, p, _ in case.lines if "/orders/" in t]
    assert ["accepted"] * len(order_messages) == [a["result"] for a in acks]
    assert [] == [e for e in errors if e["severity"] == "error"]
    out = tmp_path / "replay"
    assert 0 == main(["replay", str(folder / "journal.sqlite"), "--out", str(out)])
    (row,) = json.loads((out / "summary.json").read_text())["orders"]
    assert (case.filled, case.state) == (row["filled"], row["state"])


def test_restarted_daemon_logs_nothing_twice(tmp_path: Path, broker: PrivateMosquitto) -> None:
    """What a daemon logged (a rejected message, an alert) is not logged again after a restart."""
    folder = tmp_path / "daemon"
    daemon = _daemon(folder, broker)
    try:
        _pub(broker.port, f"{ROOT}/fills/{ORDER_ID}", '{"type": "fill", "quantity": -1')
        topic, payload, _ = CASES["fill-before-order"].lines[0]
        _pub(broker.port, topic, json.dumps(payload))  # parked: an info alert
        wait_until(lambda: _count(daemon) >= 2, 60, "two messages journaled")
        assert 0 == daemon.terminate()
        first = daemon.log_text()
        daemon = _daemon(tmp_path / "restarted", broker, folder / "journal.sqlite")
        assert 0 == daemon.terminate()
    finally:
        daemon.cleanup()
    logged = [
        [json.loads(line).get("event") for line in text.splitlines()]
        for text in (first, daemon.log_text())
    ]
    expected = [(1, 1, 1), (0, 0, 1)]
    assert expected == [(e.count("rejected"), e.count("alert"), e.count("stopped")) for e in logged]

"""The live daemon against a real Mosquitto: what it publishes equals a replay of its journal."""

from __future__ import annotations

import asyncio
import json
import shutil
import subprocess
from collections.abc import Iterator
from datetime import datetime
from pathlib import Path

import aiomqtt
import pytest

from tests.brokers import (
    Collector,
    DaemonProcess,
    PrivateMosquitto,
    async_wait_until,
    day_messages,
    day_start,
    journaled,
    publish_all,
    replay_by_topic,
    wait_until,
)
from tracker.shell import bus
from tracker.shell.config import BrokerSettings, Settings
from tracker.shell.daemon import Daemon

pytestmark = pytest.mark.broker

ROOT = "desk"
ORDER = {
    "type": "order",
    "action": "new",
    "order_id": "X_ZEPH-T1",
    "symbol": "X_ZEPH",
    "side": "buy",
    "quantity": 10_000,
    "start": "2026-03-10T14:30:00Z",
    "end": "2026-03-10T20:00:00Z",
    "ts": "2026-03-10T14:29:00Z",
}


def _fill(n: int, quantity: int = 100) -> tuple[str, bytes]:
    payload = {
        "type": "fill",
        "fill_id": f"F{n}",
        "order_id": "X_ZEPH-T1",
        "quantity": quantity,
        "price": 42.0,
        "ts": f"2026-03-10T14:{31 + n // 60:02d}:{n % 60:02d}Z",
    }
    return f"{ROOT}/fills/X_ZEPH-T1", json.dumps(payload).encode()


def _order() -> tuple[str, bytes]:
    return f"{ROOT}/orders/X_ZEPH-T1", json.dumps(ORDER).encode()


@pytest.fixture
def mosquitto(tmp_path: Path) -> Iterator[PrivateMosquitto]:
    """A private Mosquitto, stopped even when the test fails."""
    with PrivateMosquitto(tmp_path / "mosquitto") as broker:
        yield broker


def _settings(tmp_path: Path, port: int, **changes: object) -> Settings:
    values: dict[str, object] = {
        "journal": tmp_path / "journal.sqlite",
        "broker": BrokerSettings(port=port),
        "root": ROOT,
        "instance": "t1",
        "clock_start": datetime.fromisoformat(day_start()),
        "heartbeat_seconds": 1.0,
        # The tests publish a recorded day at once, ahead of the simulated clock: the engine
        # takes the messages' own ts (tests/test_time.py holds the receive-time default).
        "engine": {"event_time": "message"},
    }
    values.update(changes)
    return Settings(**values)  # type: ignore[arg-type]


async def _serve_until(daemon: Daemon, done: object, timeout: float = 120.0) -> None:
    """Run the daemon until ``done()`` holds, then stop it in order."""
    task = asyncio.create_task(daemon.run())
    try:
        await async_wait_until(done, timeout, "the daemon to take every message")  # type: ignore[arg-type]
    finally:
        daemon.stop()
        await asyncio.wait_for(task, 60)


@pytest.mark.slow
@pytest.mark.parametrize("path", ["lean", "paho"])
def test_live_outputs_equal_a_replay_of_the_journal(
    tmp_path: Path, mosquitto: PrivateMosquitto, path: str, monkeypatch: pytest.MonkeyPatch
) -> None:
    """A whole invented day over Mosquitto: every output topic carries what a replay produces,
    through the bus's lean path and through paho's own publish and ack (its fallback)."""
    if path == "paho":
        monkeypatch.setattr(bus._Link, "attach", classmethod(lambda cls, inner: None))
    messages = day_messages(ROOT)
    settings = _settings(tmp_path, mosquitto.port)

    async def scenario() -> dict[str, list[bytes]]:
        async with Collector(mosquitto.port, ROOT, client_id="collector") as seen:
            async with Daemon(settings) as daemon:
                task = asyncio.create_task(daemon.run())
                await asyncio.wait_for(daemon.bus.connected.wait(), 30)
                await publish_all(mosquitto.port, messages, client_id="publisher")
                await async_wait_until(
                    lambda: daemon.received >= len(messages) and not len(daemon.outbox),
                    120,
                    "every message to be applied and published",
                )
                daemon.stop()
                await asyncio.wait_for(task, 60)
            await seen.settle()
            return seen.outputs()

    live = asyncio.run(scenario())
    replayed, _ = replay_by_topic(settings.journal, ROOT)
    assert sorted(replayed) == sorted(live)
    assert replayed == live


def test_every_message_is_journaled_in_arrival_order(
    tmp_path: Path, mosquitto: PrivateMosquitto
) -> None:
    """The journal holds each inbound message exactly as it arrived, in order."""
    messages = [_order()] + [_fill(n) for n in range(20)]
    settings = _settings(tmp_path, mosquitto.port)

    async def scenario() -> None:
        async with Daemon(settings) as daemon:
            task = asyncio.create_task(daemon.run())
            await asyncio.wait_for(daemon.bus.connected.wait(), 30)
            await publish_all(mosquitto.port, messages, client_id="publisher")
            await async_wait_until(lambda: daemon.received >= len(messages), 60, "messages")
            daemon.stop()
            await asyncio.wait_for(task, 60)

    asyncio.run(scenario())
    assert messages == journaled(settings.journal, ROOT)


def test_messages_sent_while_the_daemon_is_down_are_taken_on_restart(
    tmp_path: Path, mosquitto: PrivateMosquitto
) -> None:
    """The persistent session: fills published while the daemon is stopped count after restart."""
    settings = _settings(tmp_path, mosquitto.port)
    fills = [_fill(n) for n in range(10)]

    async def scenario() -> dict[str, object]:
        async with Daemon(settings) as daemon:  # first run: subscribe, take the order, stop
            await _serve_until_published(daemon, mosquitto.port, [_order()])
        await publish_all(mosquitto.port, fills, client_id="publisher-2")  # nobody listening
        async with Daemon(settings) as daemon:
            await _serve_until(daemon, lambda: daemon.received >= len(fills))
            return daemon.summary()

    summary = asyncio.run(scenario())
    filled = {o["order_id"]: o["filled"] for o in summary["orders"]}  # type: ignore[attr-defined]
    assert {"X_ZEPH-T1": 1_000} == filled


async def _serve_until_published(
    daemon: Daemon, port: int, messages: list[tuple[str, bytes]]
) -> None:
    task = asyncio.create_task(daemon.run())
    try:
        await asyncio.wait_for(daemon.bus.connected.wait(), 30)
        await publish_all(port, messages, client_id="publisher-1")
        await async_wait_until(lambda: daemon.received >= len(messages), 60, "messages")
    finally:
        daemon.stop()
        await asyncio.wait_for(task, 60)


@pytest.mark.parametrize(
    ("snapshot_records", "restored"), [(0, False), (2_500, True)], ids=["replay", "snapshot"]
)
def test_restart_rebuilds_state_from_the_journal(
    tmp_path: Path, mosquitto: PrivateMosquitto, snapshot_records: int, restored: bool
) -> None:
    """A second start replays the journal (or loads the snapshot the clean stop stored, and
    replays nothing): the fills of the first run are still counted."""
    settings = _settings(tmp_path, mosquitto.port, snapshot_records=snapshot_records)

    async def scenario() -> tuple[int, int | None, int, dict[str, object]]:
        async with Daemon(settings) as daemon:
            await _serve_until_published(daemon, mosquitto.port, [_order(), _fill(1), _fill(2)])
            applied = daemon.published_through
        async with Daemon(settings) as daemon:
            return applied, daemon.restored_from, daemon.recovered, daemon.summary()

    applied, restored_from, recovered, summary = asyncio.run(scenario())
    filled = {o["order_id"]: o["filled"] for o in summary["orders"]}  # type: ignore[attr-defined]
    assert (applied if restored else None) == restored_from
    assert (0 if restored else applied) == recovered
    assert applied >= 4  # the start tick, the order and two fills
    assert {"X_ZEPH-T1": 200} == filled


def test_redelivered_fill_changes_nothing(tmp_path: Path, mosquitto: PrivateMosquitto) -> None:
    """An exact copy of a fill (a QoS 1 redelivery) is journaled but not counted twice."""
    settings = _settings(tmp_path, mosquitto.port)
    messages = [_order(), _fill(1), _fill(1), _fill(1)]

    async def scenario() -> dict[str, object]:
        async with Daemon(settings) as daemon:
            await _serve_until_published(daemon, mosquitto.port, messages)
            return daemon.summary()

    summary = asyncio.run(scenario())
    filled = {o["order_id"]: o["filled"] for o in summary["orders"]}  # type: ignore[attr-defined]
    assert ({"X_ZEPH-T1": 100}, 2) == (filled, summary["replay"]["redelivered"])  # type: ignore[index]


async def _retained(port: int, topic: str) -> bytes | None:
    """The retained message of a topic (None when there is none)."""
    async with aiomqtt.Client(
        "127.0.0.1", port, identifier="retained-reader", timeout=30
    ) as client:
        await client.subscribe(topic, qos=1)
        try:
            async with asyncio.timeout(2.0):
                async for message in client.messages:
                    if message.retain:
                        assert isinstance(message.payload, bytes)
                        return message.payload
        except TimeoutError:
            return None
    return None


def test_status_is_retained_per_order(tmp_path: Path, mosquitto: PrivateMosquitto) -> None:
    """A subscriber arriving after the fact gets the order's latest status (retained)."""
    settings = _settings(tmp_path, mosquitto.port)

    async def scenario() -> bytes | None:
        async with Daemon(settings) as daemon:
            await _serve_until_published(daemon, mosquitto.port, [_order(), _fill(1)])
        return await _retained(mosquitto.port, f"{ROOT}/status/X_ZEPH-T1")

    status = asyncio.run(scenario())
    assert status is not None
    assert (100, "X_ZEPH-T1") == (json.loads(status)["filled"], json.loads(status)["order_id"])


def test_health_is_online_while_running_and_offline_after_stop(
    tmp_path: Path, mosquitto: PrivateMosquitto
) -> None:
    """The retained health topic says online while serving and offline after a clean stop."""
    settings = _settings(tmp_path, mosquitto.port)
    topic = f"{ROOT}/health/t1"

    async def scenario() -> tuple[str, str]:
        async with Daemon(settings) as daemon:
            task = asyncio.create_task(daemon.run())
            await asyncio.wait_for(daemon.bus.connected.wait(), 30)
            await asyncio.sleep(0.2)
            online = await _retained(mosquitto.port, topic)
            daemon.stop()
            await asyncio.wait_for(task, 60)
        offline = await _retained(mosquitto.port, topic)
        assert online is not None and offline is not None
        return json.loads(online)["status"], json.loads(offline)["status"]

    assert ("online", "offline") == asyncio.run(scenario())


@pytest.mark.parametrize(
    ("topic", "payload", "reason"),
    [
        (f"{ROOT}/fills/X_ZEPH-T1", b"{not json", "not valid JSON"),
        (f"{ROOT}/fills/X_ZEPH-T1", b"\xff\xfe", "not UTF-8"),
        (f"{ROOT}/fills/X_ZEPH%2BT1", _fill(1)[1], "the topic says"),
        (f"{ROOT}/orders/X_ZEPH-T1", _fill(1)[1], "arrived on topic"),
        (f"{ROOT}/fills/X_ZEPH-T1", b"x" * 70_000, "over the limit"),
    ],
    ids=["json", "utf8", "id-mismatch", "wrong-topic", "too-large"],
)
def test_bad_message_reaches_the_errors_topic(
    tmp_path: Path, mosquitto: PrivateMosquitto, topic: str, payload: bytes, reason: str
) -> None:
    """A malformed message is answered on {root}/errors with a reason; the daemon goes on."""
    settings = _settings(tmp_path, mosquitto.port)

    async def scenario() -> tuple[list[dict[str, object]], dict[str, object]]:
        async with Collector(mosquitto.port, ROOT, client_id="collector") as seen:
            async with Daemon(settings) as daemon:
                await _serve_until_published(
                    daemon, mosquitto.port, [(topic, payload), _order(), _fill(2)]
                )
                summary = daemon.summary()
            await seen.settle(0.3)
        errors = [json.loads(p) for p in seen.outputs().get(f"{ROOT}/errors", [])]
        return errors, summary

    errors, summary = asyncio.run(scenario())
    filled = {o["order_id"]: o["filled"] for o in summary["orders"]}  # type: ignore[attr-defined]
    assert 1 == len(errors)
    assert reason in str(errors[0]["reason"]) + str(errors[0]["payload"])
    assert {"X_ZEPH-T1": 100} == filled


def test_small_inbox_applies_a_burst_without_loss(
    tmp_path: Path, mosquitto: PrivateMosquitto
) -> None:
    """With an inbox of 2, a burst of 300 fills waits (back-pressure) and every one is applied."""
    settings = _settings(tmp_path, mosquitto.port, queue_size=2, batch_size=2)
    messages = [_order()] + [_fill(n, quantity=10) for n in range(300)]

    async def scenario() -> dict[str, object]:
        async with Daemon(settings) as daemon:
            await _serve_until_published(daemon, mosquitto.port, messages)
            return daemon.summary()

    summary = asyncio.run(scenario())
    filled = {o["order_id"]: o["filled"] for o in summary["orders"]}  # type: ignore[attr-defined]
    assert {"X_ZEPH-T1": 3_000} == filled


@pytest.fixture
def locked_mosquitto(tmp_path: Path) -> Iterator[PrivateMosquitto]:
    """A private Mosquitto that admits only user 'desk' with password 'Wh1sper-x9'."""
    folder = tmp_path / "locked"
    folder.mkdir()
    passwords = folder / "passwords"
    subprocess.run(
        ["mosquitto_passwd", "-c", "-b", str(passwords), "desk", "Wh1sper-x9"], check=True
    )
    with PrivateMosquitto(folder, password_file=passwords) as broker:
        yield broker


@pytest.mark.parametrize(
    ("password", "logged"),
    [("Wh1sper-x9", '"connected"'), ("Wr0ng-pass", '"cannot connect"')],
    ids=["right", "wrong"],
)
def test_credentials_are_used_and_never_logged(
    tmp_path: Path, locked_mosquitto: PrivateMosquitto, password: str, logged: str
) -> None:
    """The password from the environment opens the broker; neither it nor a wrong one is logged."""
    daemon = DaemonProcess(
        tmp_path / "daemon",
        locked_mosquitto.url,
        root=ROOT,
        instance="auth",
        extra=("--username", "desk"),
        env={"TRACKER_BROKER_PASSWORD": password},
    )
    daemon.start()
    try:
        wait_until(lambda: logged in daemon.log_text(), 60, f"{logged} in the log")
        assert 0 == daemon.terminate()
    finally:
        daemon.cleanup()
    assert password not in daemon.log_text()


def _certificates(folder: Path) -> tuple[Path, Path, Path]:
    """A throw-away CA and a server certificate for 127.0.0.1 signed by it (openssl)."""
    folder.mkdir(parents=True, exist_ok=True)
    ca_key, ca, key, csr, cert = (
        folder / n for n in ("ca.key", "ca.pem", "s.key", "s.csr", "s.pem")
    )
    san = folder / "san.cnf"
    san.write_text("subjectAltName=IP:127.0.0.1\n")

    def openssl(*args: str) -> None:
        subprocess.run(["openssl", *args], check=True, capture_output=True, timeout=60)

    openssl(
        "req",
        "-x509",
        "-newkey",
        "rsa:2048",
        "-nodes",
        "-keyout",
        str(ca_key),
        "-out",
        str(ca),
        "-days",
        "2",
        "-subj",
        "/CN=tracker test CA",
    )
    openssl(
        "req",
        "-newkey",
        "rsa:2048",
        "-nodes",
        "-keyout",
        str(key),
        "-out",
        str(csr),
        "-subj",
        "/CN=127.0.0.1",
    )
    openssl(
        "x509",
        "-req",
        "-in",
        str(csr),
        "-CA",
        str(ca),
        "-CAkey",
        str(ca_key),
        "-CAcreateserial",
        "-out",
        str(cert),
        "-days",
        "2",
        "-extfile",
        str(san),
    )
    return ca, cert, key


@pytest.mark.parametrize(
    ("trust", "logged"), [(True, '"connected"'), (False, '"cannot connect"')], ids=["ca", "no-ca"]
)
def test_tls_broker_is_verified_against_the_given_ca(
    tmp_path: Path, trust: bool, logged: str
) -> None:
    """mqtts:// with --ca connects to a TLS Mosquitto; without the CA the certificate is refused."""
    if shutil.which("openssl") is None:
        pytest.skip("openssl is not installed")
    ca, cert, key = _certificates(tmp_path / "pki")
    options = (f"cafile {ca}", f"certfile {cert}", f"keyfile {key}")
    with PrivateMosquitto(tmp_path / "tls", listener_options=options) as broker:
        extra = ("--ca", str(ca)) if trust else ()
        daemon = DaemonProcess(
            tmp_path / "daemon",
            f"mqtts://127.0.0.1:{broker.port}",
            root=ROOT,
            instance="tls",
            extra=extra,
        )
        daemon.start()
        try:
            wait_until(lambda: logged in daemon.log_text(), 60, f"{logged} in the log")
            assert 0 == daemon.terminate()
        finally:
            daemon.cleanup()

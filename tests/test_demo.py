"""tracker demo: the embedded broker does what the demo needs, and the demo day runs end to end."""

from __future__ import annotations

import asyncio
import json
import socket
from collections.abc import Iterator
from pathlib import Path

import aiomqtt
import pytest

from tests.brokers import PrivateMosquitto
from tracker.cli import main
from tracker.cli.demo import play_day
from tracker.shell.broker import EmbeddedBroker

FAST = "20000"  # simulated seconds per real second: the day's 23,400 s in about a second


async def _take(
    client: aiomqtt.Client, count: int, timeout: float = 10.0
) -> list[tuple[str, bytes]]:
    got: list[tuple[str, bytes]] = []
    async with asyncio.timeout(timeout):
        async for message in client.messages:
            assert isinstance(message.payload, bytes)
            got.append((message.topic.value, message.payload))
            if len(got) == count:
                break
    return got


def test_embedded_broker_queues_qos1_for_a_persistent_session() -> None:
    """amqtt keeps QoS 1 messages for a disconnected persistent session and delivers them later."""

    async def scenario() -> list[tuple[str, bytes]]:
        async with EmbeddedBroker() as broker:
            port = broker.port
            async with aiomqtt.Client("127.0.0.1", port, identifier="d", clean_session=False) as c:
                await c.subscribe("t/#", qos=1)
            async with aiomqtt.Client("127.0.0.1", port, identifier="p") as p:
                for i in range(3):
                    await p.publish(f"t/{i}", b"%d" % i, qos=1)
            async with aiomqtt.Client("127.0.0.1", port, identifier="d", clean_session=False) as c:
                return await _take(c, 3)

    assert [("t/0", b"0"), ("t/1", b"1"), ("t/2", b"2")] == asyncio.run(scenario())


def test_embedded_broker_keeps_retained_messages() -> None:
    """A late subscriber gets the retained message of a topic."""

    async def scenario() -> list[tuple[str, bytes]]:
        async with EmbeddedBroker() as broker:
            async with aiomqtt.Client("127.0.0.1", broker.port, identifier="p") as p:
                await p.publish("s/1", b"state", qos=1, retain=True)
            async with aiomqtt.Client("127.0.0.1", broker.port, identifier="late") as c:
                await c.subscribe("s/1", qos=1)
                return await _take(c, 1)

    assert [("s/1", b"state")] == asyncio.run(scenario())


def test_embedded_broker_publishes_the_last_will() -> None:
    """A client that vanishes without DISCONNECT gets its retained last will published."""

    async def scenario() -> list[tuple[str, bytes]]:
        async with EmbeddedBroker() as broker:
            watch = aiomqtt.Client("127.0.0.1", broker.port, identifier="watch")
            async with watch:
                await watch.subscribe("h/x", qos=1)
                will = aiomqtt.Will("h/x", b"offline", qos=1, retain=True)
                doomed = aiomqtt.Client("127.0.0.1", broker.port, identifier="w", will=will)
                await doomed.__aenter__()
                # Cut the socket under the client: to the broker it looks like a crash.
                sock = doomed._client.socket()
                assert isinstance(sock, socket.socket)
                sock.shutdown(socket.SHUT_RDWR)
                return await _take(watch, 1)

    assert [("h/x", b"offline")] == asyncio.run(scenario())


@pytest.mark.slow
def test_demo_command_exits_zero_and_says_where_outputs_are(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """tracker demo plays the day on the embedded broker, exits 0 and prints the output paths."""
    out = tmp_path / "demo"
    code = main(["demo", "--speed", FAST, "--out", str(out), "--no-table"])
    printed = capsys.readouterr().out
    summary = json.loads((out / "replay" / "summary.json").read_text())
    filled = {o["order_id"]: o["filled"] for o in summary["orders"]}
    assert 0 == code
    assert f"journal:  {out / 'journal.sqlite'}" in printed
    assert "matches what the daemon published" in printed
    assert ["X_KALO-S1", "X_MIRA-B1", "X_ZEPH-B1", "X_ZEPH-S2"] == sorted(filled)
    assert all(shares > 0 for shares in filled.values())


@pytest.fixture
def mosquitto(tmp_path: Path) -> Iterator[PrivateMosquitto]:
    """A private Mosquitto, stopped even when the test fails."""
    with PrivateMosquitto(tmp_path / "mosquitto") as broker:
        yield broker


@pytest.mark.broker
@pytest.mark.slow
def test_demo_on_an_existing_broker(tmp_path: Path, mosquitto: PrivateMosquitto) -> None:
    """--broker URL plays the same day through an outside Mosquitto; the replay matches."""
    result = asyncio.run(
        play_day(speed=float(FAST), out=tmp_path / "demo", broker_url=mosquitto.url)
    )
    assert (mosquitto.url, True) == (result.broker_url, result.matches)

"""One daemon per instance id: a second one is refused at start, or stops when it collides."""

from __future__ import annotations

import asyncio
import dataclasses
import json
from collections.abc import Iterator
from datetime import datetime
from pathlib import Path

import aiomqtt
import pytest

from tests.brokers import PrivateMosquitto, day_start
from tracker.errors import InputError
from tracker.shell.config import BrokerSettings, Settings
from tracker.shell.daemon import Daemon

pytestmark = pytest.mark.broker

ROOT = "desk"


@pytest.fixture
def mosquitto(tmp_path: Path) -> Iterator[PrivateMosquitto]:
    """A private Mosquitto, stopped even when the test fails."""
    with PrivateMosquitto(tmp_path / "mosquitto") as broker:
        yield broker


def _settings(tmp_path: Path, port: int, name: str, instance: str = "i1") -> Settings:
    return Settings(
        journal=tmp_path / name / "journal.sqlite",
        broker=BrokerSettings(port=port),
        root=ROOT,
        instance=instance,
        clock_start=datetime.fromisoformat(day_start()),
        heartbeat_seconds=1.0,
        tick_seconds=0,
    )


def test_second_daemon_with_the_same_instance_is_refused(
    tmp_path: Path, mosquitto: PrivateMosquitto
) -> None:
    """While instance i1 is online, another daemon as i1 refuses to start and says why."""

    async def scenario() -> str:
        async with Daemon(_settings(tmp_path, mosquitto.port, "a")) as first:
            task = asyncio.create_task(first.run())
            await asyncio.wait_for(first.bus.connected.wait(), 30)
            await asyncio.sleep(0.3)  # its online health message is retained by now
            try:
                with pytest.raises(InputError) as refused:
                    async with Daemon(_settings(tmp_path, mosquitto.port, "b")):
                        pass
            finally:
                first.stop()
                await asyncio.wait_for(task, 60)
            assert first.failure is None
            return str(refused.value)

    message = asyncio.run(scenario())
    assert "already online" in message
    assert "--instance" in message


def test_another_instance_id_starts_beside_it(tmp_path: Path, mosquitto: PrivateMosquitto) -> None:
    """Two daemons with different instance ids (and journals) run side by side."""

    async def scenario() -> None:
        async with Daemon(_settings(tmp_path, mosquitto.port, "a")) as first:
            task = asyncio.create_task(first.run())
            await asyncio.wait_for(first.bus.connected.wait(), 30)
            await asyncio.sleep(0.3)
            async with Daemon(_settings(tmp_path, mosquitto.port, "b", "i2")) as second:
                other = asyncio.create_task(second.run())
                await asyncio.wait_for(second.bus.connected.wait(), 30)
                second.stop()
                await asyncio.wait_for(other, 60)
            first.stop()
            await asyncio.wait_for(task, 60)

    asyncio.run(scenario())


def test_restart_after_a_clean_stop_is_allowed(tmp_path: Path, mosquitto: PrivateMosquitto) -> None:
    """A clean stop leaves 'offline' retained, so the same instance starts again at once."""

    async def scenario() -> None:
        for _ in range(2):
            async with Daemon(_settings(tmp_path, mosquitto.port, "a")) as daemon:
                task = asyncio.create_task(daemon.run())
                await asyncio.wait_for(daemon.bus.connected.wait(), 30)
                daemon.stop()
                await asyncio.wait_for(task, 60)

    asyncio.run(scenario())


def test_collision_while_running_stops_the_daemon(
    tmp_path: Path, mosquitto: PrivateMosquitto
) -> None:
    """A live 'online' health message from another run on our topic stops us, with the reason."""

    async def scenario() -> InputError | None:
        async with Daemon(_settings(tmp_path, mosquitto.port, "a")) as daemon:
            task = asyncio.create_task(daemon.run())
            await asyncio.wait_for(daemon.bus.connected.wait(), 30)
            await asyncio.sleep(0.3)
            intruder = {"type": "health", "status": "online", "client_id": "x", "run_id": "other"}
            async with aiomqtt.Client("127.0.0.1", mosquitto.port, identifier="intruder") as c:
                await c.publish(f"{ROOT}/health/i1", json.dumps(intruder), qos=1, retain=True)
            await asyncio.wait_for(task, 60)  # it stops by itself
            return daemon.failure

    failure = asyncio.run(scenario())
    assert failure is not None
    assert "another process" in str(failure)


def test_symlink_to_a_locked_journal_is_refused(tmp_path: Path) -> None:
    """A second daemon given a symlink to a journal in use meets the same lock."""
    first = _settings(tmp_path, 1, "a")
    first.journal.parent.mkdir(parents=True)
    link = tmp_path / "link.sqlite"
    link.symlink_to(first.journal)
    holder = Daemon(first)
    holder._lock()
    try:
        second = Daemon(dataclasses.replace(_settings(tmp_path, 1, "b"), journal=link))
        with pytest.raises(InputError, match="another tracker daemon is using"):
            second._lock()
    finally:
        holder._unlock()

"""A flood of bad messages through the live daemon and Mosquitto: thinned out as a replay does."""

from __future__ import annotations

import asyncio
import json
import re
from collections.abc import Iterator
from datetime import datetime
from pathlib import Path

import pytest

from tests.brokers import (
    Collector,
    PrivateMosquitto,
    async_wait_until,
    day_start,
    publish_all,
    replay_by_topic,
)
from tracker.edge.digest import FULL_PER_CLASS
from tracker.shell.config import BrokerSettings, Settings
from tracker.shell.daemon import Daemon

pytestmark = pytest.mark.broker

ROOT = "flood"
ORDER_ID = "X_ZEPH-F1"  # invented
COUNT = re.compile(r"^([\d,]+) more ")


@pytest.fixture
def mosquitto(tmp_path: Path) -> Iterator[PrivateMosquitto]:
    """A private Mosquitto, stopped even when the test fails."""
    with PrivateMosquitto(tmp_path / "mosquitto") as broker:
        yield broker


def _settings(tmp_path: Path, port: int) -> Settings:
    return Settings(
        journal=tmp_path / "journal.sqlite",
        broker=BrokerSettings(port=port),
        root=ROOT,
        instance="f1",
        clock_start=datetime.fromisoformat(day_start()),
        heartbeat_seconds=1.0,
        engine={"event_time": "message"},  # the messages are stamped an hour past the clock
    )


def _order() -> tuple[str, bytes]:
    payload = {
        "type": "order",
        "action": "new",
        "order_id": ORDER_ID,
        "symbol": "X_ZEPH",
        "side": "buy",
        "quantity": 10_000,
        "start": "2026-03-10T14:30:00Z",
        "end": "2026-03-10T20:00:00Z",
        "ts": "2026-03-10T14:29:00Z",
    }
    return f"{ROOT}/orders/{ORDER_ID}", json.dumps(payload).encode()


def _fill(n: int, *, good: bool) -> tuple[str, bytes]:
    payload = {
        "type": "fill",
        "fill_id": f"F{n}",
        "order_id": ORDER_ID,
        "quantity": 10 if good else -10,
        "price": 42.0,
        "ts": "2026-03-10T14:31:00Z",
    }
    return f"{ROOT}/fills/{ORDER_ID}", json.dumps(payload).encode()


def _counted(errors: list[bytes]) -> tuple[int, int]:
    """(error records in full, messages counted in summaries) among published error records."""
    full = counted = 0
    for payload in errors:
        match = COUNT.match(json.loads(payload)["reason"])
        if match:
            counted += int(match.group(1).replace(",", ""))
        else:
            full += 1
    return full, counted


@pytest.mark.slow
def test_a_flood_is_published_as_a_replay_of_the_journal_thins_it_across_a_restart(
    tmp_path: Path, mosquitto: PrivateMosquitto
) -> None:
    """Two runs, 150 bad fills each: live errors equal the replay's, and add up to 300."""
    settings = _settings(tmp_path, mosquitto.port)
    good = {0, 50, 100, 160, 210, 260}  # three good fills among the bad ones of each run
    runs = [
        [_order(), *(_fill(n, good=n in good) for n in range(153))],
        [_fill(n, good=n in good) for n in range(153, 306)],
    ]

    async def serve(messages: list[tuple[str, bytes]], client_id: str) -> None:
        async with Daemon(settings) as daemon:
            task = asyncio.create_task(daemon.run())
            await asyncio.wait_for(daemon.bus.connected.wait(), 30)
            await publish_all(mosquitto.port, messages, client_id=client_id)
            await async_wait_until(
                lambda: daemon.received >= len(messages), 120, "every message to be journaled"
            )
            daemon.stop()
            await asyncio.wait_for(task, 60)

    async def scenario() -> dict[str, list[bytes]]:
        async with Collector(mosquitto.port, ROOT, client_id="collector") as seen:
            for number, messages in enumerate(runs):
                await serve(messages, f"publisher-{number}")
            await seen.settle()
            return seen.outputs()

    live = asyncio.run(scenario())
    replayed, summary = replay_by_topic(settings.journal, ROOT)
    errors = live[f"{ROOT}/errors"]
    full, counted = _counted(errors)
    assert replayed == live
    assert (300, 300) == (summary["replay"]["rejected"], full + counted)
    assert full <= 2 * 2 * FULL_PER_CLASS  # at most two intervals per run

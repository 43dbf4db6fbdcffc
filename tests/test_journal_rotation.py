"""One journal per day: at the first record of a new day the daemon keeps the day's journal under
its dated name and goes on in a new one that starts from the state carried as a snapshot."""

from __future__ import annotations

import asyncio
import json
from collections.abc import Iterator
from datetime import datetime
from pathlib import Path

import pytest

from tests.brokers import PrivateMosquitto, async_wait_until, publish_all
from tracker.cli import main
from tracker.shell.config import BrokerSettings, Settings
from tracker.shell.daemon import Daemon
from tracker.shell.journal import read_base_seq, read_journal, read_snapshots

pytestmark = pytest.mark.broker

ROOT = "days"
# Five seconds before midnight in New York (the default day_timezone), on a clock running 5x.
EVENING = datetime.fromisoformat("2026-03-10T23:59:55-04:00")


def _order(order_id: str, ts: str) -> tuple[str, bytes]:
    payload = {
        "type": "order",
        "action": "new",
        "order_id": order_id,
        "symbol": "X_ZEPH",
        "side": "buy",
        "quantity": 5_000,
        "start": "2026-03-11T13:30:00Z",
        "end": "2026-03-11T20:00:00Z",
        "ts": ts,
    }
    return f"{ROOT}/orders/{order_id}", json.dumps(payload).encode()


def _cancel(order_id: str, ts: str) -> tuple[str, bytes]:
    payload = {"type": "order", "action": "cancel", "order_id": order_id, "ts": ts}
    return f"{ROOT}/orders/{order_id}", json.dumps(payload).encode()


def _known(daemon: Daemon, order_id: str) -> bool:
    state_of = getattr(daemon.engine, "state_of")  # noqa: B009 -- the Engine, not the protocol
    return state_of(order_id) is not None


@pytest.fixture
def mosquitto(tmp_path: Path) -> Iterator[PrivateMosquitto]:
    """A private Mosquitto, stopped even when the test fails."""
    with PrivateMosquitto(tmp_path / "mosquitto") as broker:
        yield broker


def test_the_first_record_of_a_new_day_goes_into_a_new_journal(
    tmp_path: Path, mosquitto: PrivateMosquitto
) -> None:
    """Orders before midnight, one after: the first ones stay in journal-2026-03-10.sqlite, the
    last opens the new day's journal, which carries the order still pending in its snapshot and
    leaves the cancelled one behind; a replay of each journal alone and a restart on the new one
    give the daemon's final summary."""
    journal = tmp_path / "journal.sqlite"
    settings = Settings(
        journal=journal,
        broker=BrokerSettings(port=mosquitto.port),
        root=ROOT,
        instance="days",
        clock_start=EVENING,
        clock_speed=5.0,
        heartbeat_seconds=1.0,
        summary=tmp_path / "live-summary.json",
    )

    async def day_and_night() -> list[Path]:
        async with Daemon(settings) as daemon:
            task = asyncio.create_task(daemon.run())
            await asyncio.wait_for(daemon.bus.connected.wait(), 30)
            before_midnight = [
                _order("X_ZEPH-N1", "2026-03-11T03:59:56Z"),
                _order("X_ZEPH-C0", "2026-03-11T03:59:56Z"),
                _cancel("X_ZEPH-C0", "2026-03-11T03:59:56Z"),
            ]
            await publish_all(mosquitto.port, before_midnight, client_id="p1")
            await async_wait_until(lambda: _known(daemon, "X_ZEPH-N1"), 30, "N1")
            await asyncio.sleep(1.5)  # past midnight on the daemon's clock
            await publish_all(
                mosquitto.port, [_order("X_ZEPH-N2", "2026-03-11T04:00:05Z")], client_id="p2"
            )
            await async_wait_until(lambda: _known(daemon, "X_ZEPH-N2"), 30, "N2")
            daemon.stop()
            await asyncio.wait_for(task, 60)
            return daemon.rotated

    rotated = asyncio.run(day_and_night())
    dated = tmp_path / "journal-2026-03-10.sqlite"
    assert [dated] == rotated
    old, new = list(read_journal(dated)), list(read_journal(journal))
    assert old[-1].line == read_base_seq(journal)
    assert [old[-1].line + 1] == [new[0].line]
    assert ["X_ZEPH-N1", "X_ZEPH-C0", "X_ZEPH-C0"] == [
        r.topic.rsplit("/", 1)[1] for r in old if "/orders/" in r.topic
    ]
    assert ["X_ZEPH-N2"] == [r.topic.rsplit("/", 1)[1] for r in new if "/orders/" in r.topic]
    carried = [info for info in read_snapshots(journal) if info.kind == "carried"]
    assert [old[-1].line] == [info.after_seq for info in carried]

    out = tmp_path / "replay"
    assert 0 == main(["replay", str(journal), "--out", str(out), "--no-progress"])
    live = json.loads(settings.summary.read_text())  # type: ignore[union-attr]
    assert live == json.loads((out / "summary.json").read_text())
    # The cancelled order stayed behind in the day's journal; the new day carries the rest.
    assert ["X_ZEPH-N1", "X_ZEPH-N2"] == [row["order_id"] for row in live["orders"]]
    day_before = tmp_path / "replay-day-before"
    assert 0 == main(["replay", str(dated), "--out", str(day_before), "--no-progress"])
    rows = json.loads((day_before / "summary.json").read_text())["orders"]
    assert [("X_ZEPH-C0", "cancelled"), ("X_ZEPH-N1", "pending")] == [
        (row["order_id"], row["state"]) for row in rows
    ]

    async def restart() -> tuple[int | None, list[str]]:
        async with Daemon(settings) as daemon:
            orders = [row["order_id"] for row in daemon.summary()["orders"]]
            return daemon.restored_from, orders

    restored, orders = asyncio.run(restart())
    assert new[-1].line == restored
    assert ["X_ZEPH-N1", "X_ZEPH-N2"] == orders

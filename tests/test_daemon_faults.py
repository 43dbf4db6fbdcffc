"""Faults: kill -9 mid-day, the broker going away, and junk over the wire."""

from __future__ import annotations

import asyncio
import json
from collections.abc import Iterator
from datetime import datetime, timedelta
from pathlib import Path

import aiomqtt
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from tests.brokers import (
    DaemonProcess,
    PrivateMosquitto,
    async_wait_until,
    day_messages,
    day_start,
    has_all,
    journaled,
    publish_all,
    wait_until,
)
from tracker.core.formats import utc_text
from tracker.shell.config import BrokerSettings, Settings
from tracker.shell.daemon import Daemon
from tracker.shell.journal import read_journal

pytestmark = pytest.mark.broker


@pytest.fixture
def mosquitto(tmp_path: Path) -> Iterator[PrivateMosquitto]:
    """A private Mosquitto, stopped even when the test fails."""
    with PrivateMosquitto(tmp_path / "mosquitto") as broker:
        yield broker


def _orders_of(summary_path: Path) -> list[dict[str, object]]:
    orders: list[dict[str, object]] = json.loads(summary_path.read_text())["orders"]
    return orders


def _uninterrupted(
    tmp_path: Path, mosquitto: PrivateMosquitto, daemons: list[DaemonProcess]
) -> list[dict[str, object]]:
    """The day through one daemon that is never interrupted: its final summary's orders."""
    root = "calm"
    messages = day_messages(root)
    daemon = DaemonProcess(tmp_path / "calm", mosquitto.url, root=root, instance="calm")
    daemons.append(daemon)
    daemon.start()
    daemon.wait_connected()
    asyncio.run(publish_all(mosquitto.port, messages, client_id="calm-publisher"))
    wait_until(lambda: has_all(daemon.journal, root, messages), 120, "the calm day")
    assert 0 == daemon.terminate()
    return _orders_of(daemon.summary)


@pytest.mark.slow
def test_kill_9_mid_day_and_restart_gives_the_uninterrupted_summary(
    tmp_path: Path, mosquitto: PrivateMosquitto, daemons: list[DaemonProcess]
) -> None:
    """kill -9 in the middle of the day, messages keep coming, restart: same final summary."""
    expected = _uninterrupted(tmp_path, mosquitto, daemons)
    root = "crash"
    messages = day_messages(root)
    half = len(messages) // 2
    first = DaemonProcess(tmp_path / "crash", mosquitto.url, root=root, instance="crash")
    daemons.append(first)
    first.start()
    first.wait_connected()

    async def first_half_then_kill() -> None:
        publishing = asyncio.create_task(
            publish_all(mosquitto.port, messages[:half], client_id="crash-publisher")
        )
        # Kill while messages are still arriving: some in the journal, some in flight.
        await async_wait_until(
            lambda: len(journaled(first.journal, root)) >= half // 2, 120, "half of the half"
        )
        first.kill()
        await publishing

    asyncio.run(first_half_then_kill())
    # The rest of the day arrives while the daemon is down (the broker queues it for the session).
    asyncio.run(publish_all(mosquitto.port, messages[half:], client_id="crash-publisher"))
    second = DaemonProcess(tmp_path / "crash", mosquitto.url, root=root, instance="crash")
    daemons.append(second)
    second.start()
    wait_until(lambda: has_all(second.journal, root, messages), 120, "the rest of the day")
    assert 0 == second.terminate()
    assert expected == _orders_of(second.summary)


def test_kill_9_leaves_the_last_will_offline(
    tmp_path: Path, mosquitto: PrivateMosquitto, daemons: list[DaemonProcess]
) -> None:
    """After kill -9 the broker publishes the daemon's retained last will: status offline."""
    daemon = DaemonProcess(tmp_path / "will", mosquitto.url, root="will", instance="w1")
    daemons.append(daemon)
    daemon.start()
    daemon.wait_connected()

    async def health() -> list[str]:
        seen: list[str] = []
        async with aiomqtt.Client("127.0.0.1", mosquitto.port, identifier="watch") as client:
            await client.subscribe("will/health/w1", qos=1)
            async with asyncio.timeout(60):
                async for message in client.messages:
                    assert isinstance(message.payload, bytes)
                    seen.append(json.loads(message.payload)["status"])
                    if seen == ["online"]:
                        daemon.kill()
                    if seen[-1] == "offline":
                        return seen
        return seen

    assert ["online", "offline"] == asyncio.run(health())


@pytest.mark.slow
def test_broker_restart_mid_day_loses_nothing(tmp_path: Path, mosquitto: PrivateMosquitto) -> None:
    """Mosquitto stops and comes back mid-day: the daemon reconnects; every message is applied."""
    root = "bounce"
    messages = day_messages(root)
    half = len(messages) // 2
    settings_ = Settings(
        journal=tmp_path / "bounce.sqlite",
        broker=BrokerSettings(port=mosquitto.port),
        root=root,
        instance="bounce",
        clock_start=datetime.fromisoformat(day_start()),
        engine={"event_time": "message"},  # the day is published at once, ahead of the clock
        # Slow enough that the second half is published while the daemon is still away: it must
        # come from the session the broker saved and restored.
        reconnect_min_seconds=3.0,
        reconnect_max_seconds=3.0,
    )

    async def scenario() -> tuple[int, dict[str, object]]:
        async with Daemon(settings_) as daemon:
            task = asyncio.create_task(daemon.run())
            await asyncio.wait_for(daemon.bus.connected.wait(), 30)
            await publish_all(mosquitto.port, messages[:half], client_id="bounce-publisher")
            await asyncio.to_thread(mosquitto.stop)
            await async_wait_until(lambda: not daemon.bus.connected.is_set(), 30, "disconnect")
            await asyncio.to_thread(mosquitto.start)
            await publish_all(mosquitto.port, messages[half:], client_id="bounce-publisher")
            await async_wait_until(
                lambda: has_all(settings_.journal, root, messages) and not len(daemon.outbox),
                120,
                "every message after the restart",
            )
            daemon.stop()
            await asyncio.wait_for(task, 60)
            return daemon.bus.connections, daemon.summary()

    connections, summary = asyncio.run(scenario())
    from tests.brokers import replay_by_topic

    _, replayed = replay_by_topic(settings_.journal, root)
    assert connections >= 2
    assert replayed["orders"] == summary["orders"]
    assert len(summary["orders"]) == 4  # type: ignore[arg-type]


# ------------------------------------------------------------------------------------------------
# Junk over the wire (Hypothesis, bounded in count)

JUNK_ROOT = "junk"
_TOPICS = st.sampled_from(
    [
        f"{JUNK_ROOT}/orders/O-1",
        f"{JUNK_ROOT}/fills/O-1",
        f"{JUNK_ROOT}/bins/X_ZEPH",
        f"{JUNK_ROOT}/control",
    ]
)
_JSON_VALUES = st.recursive(
    st.none() | st.booleans() | st.integers() | st.floats(allow_nan=False) | st.text(max_size=8),
    lambda inner: (
        st.lists(inner, max_size=3) | st.dictionaries(st.text(max_size=6), inner, max_size=3)
    ),
    max_leaves=8,
)
# Payloads that cannot be a valid message: raw bytes that are not JSON, JSON that is not an
# object, objects of an unknown type, and messages of a known type with a field made wrong.
_PAYLOADS = st.one_of(
    st.binary(max_size=64).filter(lambda b: not b.strip().startswith(b"{")),
    _JSON_VALUES.filter(lambda v: not isinstance(v, dict)).map(lambda v: json.dumps(v).encode()),
    st.dictionaries(st.text(max_size=6), _JSON_VALUES, max_size=4).map(
        lambda d: json.dumps({**d, "type": "nonsense"}).encode()
    ),
    st.fixed_dictionaries(
        {
            "type": st.just("fill"),
            "fill_id": st.text(min_size=1, max_size=6),
            "order_id": st.just("O-1"),
            "quantity": st.one_of(st.integers(max_value=0), st.text(max_size=3), st.none()),
            "price": st.floats(allow_nan=False),
            "ts": st.just("2026-03-10T14:31:00Z"),
        }
    ).map(lambda d: json.dumps(d).encode()),
)


@pytest.fixture(scope="module")
def junk_daemon(
    tmp_path_factory: pytest.TempPathFactory,
) -> Iterator[tuple[PrivateMosquitto, DaemonProcess]]:
    """One Mosquitto and one daemon subprocess shared by the Hypothesis examples."""
    folder = tmp_path_factory.mktemp("junk")
    with PrivateMosquitto(folder / "mosquitto") as broker:
        daemon = DaemonProcess(folder / "daemon", broker.url, root=JUNK_ROOT, instance="junk")
        daemon.start()
        try:
            daemon.wait_connected()
            yield broker, daemon
        finally:
            daemon.cleanup()


@settings(
    max_examples=12,
    deadline=None,
    suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow],
)
@given(batch=st.lists(st.tuples(_TOPICS, _PAYLOADS), min_size=1, max_size=8))
def test_every_malformed_message_is_answered_on_errors(
    junk_daemon: tuple[PrivateMosquitto, DaemonProcess], batch: list[tuple[str, bytes]]
) -> None:
    """Each malformed message over a real broker yields one error with a reason; none stops it."""
    broker, daemon = junk_daemon

    async def scenario() -> list[dict[str, object]]:
        errors: list[dict[str, object]] = []
        async with aiomqtt.Client("127.0.0.1", broker.port, identifier="junk-watch") as watch:
            await watch.subscribe(f"{JUNK_ROOT}/errors", qos=1)
            await publish_all(broker.port, batch, client_id="junk-publisher")
            async with asyncio.timeout(60):
                async for message in watch.messages:
                    assert isinstance(message.payload, bytes)
                    errors.append(json.loads(message.payload))
                    if len(errors) == len(batch):
                        break
        return errors

    errors = asyncio.run(scenario())
    assert daemon.process is not None and daemon.process.poll() is None
    assert [topic for topic, _ in batch] == [e["topic"] for e in errors]
    assert all(isinstance(e["reason"], str) and e["reason"] for e in errors)


def _fill_message(root: str, n: int) -> tuple[str, bytes]:
    payload = {
        "type": "fill",
        "fill_id": f"F{n}",
        "order_id": "X_ZEPH-J1",
        "quantity": 100,
        "price": 42.0,
        "ts": "2026-03-10T14:31:00Z",
    }
    return f"{root}/fills/X_ZEPH-J1", json.dumps(payload).encode()


def test_journal_deleted_while_running_stops_and_loses_nothing(
    tmp_path: Path, mosquitto: PrivateMosquitto
) -> None:
    """A journal deleted under the daemon stops it; the unjournaled fill waits at the broker."""
    root = "jl"

    def settings(journal: Path) -> Settings:
        return Settings(
            journal=journal,
            broker=BrokerSettings(port=mosquitto.port),
            root=root,
            instance="jl",
            clock_start=datetime.fromisoformat(day_start()),
            heartbeat_seconds=1.0,
            tick_seconds=0,
        )

    first_journal = tmp_path / "first" / "journal.sqlite"
    second_journal = tmp_path / "second" / "journal.sqlite"

    published: list[object] = []

    async def scenario() -> Exception | None:
        async with Daemon(settings(first_journal), on_output=published.append) as daemon:
            task = asyncio.create_task(daemon.run())
            await asyncio.wait_for(daemon.bus.connected.wait(), 30)
            await publish_all(mosquitto.port, [_fill_message(root, 1)], client_id="pub1")
            await async_wait_until(lambda: daemon.received >= 1, 30, "the first fill")
            first_journal.unlink()
            await publish_all(mosquitto.port, [_fill_message(root, 2)], client_id="pub2")
            await asyncio.wait_for(task, 60)  # it stops by itself
            failure = daemon.failure
        async with Daemon(settings(second_journal)) as again:
            task = asyncio.create_task(again.run())
            await async_wait_until(lambda: again.received >= 1, 30, "the redelivered fill")
            again.stop()
            await asyncio.wait_for(task, 60)
        return failure

    failure = asyncio.run(scenario())
    assert failure is not None and "deleted or replaced" in str(failure)
    assert [_fill_message(root, 2)] == journaled(second_journal, root)
    alerts = [getattr(out, "code", None) for out in published]
    assert ["journal_failed"] == [code for code in alerts if code == "journal_failed"]


def test_no_ticks_are_journaled_while_nothing_waits_on_time(
    tmp_path: Path, mosquitto: PrivateMosquitto
) -> None:
    """With no order, only the start tick is journaled; an order's start brings the ticks back."""
    root = "quiet"
    start = datetime.fromisoformat(day_start())
    settings = Settings(
        journal=tmp_path / "journal.sqlite",
        broker=BrokerSettings(port=mosquitto.port),
        root=root,
        instance="quiet",
        clock_start=start,
        clock_speed=60.0,  # a simulated minute per second
        tick_seconds=1.0,
        heartbeat_seconds=1.0,
    )
    order = {
        "type": "order",
        "action": "new",
        "order_id": "X_ZEPH-Q1",
        "symbol": "X_ZEPH",
        "side": "buy",
        "quantity": 1_000,
        "start": utc_text(start + timedelta(minutes=3)),
        "end": utc_text(start + timedelta(hours=2)),
        "ts": utc_text(start),
    }

    def ticks(path: Path) -> int:
        return sum(1 for record in read_journal(path) if record.topic == f"{root}/tick")

    async def scenario() -> tuple[int, int, str | None]:
        async with Daemon(settings) as daemon:
            task = asyncio.create_task(daemon.run())
            await asyncio.wait_for(daemon.bus.connected.wait(), 30)
            await asyncio.sleep(2.5)  # two and a half simulated minutes, nothing to wait for
            quiet = ticks(settings.journal)
            message = (f"{root}/orders/X_ZEPH-Q1", json.dumps(order).encode())
            await publish_all(mosquitto.port, [message], client_id="quiet-pub")
            await async_wait_until(
                lambda: daemon.engine.state_of("X_ZEPH-Q1") is not None, 30, "the order"
            )
            await asyncio.sleep(4.0)  # its start (3 simulated minutes in) passes meanwhile
            state = daemon.engine.state_of("X_ZEPH-Q1")
            daemon.stop()
            await asyncio.wait_for(task, 60)
            return quiet, ticks(settings.journal), None if state is None else state.value

    quiet, later, state = asyncio.run(scenario())
    assert 1 == quiet
    assert later > 1
    assert "working" == state

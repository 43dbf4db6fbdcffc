"""A journal that describes itself: the daemon's root, engine settings and profiles are in it, so
``tracker replay JOURNAL`` needs no flags, and flags that disagree are refused (or a what-if)."""

from __future__ import annotations

import asyncio
import json
from collections.abc import Iterator
from datetime import datetime
from pathlib import Path

import pytest

from tests.brokers import (
    Collector,
    PrivateMosquitto,
    async_wait_until,
    day_messages,
    day_start,
    publish_all,
)
from tracker.cli import main
from tracker.core.engine import EngineConfig
from tracker.core.profiles import Profile, default_profile
from tracker.edge.wire import decode_output, topic_of
from tracker.shell.config import BrokerSettings, Settings
from tracker.shell.daemon import Daemon
from tracker.shell.journal import Journal, read_setup
from tracker.shell.setup import Setup, entries_of, timeline

ROOT = "desk"
TS = "2026-03-10T14:00:00.000000Z"


def _order(order_id: str, ts: str, **extra: object) -> bytes:
    payload = {
        "type": "order",
        "action": "new",
        "order_id": order_id,
        "symbol": "X_ZEPH",
        "side": "buy",
        "quantity": 10_000,
        "start": "2026-03-10T14:00:00Z",
        "end": "2026-03-10T19:00:00Z",
        "ts": ts,
        **extra,
    }
    return json.dumps(payload).encode()


def _setup(cap: float, adv: float = 2_000_000.0) -> Setup:
    profile = default_profile("X_ZEPH")
    mapping = {**profile.to_mapping(), "average_daily_volume": adv}
    return Setup(
        ROOT, EngineConfig(default_max_participation=cap), {"X_ZEPH": Profile.from_mapping(mapping)}
    )


def _journal(path: Path) -> Path:
    """A journal whose daemon was restarted with another default cap between two orders."""
    with Journal(path) as journal:
        journal.describe(entries_of(_setup(0.25)), TS)
        journal.append(f"{ROOT}/orders/A1", _order("A1", "2026-03-10T14:00:01Z"), TS)
        journal.describe(entries_of(_setup(0.3)), TS)
        journal.append(f"{ROOT}/orders/A2", _order("A2", "2026-03-10T14:00:02Z"), TS)
    return path


def _summary(out: Path) -> dict[str, object]:
    return json.loads((out / "summary.json").read_text())  # type: ignore[no-any-return]


def test_describe_writes_only_what_changed(tmp_path: Path) -> None:
    """A second start with the same setup adds nothing; a changed setting adds one entry."""
    with Journal(tmp_path / "j.sqlite") as journal:
        first = journal.describe(entries_of(_setup(0.25)), TS)
        again = journal.describe(entries_of(_setup(0.25)), TS)
        changed = journal.describe(entries_of(_setup(0.3)), TS)
    expected = (["root", "engine", "profile"], [], ["engine"])
    assert expected == ([e.kind for e in first], again, [e.kind for e in changed])


def test_timeline_reads_back_each_setup_at_its_place(tmp_path: Path) -> None:
    """The journal's description gives each setup with the record after which it held."""
    described = timeline(read_setup(_journal(tmp_path / "j.sqlite")))
    expected = [(0, 0.25, 2_000_000.0), (1, 0.3, 2_000_000.0)]
    actual = [
        (after, s.config.default_max_participation, s.profiles["X_ZEPH"].average_daily_volume)
        for after, s in described
    ]
    assert expected == actual


def test_replay_without_flags_uses_the_journaled_setup(tmp_path: Path) -> None:
    """Each order is replayed with the setup that held when it arrived (no flags given)."""
    out = tmp_path / "out"
    assert 0 == main(["replay", str(_journal(tmp_path / "j.sqlite")), "--out", str(out)])
    statuses = [json.loads(line) for line in (out / "status.jsonl").read_text().splitlines()]
    caps = {s["order_id"]: (s["max_participation"], s["cap_source"]) for s in statuses}
    expected = {"A1": (0.25, "default"), "A2": (0.3, "default")}
    assert expected == caps


def test_replay_refuses_flags_that_disagree(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """--root other than the journal's is refused with exit 2 and a message naming it."""
    journal = _journal(tmp_path / "j.sqlite")
    code = main(["replay", str(journal), "--out", str(tmp_path / "o"), "--root", "other"])
    err = capsys.readouterr().err
    assert (2, True, True) == (code, "--root 'other'" in err, "--what-if" in err)


def test_what_if_replays_with_the_flags_and_says_so(tmp_path: Path) -> None:
    """--what-if uses the disagreeing flags and labels the summary."""
    journal = _journal(tmp_path / "j.sqlite")
    config = tmp_path / "engine.json"
    config.write_text(json.dumps({"default_max_participation": 0.1}))
    out = tmp_path / "o"
    args = ["replay", str(journal), "--out", str(out), "--config", str(config), "--what-if"]
    assert 0 == main(args)
    summary = _summary(out)
    assert "what_if" in summary
    assert "default_max_participation" in str(summary["what_if"])


def test_journal_root_is_kept_by_a_restarted_daemon(tmp_path: Path) -> None:
    """A daemon given another root than the journal's refuses to start."""
    journal = _journal(tmp_path / "j.sqlite")
    settings = Settings(journal=journal, root="other", broker=BrokerSettings(port=1))

    async def enter() -> None:
        async with Daemon(settings):
            pass

    with pytest.raises(Exception, match="written under the topic root 'desk'"):
        asyncio.run(enter())


@pytest.mark.broker
@pytest.mark.slow
def test_live_run_with_profiles_and_config_replays_byte_for_byte(
    tmp_path: Path, mosquitto: PrivateMosquitto
) -> None:
    """A live day with a profile folder and engine settings: its journal, replayed with no
    flags, gives every output topic the bytes the daemon published."""
    profiles = tmp_path / "profiles"
    profiles.mkdir()
    for symbol in ("X_ZEPH", "X_KALO", "X_MIRA"):
        mapping = {**default_profile(symbol).to_mapping(), "average_daily_volume": 1_500_000.0}
        (profiles / f"{symbol}.json").write_text(json.dumps(mapping))
    settings = Settings(
        journal=tmp_path / "journal.sqlite",
        broker=BrokerSettings(port=mosquitto.port),
        root=ROOT,
        instance="t1",
        profiles=profiles,
        engine={"deviation_pct": 3.0, "default_max_participation": 0.3},
        clock_start=datetime.fromisoformat(day_start()),
        heartbeat_seconds=1.0,
    )
    messages = day_messages(ROOT)

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
    out = tmp_path / "replay"
    assert 0 == main(["replay", str(settings.journal), "--out", str(out), "--no-progress"])
    replayed: dict[str, list[bytes]] = {}
    for name in ("targets", "alerts", "status", "errors", "acks"):
        for line in (out / f"{name}.jsonl").read_bytes().splitlines():
            replayed.setdefault(topic_of(decode_output(line), ROOT), []).append(line)
    assert sorted(replayed) == sorted(live)
    assert replayed == live


@pytest.fixture
def mosquitto(tmp_path: Path) -> Iterator[PrivateMosquitto]:
    """A private Mosquitto, stopped even when the test fails."""
    with PrivateMosquitto(tmp_path / "mosquitto") as broker:
        yield broker

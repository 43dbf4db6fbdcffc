"""A broker that drops the tail of a source's messages: only the source's heartbeat shows it.

A broker with a queue limit (Mosquitto's ``max_queued_messages``, 1,000 by default) keeps the
first messages for a client that is away and drops the rest. When those were the source's last,
no later message shows a jump in its ``seq``; the heartbeat it sends when it has nothing more to
say takes the next number and does (issue 12 measured 3,501 fills lost unseen after a kill -9).
"""

from __future__ import annotations

import asyncio
import json
from collections.abc import Iterator
from datetime import datetime, timedelta
from pathlib import Path

import pytest

from tests.brokers import (
    DaemonProcess,
    PrivateMosquitto,
    day_start,
    journaled,
    publish_all,
    wait_until,
)
from tracker.core.formats import utc_text

pytestmark = pytest.mark.broker

ROOT = "tail"
QUEUE = 5  # the broker's per-client queue, small so that the loss is certain
FILLS = 20


@pytest.fixture
def mosquitto(tmp_path: Path) -> Iterator[PrivateMosquitto]:
    """A private Mosquitto that queues at most QUEUE messages for a client that is away."""
    contract = [f"max_queued_messages {QUEUE}", "persistence false"]
    with PrivateMosquitto(tmp_path / "mosquitto", contract=contract) as broker:
        yield broker


def stamped_fills() -> list[tuple[str, bytes]]:
    """FILLS fills of one order from source ``gw``, numbered 1 to FILLS (invented values)."""
    when = utc_text(datetime.fromisoformat(day_start()) + timedelta(seconds=1))
    return [
        (
            f"{ROOT}/fills/A",
            json.dumps(
                {
                    "type": "fill",
                    "fill_id": f"F{n}",
                    "order_id": "A",
                    "quantity": 100,
                    "price": 42.0,
                    "ts": when,
                    "source": "gw",
                    "seq": n,
                }
            ).encode(),
        )
        for n in range(1, FILLS + 1)
    ]


def heartbeat(seq: int) -> tuple[str, bytes]:
    document = {"type": "heartbeat", "source": "gw", "seq": seq}
    return (f"{ROOT}/control", json.dumps(document).encode())


def run_until_journaled(daemon: DaemonProcess, count: int) -> dict[str, list[list[int]]]:
    """Start ``daemon``, wait until its journal holds ``count`` messages, stop it; its gaps."""
    daemon.start()
    daemon.wait_connected()
    wait_until(lambda: len(journaled(daemon.journal, ROOT)) >= count, 60, f"{count} messages")
    assert 0 == daemon.terminate()
    gaps: dict[str, list[list[int]]] = json.loads(daemon.summary.read_text())["gaps"]
    return gaps


def test_a_heartbeat_reveals_the_tail_a_full_queue_dropped(
    tmp_path: Path, mosquitto: PrivateMosquitto, daemons: list[DaemonProcess]
) -> None:
    """Fills sent while the daemon is away overflow the broker's queue: the daemon gets the
    first QUEUE and cannot tell the rest are missing, until the source's heartbeat comes."""

    journal = tmp_path / "journal.sqlite"

    def daemon() -> DaemonProcess:
        run = tmp_path / f"run-{len(daemons) + 1}"  # a log of its own: wait_connected reads it
        started = DaemonProcess(run, mosquitto.url, root=ROOT, instance="tail", journal=journal)
        daemons.append(started)
        return started

    run_until_journaled(daemon(), 0)  # the daemon's session now exists at the broker
    asyncio.run(publish_all(mosquitto.port, stamped_fills(), client_id="gw"))
    assert {} == run_until_journaled(daemon(), QUEUE)  # the dropped tail is invisible
    assert QUEUE == len(journaled(journal, ROOT))

    revived = daemon()
    revived.start()
    revived.wait_connected()
    asyncio.run(publish_all(mosquitto.port, [heartbeat(FILLS + 1)], client_id="gw"))
    wait_until(lambda: len(journaled(revived.journal, ROOT)) > QUEUE, 60, "the heartbeat")
    assert 0 == revived.terminate()
    summary = json.loads(revived.summary.read_text())
    assert {"gw": [[QUEUE + 1, FILLS]]} == summary["gaps"]

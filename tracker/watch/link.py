"""The view's MQTT connection: read-only subscriptions, one publish for controls, reconnects.

Theory of operation
-------------------
:class:`Link` connects with the broker settings ``tracker run`` uses (:mod:`tracker.shell.config`:
URL, TLS files, username and password file, environment, ``--config``), with a clean session and
a client id of its own per process (``tracker-watch-HOST-PID``): the view is a guest, so it leaves
no session behind on the broker, never takes the daemon's id, and publishes no health message.

It subscribes to what the daemon publishes (status, targets, alerts, health, errors) and to what
the daemon reads that helps the view (bins, orders; the fills of the order whose detail is open),
with the QoS of :func:`subscriptions`, and hands every message to a callback in arrival order.
The callback must be quick (the :class:`~tracker.watch.board.Board` does a few dictionary updates
per message); drawing happens elsewhere, at its own pace.

When the connection drops or cannot be made, :attr:`Link.status` says so (``reconnecting``, the
attempt, the error, when the next try is) and the link waits a jittered, doubling delay
(:func:`tracker.shell.bus.backoff_delays`, the daemon's own) before it tries again; the board keeps
what it had, and the retained messages refresh it after the reconnect.

A subscription the broker refuses (an access rule: say a desk account may not read fills) is not
fatal: the view shows less, and :attr:`LinkStatus.refused` names the filters.
"""

from __future__ import annotations

import asyncio
import contextlib
import os
import re
import socket
import time
from collections.abc import Callable
from dataclasses import dataclass, field, replace
from typing import Any

import aiomqtt

from tracker.core.topics import Topics
from tracker.shell.bus import backoff_delays, client_arguments
from tracker.shell.config import BrokerSettings

__all__ = ["Link", "LinkStatus", "subscriptions", "watch_client_id"]

#: Seconds allowed for one subscribe or publish round trip.
OPERATION_TIMEOUT = 10.0


def subscriptions(root: str) -> tuple[tuple[str, int], ...]:
    """The topic filters the view reads (every one read-only), each with its QoS.

    What a person must not miss (alerts, health, errors) comes at QoS 1. The bulk (a status per
    fill, a target per order and bin, the market bins) comes at QoS 0: over one live connection it
    arrives all the same, the next message of an order replaces the last, and the retained
    statuses refresh everything after a reconnect; it spares the view one acknowledgement per
    message, which at 1,000 orders is most of its network work. Fills are not read in bulk: the
    detail screen follows the fills of its one order (:meth:`Link.follow`).
    """
    topics = Topics(root)
    return (
        (topics.alerts("#"), 1),  # order, symbol and engine alerts alike
        (topics.health(), 1),
        (topics.errors, 1),
        (topics.status(), 0),
        (topics.targets(), 0),
        (topics.bins(), 0),
        (topics.orders(), 0),
    )


def watch_client_id() -> str:
    """A client id of this process alone: ``tracker-watch-HOST-PID`` (at most 64 characters)."""
    host = re.sub(r"[^A-Za-z0-9._-]", "-", socket.gethostname())[:32] or "host"
    return f"tracker-watch-{host}-{os.getpid()}"


@dataclass(frozen=True, slots=True)
class LinkStatus:
    """The connection as the screen shows it.

    Attributes:
        state: ``connecting`` (first try), ``connected`` or ``reconnecting``.
        url: The broker URL (never with credentials).
        attempts: Failed tries since the last good connection.
        error: The last failure, in words.
        retry_at: The monotonic time of the next try, while waiting.
        connections: Successful connections so far.
        refused: Filters the broker refused.
    """

    state: str
    url: str
    attempts: int = 0
    error: str | None = None
    retry_at: float | None = None
    connections: int = 0
    refused: tuple[str, ...] = field(default_factory=tuple)


class Link:
    """The connection (see the module docstring).

    Args:
        broker: Where and how to connect (from :func:`tracker.shell.config.load_settings`).
        root: The topic root.
        on_message: Called with ``(topic, payload, retained)`` for every message, in order.
        filters: The topic filters and their QoS; the view's own (:func:`subscriptions`) by
            default.
        reconnect_min_seconds, reconnect_max_seconds: Bounds of the reconnect delay.
        client_id: The MQTT client id; :func:`watch_client_id` by default.
    """

    def __init__(
        self,
        broker: BrokerSettings,
        root: str,
        on_message: Callable[[str, bytes, bool], None],
        *,
        filters: tuple[tuple[str, int], ...] | None = None,
        reconnect_min_seconds: float = 0.2,
        reconnect_max_seconds: float = 10.0,
        client_id: str | None = None,
    ) -> None:
        self.broker = broker
        self.root = root
        self.filters = filters if filters is not None else subscriptions(root)
        self._on_message = on_message
        self.reconnect_min_seconds = reconnect_min_seconds
        self.reconnect_max_seconds = reconnect_max_seconds
        self.client_id = client_id or watch_client_id()
        self.status = LinkStatus("connecting", broker.url)
        self.subscribed = asyncio.Event()
        self._client: aiomqtt.Client | None = None
        self._followed: str | None = None

    async def run(self) -> None:
        """Connect, read, and reconnect after any loss, until cancelled."""
        delays = iter(backoff_delays(self.reconnect_min_seconds, self.reconnect_max_seconds))
        while True:
            error = "the broker closed the connection"
            try:
                await self._connection()
            except aiomqtt.MqttError as exc:
                error = f"{type(exc).__name__}: {exc}"
            finally:
                self._client = None
                self.subscribed.clear()
            if self.status.state == "connected":  # it was up: start the back-off afresh
                delays = iter(
                    backoff_delays(self.reconnect_min_seconds, self.reconnect_max_seconds)
                )
            delay = next(delays)
            self.status = replace(
                self.status,
                state="connecting" if self.status.connections == 0 else "reconnecting",
                attempts=self.status.attempts + 1,
                error=error,
                retry_at=time.monotonic() + delay,
            )
            await asyncio.sleep(delay)

    async def _connection(self) -> None:
        client = aiomqtt.Client(
            **client_arguments(self.broker),
            identifier=self.client_id,
            clean_session=True,
            timeout=OPERATION_TIMEOUT,
        )
        async with client:
            self._client = client
            granted = await client.subscribe(list(self.filters))
            codes = _granted_codes(granted)
            refused = tuple(
                topic for (topic, _), code in zip(self.filters, codes, strict=False) if code >= 0x80
            )
            if self._followed is not None:
                await client.subscribe(self._followed, qos=0)
            self.status = LinkStatus(
                "connected",
                self.broker.url,
                connections=self.status.connections + 1,
                refused=refused,
            )
            self.subscribed.set()
            async for message in client.messages:
                payload = message.payload
                if isinstance(payload, str):
                    data = payload.encode("utf-8")
                elif isinstance(payload, bytes | bytearray):
                    data = bytes(payload)
                else:
                    data = b"" if payload is None else str(payload).encode("utf-8")
                self._on_message(message.topic.value, data, bool(message.retain))

    async def follow(self, topic: str | None) -> None:
        """Read ``topic`` too (one at a time: the previous one is dropped); ``None``: none.

        Kept across reconnects. A failure is left to the connection loop to notice.
        """
        previous, self._followed = self._followed, topic
        client = self._client
        if client is None or previous == topic:
            return
        with contextlib.suppress(aiomqtt.MqttError):
            if previous is not None:
                await client.unsubscribe(previous)
            if topic is not None:
                await client.subscribe(topic, qos=0)

    async def publish(self, topic: str, payload: bytes) -> None:
        """Publish one message at QoS 1 (not retained) and wait for the broker's acknowledgement.

        Raises:
            aiomqtt.MqttError: not connected, or the broker did not acknowledge in time.
        """
        client = self._client
        if client is None or self.status.state != "connected":
            raise aiomqtt.MqttError("not connected to the broker")
        await client.publish(topic, payload, qos=1, retain=False)


def _granted_codes(granted: Any) -> list[int]:
    """SUBACK return codes as ints (paho gives ints or ReasonCode objects)."""
    codes = []
    for item in granted or ():
        value = getattr(item, "value", item)
        codes.append(int(value) if isinstance(value, int) else 0)
    return codes

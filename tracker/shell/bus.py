"""The MQTT bus of the live daemon: one connection that keeps coming back.

Theory of operation
-------------------
:class:`Bus` owns the broker connection (aiomqtt over paho-mqtt). It connects with a *stable*
client id and ``clean_session=False``, so the broker keeps our subscriptions and queues QoS 1
messages while we are away; it subscribes at QoS 1, publishes a retained ``online`` health message
(with a retained ``offline`` last will for a crash), and runs three loops per connection:

* **reader** -- every message on one of our subscriptions becomes a :class:`Delivery` in the
  bounded ``inbox``. Messages are acknowledged *manually*: paho would send the PUBACK as soon as a
  message is read, before we have journaled it, and a crash in between would lose a fill the broker
  thinks we have. So the daemon calls :meth:`Delivery.ack` only after the journal commit. Unacked
  messages also make the broker stop sending at its in-flight window -- the back-pressure that
  keeps the inbox bounded. When the inbox is full the reader waits (and says so in the log and
  the health message) instead of growing a queue.
* **writer** -- takes :class:`Outgoing` messages from the :class:`Outbox` in order and publishes
  them at QoS 1, many in flight at once; each confirmed one is reported through ``on_published``.
  When the connection drops, the unconfirmed ones go back to the front of the outbox and are sent
  again after the reconnect (at least once, in order).
* **heartbeat** -- re-publishes the retained health message every ``heartbeat_seconds``.

One instance per id: every health message carries this process's ``run_id``, and the bus also
listens to its own health topic. Before the daemon connects with its client id (which would take
the session over from a daemon already using it), :func:`probe_health` reads the retained health
message with a throwaway client id, and the daemon refuses to start when it says another run is
online. While running, a live ``online`` health message with another ``run_id`` on our topic means
a second process took our client id: the bus reports it (``on_conflict``) and the daemon stops,
instead of the two taking the session from each other every few seconds.

A lost connection ends the three loops; the bus waits a jittered, doubling back-off
(``reconnect_min_seconds`` .. ``reconnect_max_seconds``) and connects again. :meth:`Bus.close`
asks it to stop reading, flush the outbox (within a timeout), publish ``offline`` and disconnect.

Manual acknowledgement uses paho's ``manual_ack`` through aiomqtt's inner client (aiomqtt 2.x has
no public switch for it yet; see aiomqtt issue #345, "Application-controlled acknowledgements").
For speed the reader also takes paho's ``on_message`` callback (and aiomqtt 2.x's private
``_queue`` and ``_disconnected``), the connection's socket is set to TCP_NODELAY, and the
publications, their PUBACKs, the inbound messages and their acknowledgements go through a lean
path over paho's socket (MQTT 3.1.1 packets made and read here, many per socket write and read),
with paho's own ``publish`` and ``ack`` as the fallback: see :meth:`Bus._read`,
:func:`_no_delay` and :class:`_Link`.
"""

from __future__ import annotations

import asyncio
import collections
import contextlib
import functools
import json
import random
import socket
import ssl
import struct
import uuid
from collections.abc import Callable, Iterable, Sequence
from dataclasses import dataclass
from typing import Any

import aiomqtt
import paho.mqtt.client as paho
import structlog
from paho.mqtt.exception import MalformedPacket

from tracker.shell.config import BrokerSettings

__all__ = [
    "Bus",
    "Delivery",
    "Outbox",
    "Outgoing",
    "acknowledge",
    "backoff_delays",
    "client_arguments",
    "probe_health",
    "topic_matches",
]

#: Seconds to wait for one PUBACK / SUBACK before the connection is considered broken.
OPERATION_TIMEOUT = 15.0
#: Most publications waiting for their PUBACK at once.
MAX_IN_FLIGHT = 256
#: Topics whose verdict (on our subscriptions or not) is remembered before the memory starts over.
WANTED_TOPICS = 100_000
#: Seconds between "inbox full" reminders while back-pressure lasts.
BACKPRESSURE_REPORT_SECONDS = 5.0
#: Seconds :func:`probe_health` waits, after its subscription is confirmed, for a retained message
#: (a broker sends retained messages right after the SUBACK, so this only covers the latency).
PROBE_SECONDS = 0.5


@functools.lru_cache(maxsize=256)
def _levels(pattern: str) -> tuple[str, ...]:
    return tuple(pattern.split("/"))


def topic_matches(topic: str, pattern: str) -> bool:
    """Whether a topic matches a subscription filter (``+`` one level, ``#`` the rest)."""
    topic_levels = topic.split("/")
    levels = _levels(pattern)
    for index, level in enumerate(levels):
        if level == "#":
            return True
        if index >= len(topic_levels):
            return False
        if level != "+" and level != topic_levels[index]:
            return False
    return len(topic_levels) == len(levels)


def client_arguments(broker: BrokerSettings) -> dict[str, Any]:
    """Where and as whom an ``aiomqtt.Client`` connects: address, credentials, TLS, keep-alive.

    One place for every client of the package (the daemon's :class:`Bus`, ``tracker watch``), so
    each honours the same settings (``mqtts://``, CA, client certificate, password file).

    Args:
        broker: Settings from :func:`tracker.shell.config.load_settings`.

    Returns:
        Keyword arguments of ``aiomqtt.Client``: ``hostname``, ``port``, ``username``,
        ``password``, ``keepalive``, ``tls_params``. The caller adds its identity and session.
    """
    tls_params = None
    if broker.tls:
        tls_params = aiomqtt.TLSParameters(
            ca_certs=str(broker.ca) if broker.ca else None,
            certfile=str(broker.cert) if broker.cert else None,
            keyfile=str(broker.key) if broker.key else None,
            cert_reqs=ssl.CERT_REQUIRED,
            tls_version=ssl.PROTOCOL_TLS_CLIENT,
        )
    return {
        "hostname": broker.host,
        "port": broker.port,
        "username": broker.username,
        "password": broker.password.reveal() if broker.password else None,
        "keepalive": broker.keepalive,
        "tls_params": tls_params,
    }


def backoff_delays(
    minimum: float, maximum: float, rng: random.Random | None = None
) -> Iterable[float]:
    """Reconnect delays: doubling from ``minimum`` up to ``maximum``, each with full jitter.

    "Full jitter" draws each delay uniformly between half the current step and the step, so a
    fleet of daemons that lost the same broker does not reconnect in lock-step.
    """
    rng = rng or random.Random()
    step = minimum
    while True:
        yield rng.uniform(step / 2, step)
        step = min(maximum, step * 2)


#: One message as paho hands it over: topic, payload, retained, QoS, message id.
_Incoming = tuple[str, Any, bool, int, int]

#: Acknowledges deliveries of one connection by their message ids (see :func:`acknowledge`).
_Acks = Callable[[Sequence[int]], None]


@dataclass(slots=True)
class Delivery:
    """One inbound message, not yet acknowledged to the broker.

    Attributes:
        topic, payload: As received.
        retained: The broker sent it as a retained message.
        qos: The QoS it was delivered with.
    """

    topic: str
    payload: bytes
    retained: bool = False
    qos: int = 0
    _acks: _Acks | None = None  # its connection's (None: QoS 0, or acknowledged already)
    _mid: int = 0

    def ack(self) -> None:
        """Acknowledge to the broker (after the message is safely journaled)."""
        acknowledge((self,))


def acknowledge(deliveries: Iterable[Delivery]) -> None:
    """Acknowledge deliveries to the broker, in order, the PUBACKs of a group as one write.

    Each is acknowledged once (again: nothing). After a reconnect the broker sends the messages
    of the old connection again (a redelivery, which changes nothing); their acknowledgements on
    the old connection are never written.
    """
    acks: _Acks | None = None
    mids: list[int] = []
    for delivery in deliveries:
        if delivery._acks is None:
            continue
        if delivery._acks is not acks:
            if acks is not None:
                acks(mids)
            acks, mids = delivery._acks, []
        mids.append(delivery._mid)
        delivery._acks = None
    if acks is not None:
        acks(mids)


@dataclass(frozen=True, slots=True)
class Outgoing:
    """One message to publish.

    Attributes:
        topic, payload, retain: What to publish (always QoS 1).
        seq: The journal sequence number of the record that produced it (0: none).
    """

    topic: str
    payload: bytes
    retain: bool = False
    seq: int = 0


class Outbox:
    """A bounded FIFO of outgoing messages that survives reconnects.

    Producers wait in :meth:`put` when it is full (back-pressure). The writer :meth:`take` s items,
    which stay *in flight* until :meth:`done`; :meth:`requeue_in_flight` puts the unconfirmed ones
    back at the front in their original order. (Single event loop: the bookkeeping has no await
    inside, so it needs no lock.)

    Args:
        capacity: Messages queued plus in flight before :meth:`put` waits.
    """

    def __init__(self, capacity: int = 10_000) -> None:
        self.capacity = capacity
        self._queue: collections.deque[Outgoing] = collections.deque()
        self._in_flight: dict[int, Outgoing] = {}
        self._ticket = 0
        self._ready = asyncio.Event()  # something to take
        self._room = asyncio.Event()  # below capacity
        self._room.set()
        self._empty = asyncio.Event()  # nothing queued, nothing in flight
        self._empty.set()

    def __len__(self) -> int:
        return len(self._queue) + len(self._in_flight)

    @property
    def full(self) -> bool:
        """No room for another message."""
        return len(self) >= self.capacity

    def _changed(self) -> None:
        size = len(self)
        (self._ready.set if self._queue else self._ready.clear)()
        (self._room.set if size < self.capacity else self._room.clear)()
        (self._empty.set if size == 0 else self._empty.clear)()

    async def put(self, item: Outgoing, *, timeout: float | None = None) -> None:
        """Add one message; wait while full (raises TimeoutError after ``timeout`` seconds)."""
        while self.full:
            await asyncio.wait_for(self._room.wait(), timeout)
        self._queue.append(item)
        self._changed()

    def extend(self, items: Iterable[Outgoing]) -> None:
        """Add messages without waiting, even past the capacity (at start, the recovered
        outputs; later, outputs the caller knows there is room for)."""
        self._queue.extend(items)
        self._changed()

    async def take(self) -> tuple[int, Outgoing]:
        """The next message and its ticket; it stays in flight until :meth:`done`."""
        while not self._queue:
            await self._ready.wait()
        item = self._queue.popleft()
        self._ticket += 1
        self._in_flight[self._ticket] = item
        self._changed()
        return self._ticket, item

    async def take_many(self, most: int) -> list[tuple[int, Outgoing]]:
        """Up to ``most`` messages (at least one) and their tickets, as :meth:`take` gives them."""
        while not self._queue:
            await self._ready.wait()
        taken = []
        queue, in_flight = self._queue, self._in_flight
        for _ in range(min(most, len(queue))):
            item = queue.popleft()
            self._ticket += 1
            in_flight[self._ticket] = item
            taken.append((self._ticket, item))
        self._changed()
        return taken

    def done(self, ticket: int) -> None:
        """The message of ``ticket`` was confirmed by the broker."""
        self._in_flight.pop(ticket, None)
        # _changed, less what a confirmation cannot change (the queue, so ``_ready``), and
        # without a call for an event already as it should be: once per publication.
        size = len(self._queue) + len(self._in_flight)
        if size < self.capacity and not self._room.is_set():
            self._room.set()
        if size == 0:
            self._empty.set()

    def requeue_in_flight(self) -> int:
        """Put every unconfirmed message back at the front, in order; return how many."""
        items = [self._in_flight[t] for t in sorted(self._in_flight)]
        self._in_flight.clear()
        self._queue.extendleft(reversed(items))
        self._changed()
        return len(items)

    async def wait_empty(self, timeout: float) -> bool:
        """Wait until every message is confirmed; False if ``timeout`` seconds passed first."""
        try:
            await asyncio.wait_for(self._empty.wait(), timeout)
        except TimeoutError:
            return False
        return True


class _Closing(Exception):
    """Raised inside a connection to end it on purpose (after the flush)."""


class Bus:
    """The daemon's MQTT connection (see the module docstring).

    Args:
        broker: Where and how to connect.
        client_id: Stable MQTT client id.
        subscriptions: Topic filters to subscribe to at QoS 1.
        inbox: Where deliveries go (bounded; the reader waits when it is full).
        outbox: Where outgoing messages come from.
        health_topic: Retained health topic (``{root}/health/{instance}``).
        health: Called for the current health document (a JSON-able dict) at each heartbeat.
        on_published: Called with each confirmed :class:`Outgoing`.
        heartbeat_seconds: Interval of the health message.
        reconnect_min_seconds, reconnect_max_seconds: Back-off bounds.
        on_conflict: Called with the health document of another process that publishes as this
            instance (see the module docstring).
    """

    def __init__(
        self,
        broker: BrokerSettings,
        *,
        client_id: str,
        subscriptions: Sequence[str],
        inbox: asyncio.Queue[Delivery],
        outbox: Outbox,
        health_topic: str,
        health: Callable[[], dict[str, Any]],
        on_published: Callable[[Outgoing], None] | None = None,
        heartbeat_seconds: float = 10.0,
        reconnect_min_seconds: float = 0.2,
        reconnect_max_seconds: float = 30.0,
        on_conflict: Callable[[dict[str, Any]], None] | None = None,
    ) -> None:
        self.broker = broker
        self.run_id = uuid.uuid4().hex
        self._on_conflict = on_conflict
        self.client_id = client_id
        self.subscriptions = tuple(subscriptions)
        self.inbox = inbox
        self.outbox = outbox
        self.health_topic = health_topic
        self._health = health
        self._on_published = on_published
        self.heartbeat_seconds = heartbeat_seconds
        self.reconnect_min_seconds = reconnect_min_seconds
        self.reconnect_max_seconds = reconnect_max_seconds
        self.connected = asyncio.Event()
        self.reading = True
        self._close_requested = asyncio.Event()
        self._stop_reading = asyncio.Event()
        self._give_up = asyncio.Event()
        self.connections = 0
        self.backpressure = False
        self.ignored = 0
        self._wanted_topics: dict[str, bool] = {}
        self._log = structlog.get_logger("tracker.shell.bus").bind(broker=broker.url)

    # -- control ---------------------------------------------------------------------------------

    def stop_reading(self) -> None:
        """Take no more messages: what the broker sends from now on stays unacknowledged, so it
        delivers it again on the next start."""
        self._stop_reading.set()

    def close(self) -> None:
        """Flush the outbox, publish ``offline`` and disconnect; :meth:`run` then returns."""
        self._stop_reading.set()
        self._close_requested.set()

    # -- the connection loop ---------------------------------------------------------------------

    def _client(self, *, clean_session: bool = False, will: bool = True) -> aiomqtt.Client:
        client = aiomqtt.Client(
            **client_arguments(self.broker),
            identifier=self.client_id,
            clean_session=clean_session,
            will=aiomqtt.Will(self.health_topic, self._offline(), qos=1, retain=True)
            if will
            else None,
            timeout=OPERATION_TIMEOUT,
            max_inflight_messages=MAX_IN_FLIGHT,
        )
        # Acknowledge only after the journal commit (see the module docstring). Must be set before
        # connecting: a persistent session's queued messages arrive right after CONNACK.
        client._client.manual_ack_set(True)
        # aiomqtt warns past 10 pending calls; we keep up to MAX_IN_FLIGHT on purpose.
        client.pending_calls_threshold = MAX_IN_FLIGHT + 16
        return client

    def _offline(self) -> bytes:
        document = {
            "type": "health",
            "status": "offline",
            "client_id": self.client_id,
            "run_id": self.run_id,
        }
        return json.dumps(document, separators=(",", ":")).encode()

    def _online(self) -> bytes:
        document = {
            "type": "health",
            "status": "online",
            "client_id": self.client_id,
            "run_id": self.run_id,
        }
        document.update(self._health())
        return json.dumps(document, separators=(",", ":"), default=str).encode()

    async def run(self) -> None:
        """Connect, serve, reconnect with back-off; return after :meth:`close` has flushed."""
        delays = iter(backoff_delays(self.reconnect_min_seconds, self.reconnect_max_seconds))
        while True:
            connections = self.connections
            try:
                await self._connection()
                return  # closed on purpose: flushed, offline published
            except aiomqtt.MqttError as exc:
                error = exc
            finally:
                self.connected.clear()
            if self.connections > connections:  # it was up: start the back-off afresh
                delays = iter(
                    backoff_delays(self.reconnect_min_seconds, self.reconnect_max_seconds)
                )
            requeued = self.outbox.requeue_in_flight()
            delay = next(delays)
            self._log.warning(
                "connection lost" if self.connections > connections else "cannot connect",
                error=f"{type(error).__name__}: {error}",
                retry_in=round(delay, 2),
                requeued=requeued,
            )
            if self._close_requested.is_set() and len(self.outbox) == 0:
                return
            with contextlib.suppress(TimeoutError):
                await asyncio.wait_for(self._give_up.wait(), delay)
            if self._give_up.is_set():
                return

    async def _connection(self) -> None:
        """One connection, from connect to close or loss (raised as one MqttError)."""
        client = self._client()
        try:
            async with client:
                self.connections += 1
                self.connected.set()
                self._log.info("connected", connection=self.connections)
                await self._serve(client)
        except BaseExceptionGroup as group:
            lost, other = group.split(aiomqtt.MqttError)
            if other is not None or lost is None:
                raise
            first: BaseException = lost
            while isinstance(first, BaseExceptionGroup):
                first = first.exceptions[0]
            raise first from None

    def give_up(self) -> None:
        """Stop reconnecting (the flush timed out while the broker is away; the journal has it)."""
        self._give_up.set()

    async def _serve(self, client: aiomqtt.Client) -> None:
        _no_delay(client)
        # Our own health topic at QoS 0: a broker queues no QoS 0 message for a session that is
        # away, so what comes is live. At QoS 1 a restart got the previous run's "online", queued
        # while no one was connected, and took it for a second process.
        filters = [(topic, 1) for topic in self.subscriptions]
        await client.subscribe([*filters, (self.health_topic, 0)])
        await client.publish(self.health_topic, self._online(), qos=1, retain=True)
        link = _Link.attach(client._client)
        try:
            async with asyncio.TaskGroup() as group:
                if not self._stop_reading.is_set():
                    reader = group.create_task(self._read(client, link), name="bus.reader")
                    group.create_task(self._stop_reader(reader), name="bus.reader-stop")
                group.create_task(self._write(client, link), name="bus.writer")
                group.create_task(self._heartbeat(client), name="bus.heartbeat")
                group.create_task(self._closer(client), name="bus.closer")
        except* _Closing:
            pass
        finally:
            if link is not None:
                link.detach()  # paho's own methods for the disconnect

    async def _stop_reader(self, reader: asyncio.Task[None]) -> None:
        await self._stop_reading.wait()
        reader.cancel()

    async def _closer(self, client: aiomqtt.Client) -> None:
        # The daemon calls close() after the outbox is flushed (or the flush timed out).
        await self._close_requested.wait()
        await client.publish(self.health_topic, self._offline(), qos=1, retain=True)
        self._log.info("offline published; disconnecting")
        raise _Closing

    async def _read(self, client: aiomqtt.Client, link: _Link | None) -> None:
        """Take every message on our subscriptions into the inbox, in order of arrival.

        The hot path of a burst: aiomqtt's message iterator costs a message object (with a
        validated topic), a queue, a task and an ``asyncio.wait`` per message, so the reader takes
        paho's messages from its ``on_message`` callback instead (in order, in the loop's thread:
        paho runs in aiomqtt's socket callbacks), and waits only when there is none. What aiomqtt
        queued before the reader started (a persistent session's backlog arrives right after
        CONNACK) is taken first. When the reader stops, aiomqtt's callback is put back: what comes
        then is never acknowledged, so the broker delivers it again on the next start.
        """
        inner: paho.Client = client._client
        # One acknowledger per connection, so that :func:`acknowledge` groups by it.
        acks: _Acks = link.ack if link is not None else functools.partial(_ack_each, inner)
        backlog: asyncio.Queue[aiomqtt.Message] = client._queue
        arrived: collections.deque[_Incoming] = collections.deque()
        while not backlog.empty():
            message = backlog.get_nowait()
            arrived.append(
                (message.topic.value, message.payload, message.retain, message.qos, message.mid)
            )
        wake = asyncio.Event()
        aiomqtt_on_message = inner.on_message

        def on_message(_client: Any, _userdata: Any, message: paho.MQTTMessage) -> None:
            try:
                topic = message.topic
            except UnicodeDecodeError:  # not a topic of ours: acknowledged and ignored below
                topic = ""
            arrived.append((topic, message.payload, message.retain, message.qos, message.mid))
            wake.set()

        def on_publish(topic: str, payload: bytes, retain: bool, qos: int, mid: int) -> None:
            arrived.append((topic, payload, retain, qos, mid))
            wake.set()

        inner.on_message = on_message
        if link is not None:
            link.on_message = on_publish
        disconnected: asyncio.Future[None] = client._disconnected
        try:
            while True:
                inbox = self.inbox
                while arrived:
                    delivery = self._take(client, acks, *arrived.popleft())
                    if delivery is None:
                        continue
                    if inbox.full():
                        await self._put(delivery)  # waits, and says so
                    else:
                        inbox.put_nowait(delivery)
                # Not held while waiting for the next message: a 100 MB payload goes as soon as
                # the journal stage is done with it.
                delivery = None
                wake.clear()
                waiter = asyncio.ensure_future(wake.wait())
                try:
                    await asyncio.wait((waiter, disconnected), return_when=asyncio.FIRST_COMPLETED)
                finally:
                    waiter.cancel()
                if disconnected.done() and not arrived:
                    raise aiomqtt.MqttError("Disconnected during message iteration") from (
                        disconnected.exception()
                    )
        finally:
            inner.on_message = aiomqtt_on_message
            if link is not None:
                link.on_message = None

    def _take(
        self,
        client: aiomqtt.Client,
        acks: _Acks,
        topic: str,
        payload: Any,
        retain: bool,
        qos: int,
        mid: int,
    ) -> Delivery | None:
        """The delivery for the inbox, or ``None`` for a message that is not one."""
        # A persistent session can get messages before we subscribe again, and amqtt sends
        # retained messages of other clients' subscriptions: keep only what we asked for.
        if topic == self.health_topic:
            _acknowledge(client, qos, mid)
            self._heard_health(payload, retain)
            return None
        if not topic or not self._wanted(topic):
            self.ignored += 1
            self._log.debug("ignored message outside our subscriptions", topic=topic)
            _acknowledge(client, qos, mid)  # else it holds a place in the in-flight window
            return None
        if isinstance(payload, str):
            payload = payload.encode("utf-8")
        elif not isinstance(payload, bytes | bytearray):
            payload = b"" if payload is None else str(payload).encode("utf-8")
        return Delivery(
            topic=topic,
            payload=payload if type(payload) is bytes else bytes(payload),
            retained=bool(retain),
            qos=qos,
            _acks=acks if qos == 1 else None if qos == 0 else _acker(client, qos),
            _mid=mid,
        )

    def _wanted(self, topic: str) -> bool:
        """Whether a topic is on one of our subscriptions (remembered for the topics of a day)."""
        wanted = self._wanted_topics.get(topic)
        if wanted is None:
            if len(self._wanted_topics) >= WANTED_TOPICS:
                self._wanted_topics.clear()
            wanted = any(topic_matches(topic, pattern) for pattern in self.subscriptions)
            self._wanted_topics[topic] = wanted
        return wanted

    def _heard_health(self, payload: Any, retain: bool) -> None:
        """A live health message on our own topic from another run is a second process."""
        if retain:
            return  # what was there when we subscribed: the start-up probe judged it
        document = _health_document(payload)
        if document is None or document.get("status") != "online":
            return
        other = document.get("run_id")
        if other is None or other == self.run_id:
            return
        self._log.critical(
            "another process publishes as this instance",
            other_run=other,
            other_client=document.get("client_id"),
            run_id=self.run_id,
        )
        if self._on_conflict is not None:
            self._on_conflict(document)

    async def _put(self, delivery: Delivery) -> None:
        try:
            self.inbox.put_nowait(delivery)
            return
        except asyncio.QueueFull:
            pass
        self.backpressure = True
        self._log.warning("inbox full: back-pressure", capacity=self.inbox.maxsize)
        while True:
            try:
                await asyncio.wait_for(self.inbox.put(delivery), BACKPRESSURE_REPORT_SECONDS)
                break
            except TimeoutError:
                self._log.warning("inbox still full", capacity=self.inbox.maxsize)
        self.backpressure = False

    async def _write(self, client: aiomqtt.Client, link: _Link | None) -> None:
        """Publish the outbox in order, up to MAX_IN_FLIGHT awaiting their PUBACK at once.

        This is the hot path of the daemon (one or two outputs per fill), so it does not go
        through ``aiomqtt.Client.publish``, which costs a task, an event and a timeout per
        message: the :class:`_Link` queues each PUBLISH packet at once (in order) and hands back
        its PUBACK's message id; without it (a paho it cannot take), paho's ``publish`` is used
        and its ``on_publish`` chained onto aiomqtt's own handler. A PUBACK that never comes is a
        dead connection, which the reader and the keep-alive notice; the unconfirmed messages are
        then sent again after the reconnect.
        """
        if link is None:
            await self._write_paho(client)
            return
        pending: dict[int, tuple[int, Outgoing]] = {}  # message id -> (ticket, message)
        room = asyncio.Event()
        room.set()

        def on_puback(mid: int) -> bool:
            return self._confirm(pending, mid, room)  # False: aiomqtt's (a health message)

        link.on_puback = on_puback
        try:
            while True:
                while len(pending) >= MAX_IN_FLIGHT:
                    room.clear()
                    await room.wait()
                for ticket, item in await self.outbox.take_many(MAX_IN_FLIGHT - len(pending)):
                    pending[link.publish(item.topic, item.payload, item.retain)] = (ticket, item)
        finally:
            link.on_puback = None

    async def _write_paho(self, client: aiomqtt.Client) -> None:
        """:meth:`_write` through paho's ``publish`` and ``on_publish``."""
        inner: paho.Client = client._client
        pending: dict[int, tuple[int, Outgoing]] = {}  # paho message id -> (ticket, message)
        room = asyncio.Event()
        room.set()
        aiomqtt_on_publish = inner.on_publish

        def on_publish(*args: Any) -> None:
            if aiomqtt_on_publish is not None:
                aiomqtt_on_publish(*args)  # the health messages go through aiomqtt
            self._confirm(pending, args[2], room)  # (client, userdata, mid, reason, properties)

        inner.on_publish = on_publish
        try:
            while True:
                while len(pending) >= MAX_IN_FLIGHT:
                    room.clear()
                    await room.wait()
                ticket, item = await self.outbox.take()
                info = inner.publish(item.topic, item.payload, qos=1, retain=item.retain)
                if info.rc != paho.MQTT_ERR_SUCCESS:
                    raise aiomqtt.MqttCodeError(info.rc, "Could not publish message")
                pending[info.mid] = (ticket, item)
        finally:
            inner.on_publish = aiomqtt_on_publish

    def _confirm(
        self, pending: dict[int, tuple[int, Outgoing]], mid: int, room: asyncio.Event
    ) -> bool:
        """The broker confirmed message id ``mid``: done in the outbox, room for one more in
        flight. Whether it was one of ``pending`` (a writer's publications)."""
        entry = pending.pop(mid, None)
        if entry is None:
            return False
        ticket, item = entry
        self.outbox.done(ticket)
        if self._on_published is not None:
            self._on_published(item)
        room.set()
        return True

    async def _heartbeat(self, client: aiomqtt.Client) -> None:
        while True:
            await asyncio.sleep(self.heartbeat_seconds)
            await client.publish(self.health_topic, self._online(), qos=1, retain=True)


def _no_delay(client: aiomqtt.Client) -> None:
    """Send small packets at once (TCP_NODELAY), as latency-bound messaging commonly does.

    Without it, Nagle's algorithm holds a PUBACK or a status message back until the broker's
    delayed acknowledgement of the previous packet (about 40 ms on Linux): good fills then came
    back in steps of 20-40 ms even with nothing else to do (``benchmarks/bench_flood.py``).
    """
    sock = client._client.socket()
    if not isinstance(sock, socket.socket) or sock.family not in (socket.AF_INET, socket.AF_INET6):
        return  # a websocket or a test double: nothing to set
    with contextlib.suppress(OSError):
        sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)


def _acknowledge(client: aiomqtt.Client, qos: int, mid: int) -> None:
    """Acknowledge at once a message that is not journaled (it must not block the window)."""
    if qos:
        client._client.ack(mid, qos)


def paho_version() -> str:
    """The installed paho-mqtt's version."""
    import paho.mqtt

    return str(paho.mqtt.__version__)


class _Link:
    """The lean path through paho for one connection: QoS 1 PUBLISH and PUBACK packets made here
    and queued on paho's socket, many per socket write.

    paho's own ``publish`` makes a message object, an info object with a condition variable and
    (for the acknowledgement) a reason code and a properties object per publication, even for
    MQTT 3.1.1, and sends every queued packet with its own ``send`` call; in a burst that was
    about a third of the daemon's time (``benchmarks/README.md``). Here a publication is its
    packet, its PUBACK is matched by message id before paho looks at it (paho's handler still
    gets every PUBACK that is not ours: the health messages and subscriptions go through
    aiomqtt), and the packets waiting when the socket is writable leave in one ``send`` (at most
    ``WRITE_CHUNK`` bytes each): the same bytes, in the same order, as paho would send them.

    It uses paho internals (``_packet_queue``, ``_out_packet``, ``_packet_write``,
    ``_handle_pubackcomp``, ``_in_packet``, ``_mid_generate``): :meth:`attach` checks that paho
    is of the release series the tests were run with (:data:`PAHO_SERIES`), that they are there
    and that the connection speaks MQTT 3.1 or 3.1.1, and returns ``None`` otherwise, in which
    case the bus goes through paho's public ``publish`` and ``ack``: a new paho may keep a name
    and change what it means, so it is not taken this way before a test run says it can be.
    """

    #: paho releases the lean path was tested with (``paho.mqtt.__version__`` prefix).
    PAHO_SERIES = ("2.1.", "2.2.")

    #: Most bytes of waiting packets joined into one socket write.
    WRITE_CHUNK = 256 * 1024
    #: Bytes asked of the socket per read (paho asks for one byte, then the length, then the
    #: rest of each packet: three reads or more per packet otherwise).
    READ_CHUNK = 64 * 1024
    #: Packets read per readable event before the loop gets its turn (more if already read).
    READ_PACKETS = 1_000

    _NEEDED = (
        "_packet_queue",
        "_out_packet",
        "_packet_write",
        "_handle_pubackcomp",
        "_in_packet",
        "_mid_generate",
        "_protocol",
        "_sock",
        "_sock_recv",
        "_packet_read",
        "_loop_rc_handle",
        "_handle_publish",
        "_manual_ack",
        "loop_read",
        "_packet_handle",
        "_msgtime_mutex",
        "_last_bytes_received",
    )

    #: The paho methods the link stands in for (see :meth:`attach` and :meth:`detach`).
    _TAKEN = ("_packet_write", "_handle_pubackcomp", "_sock_recv", "loop_read", "_handle_publish")

    def __init__(self, inner: paho.Client) -> None:
        self.inner = inner
        self.on_puback: Callable[[int], bool] | None = None
        #: Takes each PUBLISH at QoS 0 or 1 (topic, payload, retained, QoS, message id) instead
        #: of paho's ``on_message`` (and aiomqtt's queue) while it is set.
        self.on_message: Callable[[str, bytes, bool, int, int], None] | None = None
        self._paho_publish = inner._handle_publish
        self._paho_packet_write = inner._packet_write
        self._paho_pubackcomp = inner._handle_pubackcomp
        self._paho_recv = inner._sock_recv
        # Bytes read from the socket and not handled yet (from ``_at`` on): the start of a packet
        # whose rest has not come, or (for paho's own read) what paho has not asked for yet.
        self._read = bytearray()
        self._at = 0

    @classmethod
    def attach(cls, inner: paho.Client) -> _Link | None:
        """The link for this client, installed; ``None`` when paho cannot be taken this way."""
        if not paho_version().startswith(cls.PAHO_SERIES):
            return None
        if not all(hasattr(inner, name) for name in cls._NEEDED):
            return None
        if inner._protocol not in (paho.MQTTv31, paho.MQTTv311):
            return None
        link = cls(inner)
        inner._packet_write = link._packet_write  # type: ignore[method-assign]
        inner._handle_pubackcomp = link._handle_pubackcomp  # type: ignore[method-assign]
        inner._sock_recv = link._sock_recv  # type: ignore[method-assign]
        inner.loop_read = link.loop_read  # type: ignore[method-assign]
        inner._handle_publish = link._handle_publish  # type: ignore[method-assign]
        return link

    def detach(self) -> None:
        """Give paho its own methods back (at the end of the connection): the client and the
        link no longer hold each other, so the client goes with its last reference, not at some
        later garbage collection (paho's finalizer would then run inside whatever runs then)."""
        self.on_message = None
        self.on_puback = None
        for name in _Link._TAKEN:
            self.inner.__dict__.pop(name, None)

    def _handle_publish(self) -> Any:
        """paho's PUBLISH handler when paho read the packet itself (see :meth:`_deliver`)."""
        packet = self.inner._in_packet
        data = packet["packet"]
        if self._deliver(packet["command"], data, 0, len(data)):
            return paho.MQTT_ERR_SUCCESS
        return self._paho_publish()

    def _sock_recv(self, bufsize: int) -> bytes:
        """paho's read of ``bufsize`` bytes at most, served from one larger read of the socket."""
        read, at = self._read, self._at
        if at < len(read):
            self._at = at + bufsize
            return bytes(read[at : at + bufsize])
        data: bytes = self._paho_recv(max(bufsize, self.READ_CHUNK))  # raises as paho's would
        if len(data) <= bufsize:
            return data
        self._read, self._at = bytearray(data), bufsize
        return data[:bufsize]

    def loop_read(self, max_packets: int = 1) -> Any:
        """paho's ``loop_read``, reading until the socket has nothing more (or ``READ_PACKETS``
        packets and nothing left over here), not one packet per publication in flight.

        Whole packets are cut from the bytes read here (:meth:`_next_packet`), not read by
        paho's ``_packet_read`` in three or more pieces each; a QoS 0 or 1 PUBLISH and a PUBACK
        of ours go straight to :attr:`on_message` and :attr:`on_puback`, and every other packet
        to paho's own handler, as paho would hand it over.
        """
        inner = self.inner
        packets = 0
        while True:
            if inner._sock is None:
                return paho.MQTT_ERR_NO_CONN
            # paho part-way through a packet (read before the link came): its own read finishes it
            rc = inner._packet_read() if inner._in_packet["command"] else self._next_packet()
            if rc > 0:
                return inner._loop_rc_handle(rc)
            if rc == paho.MQTT_ERR_AGAIN:  # the socket has nothing more (the start of a packet
                return paho.MQTT_ERR_SUCCESS  # may wait here for the rest of it)
            packets += 1
            if packets >= self.READ_PACKETS and self._at >= len(self._read):
                return paho.MQTT_ERR_SUCCESS

    def _next_packet(self) -> Any:
        """Handle the next whole packet, reading the socket when less than one is here; the
        result code as paho's ``_packet_read`` gives it (``MQTT_ERR_AGAIN``: none whole yet)."""
        inner = self.inner
        read = self._read
        while True:
            at = self._at
            end = len(read)
            if at < end:
                length, shift, pos = 0, 0, at + 1
                while pos < end:
                    byte = read[pos]
                    pos += 1
                    length |= (byte & 0x7F) << shift
                    shift += 7
                    if not byte & 0x80:
                        break
                    if shift >= 28 and pos < end:  # a fifth length byte: paho refuses it too
                        return paho.MQTT_ERR_PROTOCOL
                else:
                    length = -1  # the remaining length is not all here yet
                if 0 <= length <= end - pos:
                    break
            try:
                data: bytes = self._paho_recv(self.READ_CHUNK)
            except BlockingIOError:
                return paho.MQTT_ERR_AGAIN
            except OSError:  # as paho's read: the connection is lost (paho logs it)
                return paho.MQTT_ERR_CONN_LOST
            if not data:
                return paho.MQTT_ERR_CONN_LOST
            if at:
                del read[:at]  # (in place, and cheap: a bytearray drops its head without a copy)
                self._at = 0
            read += data  # a large packet gathers here in linear time, as in paho's own read
            with inner._msgtime_mutex:
                inner._last_bytes_received = paho.time_func()
        header = read[at]
        stop = pos + length
        if stop < len(read):
            self._at = stop
        else:  # all handled: a fresh buffer, so that a large packet's memory goes with it
            self._read, self._at = bytearray(), 0
        kind = header & 0xF0
        if kind == paho.PUBLISH and self._deliver(header, read, pos, stop):
            return paho.MQTT_ERR_SUCCESS
        on_puback = self.on_puback
        if (
            kind == paho.PUBACK
            and length >= 2
            and on_puback is not None
            and on_puback((read[pos] << 8) | read[pos + 1])
        ):
            return paho.MQTT_ERR_SUCCESS
        # Any other packet (a PUBACK not of ours too: asked again there, it is not ours again):
        # paho's handler, given it as paho's _packet_read would give it.
        inner._in_packet = {
            "command": header,
            "have_remaining": 1,
            "remaining_count": list(read[at + 1 : pos]),
            "remaining_mult": 1 << (7 * (pos - at - 1)),
            "remaining_length": length,
            "packet": bytearray(read[pos:stop]),
            "to_process": 0,
            "pos": 0,
        }
        try:
            rc = inner._packet_handle()
        except MalformedPacket:
            rc = paho.MQTT_ERR_PROTOCOL
        inner._in_packet = {
            "command": 0,
            "have_remaining": 0,
            "remaining_count": [],
            "remaining_mult": 1,
            "remaining_length": 0,
            "packet": bytearray(b""),
            "to_process": 0,
            "pos": 0,
        }
        return rc

    def _deliver(self, header: int, data: bytes | bytearray, start: int, stop: int) -> bool:
        """An inbound PUBLISH at QoS 0 or 1 (its body: ``data[start:stop]``) to :attr:`on_message`,
        without paho's message object; ``False``: paho's handler takes it (QoS 2, a malformed
        packet, or no one listening here). The acknowledgement is manual (:class:`Delivery`)."""
        on_message = self.on_message
        qos = (header & 0x06) >> 1
        if on_message is None or qos > 1 or stop - start < 2 or not self.inner._manual_ack:
            return False
        end = start + 2 + ((data[start] << 8) | data[start + 1])
        begin = end + 2 if qos else end
        if end == start + 2 or stop < begin:
            return False  # an empty topic or a cut packet: paho says malformed
        try:
            topic = data[start + 2 : end].decode("utf-8")
        except UnicodeDecodeError:  # not a topic of ours: acknowledged and ignored
            topic = ""
        mid = (data[end] << 8) | data[end + 1] if qos else 0
        on_message(topic, bytes(memoryview(data)[begin:stop]), bool(header & 0x01), qos, mid)
        return True

    def publish(self, topic: str, payload: bytes, retain: bool) -> int:
        """Queue a QoS 1 PUBLISH; return its message id (:attr:`on_puback` gets it back).

        Raises:
            aiomqtt.MqttCodeError: Not connected.
            ValueError: A topic MQTT does not allow in a publication, or a packet too large.
        """
        inner = self.inner
        if inner._sock is None:
            raise aiomqtt.MqttCodeError(paho.MQTT_ERR_NO_CONN, "Could not publish message")
        name = topic.encode("utf-8")
        if not name or len(name) > 65_535 or b"+" in name or b"#" in name:
            raise ValueError(f"not a topic to publish to: {topic!r}")
        mid = inner._mid_generate()
        length = 4 + len(name) + len(payload)  # topic length, topic, message id, payload
        if length > 268_435_455:
            raise ValueError("Packet too large")
        head = bytearray((0x33 if retain else 0x32,))  # PUBLISH, QoS 1, retain flag
        while True:
            byte, length = length & 0x7F, length >> 7
            head.append(byte | 0x80 if length else byte)
            if not length:
                break
        packet = b"".join((head, _U16.pack(len(name)), name, _U16.pack(mid), payload))
        inner._packet_queue(paho.PUBLISH, packet, mid, 1)
        return mid

    def ack(self, mids: Sequence[int]) -> None:
        """Queue the PUBACKs of QoS 1 deliveries, as one write."""
        if mids:
            packet = b"".join(_PUBACK.pack(0x40, 2, mid) for mid in mids)
            self.inner._packet_queue(paho.PUBACK, packet, 0, 1)

    def _handle_pubackcomp(self, cmd: Any) -> Any:
        if cmd == "PUBACK" and self.on_puback is not None:
            packet = self.inner._in_packet["packet"]
            if len(packet) >= 2 and self.on_puback((packet[0] << 8) | packet[1]):
                return paho.MQTT_ERR_SUCCESS
        return self._paho_pubackcomp(cmd)

    def _packet_write(self) -> Any:
        """paho's own write, after joining the waiting packets into chunks (see the class)."""
        waiting: collections.deque[Any] = self.inner._out_packet
        if len(waiting) > 1:
            joined: collections.deque[Any] = collections.deque()
            run: list[Any] = []
            size = 0
            for packet in waiting:
                command = packet["command"] & 0xF0
                if command == paho.DISCONNECT or (command == paho.PUBLISH and not packet["qos"]):
                    # paho acts on these once written (on_publish, closing): left as they are
                    _join(joined, run, size)
                    run, size = [], 0
                    joined.append(packet)
                    continue
                run.append(packet)
                size += packet["to_process"]
                if size >= self.WRITE_CHUNK:
                    _join(joined, run, size)
                    run, size = [], 0
            _join(joined, run, size)
            waiting.clear()
            waiting.extend(joined)
        return self._paho_packet_write()


_PUBACK = struct.Struct("!BBH")
_U16 = struct.Struct("!H")


def _join(joined: collections.deque[Any], run: list[Any], size: int) -> None:
    """Append ``run`` (whole or partly written packets, in order) to ``joined`` as one packet."""
    if len(run) == 1:
        joined.append(run[0])
    elif run:
        data = b"".join(p["packet"][p["pos"] :] if p["pos"] else p["packet"] for p in run)
        joined.append(
            {
                "command": paho.PUBACK,  # written like any packet paho does nothing after
                "mid": 0,
                "qos": 1,
                "pos": 0,
                "to_process": size,
                "packet": data,
                "info": None,
            }
        )


def _health_document(payload: Any) -> dict[str, Any] | None:
    if isinstance(payload, str):
        payload = payload.encode("utf-8")
    if not isinstance(payload, bytes | bytearray):
        return None
    try:
        document = json.loads(payload)
    except ValueError:
        return None
    return document if isinstance(document, dict) else None


async def probe_health(
    broker: BrokerSettings, health_topic: str, client_id: str, *, wait: float = PROBE_SECONDS
) -> dict[str, Any] | None:
    """The retained health message on ``health_topic``, read with a throwaway client id.

    Args:
        broker: Where and how to connect.
        health_topic: The instance's health topic.
        client_id: The daemon's client id (the probe uses it with a unique suffix).
        wait: Seconds to wait after the subscription is confirmed.

    Returns:
        The health document, or ``None`` when there is none (or it is not JSON).

    Raises:
        aiomqtt.MqttError: The broker cannot be reached.
    """
    probe = Bus(
        broker,
        client_id=f"{client_id}.probe.{uuid.uuid4().hex[:8]}"[:64],
        subscriptions=(),
        inbox=asyncio.Queue(1),
        outbox=Outbox(1),
        health_topic=health_topic,
        health=dict,
    )
    client = probe._client(clean_session=True, will=False)
    async with client:
        await client.subscribe(health_topic, qos=1)
        try:
            async with asyncio.timeout(wait):
                async for message in client.messages:
                    if message.retain:
                        return _health_document(message.payload)
        except TimeoutError:
            return None
    return None


def _ack_each(inner: paho.Client, mids: Sequence[int], qos: int = 1) -> None:
    """Acknowledge through paho's public ``ack`` (when :class:`_Link` cannot be used)."""
    # After a reconnect this is a different connection: the broker re-sends the message
    # (redelivery), so an ack on the old client is moot and paho just returns an error code.
    for mid in mids:
        inner.ack(mid, qos)


def _acker(client: aiomqtt.Client, qos: int) -> _Acks:
    """The acknowledger of deliveries at QoS ``qos`` above 1 (subscriptions at QoS 1 get none:
    a broker delivers at the lower of the two QoS)."""
    return functools.partial(_ack_each, client._client, qos=qos)

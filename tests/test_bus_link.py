"""The bus's lean path through paho: the bytes it writes and reads are MQTT 3.1.1's, as paho's own.

No broker: a paho client whose socket is a stand-in that takes a few bytes per write and hands
out what a broker would send in arbitrary pieces. The reference for every packet is paho's own
encoder (``Client.publish``, ``Client.ack``) and the MQTT 3.1.1 specification (OASIS, sections
3.3 PUBLISH and 3.4 PUBACK); the daemon's tests against Mosquitto run the same path end to end.
"""

from __future__ import annotations

import struct
from typing import Any

import paho.mqtt.client as paho
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from tracker.shell import bus
from tracker.shell.bus import Delivery, _Link, acknowledge

MESSAGES = [
    ("desk/status/O-1", b'{"type":"status","filled":10}', True),
    ("desk/alerts/O-1", b'{"type":"alert"}', False),
    ("desk/targets/O-2", b"", True),  # a cleared retained target: an empty payload
    ("desk/status/\u00e9", b"x" * 200, False),  # a non-ASCII topic and a two-byte length
    ("desk/errors", b"y" * 20_000, False),  # a three-byte remaining length
]


class Socket:
    """A non-blocking socket stand-in: ``send`` takes at most ``step`` bytes and, when
    ``refuse``, refuses every other call (a full socket buffer); ``recv`` hands out
    ``incoming`` in pieces of ``piece`` bytes, with nothing to read every ``pause``-th time (the
    rest has not come yet); once it had nothing, it must not be read before :meth:`readable`."""

    def __init__(
        self,
        step: int = 7,
        incoming: bytes = b"",
        piece: int = 5,
        refuse: bool = True,
        pause: int = 0,
    ) -> None:
        self.sent = bytearray()
        self.step = step
        self.refuse = refuse
        self.calls = 0
        self.incoming = incoming
        self.piece = piece
        self.pause = pause
        self.reads = 0
        self.blocked = False  # until the event loop says it is readable again (readable())

    def readable(self) -> None:
        self.blocked = False

    def send(self, data: bytes) -> int:
        self.calls += 1
        if self.refuse and self.calls % 2 == 0:
            raise BlockingIOError
        taken = bytes(data[: self.step])
        self.sent += taken
        return len(taken)

    def recv(self, size: int) -> bytes:
        assert not self.blocked, "read again after the socket said it had nothing (a busy loop)"
        self.reads += 1
        if not self.incoming or (self.pause and self.reads % self.pause == 0):
            self.blocked = True
            raise BlockingIOError
        taken = self.incoming[: min(size, self.piece)]
        self.incoming = self.incoming[len(taken) :]
        return taken

    def fileno(self) -> int:
        return -1

    def close(self) -> None:
        pass


@pytest.fixture(autouse=True)
def _detached(monkeypatch: pytest.MonkeyPatch) -> Any:
    """Every link made in a test gives its client back at the end (as the bus does when a
    connection ends), so that no client waits for a later garbage collection to be finalized."""
    made: list[_Link] = []
    attach = _Link.attach.__func__  # type: ignore[attr-defined]

    def tracked(cls: type[_Link], inner: paho.Client) -> _Link | None:
        link = attach(cls, inner)
        if link is not None:
            made.append(link)
        return link

    monkeypatch.setattr(_Link, "attach", classmethod(tracked))
    yield
    for link in made:
        link.detach()


def _client(sock: Socket) -> paho.Client:
    client = paho.Client(paho.CallbackAPIVersion.VERSION2, client_id="link-test")
    client.manual_ack_set(True)
    client._sock = sock  # type: ignore[assignment]
    return client


def _drain(client: paho.Client) -> None:
    for _ in range(100_000):
        if not client._out_packet:
            return
        client.loop_write()
    raise AssertionError("the packets were never all written")


def _paho_bytes(build: Any) -> bytes:
    """What paho itself writes for the same calls (its socket takes everything at once)."""
    sock = Socket(step=1 << 30, refuse=False)
    client = _client(sock)
    client.max_inflight_messages_set(0)
    build(client)
    _drain(client)
    return bytes(sock.sent)


def test_publications_and_acks_are_paho_s_own_bytes_in_order() -> None:
    """PUBLISH (QoS 1, retain flag) and PUBACK packets, written through a socket that takes 7
    bytes at a time and refuses every other write, arrive whole and in the order queued: the
    same bytes paho's publish and ack write, message ids included."""
    sock = Socket()
    client = _client(sock)
    link = _Link.attach(client)
    assert link is not None
    mids = [link.publish(topic, payload, retain) for topic, payload, retain in MESSAGES]
    link.ack([7, 300, 65_535])
    _drain(client)

    def paho_does(other: paho.Client) -> None:
        for topic, payload, retain in MESSAGES:
            other.publish(topic, payload, qos=1, retain=retain)
        for mid in (7, 300, 65_535):
            other.ack(mid, 1)

    assert [1, 2, 3, 4, 5] == mids
    assert _paho_bytes(paho_does) == bytes(sock.sent)


def test_waiting_packets_leave_in_one_write() -> None:
    """Packets queued until the event loop finds the socket writable (as under aiomqtt, which
    registers for writability) go out in one send, not one each, and whole."""
    sock = Socket(step=1 << 20, refuse=False)
    client = _client(sock)
    client.on_socket_register_write = lambda *_: None  # written when the loop says so
    link = _Link.attach(client)
    assert link is not None
    for topic, payload, retain in MESSAGES[:3]:
        link.publish(topic, payload, retain)
    link.ack([1, 2])
    assert 0 == sock.calls
    _drain(client)

    def paho_does(other: paho.Client) -> None:
        for topic, payload, retain in MESSAGES[:3]:
            other.publish(topic, payload, qos=1, retain=retain)
        for mid in (1, 2):
            other.ack(mid, 1)

    assert 1 == sock.calls
    assert _paho_bytes(paho_does) == bytes(sock.sent)


def _publish_packet(topic: str, payload: bytes, qos: int, mid: int, retain: bool) -> bytes:
    """A PUBLISH as a broker sends it (MQTT 3.1.1, section 3.3)."""
    name = topic.encode("utf-8")
    body = struct.pack("!H", len(name)) + name + (struct.pack("!H", mid) if qos else b"") + payload
    length, encoded = len(body), bytearray()
    while True:
        byte, length = length % 128, length // 128
        encoded.append(byte | 0x80 if length else byte)
        if not length:
            break
    return bytes([0x30 | qos << 1 | int(retain)]) + bytes(encoded) + body


@pytest.mark.parametrize("piece", [1, 5, 4096], ids=["byte-by-byte", "small-pieces", "whole"])
def test_inbound_publications_and_pubacks_are_read_in_order(piece: int) -> None:
    """PUBLISH packets (QoS 0 and 1, retained or not, empty and long payloads) and PUBACKs, read
    in pieces of any size, reach the reader and the writer in arrival order, each once."""
    stream = (
        _publish_packet("desk/fills/O-1", b'{"n":1}', 1, 11, False)
        + b"\x40\x02\x00\x05"  # PUBACK of message id 5
        + _publish_packet("desk/bins/X", b"", 0, 0, True)
        + _publish_packet("desk/fills/O-2", b"z" * 300, 1, 65_535, False)
        + b"\x40\x02\x01\x00"  # PUBACK of message id 256
    )
    sock = Socket(incoming=stream, piece=piece)
    client = _client(sock)
    link = _Link.attach(client)
    assert link is not None
    got: list[tuple[Any, ...]] = []
    link.on_message = lambda *message: got.append(("publish", *message))
    link.on_puback = lambda mid: got.append(("puback", mid)) is None
    for _ in range(len(stream)):  # as the event loop does while the socket is readable
        sock.readable()
        assert paho.MQTT_ERR_SUCCESS == client.loop_read()
        if not sock.incoming:
            break
    assert [
        ("publish", "desk/fills/O-1", b'{"n":1}', False, 1, 11),
        ("puback", 5),
        ("publish", "desk/bins/X", b"", True, 0, 0),
        ("publish", "desk/fills/O-2", b"z" * 300, False, 1, 65_535),
        ("puback", 256),
    ] == got


def test_acknowledge_writes_each_delivery_once_grouped_by_connection() -> None:
    """acknowledge() hands each connection the message ids of its deliveries in order, in one
    call per run of the same connection; a delivery acknowledged once is not acknowledged again,
    and a QoS 0 delivery has nothing to acknowledge."""
    calls: list[tuple[str, list[int]]] = []

    def first(mids: Any) -> None:
        calls.append(("first", list(mids)))

    def second(mids: Any) -> None:
        calls.append(("second", list(mids)))

    deliveries = [
        Delivery("t", b"", qos=1, _acks=first, _mid=1),
        Delivery("t", b"", qos=1, _acks=first, _mid=2),
        Delivery("t", b"", qos=0),
        Delivery("t", b"", qos=1, _acks=second, _mid=1),
        Delivery("t", b"", qos=1, _acks=first, _mid=3),
    ]
    acknowledge(deliveries)
    acknowledge(deliveries)
    deliveries[0].ack()
    assert [("first", [1, 2]), ("second", [1]), ("first", [3])] == calls


def test_mqtt_5_is_left_to_paho() -> None:
    """The lean path speaks MQTT 3.1 and 3.1.1 only: for MQTT 5 the bus uses paho's own."""
    client = paho.Client(paho.CallbackAPIVersion.VERSION2, protocol=paho.MQTTv5)
    assert _Link.attach(client) is None


def test_a_paho_release_outside_the_tested_series_is_left_to_paho(
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    """A paho the lean path was not tested with may change what its internals mean: paho's own
    publish and ack are used."""
    monkeypatch.setattr(bus, "paho_version", lambda: "3.0.0")
    client = paho.Client(paho.CallbackAPIVersion.VERSION2, protocol=paho.MQTTv311)
    assert _Link.attach(client) is None


PACKETS = st.one_of(
    st.tuples(
        st.just("publish"),
        st.text(alphabet="abcé/_-0123", min_size=1, max_size=20),
        st.binary(max_size=300) | st.just(b"w" * 20_000),  # up to a three-byte length
        st.booleans(),
        st.sampled_from([0, 1]),
        st.integers(1, 65_535),
    ),
    st.tuples(st.just("puback"), st.integers(1, 65_535)),
    st.tuples(st.just("pingresp")),
)


def _packet(packet: tuple[Any, ...]) -> bytes:
    if packet[0] == "publish":
        _, topic, payload, retain, qos, mid = packet
        return _publish_packet(topic, payload, qos, mid if qos else 0, retain)
    if packet[0] == "puback":
        return struct.pack("!BBH", 0x40, 2, packet[1])
    return b"\xd0\x00"  # PINGRESP (MQTT 3.1.1, section 3.13)


@settings(max_examples=300, deadline=None)
@given(
    st.lists(PACKETS, max_size=12),
    st.integers(1, 600),
    st.integers(1, 5),
    st.sampled_from([0, 2, 3, 7]),
)
def test_packets_cut_from_any_pieces_reach_their_handlers_once_in_order(
    packets: list[tuple[Any, ...]], piece: int, calls: int, pause: int
) -> None:
    """Whatever pieces the bytes come in, with pauses anywhere (in the middle of a packet too),
    and however many reads the loop makes: every PUBLISH
    reaches the reader and every PUBACK of ours the writer, once, in order; a PUBACK not of
    ours and a PINGRESP go to paho (which clears its ping timer for the PINGRESP)."""
    stream = b"".join(_packet(packet) for packet in packets)
    sock = Socket(incoming=stream, piece=piece, pause=pause)
    client = _client(sock)
    link = _Link.attach(client)
    assert link is not None
    got: list[tuple[Any, ...]] = []
    ours = {mid for packet in packets if packet[0] == "puback" for mid in packet[1:] if mid % 3}
    link.on_message = lambda *message: got.append(("publish", *message))
    link.on_puback = lambda mid: mid in ours and got.append(("puback", mid)) is None
    client._ping_t = 12.5
    for _ in range(2 * len(stream) + 2):  # as the event loop does while the socket is readable
        link.READ_PACKETS = calls  # a burst read over several turns of the loop, or at once
        sock.readable()
        assert paho.MQTT_ERR_SUCCESS == client.loop_read()
        if not sock.incoming and link._at >= len(link._read):
            break
    expected = [
        ("publish", *packet[1:5], packet[5] if packet[4] else 0)
        if packet[0] == "publish"
        else ("puback", packet[1])
        for packet in packets
        if packet[0] == "publish" or (packet[0] == "puback" and packet[1] in ours)
    ]
    assert expected == got
    assert (0 if ("pingresp",) in packets else 12.5) == client._ping_t


def test_a_fifth_length_byte_is_refused_as_paho_refuses_it() -> None:
    """A remaining length of five bytes is a protocol error (MQTT 3.1.1, section 2.2.3: at most
    four), for the link as for paho's own read."""
    stream = b"\x30\xff\xff\xff\xff\x01" + b"x" * 10

    def read(attach: bool) -> int:
        client = _client(Socket(incoming=stream, piece=3))
        if attach:
            assert _Link.attach(client) is not None
        rc = paho.MQTT_ERR_SUCCESS
        for _ in range(10):
            client._sock.readable()  # type: ignore[union-attr]
            rc = client.loop_read()
            if rc != paho.MQTT_ERR_SUCCESS:
                break
        return int(rc)

    assert int(paho.MQTT_ERR_PROTOCOL) == read(attach=False) == read(attach=True)


def test_a_packet_paho_began_reading_is_finished_by_paho_s_read() -> None:
    """A packet whose first bytes paho read before the link came is read to its end by paho's
    own read, and the next ones by the link's: each reaches the reader once, in order."""
    first = _publish_packet("desk/fills/O-1", b'{"n":1}', 1, 11, False)
    second = _publish_packet("desk/fills/O-2", b'{"n":2}', 1, 12, False)
    sock = Socket(incoming=first[:3], piece=1)
    client = _client(sock)
    for _ in range(3):
        sock.readable()
        client.loop_read()  # paho has the header and part of the length now
    assert client._in_packet["command"]
    link = _Link.attach(client)
    assert link is not None
    got: list[tuple[Any, ...]] = []
    link.on_message = lambda *message: got.append(message)
    sock.incoming = first[3:] + second
    for _ in range(5):
        sock.readable()
        client.loop_read()
    expected = [
        ("desk/fills/O-1", b'{"n":1}', False, 1, 11),
        ("desk/fills/O-2", b'{"n":2}', False, 1, 12),
    ]
    assert expected == got

"""The MQTT link's chunked reader hands paho every packet whole, however the byte stream is cut into reads."""

from __future__ import annotations

import bisect
import gc
import random
import struct
import threading

import paho.mqtt.client as mqtt
import pytest
from paho.mqtt.enums import CallbackAPIVersion
from paho.mqtt.matcher import MQTTMatcher

from edgevib.daemon.config import MqttConnection
from edgevib.daemon.mqtt_client import READ_CHUNK, AcyclicMatcher, MqttLink, _ChunkedReader, make_client


def _remaining_length(n: int) -> bytes:
    """MQTT 3.1.1 §2.2.3: seven bits a byte, least significant first, the top bit set while more bytes follow."""
    out = bytearray()
    while True:
        n, digit = n >> 7, n & 0x7F
        out.append(digit | (0x80 if n else 0))
        if not n:
            return bytes(out)


def _pub(topic: bytes, payload: bytes, *, qos: int = 0, mid: int = 1, v5: bool = False, props: bytes = b"",
         flags: int = 0, length: bytes | None = None) -> bytes:
    """A PUBLISH (MQTT 3.1.1 §3.3, MQTT 5.0 §3.3): first byte 0x30 | QoS << 1 | DUP/RETAIN ``flags`` (§3.3.1), the
    topic as a two-byte length and its bytes (§1.5.3), the packet identifier at QoS 1 and 2 (§3.3.2.2), in MQTT 5
    the property length and properties (§3.3.2.3), then the payload.  ``length`` replaces the remaining length's
    encoding (for non-minimal ones)."""
    body = struct.pack(">H", len(topic)) + topic
    if qos:
        body += struct.pack(">H", mid)
    if v5:
        body += _remaining_length(len(props)) + props
    body += payload
    return bytes((0x30 | qos << 1 | flags,)) + (length or _remaining_length(len(body))) + body


PINGRESP = b"\xd0\x00"  # MQTT 3.1.1 §3.13: a packet with no remaining bytes


def _messages() -> list[tuple[str, bytes]]:
    # with the 14 bytes of a topic: remaining lengths on either side of the variable-length integer's 1- to 2-byte
    # (127 / 128) and 2- to 3-byte (16 383 / 16 384) steps, and payloads longer than a read chunk
    sizes = [0, 1, 113, 114, 16_369, 16_370, 70_000, READ_CHUNK + 5]
    out = [(f"fwb/s{i}/block", bytes((i * 7 + k) % 251 for k in range(n))) for i, n in enumerate(sizes)]
    assert [2 + len(t) + len(p) for t, p in out[:6]] == [14, 15, 127, 128, 16_383, 16_384]  # remaining lengths
    return out


@pytest.mark.parametrize("step", [1, 2, 3, 5, 64, 4096, READ_CHUNK])
def test_every_packet_arrives_whole_and_in_order(step: int) -> None:
    expected = _messages()
    if step < 64:  # a few bytes at a time: the smaller packets suffice to cut every header at every place
        expected = expected[:6]
    stream = b"".join(_pub(t.encode(), p) + PINGRESP for t, p in expected)
    got: list[tuple[str, bytes]] = []
    conn = MqttConnection.model_validate({"url": "mqtt://127.0.0.1:1", "client_id": "edgevib-reader-test"})
    link = MqttLink(conn, role="test", on_message=lambda m: got.append((m.topic, bytes(m.payload))))
    client = mqtt.Client(CallbackAPIVersion.VERSION2, client_id="edgevib-reader-test")
    client.on_message = link._cb_message
    sock = _Cuts(stream, list(range(step, len(stream), step)))
    reader = _ChunkedReader(sock)
    client._sock = reader  # as MqttLink wraps paho's socket when it opens
    link._paho, link._fd = client, sock.fileno()
    for _ in range(len(stream) + 10):  # one call per readiness of the socket
        link._on_readable()
        if sock.pos == len(stream) and not reader.ready():
            break
    assert got == expected  # each payload whole, in the order sent (MQTT 3.1.1 §4.6)


FILTERS = ["#", "+", "+/+", "fwb/#", "fwb/+/block", "fwb/s1/block", "fwb/s1/#", "fwb/+/+", "+/s1/block", "$SYS/#",
           "$SYS/+", "+/+/+/+", "fwb", "fwb/s1/block/#", "", "/#", "+/#"]
TOPICS = ["fwb/s1/block", "fwb/s2/block", "fwb", "fwb/s1", "fwb/s1/block/extra", "$SYS/broker/load", "$SYS",
          "/leading", "a/b/c/d", "fwb//block", ""]


@pytest.mark.parametrize("n_filters", [0, 1, 3, len(FILTERS)])
def test_acyclic_matcher_matches_as_pahos_own_matcher(n_filters: int) -> None:
    # reference: paho's MQTTMatcher.iter_match (and with it the wildcard rules of MQTT 3.1.1 §4.7): the same
    # callbacks, in the same order, for every topic, whatever filters are registered
    ours, pahos = AcyclicMatcher(), MQTTMatcher()
    for k, f in enumerate(FILTERS[:n_filters]):
        ours[f] = pahos[f] = f"callback-{k}"
    for topic in TOPICS:
        assert list(ours.iter_match(topic)) == list(pahos.iter_match(topic)), topic


def test_received_messages_leave_no_cyclic_garbage() -> None:
    # a message that leaves a reference cycle behind makes the cyclic collector run (and, in time, walk every
    # object of the daemon): 40 messages through the link and a client made as the daemon makes it find nothing
    # for gc.collect (paho's own matcher leaves six objects per message)
    messages = [(f"fwb/s{i}/block", bytes(100)) for i in range(40)]
    stream = b"".join(_pub(t.encode(), p) for t, p in messages)
    got: list[str] = []
    conn = MqttConnection.model_validate({"url": "mqtt://127.0.0.1:1", "client_id": "edgevib-reader-test"})
    link = MqttLink(conn, role="test", on_message=lambda m: got.append(m.topic))
    client = make_client(conn)
    client.on_message = link._cb_message
    sock = _Cuts(stream, list(range(READ_CHUNK, len(stream), READ_CHUNK)))
    reader = _ChunkedReader(sock)
    client._sock = reader
    link._paho, link._fd = client, sock.fileno()
    gc.collect()
    enabled = gc.isenabled()
    gc.disable()
    try:
        for _ in range(10):
            link._on_readable()
            if sock.pos == len(stream) and not reader.ready():
                break
        assert got == [t for t, _ in messages]
        assert gc.collect() == 0
    finally:
        if enabled:
            gc.enable()


# ---------------------------------------------------------------------------------------------------------------
# The link's own cut of QoS 0 PUBLISH packets (MqttLink._take_publishes), against paho's parsing of the same stream.
# Reference: paho-mqtt 2.x itself — a plain paho client reading the same bytes from its own socket
# (Client._packet_read, decode_publish, _handle_publish).  The packets are written from MQTT 3.1.1 §2.2 (fixed header,
# remaining length §2.2.3), §3.3 (PUBLISH), §3.9 (SUBACK), §3.13 (PINGRESP) and MQTT 5.0 §3.3 (PUBLISH, its
# property length §3.3.2.3), §3.9 (SUBACK), §2.2.2 (properties).


def _suback(mid: int, v5: bool) -> bytes:
    """SUBACK granting QoS 0 (MQTT 3.1.1 §3.9; MQTT 5.0 §3.9 adds a property length before the codes)."""
    body = struct.pack(">H", mid) + (b"\x00" if v5 else b"") + b"\x00"
    return b"\x90" + _remaining_length(len(body)) + body


def _stream(v5: bool) -> list[tuple[bytes, bool]]:
    """(packet, whether the link may cut it itself when it is whole in a chunk)."""
    t = b"fwb/quarry-lane/P-101/block"
    out = [(_pub(t, b"", v5=v5), True),  # an empty payload
           (_pub(t, b"\x01", v5=v5), True),
           (_pub(b"fwb/s2/block", bytes(range(200)), v5=v5), True),  # remaining length in 2 bytes
           (_pub(b"fwb/s3/block", bytes(20_000), v5=v5), True),  # in 3 bytes
           (_pub("fwb/Pumpe-Ü1/block".encode(), b"umlaut", v5=v5), True),  # UTF-8 beyond ASCII
           (_pub(t, b"retained", v5=v5, flags=0x01), True),  # RETAIN (§3.3.1.3)
           (_pub(t, b"dup", v5=v5, flags=0x08), True),  # DUP on QoS 0: against §3.3.1.1, taken by paho all the same
           (PINGRESP, False),
           (_suback(3, v5), False),
           (_pub(t, b"qos1", v5=v5, qos=1, mid=7), False),  # PUBACK sent by paho
           (_pub(t, b"qos2", v5=v5, qos=2, mid=8), False),  # PUBREC sent by paho, held until PUBREL
           (_pub(b"fwb/\xff\xfe/block", b"bad topic", v5=v5), False),  # not UTF-8: paho's message raises on .topic
           (_pub(t, b"after", v5=v5), True),
           (_pub(b"fwb/big/block", bytes(READ_CHUNK + 100), v5=v5), False),  # longer than a chunk
           (_pub(b"fwb/huge/block", b"\x07" * 2_100_000, v5=v5), False),  # remaining length in 4 bytes
           (_pub(t, b"last", v5=v5), True)]
    if v5:
        out += [(_pub(t, b"with properties", v5=True, props=b"\x01\x01"), False),  # Payload Format Indicator
                (_pub(b"", b"by alias", v5=True, props=b"\x23\x00\x01"), False),  # Topic Alias, empty topic
                (_pub(t, b"again", v5=True), True)]
    else:  # a non-minimal remaining length, 4 bytes for 14 (§2.2.3's decoding gives 14, and so does paho's)
        body_len = len(_pub(t, b"x")) - 2
        out.append((_pub(t, b"x", length=bytes((0x80 | body_len, 0x80, 0x80, 0x00))), True))
    return out


class _Cuts:
    """A non-blocking socket serving a prepared stream, every read ending at the next cut (cuts every ``step`` bytes:
    reads of at most ``step`` bytes) (``recv`` for paho
    reading its socket itself, ``recv_into`` for the link's reader); what is sent is kept."""

    def __init__(self, data: bytes, cuts: list[int]) -> None:
        self.data, self.pos = data, 0
        self.bounds = sorted({c for c in cuts if 0 < c < len(data)} | {len(data)})
        self.reads: list[tuple[int, int]] = []
        self.sent = bytearray()

    def _take(self, n: int) -> bytes:
        if self.pos >= len(self.data):
            raise BlockingIOError
        stop = min(self.bounds[bisect.bisect_right(self.bounds, self.pos)], self.pos + n)
        self.reads.append((self.pos, stop))
        out, self.pos = self.data[self.pos:stop], stop
        return out

    def recv(self, n: int) -> bytes:
        return self._take(n)

    def recv_into(self, buf: bytearray) -> int:
        data = self._take(len(buf))
        buf[:len(data)] = data
        return len(data)

    def send(self, data: bytes) -> int:
        self.sent += data
        return len(data)

    def fileno(self) -> int:
        return 1000

    def setblocking(self, _flag: bool) -> None: ...
    def close(self) -> None: ...


Events = list[tuple[object, ...]]


def _client(v5: bool) -> mqtt.Client:
    return mqtt.Client(CallbackAPIVersion.VERSION2, client_id="edgevib-fast-test",
                       protocol=mqtt.MQTTv5 if v5 else mqtt.MQTTv311)


def _state(client: mqtt.Client, sock: _Cuts) -> tuple[object, ...]:
    """What paho keeps of the stream: its incoming-packet state, the QoS 2 messages held, what it sent back
    (PUBACK, PUBREC), whether it closed the connection."""
    return (dict(client._in_packet), sorted(client._in_messages), bytes(sock.sent), client._sock is None,
            client._ping_t)


def _through_paho(stream: bytes, cuts: list[int], v5: bool) -> tuple[Events, tuple[object, ...]]:
    """The reference: plain paho reading the stream from its own socket; each message as (topic, payload, qos), a
    topic that is not UTF-8 as paho's error for it."""
    events: list[tuple[object, ...]] = []

    def on_message(_c: mqtt.Client, _u: object, msg: mqtt.MQTTMessage) -> None:
        try:
            events.append((msg.topic, bytes(msg.payload), msg.qos))
        except UnicodeDecodeError as exc:
            events.append(("not UTF-8", repr(exc)))

    client = _client(v5)
    client.on_message = on_message
    sock = _Cuts(stream, cuts)
    client._sock = sock
    client._last_bytes_received = 0.0
    for _ in range(len(stream) + 10):
        if client._sock is None or sock.pos == len(stream):
            break
        client.loop_read()
    assert client._last_bytes_received > 0.0  # paho's keep-alive clock moved with what it received
    return events, _state(client, sock)


def _through_link(stream: bytes, cuts: list[int], v5: bool, monkeypatch: pytest.MonkeyPatch,
                  raise_on: bytes | None = None) -> tuple[Events, tuple[object, ...], MqttLink, _Cuts]:
    """The same stream through a link with ``on_payload``, wired as MqttLink.start wires its client; each message
    with the QoS paho gave it (0 when the link cut it itself), a failed callback as the error it reported."""
    events: list[tuple[object, ...]] = []
    paho_qos: list[int] = []
    conn = MqttConnection.model_validate({"url": "mqtt://127.0.0.1:1", "client_id": "edgevib-fast-test",
                                          "protocol": "5" if v5 else "3.1.1"})

    def on_payload(topic: str, payload: bytes) -> None:
        if raise_on is not None and payload == raise_on:
            raise RuntimeError("a handler's bug")
        events.append((topic, payload, paho_qos[-1] if paho_qos else 0))

    link = MqttLink(conn, role="test", on_payload=on_payload)
    client = _client(v5)

    def via_paho(c: mqtt.Client, u: object, msg: mqtt.MQTTMessage) -> None:
        paho_qos.append(msg.qos)
        link._cb_message(c, u, msg)
        paho_qos.pop()

    client.on_message = via_paho
    client.on_socket_close = link._cb_socket_close
    monkeypatch.setattr(link, "_post", lambda fn, *args: events.append((fn.__name__, *args))
                        if fn.__name__ == "_callback_failed" else fn(*args))
    sock = _Cuts(stream, cuts)
    reader = _ChunkedReader(sock)
    client._sock = reader  # as MqttLink wraps paho's socket when it opens
    client._last_bytes_received = 0.0
    link._paho, link._fd, link._loop_thread = client, sock.fileno(), threading.get_ident()
    for _ in range(len(stream) + 10):  # one call per readiness of the socket
        link._on_readable()
        if link._fd is None or (sock.pos == len(stream) and not reader.ready()):
            break
    assert client._last_bytes_received > 0.0  # the keep-alive clock moved, also for the packets the link cut
    return events, _state(client, sock), link, sock


def _normalise(events: list[tuple[object, ...]]) -> list[tuple[object, ...]]:
    # the link reports a failed callback as ("_callback_failed", "on_message", repr(error)); paho's error the same
    return [("not UTF-8", e[2]) if e[0] == "_callback_failed" else e for e in events]


def _expected_fast(packets: list[tuple[bytes, bool]], reads: list[tuple[int, int]]) -> int:
    """The packets the link may cut that lay whole in one read of the socket (a chunk)."""
    n, pos = 0, 0
    for packet, fast in packets:
        start, stop = pos, pos + len(packet)
        pos = stop
        if fast and any(a <= start and stop <= b for a, b in reads):
            n += 1
    return n


@pytest.mark.parametrize("v5", [False, True])
@pytest.mark.parametrize("cuts", ["none", "random"])
def test_link_cuts_qos0_publishes_as_paho_reads_them(v5: bool, cuts: str, monkeypatch: pytest.MonkeyPatch) -> None:
    packets = _stream(v5)
    stream = b"".join(p for p, _ in packets)
    rng = random.Random(14)
    at = sorted(rng.sample(range(1, len(stream)), 60)) if cuts == "random" else []
    expected, paho_state = _through_paho(stream, at, v5)
    events, link_state, link, sock = _through_link(stream, at, v5, monkeypatch)
    assert _normalise(events) == expected  # the same messages, in the same order, with the same QoS
    assert link_state == paho_state  # and paho left in the same state, the same acknowledgements sent
    assert any(e[0] == "not UTF-8" for e in expected)  # (the stream does hold the undecodable topic)
    fast = _expected_fast(packets, sock.reads)
    assert fast >= 6 and link.fast_publishes == fast  # the link's own cut was taken, for exactly those packets


@pytest.mark.parametrize("v5", [False, True])
def test_a_packet_cut_at_every_place(v5: bool, monkeypatch: pytest.MonkeyPatch) -> None:
    packets = [(_pub(b"fwb/a/block", b"\x00\x01\x02", v5=v5), True), (PINGRESP, False),
               # a 2-byte remaining length; the payload a PUBLISH itself: cut before it, a chunk starts with it
               (_pub(b"fwb/b/block", _pub(b"fwb/inner", bytes(130), v5=v5), v5=v5), True),
               (_pub(b"fwb/c/block", b"", v5=v5), True)]
    stream = b"".join(p for p, _ in packets)
    for cut in range(1, len(stream)):
        expected, paho_state = _through_paho(stream, [cut], v5)
        events, link_state, link, sock = _through_link(stream, [cut], v5, monkeypatch)
        assert _normalise(events) == expected, cut
        assert link_state == paho_state, cut
        assert link.fast_publishes == _expected_fast(packets, sock.reads) >= 2, cut


MALFORMED = {
    "remaining length over 4 bytes": b"\x30\xff\xff\xff\xff\x01",  # §2.2.3: at most four bytes
    "5-byte remaining length of 5": b"\x30\x85\x80\x80\x80\x00\x00\x01axy",  # a whole packet but for that
    "topic past the packet": b"\x30\x04\x00\x09ab",  # a topic length of 9 in a 4-byte packet
    "packet shorter than a topic length": b"\x30\x01\x00",
    "empty topic (MQTT 3.1.1)": b"\x30\x02\x00\x00",  # §4.7.3: a topic is at least one character long
    "QoS 3": b"\x36\x07\x00\x01a\x00\x01zz",  # §3.3.1.2: QoS 3 is malformed
}


@pytest.mark.parametrize("case", sorted(MALFORMED))
def test_a_malformed_packet_is_left_to_paho(case: str, monkeypatch: pytest.MonkeyPatch) -> None:
    # paho reports it (MQTT_ERR_PROTOCOL) and closes the connection: nothing after it is delivered, by either
    before = _pub(b"fwb/a/block", b"before")
    stream = before + MALFORMED[case] + _pub(b"fwb/a/block", b"after") * 3
    expected, paho_state = _through_paho(stream, [], False)
    events, link_state, link, _sock = _through_link(stream, [], False, monkeypatch)
    assert expected == [("fwb/a/block", b"before", 0)]
    assert events == expected and link_state == paho_state
    assert paho_state[3] is True and link._fd is None  # the connection closed
    assert link.fast_publishes == 1


def test_a_handler_error_is_contained_as_on_pahos_path(monkeypatch: pytest.MonkeyPatch) -> None:
    # the same link reading through paho (paho reading its socket itself) and cutting the packets itself: the
    # failing message reported once as a failed callback, the others delivered
    stream = b"".join(_pub(b"fwb/a/block", p) for p in (b"1", b"boom", b"2"))
    events, _state_fast, link, _sock = _through_link(stream, [], False, monkeypatch, raise_on=b"boom")
    assert link.fast_publishes == 3
    failed = ("_callback_failed", "on_message", repr(RuntimeError("a handler's bug")))
    assert events == [("fwb/a/block", b"1", 0), failed, ("fwb/a/block", b"2", 0)]
    conn = MqttConnection.model_validate({"url": "mqtt://127.0.0.1:1", "client_id": "edgevib-fast-test"})
    got: list[tuple[object, ...]] = []

    def on_payload(topic: str, payload: bytes) -> None:
        if payload == b"boom":
            raise RuntimeError("a handler's bug")
        got.append((topic, payload, 0))

    plain = MqttLink(conn, role="test", on_payload=on_payload)
    monkeypatch.setattr(plain, "_post", lambda fn, *args: got.append((fn.__name__, *args)))
    client = _client(False)
    client.on_message = plain._cb_message
    client._sock = _Cuts(stream, [])  # paho reading its own socket
    plain._paho, plain._fd = client, 1000
    for _ in range(10):
        plain._on_readable()
    assert got == events and plain.fast_publishes == 0

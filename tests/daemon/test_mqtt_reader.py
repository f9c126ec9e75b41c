"""The MQTT link's chunked reader hands paho every packet whole, however the byte stream is cut into reads."""

from __future__ import annotations

import asyncio
import bisect
import gc
import random
import socket
import struct
import threading
from collections.abc import Callable

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
    reading its socket itself, ``recv_into`` for the link's reader); what is sent is kept.  After the stream: nothing
    yet (a read would block), or with ``eof`` the end of the stream, or ``error`` raised by every read."""

    def __init__(self, data: bytes, cuts: list[int], *, eof: bool = False, error: OSError | None = None) -> None:
        self.data, self.pos = data, 0
        self.bounds = sorted({c for c in cuts if 0 < c < len(data)} | {len(data)})
        self.reads: list[tuple[int, int]] = []
        self.sent = bytearray()
        self.eof, self.error = eof, error

    @property
    def done(self) -> bool:
        """Served whole, and nothing more to come (no end of stream or error to report)."""
        return self.pos >= len(self.data) and not self.eof and self.error is None

    def _take(self, n: int) -> bytes:
        if self.pos >= len(self.data):
            if self.error is not None:
                raise self.error
            if self.eof:
                return b""
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
    """A paho client recording the reason of each disconnect it reports (as text, in its user data)."""
    client = mqtt.Client(CallbackAPIVersion.VERSION2, client_id="edgevib-fast-test",
                         protocol=mqtt.MQTTv5 if v5 else mqtt.MQTTv311, userdata=[])
    client.on_disconnect = lambda _c, gone, _f, reason, _p: gone.append(str(reason))
    return client


def _state(client: mqtt.Client, sock: _Cuts) -> tuple[object, ...]:
    """What paho keeps of the stream: its incoming-packet state, the QoS 2 messages held, what it sent back
    (PUBACK, PUBREC), whether it closed the connection, the disconnects it reported and why."""
    return (dict(client._in_packet), sorted(client._in_messages), bytes(sock.sent), client._sock is None,
            client._ping_t, list(client._userdata))


def _through_paho(stream: bytes, cuts: list[int], v5: bool, *, eof: bool = False,
                  error: OSError | None = None) -> tuple[Events, tuple[object, ...]]:
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
    sock = _Cuts(stream, cuts, eof=eof, error=error)
    client._sock = sock
    client._last_bytes_received = 0.0
    for _ in range(len(stream) + 10):
        if client._sock is None or sock.done:
            break
        client.loop_read()
    assert client._last_bytes_received > 0.0  # paho's keep-alive clock moved with what it received
    return events, _state(client, sock)


def _through_link(stream: bytes, cuts: list[int], v5: bool, monkeypatch: pytest.MonkeyPatch,
                  raise_on: bytes | None = None, *, eof: bool = False,
                  error: OSError | None = None) -> tuple[Events, tuple[object, ...], MqttLink, _Cuts]:
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
    sock = _Cuts(stream, cuts, eof=eof, error=error)
    reader = _ChunkedReader(sock)
    client._sock = reader  # as MqttLink wraps paho's socket when it opens
    client._last_bytes_received = 0.0
    link._paho, link._fd, link._loop_thread = client, sock.fileno(), threading.get_ident()
    for _ in range(len(stream) + 10):  # one call per readiness of the socket
        link._on_readable()
        if link._fd is None or (sock.done and not reader.ready()):
            break
    assert client._last_bytes_received > 0.0  # the keep-alive clock moved, also for the packets the link cut
    return events, _state(client, sock), link, sock


def _normalise(events: list[tuple[object, ...]]) -> list[tuple[object, ...]]:
    # the link reports a failed callback as ("_callback_failed", "on_message", repr(error)); paho's error the same
    return [("not UTF-8", e[2]) if e[0] == "_callback_failed" else e for e in events]


def _expected_fast(packets: list[tuple[bytes, bool]], reads: list[tuple[int, int]]) -> int:
    """The packets the link may cut that it does cut: every one that arrived whole, in one read of the socket (a
    chunk) or over several (its start is held until the rest has come), unless the stream ended inside it."""
    end = max((b for _a, b in reads), default=0)
    n, pos = 0, 0
    for packet, fast in packets:
        pos += len(packet)
        if fast and pos <= end:
            n += 1
    return n


def _crossing(packets: list[tuple[bytes, bool]], reads: list[tuple[int, int]]) -> int:
    """The packets the link may cut that no single read held whole: each came in over several reads."""
    n, pos = 0, 0
    for packet, fast in packets:
        start, stop = pos, pos + len(packet)
        pos = stop
        if fast and not any(a <= start and stop <= b for a, b in reads):
            n += 1
    return n


@pytest.mark.parametrize("v5", [False, True])
@pytest.mark.parametrize("cuts", ["none", "random", "inside"])
def test_link_cuts_qos0_publishes_as_paho_reads_them(v5: bool, cuts: str, monkeypatch: pytest.MonkeyPatch) -> None:
    packets = _stream(v5)
    stream = b"".join(p for p, _ in packets)
    rng = random.Random(14)
    at = sorted(rng.sample(range(1, len(stream)), 60)) if cuts == "random" else []
    if cuts == "inside":  # every packet cut once, at a random place after its first byte
        pos = 0
        for packet, _fast in packets:
            if len(packet) > 1:
                at.append(pos + rng.randrange(1, len(packet)))
            pos += len(packet)
    expected, paho_state = _through_paho(stream, at, v5)
    events, link_state, link, sock = _through_link(stream, at, v5, monkeypatch)
    assert _normalise(events) == expected  # the same messages, in the same order, with the same QoS
    assert link_state == paho_state  # and paho left in the same state, the same acknowledgements sent
    assert any(e[0] == "not UTF-8" for e in expected)  # (the stream does hold the undecodable topic)
    fast = _expected_fast(packets, sock.reads)
    assert fast >= 6 and link.fast_publishes == fast  # the link's own cut was taken, for exactly those packets
    assert fast == sum(f for _p, f in packets)  # all of them, those cut by the reads too
    if cuts == "inside":  # (and the reads did cut every one of them)
        assert _crossing(packets, sock.reads) == fast


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
        assert link.fast_publishes == _expected_fast(packets, sock.reads) == 3, cut  # the packet cut: held


@pytest.mark.parametrize("v5", [False, True])
@pytest.mark.parametrize("k", [1, 2, 3, 4, 5])
def test_every_fixed_header_cut_after_k_bytes(v5: bool, k: int, monkeypatch: pytest.MonkeyPatch) -> None:
    # every packet of the stream cut k bytes after its start: after its first byte, inside its remaining length
    # (§2.2.3: 1 to 4 bytes, here in 1, 2, 3 and 4), inside its topic length: each start held and read on, and the
    # packets longer than a chunk (their length learnt once the rest of it has come) left to paho whole
    packets = _stream(v5)
    stream = b"".join(p for p, _ in packets)
    at, pos = [], 0
    for packet, _fast in packets:
        if len(packet) > k:
            at.append(pos + k)
        pos += len(packet)
    expected, paho_state = _through_paho(stream, at, v5)
    events, link_state, link, sock = _through_link(stream, at, v5, monkeypatch)
    assert _normalise(events) == expected and link_state == paho_state  # reference: paho on the same reads
    assert link.fast_publishes == _expected_fast(packets, sock.reads) == sum(f for _p, f in packets)


def _chunk_sized(v5: bool, extra: int) -> bytes:
    """A QoS 0 PUBLISH of READ_CHUNK + ``extra`` bytes in all (a 3-byte remaining length, §2.2.3)."""
    topic = b"fwb/chunk/block"
    packet = _pub(topic, bytes(READ_CHUNK + extra - 4 - 2 - len(topic) - v5), v5=v5)
    assert len(packet) == READ_CHUNK + extra
    return packet


@pytest.mark.parametrize("v5", [False, True])
@pytest.mark.parametrize("into", [1, 3, 900, READ_CHUNK // 2])
def test_a_packet_as_large_as_the_buffer_is_held_a_larger_one_left_to_paho(
        v5: bool, into: int, monkeypatch: pytest.MonkeyPatch) -> None:
    # a packet as long as the buffer, starting inside a chunk and cut ``into`` bytes after its start, is held and
    # read whole into the buffer; one byte longer it never fits, and paho reads it (held only while its remaining
    # length was cut)
    small = _pub(b"fwb/a/block", b"first", v5=v5)
    packets = [(small, True), (_chunk_sized(v5, 0), True), (small, True), (_chunk_sized(v5, 1), False),
               (small, True)]
    stream = b"".join(p for p, _ in packets)
    at, pos = [], 0
    for packet, _fast in packets:
        at.append(pos + min(into, len(packet) - 1))
        pos += len(packet)
    expected, paho_state = _through_paho(stream, at, v5)
    events, link_state, link, sock = _through_link(stream, at, v5, monkeypatch)
    assert _normalise(events) == expected and link_state == paho_state  # reference: paho on the same reads
    assert [len(e[1]) for e in events if isinstance(e[1], bytes)] == [5, READ_CHUNK - 21 - v5, 5,  # (§3.3.3)
                                                                        READ_CHUNK - 20 - v5, 5]
    assert link.fast_publishes == _expected_fast(packets, sock.reads) == 4


def _truncated(v5: bool) -> tuple[list[tuple[bytes, bool]], bytes]:
    packets = [(_pub(b"fwb/a/block", b"one", v5=v5), True), (PINGRESP, False),
               (_pub(b"fwb/b/block", b"two", v5=v5), True)]
    last = _pub(b"fwb/c/block", bytes(range(150)), v5=v5)  # a 2-byte remaining length
    return packets, last


@pytest.mark.parametrize("v5", [False, True])
@pytest.mark.parametrize("end", ["eof", "reset"])
@pytest.mark.parametrize("split", [False, True])
def test_a_connection_lost_inside_a_held_packet(v5: bool, end: str, split: bool,
                                                monkeypatch: pytest.MonkeyPatch) -> None:
    # the stream ends (or the socket fails) after every possible start of the last packet, read in one piece or
    # in two: paho gets the bytes held, then the end or the error, and reports the connection lost inside the
    # packet as it does reading the socket itself; the packets before it delivered, that one not
    packets, last = _truncated(v5)
    head = b"".join(p for p, _ in packets)
    for n in range(1, len(last)):
        stream = head + last[:n]
        at = [len(head), len(head) + n // 2] if split else []
        error = ConnectionResetError(104, "Connection reset by peer") if end == "reset" else None
        expected, paho_state = _through_paho(stream, at, v5, eof=end == "eof", error=error)
        events, link_state, link, sock = _through_link(stream, at, v5, monkeypatch, eof=end == "eof", error=error)
        assert _normalise(events) == expected, n  # reference: paho reading the same reads itself
        assert link_state == paho_state, n  # the same partial packet in paho's hands, the same disconnect
        assert paho_state[3] is True and paho_state[5] and link._fd is None, n  # (the connection closed)
        assert link.fast_publishes == _expected_fast(packets, sock.reads) == 2, n


@pytest.mark.parametrize("v5", [False, True])
def test_the_keep_alive_clock_moves_with_the_body_held(v5: bool, monkeypatch: pytest.MonkeyPatch) -> None:
    # paho's keep-alive goes by _last_bytes_received, which its _packet_read sets when bytes of a packet's body
    # come in (not for its fixed header): with the start of a packet held and no more to read, the clock moves as
    # paho's own does for the same bytes, and paho has seen none of them (it is still between packets)
    _packets, last = _truncated(v5)
    for n in range(1, len(last)):
        plain = _client(v5)
        plain._sock = _Cuts(last[:n], [])
        plain._last_bytes_received = 0.0
        plain.loop_read()
        assert plain._in_packet["command"] == last[0]  # (paho has started on the packet)
        events, _link_state, link, _sock = _keep_clock_free(last[:n], v5, monkeypatch)
        client = link._paho
        assert client is not None and events == []
        assert (client._last_bytes_received > 0) == (plain._last_bytes_received > 0) == (n > 3), n
        assert client._in_packet["command"] == 0 and not client._in_packet["remaining_count"], n


def _keep_clock_free(stream: bytes, v5: bool,
                     monkeypatch: pytest.MonkeyPatch) -> tuple[Events, tuple[object, ...], MqttLink, _Cuts]:
    """_through_link on a stream that may end inside a packet: the keep-alive clock need not have moved."""
    events: list[tuple[object, ...]] = []
    conn = MqttConnection.model_validate({"url": "mqtt://127.0.0.1:1", "client_id": "edgevib-fast-test",
                                          "protocol": "5" if v5 else "3.1.1"})
    link = MqttLink(conn, role="test", on_payload=lambda topic, payload: events.append((topic, payload)))
    client = _client(v5)
    client.on_message = link._cb_message
    sock = _Cuts(stream, [])
    client._sock = _ChunkedReader(sock)
    client._last_bytes_received = 0.0
    link._paho, link._fd, link._loop_thread = client, sock.fileno(), threading.get_ident()
    link._on_readable()
    link._on_readable()  # a second readiness: nothing more to read, nothing handed to paho
    return events, _state(client, sock), link, sock


async def _turns(until: Callable[[], bool], most: int = 10_000) -> None:
    """Let the event loop turn (each turn polls the selector without waiting) until ``until()``, or ``most`` turns."""
    for _ in range(most):
        if until():
            return
        await asyncio.sleep(0)


async def test_a_held_packet_waits_for_the_socket_to_be_readable_again() -> None:
    # the event loop calls the link when its socket is readable, and again at every turn as long as it is (the
    # selectors' level-triggered readiness, Python docs: selectors, asyncio's loop.add_reader): the start of a packet
    # held with the socket drained must leave the link waiting, not called turn after turn, until the rest comes
    loop = asyncio.get_running_loop()
    ours, theirs = socket.socketpair()
    ours.setblocking(False)
    got: list[tuple[str, bytes]] = []
    conn = MqttConnection.model_validate({"url": "mqtt://127.0.0.1:1", "client_id": "edgevib-fast-test"})
    link = MqttLink(conn, role="test", on_payload=lambda topic, payload: got.append((topic, payload)))
    client = _client(False)
    client.on_message = link._cb_message
    client._sock = _ChunkedReader(ours)
    link._paho, link._fd, link._loop, link._loop_thread = client, ours.fileno(), loop, threading.get_ident()
    calls = [0]

    def on_readable() -> None:
        calls[0] += 1
        link._on_readable()

    loop.add_reader(ours.fileno(), on_readable)
    try:
        packet = _pub(b"fwb/a/block", bytes(range(200)))
        theirs.sendall(packet[:50])
        await _turns(lambda: calls[0] > 0)
        await _turns(lambda: False, 200)  # as many turns again, the held bytes still unread by paho
        assert calls[0] == 1 and got == [] and client._in_packet["command"] == 0
        theirs.sendall(packet[50:])
        await _turns(lambda: bool(got))
        await _turns(lambda: False, 200)
        assert got == [("fwb/a/block", bytes(range(200)))] and link.fast_publishes == 1  # (§3.3.2, §3.3.3)
        assert calls[0] == 2
    finally:
        loop.remove_reader(ours.fileno())
        ours.close()
        theirs.close()


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

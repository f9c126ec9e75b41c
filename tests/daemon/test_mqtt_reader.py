"""The MQTT link's chunked reader hands paho every packet whole, however the byte stream is cut into reads."""

from __future__ import annotations

import gc
import struct

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


def _publish(topic: str, payload: bytes) -> bytes:
    """A QoS 0 PUBLISH packet (MQTT 3.1.1 §3.3): type 3 in the fixed header, the topic as a length-prefixed UTF-8
    string (§1.5.3), then the payload."""
    raw = topic.encode("utf-8")
    body = struct.pack(">H", len(raw)) + raw + payload
    return b"\x30" + _remaining_length(len(body)) + body


PINGRESP = b"\xd0\x00"  # MQTT 3.1.1 §3.13: a packet with no remaining bytes


class _Trickle:
    """A non-blocking socket whose reads return at most ``step`` bytes of a prepared stream."""

    def __init__(self, data: bytes, step: int) -> None:
        self.data, self.step, self.pos = data, step, 0

    def recv_into(self, buf: bytearray) -> int:
        n = min(len(buf), self.step, len(self.data) - self.pos)
        if n == 0:
            raise BlockingIOError
        memoryview(buf)[:n] = self.data[self.pos:self.pos + n]
        self.pos += n
        return n

    def fileno(self) -> int:
        return 1000

    def close(self) -> None: ...


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
    stream = b"".join(_publish(t, p) + PINGRESP for t, p in expected)
    got: list[tuple[str, bytes]] = []
    conn = MqttConnection.model_validate({"url": "mqtt://127.0.0.1:1", "client_id": "edgevib-reader-test"})
    link = MqttLink(conn, role="test", on_message=lambda m: got.append((m.topic, bytes(m.payload))))
    client = mqtt.Client(CallbackAPIVersion.VERSION2, client_id="edgevib-reader-test")
    client.on_message = link._cb_message
    sock = _Trickle(stream, step)
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
    stream = b"".join(_publish(t, p) for t, p in messages)
    got: list[str] = []
    conn = MqttConnection.model_validate({"url": "mqtt://127.0.0.1:1", "client_id": "edgevib-reader-test"})
    link = MqttLink(conn, role="test", on_message=lambda m: got.append(m.topic))
    client = make_client(conn)
    client.on_message = link._cb_message
    sock = _Trickle(stream, READ_CHUNK)
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

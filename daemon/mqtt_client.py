"""The one MQTT client set-up of edgevib: block sources, the indicator publisher and the alarm feed all use it.

:class:`MqttLink` is one broker connection (paho-mqtt 2.x) driven from the asyncio event loop, with no network
thread of paho's: the loop reads the socket when it is readable (paho's ``loop_read``), writes what paho queued at
the end of the loop iteration and when the socket is writable again (``loop_write``), and runs paho's keep-alive
every second (``loop_misc``).  A received block thus costs no thread switch and no hand-over between threads.

* **Reconnection** is one loop (:meth:`MqttLink._run`) with bounded exponential backoff between the connection's
  ``reconnect_min_s`` and ``reconnect_max_s`` (doubling per failure, starting again after a CONNACK) — in one
  place, for every client.  Each attempt (TCP connect with its timeout, TLS handshake) blocks, so it runs in the
  link's own thread; the socket is non-blocking and served by the event loop from then on.
* **QoS 0 messages cut by the link.**  A link given ``on_payload`` (the MQTT source: topic and payload only) reads
  a QoS 0 PUBLISH itself, when paho is between packets: one copy of the payload and nothing else, instead of paho's
  message objects (:meth:`MqttLink._take_publishes`).  One that crosses the end of a read chunk has its start held
  until the rest has been read (:meth:`_ChunkedReader.hold`) — over TLS, where a read ends with a TLS record (at
  most 16 kB), most packets do.  Everything else — other packets, QoS 1 and 2, MQTT 5 properties, a topic that is
  not UTF-8, malformed packets, packets longer than a chunk — goes through paho as before.
* **Callbacks** from paho run on the event loop, inside its read or write, and do almost nothing: state changes
  and acknowledgements are handed on with ``loop.call_soon`` (outside paho's call and its locks); no exception
  escapes into paho or into the loop.
* **Refusals are logged with the broker's reason**, rate-limited, never a secret: a CONNACK failure (bad
  credentials, not authorised …), a TCP or TLS failure, a connection closed before it was established, a
  DISCONNECT sent by the broker with its reason code (MQTT 5), and a PUBACK with a failure reason code.
* **A topic the broker will not take never blocks the others.**  paho refuses topics with wildcards or that are
  not valid UTF-8 at once (:class:`TopicRefused`).  Some brokers close the connection instead of answering (a NATS
  server's MQTT gateway does so for a ``.`` in a topic): when the connection drops while a QoS 1 message is the
  oldest unacknowledged one, its topic gets a strike, and after :data:`MAX_STRIKES` strikes in a row the topic is
  set aside for the life of the link (logged once with the reason; :meth:`MqttLink.publish` then raises
  :class:`TopicRefused` for it).
* **Sessions and availability**: ``persistent_session`` keeps the broker-side session (subscriptions and the QoS 1
  messages queued for it) across disconnects and restarts — MQTT 3.1.1 ``clean_session = false``, MQTT 5
  ``clean_start = false`` with a Session Expiry Interval; an :class:`Availability` topic gets a retained
  ``online`` after every connect, a retained ``offline`` on a clean stop, and the same ``offline`` as the Last Will
  that the broker publishes when edgevib dies or loses the network.
"""

from __future__ import annotations

import asyncio
import contextlib
import socket
import ssl
import threading
import time
from collections import OrderedDict
from collections.abc import Callable, Iterable, Iterator, Sequence
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from typing import Any

import paho.mqtt.client as mqtt
from paho.mqtt.enums import CallbackAPIVersion
from paho.mqtt.matcher import MQTTMatcher
from paho.mqtt.packettypes import PacketTypes
from paho.mqtt.properties import Properties

from edgevib.daemon.config import MqttConnection
from edgevib.daemon.interfaces import EdgevibError, SourceError
from edgevib.daemon.logs import RateLimitedLogger, get_logger

__all__ = [
    "MAX_STRIKES",
    "Availability",
    "MqttLink",
    "PayloadHandler",
    "TopicRefused",
    "describe_connect_failure",
    "describe_reason",
    "make_client",
    "publish_properties",
]

log = get_logger("edgevib.mqtt")
MAX_STRIKES = 3
"""Connection drops in a row, each with the same topic's QoS 1 message oldest in flight, before it is set aside."""
PayloadHandler = Callable[[str, bytes], None]
"""A received message's topic and payload (:class:`MqttLink`'s ``on_payload``)."""
_NewProperties: Any = Properties  # paho's constructor is not annotated
TRANSIENT_REASONS = frozenset({0x97})  # Quota exceeded: worth retrying later (MQTT 5.0 §2.4, reason codes)


class TopicRefused(EdgevibError):
    """A topic that cannot be published on this broker (invalid for MQTT, or set aside after strikes)."""


@dataclass(frozen=True, slots=True)
class Availability:
    """A retained availability topic: ``online`` after each connect, ``offline`` on a clean stop and as the Will."""

    topic: str
    online: bytes = b"online"
    offline: bytes = b"offline"


def describe_connect_failure(exc: BaseException | None) -> str:
    """A short reason for a failed connection attempt (no secret can appear: only the error's own text)."""
    if exc is None:
        return "connection attempt failed"
    if isinstance(exc, ssl.SSLCertVerificationError):
        return f"TLS handshake failed: server certificate not accepted ({exc.verify_message or exc.reason})"
    if isinstance(exc, ssl.SSLError):
        return f"TLS handshake failed: {exc.reason or exc}"
    if isinstance(exc, ConnectionRefusedError):
        return "connection refused"
    if isinstance(exc, socket.gaierror):
        return f"host name not resolved: {exc.strerror or exc}"
    if isinstance(exc, TimeoutError | socket.timeout):
        return "connection attempt timed out"
    if isinstance(exc, OSError) and exc.strerror:
        return exc.strerror
    return f"{type(exc).__name__}: {exc}"


def describe_reason(reason: Any) -> str:
    """paho's reason code (MQTT 5 reason codes; MQTT 3.1.1 return codes mapped by paho) as text with its number."""
    value = getattr(reason, "value", reason)
    return f"{reason} (reason code {value})" if isinstance(value, int) else str(reason)


def _is_failure(reason: Any) -> bool:
    return bool(getattr(reason, "is_failure", False))


class AcyclicMatcher(MQTTMatcher):
    """paho's topic-filter matcher for ``message_callback_add``, the same matches in the same order, without the
    reference cycle paho's own ``iter_match`` leaves behind for every received message (a recursive closure that
    refers to itself through its cell).  Those cycles were nearly all the cyclic garbage of a running daemon: about
    six objects per block, so the collector's young generation ran every hundred-odd blocks and its oldest one
    every few seconds, walking what had accumulated since start-up with the interpreter lock held."""

    def iter_match(self, topic: str) -> Iterator[Any]:
        root = self._root
        if root._content is None and not root._children:  # no filtered callbacks (the daemon registers none)
            return iter(())
        out: list[Any] = []
        _match(root, topic.split("/"), 0, not topic.startswith("$"), out)
        return iter(out)


def _match(node: Any, parts: list[str], i: int, normal: bool, out: list[Any]) -> None:
    """Depth first as paho's ``MQTTMatcher.iter_match``: at each level the exact part, then ``+``, then ``#``
    (MQTT 3.1.1 §4.7; a topic starting with ``$`` is not matched by a wildcard at its first level, §4.7.2)."""
    children = node._children
    if i == len(parts):
        if node._content is not None:
            out.append(node._content)
    else:
        child = children.get(parts[i])
        if child is not None:
            _match(child, parts, i + 1, normal, out)
        if "+" in children and (normal or i > 0):
            _match(children["+"], parts, i + 1, normal, out)
    if "#" in children and (normal or i > 0):
        content = children["#"]._content
        if content is not None:
            out.append(content)


def make_client(conn: MqttConnection, client_id: str | None = None, *, persistent_session: bool = False,
                will: Availability | None = None) -> mqtt.Client:
    """A configured (not yet connected) paho client for ``conn``; library errors become :class:`SourceError`."""
    v5 = conn.protocol == "5"
    kwargs: dict[str, Any] = {"client_id": client_id or conn.client_id,
                              "protocol": mqtt.MQTTv5 if v5 else mqtt.MQTTv311}
    if not v5:
        kwargs["clean_session"] = not persistent_session
    client = mqtt.Client(CallbackAPIVersion.VERSION2, **kwargs)
    if isinstance(getattr(client, "_on_message_filtered", None), MQTTMatcher):  # (paho's attribute, 2.x)
        client._on_message_filtered = AcyclicMatcher()  # type: ignore[no-untyped-call]
    # paho's own reconnect loop, bounded exponential backoff (floats work; paho's annotation says int)
    client.reconnect_delay_set(min_delay=conn.reconnect_min_s, max_delay=conn.reconnect_max_s)  # type: ignore[arg-type]
    if conn.username is not None:
        client.username_pw_set(conn.username, conn.password.reveal() if conn.password is not None else None)
    if conn.tls:
        try:
            client.tls_set(ca_certs=conn.ca_file, certfile=conn.cert_file, keyfile=conn.key_file,
                           cert_reqs=ssl.CERT_REQUIRED, tls_version=ssl.PROTOCOL_TLS_CLIENT,
                           keyfile_password=conn.key_password.reveal() if conn.key_password is not None else None)
        except (ssl.SSLError, OSError, ValueError) as exc:
            raise SourceError(f"TLS set-up for {conn.url} failed: {exc}") from exc
    if will is not None:
        props = None
        if v5:
            props = _NewProperties(PacketTypes.WILLMESSAGE)
            props.PayloadFormatIndicator = 1
            props.ContentType = "text/plain"
        client.will_set(will.topic, will.offline, qos=1, retain=True, properties=props)
    return client


def publish_properties(*, content_type: str | None = None, utf8: bool = False, expiry_s: float | None = None,
                       user: Iterable[tuple[str, str]] = (), response_topic: str | None = None,
                       correlation: bytes | None = None) -> Properties:
    """MQTT 5 PUBLISH properties (Content Type, Payload Format Indicator, Message Expiry Interval, User Properties,
    Response Topic, Correlation Data; MQTT 5.0 §3.3.2.3)."""
    props: Properties = _NewProperties(PacketTypes.PUBLISH)
    if content_type:
        props.ContentType = content_type
    if utf8:
        props.PayloadFormatIndicator = 1
    if expiry_s is not None and expiry_s > 0:
        props.MessageExpiryInterval = max(1, round(expiry_s))
    pairs = list(user)
    if pairs:
        props.UserProperty = pairs
    if response_topic:
        props.ResponseTopic = response_topic
    if correlation is not None:
        props.CorrelationData = correlation
    return props


def _drop_queued(client: mqtt.Client, mids: set[int], topic: str | None) -> None:
    """Remove messages from paho's outgoing queue (by message id, and every message on ``topic``) so that its
    reconnect does not send them again.  paho offers no public call for this: its queue and lock are used here, in
    this one place."""
    lock = getattr(client, "_out_message_mutex", None)
    queue = getattr(client, "_out_messages", None)
    if lock is None or queue is None:
        return
    with lock:
        for mid, msg in list(queue.items()):
            if mid in mids or (topic is not None and msg.topic == topic):
                queue.pop(mid, None)


def _close_socket(client: mqtt.Client) -> None:
    """Close the client's socket, if any, without a word to the broker (a stopped link's last resort)."""
    sock = client.socket()
    if sock is not None:
        with contextlib.suppress(OSError):
            sock.close()


def _pending(sock: Any) -> int:
    """Decrypted bytes waiting in a TLS socket's buffer (0 for a plain socket or none)."""
    return int(sock.pending()) if isinstance(sock, ssl.SSLSocket) else 0


READ_CHUNK = 256 * 1024
"""Bytes taken from the socket by one read (as asyncio's own transports do)."""
MAX_READS = 16
"""Reads of :data:`READ_CHUNK` in one turn of the event loop before the other callbacks get theirs."""
_ONE_BYTE = tuple(bytes((b,)) for b in range(256))
"""Every one-byte string, made once: paho reads a packet's type and each byte of its length one at a time."""
_LENGTH_TOO_LONG = -1  # what _remaining_length gives for a length of more than four bytes
_LENGTH_CUT = -2  # ... and for one that runs past the end of the bytes at hand


def _remaining_length(buf: bytearray, i: int, end: int) -> tuple[int, int]:
    """A packet's remaining length (MQTT 3.1.1 §2.2.3, a variable byte integer of at most four bytes) starting at
    ``buf[i]``, and the index after it; the length is :data:`_LENGTH_TOO_LONG` or :data:`_LENGTH_CUT` (with ``i``
    where reading stopped) when it runs past four bytes or past ``end``."""
    length = shift = 0
    while True:
        if shift > 21:
            return _LENGTH_TOO_LONG, i
        if i == end:
            return _LENGTH_CUT, i
        byte = buf[i]
        i += 1
        length |= (byte & 0x7F) << shift
        if byte < 0x80:
            return length, i
        shift += 7


class _ChunkedReader:
    """paho's socket, read in chunks: one ``recv`` takes everything waiting (up to :data:`READ_CHUNK` bytes), and
    paho's many small reads of a packet (a byte for its type, a byte per byte of its remaining length, then the
    rest) are served from that chunk, without a system call (and a release of the interpreter lock) each.

    Everything but reading goes to the socket itself.  The chunk is read into one buffer allocated once (no
    allocation and no fresh pages per read); ``recv`` returns views of it (a one-byte read: the byte, from a table),
    which paho appends to its packet buffer at once: none is left when the next chunk is read, after paho's read
    has returned.

    The start of a QoS 0 PUBLISH at the chunk's end may be *held* (:meth:`hold`): kept at the front of the buffer,
    out of paho's sight, and the next read appended to it, so that the link can cut the packet once it is whole.
    Whatever happens next, paho gets the held bytes first, in order, before anything read after them: the next
    read's bytes, or its end of stream or error (paho then reports a connection lost inside a packet, as it would
    have by itself)."""

    __slots__ = ("_buf", "_end", "_eof", "_error", "_held", "_pos", "_view", "full", "sock")

    def __init__(self, sock: Any) -> None:
        self.sock = sock
        self._buf = bytearray(READ_CHUNK)
        self._view = memoryview(self._buf)
        self._pos = self._end = 0
        self._held = 0  # bytes held at the buffer's front (the start of a packet), read before the next chunk
        self._eof = False
        self._error: OSError | None = None
        self.full = False  # the last read filled its chunk: more is probably waiting

    def fill(self) -> bool:
        """Read what is waiting, once the previous chunk is used up (after the bytes held, if any); False when there
        was nothing."""
        if self._pos < self._end:
            return True
        held = self._held
        try:
            n = self.sock.recv_into(self._view[held:] if held else self._buf)
        except (BlockingIOError, ssl.SSLWantReadError):
            self.full = False
            return False
        except OSError as exc:  # paho gets it at its next read (SSLWantWriteError included: paho handles it)
            self._error, self.full = exc, False
            n = 0  # the bytes held first
        else:
            if not n:
                self._eof, self.full = True, False
            else:
                self.full = held + n == READ_CHUNK or _pending(self.sock) > 0
        self._pos, self._end, self._held = 0, held + n, 0
        return True

    def ready(self) -> bool:
        """Bytes left in the chunk, or an end of stream or an error not yet reported to paho."""
        return self._pos < self._end or self._eof or self._error is not None

    def mark(self) -> int:
        """Where paho is in the chunk: changes when paho takes bytes or the error (the chunk is not refilled
        meanwhile: only :meth:`fill` moves its end)."""
        return self._pos if self._error is None else -1

    def recv(self, n: int) -> Any:
        pos, end = self._pos, self._end
        if pos < end:
            if n == 1:  # a packet's type or a byte of its length: no view made for it
                self._pos = pos + 1
                return _ONE_BYTE[self._buf[pos]]
            stop = pos + n
            if stop > end:
                stop = end
            self._pos = stop
            return self._view[pos:stop]
        if self._error is not None:
            exc, self._error = self._error, None
            raise exc
        if self._eof:
            return b""
        raise BlockingIOError

    def take_publish(self, v5: bool) -> tuple[str, bytes] | None:
        """The QoS 0 PUBLISH packet at the reader's position, if it is whole in the chunk, taken out of it: its topic
        and its payload (one copy).  None, and nothing taken, for whatever paho is to read instead: another packet
        type, QoS 1 or 2, a packet that goes on past the chunk, a malformed one (a remaining length of more than
        four bytes, a topic running past the packet's end), an empty topic or one that is not UTF-8, and in MQTT 5
        a packet with properties.

        The layout (MQTT 3.1.1 §2.2 and §3.3, MQTT 5.0 §3.3): the fixed header's first byte (type 3 in the high
        four bits; DUP, QoS and RETAIN below: QoS 0 here, DUP and RETAIN taken as they come, as paho takes them),
        the remaining length (§2.2.3: seven bits a byte, least significant first, at most four bytes), the topic
        as a two-byte length and UTF-8 (§1.5.3), no packet identifier at QoS 0, in MQTT 5 the property length (a
        variable byte integer, §3.3.2.3: only 0 is taken here), then the payload up to the remaining length."""
        buf, pos, end = self._buf, self._pos, self._end
        if pos >= end or buf[pos] & 0xF6 != 0x30:
            return None
        # (a length past four bytes (paho's error) or past the chunk is negative: refused with the too short ones)
        length, i = _remaining_length(buf, pos + 1, end)
        stop = i + length
        if stop > end or length < 2:
            return None
        start = i + 2
        topic_end = body = start + (buf[i] << 8 | buf[i + 1])
        if topic_end == start or topic_end > stop:
            return None
        if v5:
            if body == stop or buf[body] != 0:
                return None
            body += 1
        try:
            topic = str(self._view[start:topic_end], "utf-8")
        except UnicodeDecodeError:
            return None
        self._pos = stop
        return topic, bytes(self._view[body:stop])

    def hold(self, v5: bool) -> int:
        """Hold the rest of the chunk when it is the start of a QoS 0 PUBLISH that :meth:`take_publish` may take once
        whole (see there): move it to the buffer's front, out of paho's sight, for the next read to go on after it.
        The bytes of the packet's body held (those after its fixed header: paho's keep-alive clock moves when it
        receives some), or -1 when nothing is held: paho reads on as before.

        Not held: the end of the stream or an error waiting after the chunk (paho is to see them after these
        bytes, now), a packet larger than the buffer (it would never be whole in it), a remaining length of more
        than four bytes, and what the bytes at hand already show :meth:`take_publish` refusing: another packet
        type or QoS, a topic length of 0 or past the packet, MQTT 5 properties."""
        buf, pos, end = self._buf, self._pos, self._end
        if pos >= end or self._eof or self._error is not None or buf[pos] & 0xF6 != 0x30:
            return -1
        length, i = _remaining_length(buf, pos + 1, end)
        if length == _LENGTH_TOO_LONG:  # more than four bytes of remaining length: paho's error, at once
            return -1
        if length == _LENGTH_CUT:  # the remaining length cut: held, its total not known yet
            return self._keep(pos, end, 0)
        stop = i + length
        if stop <= end or stop - pos > READ_CHUNK or length < 2:  # whole (not taken), or never whole in the buffer
            return -1
        if i + 2 <= end:
            topic_end = i + 2 + (buf[i] << 8 | buf[i + 1])
            if topic_end == i + 2 or topic_end > stop or (v5 and (topic_end == stop or
                                                                  (topic_end < end and buf[topic_end] != 0))):
                return -1
        return self._keep(pos, end, end - i)

    def _keep(self, pos: int, end: int, body: int) -> int:
        n = end - pos
        if pos:  # (overlapping ranges through a copy: bytearray's slice assignment copies with memcpy)
            self._buf[:n] = self._view[pos:end] if n <= pos else bytes(self._view[pos:end])
        self._held, self._pos, self._end = n, 0, 0
        return body

    def pending(self) -> int:
        return self._end - self._pos + _pending(self.sock)

    def send(self, data: Any) -> int:
        return int(self.sock.send(data))

    def fileno(self) -> int:
        return int(self.sock.fileno())

    def setblocking(self, flag: bool) -> None:
        self.sock.setblocking(flag)

    def close(self) -> None:
        self.sock.close()

    def __getattr__(self, name: str) -> Any:
        return getattr(self.sock, name)


class MqttLink:
    """One broker connection driven from the event loop, with a bounded-backoff reconnect loop, its state and
    refusals on the event loop.

    Parameters
    ----------
    conn
        Broker settings.
    role
        What the link is for, in log lines (``"source station-broker"``, ``"indicator publisher"``, ``"feed"``).
    subscriptions
        ``(filter, qos)`` pairs subscribed after every connect.
    on_state
        Called on the event loop with ``True``/``False`` when the connection comes up or goes down.
    on_message
        Called on the event loop **inside paho's read** with each message (it must not block; exceptions are
        caught).
    on_payload
        Instead of ``on_message``, for an owner that needs only each message's topic and payload (the MQTT source):
        called the same way with ``(topic, payload)``.  QoS 0 PUBLISH packets no longer than a read chunk are then
        cut out of the chunk by the link itself, without paho's per-packet work (:meth:`_take_publishes`); every
        other packet still comes through paho and its ``on_message``.
    on_ack
        Called on the event loop with ``(mid, status, reason)`` for each QoS ≥ 1 message: ``"ok"`` (PUBACK),
        ``"refused"`` (PUBACK with a failure reason code: the broker will not take it), ``"retry"`` (a transient
        failure code, or — with ``redeliver=False`` — still unacknowledged when the connection dropped).
    redeliver
        True: paho sends unacknowledged QoS 1 messages again after a reconnect (the indicator publisher).  False:
        the owner sends them again from its own store (the feed's outbox), so they are dropped from paho's queue at
        a disconnect and reported ``"retry"``.
    """

    def __init__(self, conn: MqttConnection, *, role: str, client_id: str | None = None,
                 subscriptions: Sequence[tuple[str, int]] = (), persistent_session: bool = False,
                 session_expiry_s: int = 0, availability: Availability | None = None,
                 on_state: Callable[[bool], None] | None = None,
                 on_message: Callable[[mqtt.MQTTMessage], None] | None = None,
                 on_payload: PayloadHandler | None = None,
                 on_ack: Callable[[int, str, str], None] | None = None, redeliver: bool = True,
                 max_inflight: int = 20, max_queued: int = 0) -> None:
        self.conn = conn
        self.role = role
        self.client_id = client_id or conn.client_id
        self.subscriptions = list(subscriptions)
        self.persistent_session = persistent_session
        self.session_expiry_s = session_expiry_s
        self.availability = availability
        self.on_state = on_state
        if on_message is not None and on_payload is not None:
            raise ValueError("give the link on_message or on_payload, not both")
        self.on_message = on_message
        self.on_payload = on_payload
        self.on_ack = on_ack
        self.redeliver = redeliver
        self.max_inflight = max_inflight
        self.max_queued = max_queued
        self.refused_topics: dict[str, str] = {}  # topic -> reason (set aside for the life of the link)
        self.refusals = 0  # connection refusals and broker disconnects seen
        self._connected = False
        self._stopping = False
        self._ever_connected = False
        self.reconnects = 0
        self._loop: asyncio.AbstractEventLoop | None = None
        self._client: mqtt.Client | None = None
        self._lock = threading.Lock()
        self._inflight: OrderedDict[int, str] = OrderedDict()  # mid -> topic of QoS >= 1 messages, oldest first
        self._strikes: dict[str, int] = {}
        self._loop_thread = 0
        self._paho: mqtt.Client | None = None  # the client served by the loop (until stop() has closed it)
        self._task: asyncio.Task[None] | None = None
        self._attempt: asyncio.Future[Any] | None = None
        self._connector: ThreadPoolExecutor | None = None
        self._delay: float | None = None  # current backoff (None: the next wait is reconnect_min_s)
        self._closed = asyncio.Event()  # the served socket was closed
        self._fd: int | None = None  # the served socket's number (registered with the loop)
        self._tls = False
        self._writer = False  # the loop waits for the socket to be writable
        self._flush_soon = False  # a _flush is scheduled
        self._misc: asyncio.TimerHandle | None = None
        self.chunked_reads = True  # read the socket in chunks (see _ChunkedReader); False: paho reads it itself
        self.fast_publishes = 0  # QoS 0 PUBLISH packets taken from the chunk by the link, not by paho
        self._log = log.bind(role=role, url=conn.url)
        self.rlog = RateLimitedLogger(self._log, interval_s=10.0)

    @property
    def v5(self) -> bool:
        return self.conn.protocol == "5"

    @property
    def connected(self) -> bool:
        return self._connected

    @property
    def client(self) -> mqtt.Client | None:
        return self._client

    # ------------------------------------------------------------------------------------------ lifecycle

    async def start(self) -> None:
        """Create the client and start connecting in the background (raises :class:`SourceError` on a TLS set-up
        problem); the link then keeps reconnecting until :meth:`stop`."""
        loop = self._loop = asyncio.get_running_loop()
        self._loop_thread = threading.get_ident()
        self._stopping = False
        client = make_client(self.conn, self.client_id, persistent_session=self.persistent_session,
                             will=self.availability)
        client.max_inflight_messages_set(self.max_inflight)
        client.max_queued_messages_set(self.max_queued)
        client.on_connect = self._cb_connect
        client.on_disconnect = self._cb_disconnect
        client.on_publish = self._cb_publish
        client.on_message = self._cb_message
        client.on_socket_open = self._cb_socket_open
        client.on_socket_close = self._cb_socket_close
        client.on_socket_register_write = self._cb_register_write
        client.on_socket_unregister_write = self._cb_unregister_write
        kwargs: dict[str, Any] = {}
        if self.v5:
            props = _NewProperties(PacketTypes.CONNECT)
            if self.persistent_session and self.session_expiry_s > 0:
                props.SessionExpiryInterval = int(self.session_expiry_s)
            kwargs["properties"] = props
            kwargs["clean_start"] = not self.persistent_session
        # only records the settings: every attempt is made by _run
        client.connect_async(self.conn.host, self.conn.port, keepalive=max(5, round(self.conn.keepalive_s)),
                             **kwargs)
        self._client = self._paho = client
        self._closed = asyncio.Event()
        self._connector = ThreadPoolExecutor(max_workers=1, thread_name_prefix="edgevib-mqtt-connect")
        self._task = loop.create_task(self._run(client), name=f"edgevib MQTT link ({self.role})")

    async def _run(self, client: mqtt.Client) -> None:
        """Connect, serve the socket from the event loop until it closes, wait the backoff, connect again — until
        :meth:`stop`.  The backoff starts at ``reconnect_min_s`` after a refused attempt or a lost connection,
        doubles with every further failure up to ``reconnect_max_s`` and starts again after a CONNACK."""
        loop = asyncio.get_running_loop()
        first = True
        while not self._stopping:
            if not first:
                await asyncio.sleep(self._next_delay())
            first = False
            if self._stopping:
                break
            # the TCP connection and the TLS handshake block (DNS, connect timeout): in the link's own thread; the
            # socket is non-blocking from then on
            self._attempt = attempt = loop.run_in_executor(self._connector, client.reconnect)
            try:
                await asyncio.shield(attempt)
            except (OSError, ValueError) as exc:  # ssl.CertificateError is a ValueError too
                if not self._stopping:
                    self._refused(describe_connect_failure(exc))
                continue
            except Exception as exc:  # anything else paho raises must not end the reconnect loop either
                if not self._stopping:
                    self._refused(f"connection attempt failed: {type(exc).__name__}: {exc}")
                continue
            sock = client.socket()
            if sock is None or self._stopping:
                continue
            self._attach(sock)
            while self._fd is not None:  # until paho closes the socket (a paho-made new socket is attached anew)
                self._closed.clear()
                await self._closed.wait()

    def _next_delay(self) -> float:
        delay = self.conn.reconnect_min_s if self._delay is None else min(2 * self._delay, self.conn.reconnect_max_s)
        self._delay = delay
        return delay

    async def stop(self, flush_s: float = 2.0) -> None:
        """Publish ``offline`` (when an availability topic is set), wait up to ``flush_s`` for pending writes,
        disconnect and close the socket."""
        self._stopping = True
        client, self._client = self._client, None
        if client is None:
            return
        if self._task is not None:
            self._task.cancel()  # the reconnect loop; the socket stays served until it is closed below
        attempt = self._attempt
        if attempt is not None and not attempt.done():  # a connection attempt in the link's thread: abandon it
            attempt.add_done_callback(lambda _f: _close_socket(client))
        if self._connected and self.availability is not None:
            with contextlib.suppress(Exception):
                client.publish(self.availability.topic, self.availability.offline, qos=1, retain=True,
                               properties=self._text_props())
        deadline = time.monotonic() + flush_s
        while self._connected and self._fd is not None and time.monotonic() < deadline:
            with self._lock:
                busy = bool(self._inflight)
            if not busy and not client.want_write():
                break
            await asyncio.sleep(0.02)
        with contextlib.suppress(Exception):
            client.disconnect()  # queues DISCONNECT; paho closes the socket once it is written
        deadline = time.monotonic() + min(1.0, max(0.1, flush_s))
        while self._fd is not None and client.want_write() and time.monotonic() < deadline:
            with contextlib.suppress(Exception):
                client.loop_write()
            if self._fd is not None and client.want_write():
                await asyncio.sleep(0.01)
        self._detach()
        _close_socket(client)
        self._paho = None
        if self._connector is not None:
            self._connector.shutdown(wait=False)
        if self._task is not None:
            await asyncio.wait([self._task], timeout=1.0)
        if self._connected:
            self._connected = False
            if self.on_state is not None:
                self.on_state(False)

    # ------------------------------------------------------------------------------------------ the socket

    def _on_loop(self) -> bool:
        return threading.get_ident() == self._loop_thread

    def _attach(self, sock: Any) -> None:
        """Serve ``sock`` from the event loop: read when readable, write what paho queued, keep-alive every
        second."""
        loop = self._loop
        if loop is None:
            return
        fd = sock.fileno()
        if fd == self._fd:
            return
        self._detach()
        self._fd = fd
        self._tls = isinstance(getattr(sock, "sock", sock), ssl.SSLSocket)
        loop.add_reader(fd, self._on_readable)
        self._misc = loop.call_later(1.0, self._on_misc)
        self._flush()  # CONNECT (queued by reconnect in the link's thread)

    def _detach(self) -> None:
        fd, self._fd = self._fd, None
        if fd is None:
            return
        loop = self._loop
        if loop is not None and not loop.is_closed():
            loop.remove_reader(fd)  # by number: the socket may already be closed
            if self._writer:
                loop.remove_writer(fd)
        self._writer = False
        if self._misc is not None:
            self._misc.cancel()
            self._misc = None
        self._closed.set()

    def _on_readable(self) -> None:
        client = self._paho
        if client is None:
            return
        try:
            reader = client.socket()
            if not isinstance(reader, _ChunkedReader):  # paho reading its socket itself, a packet per call
                client.loop_read()
                # TLS: bytes already decrypted wait in the SSL object and do not make the socket readable again
                while self._tls and self._fd is not None and _pending(client.socket()) > 0:
                    client.loop_read()
                return
            fast = (self.on_payload is not None and client.on_log is None
                    and client.logger is None)  # (paho would log each PUBLISH to them)
            for _ in range(MAX_READS):
                if not reader.fill():
                    break
                while self._fd is not None and reader.ready():  # every packet in the chunk
                    if fast:
                        self._take_publishes(client, reader)
                        if self._fd is None or not reader.ready():
                            break
                    mark = reader.mark()
                    client.loop_read()
                    if reader.mark() == mark:  # paho took nothing: the next readiness goes on
                        break
                if self._fd is None or not reader.full:
                    break
            else:  # TLS: bytes already decrypted do not make the socket readable again, so the loop goes on soon
                if self._tls and self._fd is not None and _pending(reader.sock) > 0:
                    self._post(self._on_readable)
        except Exception as exc:  # never let an exception escape into the event loop's callback
            self._callback_failed("read", repr(exc))

    def _take_publishes(self, client: mqtt.Client, reader: _ChunkedReader) -> None:
        """Hand ``on_payload`` the QoS 0 PUBLISH packets at the chunk's current place, one after the other, as long
        as they lie whole in the chunk — when paho is between packets (it has read nothing of the next one).

        What paho does for such a packet and would show us is done here: the message to the handler (inside a read
        on the event loop, an exception contained as in :meth:`_cb_message`), and the time of the last bytes
        received, which its keep-alive goes by (paho 2.x ``Client._packet_read`` sets ``_last_bytes_received``
        after every packet).  What the link never uses is left out: the ``MQTTMessage`` and its properties,
        paho's debug log line (not taken when paho has a logger or ``on_log``), filtered callbacks (the link
        registers none).  A packet the reader does not take (:meth:`_ChunkedReader.take_publish`) stops the run:
        paho reads it — unless it is the start of one it may take, cut by the chunk's end: that is held for the
        next read (:meth:`_ChunkedReader.hold`), and the keep-alive clock moves as paho's would for the bytes of its
        body received."""
        packet = client._in_packet  # paho's incoming-packet state, reset whole after each packet it has read
        if packet["command"] or packet["have_remaining"] or packet["remaining_count"]:
            return  # paho is inside a packet: the chunk goes on with the rest of it
        handler = self.on_payload
        if handler is None:
            return
        v5 = self.v5
        taken = 0
        while self._fd is not None:
            message = reader.take_publish(v5)
            if message is None:
                break
            taken += 1
            try:
                handler(*message)
            except Exception as exc:  # the handler's own bug must not break the read
                self._post(self._callback_failed, "on_message", repr(exc))
        held = reader.hold(v5) if self._fd is not None else -1
        if taken:
            self.fast_publishes += taken
        if taken or held > 0:
            with client._msgtime_mutex:
                client._last_bytes_received = mqtt.time_func()

    def _on_writable(self) -> None:
        client = self._paho
        if client is None:
            return
        try:
            client.loop_write()  # paho unregisters the writer (our callback) once nothing is left to write
        except Exception as exc:
            self._callback_failed("write", repr(exc))

    def _flush(self) -> None:
        """Write what paho queued during this iteration of the loop; wait for writability only for the rest."""
        self._flush_soon = False
        client = self._paho
        if client is None or self._fd is None:
            return
        try:
            if client.want_write():
                client.loop_write()
            if self._fd is not None and client.want_write() and not self._writer and self._loop is not None:
                self._loop.add_writer(self._fd, self._on_writable)
                self._writer = True
        except (OSError, ValueError):  # the socket was closed under paho: let its read find out
            self._post(self._on_readable)

    def _on_misc(self) -> None:
        self._misc = None
        client = self._paho
        if client is None or self._fd is None or self._loop is None:
            return
        try:
            client.loop_misc()  # keep-alive: PINGREQ, and closing a connection whose PINGRESP is overdue
        except Exception as exc:
            self._callback_failed("keep-alive", repr(exc))
        if self._fd is not None and self._misc is None:
            self._misc = self._loop.call_later(1.0, self._on_misc)

    # paho's socket callbacks: on the event loop, except during a connection attempt (the link's thread)

    def _cb_socket_open(self, client: mqtt.Client, _userdata: Any, sock: Any) -> None:
        # paho keeps its socket in ``_sock`` and offers no public way to read it in chunks: it is wrapped here, in
        # this one place, right after paho made it non-blocking and before paho sends CONNECT (the attribute
        # missing, paho reads its socket itself)
        if self.chunked_reads and getattr(client, "_sock", None) is sock:
            sock = client._sock = _ChunkedReader(sock)
        if self._on_loop():  # paho reconnecting by itself inside a read (MQTT 3.1 fallback): serve the new socket
            self._attach(sock)
        # in the link's thread (an attempt of _run): _run attaches it when the attempt returns

    def _cb_socket_close(self, _client: mqtt.Client, _userdata: Any, _sock: Any) -> None:
        if self._on_loop():
            self._detach()
        else:
            self._post(self._detach)

    def _cb_register_write(self, _client: mqtt.Client, _userdata: Any, _sock: Any) -> None:
        if not self._flush_soon:
            self._flush_soon = True
            self._post(self._flush)

    def _cb_unregister_write(self, _client: mqtt.Client, _userdata: Any, _sock: Any) -> None:
        if not self._on_loop():
            return
        if self._writer and self._fd is not None and self._loop is not None:
            self._loop.remove_writer(self._fd)
        self._writer = False

    # ------------------------------------------------------------------------------------------ publishing

    def publish(self, topic: str, payload: bytes, *, qos: int = 0, retain: bool = False,
                properties: Properties | None = None) -> mqtt.MQTTMessageInfo:
        """Publish (from the event loop).  Raises :class:`TopicRefused` for a topic that paho refuses or that was
        set aside; otherwise returns paho's message info (its ``rc`` says whether it was queued)."""
        client = self._client
        if client is None:
            raise TopicRefused("the link is stopped")
        reason = self.refused_topics.get(topic)
        if reason is not None:
            raise TopicRefused(reason)
        try:  # never under self._lock: paho calls on_publish holding its own lock (lock order)
            info = client.publish(topic, payload, qos=qos, retain=retain, properties=properties if self.v5 else None)
        except (ValueError, TypeError) as exc:  # paho: wildcards in a publish topic, bad UTF-8, payload too large
            raise TopicRefused(f"not publishable: {exc}") from exc
        if qos > 0 and info.rc == mqtt.MQTT_ERR_SUCCESS:
            # recorded before paho can write it (writes go out in a later callback of the loop): its acknowledgement
            # always finds it here
            with self._lock:
                self._inflight[info.mid] = topic
        return info

    def _text_props(self) -> Properties | None:
        if not self.v5:
            return None
        return publish_properties(content_type="text/plain", utf8=True)

    # ------------------------------------------------------------------------------------------ paho's callbacks

    def _post(self, fn: Callable[..., None], *args: Any) -> None:
        """Run ``fn`` on the event loop soon, outside paho's call (from the loop or from any thread)."""
        loop = self._loop
        if loop is None or loop.is_closed():
            return
        if self._on_loop():
            loop.call_soon(fn, *args)
        else:
            with contextlib.suppress(RuntimeError):
                loop.call_soon_threadsafe(fn, *args)

    def _cb_connect(self, client: mqtt.Client, _userdata: Any, flags: Any, reason: Any, _props: Any) -> None:
        try:
            if _is_failure(reason):
                self._post(self._refused, f"broker answered {describe_reason(reason)}")
                return
            if self.subscriptions:
                client.subscribe(self.subscriptions)
            if self.availability is not None:
                client.publish(self.availability.topic, self.availability.online, qos=1, retain=True,
                               properties=self._text_props())
            self._post(self._set_state, True, "", bool(getattr(flags, "session_present", False)))
        except Exception as exc:  # never let an exception escape into paho's loop
            self._post(self._callback_failed, "on_connect", repr(exc))

    def _cb_disconnect(self, client: mqtt.Client, _userdata: Any, _flags: Any, reason: Any, _props: Any) -> None:
        with contextlib.suppress(Exception):
            text = describe_reason(reason)
            with self._lock:
                oldest = next(iter(self._inflight.values()), None)
                set_aside = self._strike(oldest, text) if oldest is not None and not self._stopping else None
                purge = set(self._inflight) if not self.redeliver else set()
                if set_aside is not None:
                    purge |= {mid for mid, topic in self._inflight.items() if topic == set_aside}
                for mid in purge:
                    self._inflight.pop(mid, None)
            if purge or set_aside is not None:  # outside self._lock (lock order, see publish)
                _drop_queued(client, purge, set_aside)
            self._post(self._lost, text, _is_failure(reason), sorted(purge), set_aside)

    def _cb_publish(self, _client: mqtt.Client, _userdata: Any, mid: int, reason: Any, _props: Any) -> None:
        with contextlib.suppress(Exception):
            with self._lock:
                topic = self._inflight.pop(mid, None)
            if topic is None:  # untracked: QoS 0 (paho reports those as written), the availability messages
                return
            self._post(self._acked, mid, topic, not _is_failure(reason), describe_reason(reason),
                       int(getattr(reason, "value", 0)))

    def _cb_message(self, _client: mqtt.Client, _userdata: Any, msg: mqtt.MQTTMessage) -> None:
        try:
            if self.on_payload is not None:
                # paho's topic: a UnicodeDecodeError when not UTF-8; its payload: bytes (bytes() takes no copy of it)
                self.on_payload(msg.topic, bytes(msg.payload))
            elif self.on_message is not None:
                self.on_message(msg)
        except Exception as exc:  # the handler's own bug must not break paho's loop
            self._post(self._callback_failed, "on_message", repr(exc))

    # ------------------------------------------------------------------------------------------ event loop

    def _set_state(self, connected: bool, reason: str = "", session_present: bool = False) -> None:
        if connected == self._connected:
            return
        self._connected = connected
        if connected:
            self._delay = None  # the backoff starts again
            if self._ever_connected:
                self.reconnects += 1
            self._ever_connected = True
            self._log.info("MQTT connected", client_id=self.client_id, protocol=self.conn.protocol,
                           session_present=session_present if self.persistent_session else None)
        elif not self._stopping:
            self.rlog.warning("lost", "MQTT connection lost; reconnecting with backoff", reason=reason)
        if self.on_state is not None:
            self.on_state(connected)

    def _refused(self, reason: str) -> None:
        if self._stopping:
            return
        self.refusals += 1
        self.rlog.warning("refused", "broker refused the connection; retrying with backoff", reason=reason)

    def _strike(self, topic: str, reason: str) -> str | None:
        """(under the lock) One more drop with ``topic`` oldest in flight; the topic if it is now
        set aside."""
        n = self._strikes.get(topic, 0) + 1
        self._strikes = {topic: n}  # strikes count only in a row: a drop with another topic oldest resets them
        if n < MAX_STRIKES or topic in self.refused_topics:
            return None
        self.refused_topics[topic] = (f"the broker closed the connection {n} times in a row while a message on this "
                                      f"topic was the oldest unacknowledged one (last: {reason})")
        return topic

    def _lost(self, reason: str, failure: bool, dropped: list[int], set_aside: str | None) -> None:
        if not self._connected and failure and not self._stopping:
            # closed before it was ever up: e.g. the broker dropped the TLS session after the handshake because it
            # wanted a client certificate
            self._refused(f"connection closed before it was established ({reason})")
        elif failure and not self._stopping and self._connected:
            self.refusals += 1
            self.rlog.warning("disconnected", "broker closed the connection", reason=reason)
        if set_aside is not None:
            self._log.error("MQTT topic set aside: the broker will not take it; other topics go on", topic=set_aside,
                            reason=self.refused_topics[set_aside])
        self._set_state(False, reason)
        if self.on_ack is not None:
            for mid in dropped:
                self.on_ack(mid, "retry", f"connection lost before the broker acknowledged it ({reason})")

    def _acked(self, mid: int, topic: str, ok: bool, reason: str, code: int) -> None:
        if ok:
            with self._lock:
                self._strikes.pop(topic, None)
            status = "ok"
        elif code in TRANSIENT_REASONS:
            status = "retry"
        else:
            status = "refused"
            self.rlog.warning(("puback", topic), "broker refused a message", topic=topic, reason=reason)
        if self.on_ack is not None:
            self.on_ack(mid, status, reason)

    def _callback_failed(self, where: str, error: str) -> None:
        self.rlog.error(("error", where), "MQTT callback failed", where=where, error=error)

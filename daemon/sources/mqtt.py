"""MQTT source (paho-mqtt 2.x): subscribe to block topics and speed tags, hand raw payloads to the ingest.

The connection is an :class:`~edgevib.daemon.mqtt_client.MqttLink` (a reconnect loop with bounded
exponential backoff; every (re)connect resubscribes; a refusal — TCP refused, TLS handshake failure, a CONNACK
failure such as bad credentials — is logged as a rate-limited warning naming the URL and the reason, never a
secret).  Connection state goes to ``Ingest.connection`` (which counts reconnects).

The link's client is driven from the event loop and the source's callback (the link's ``on_payload``: topic and
payload, from paho's message or, for a QoS 0 PUBLISH up to a read chunk long, cut out by the link) runs there, inside
the read: a payload goes straight to the ingest (decoding, validation, frame assembly), with nothing queued in
between.  Called from another thread, or while payloads are still waiting, the callback instead appends the payload
to a hand-over queue and schedules one drain (``loop.call_soon_threadsafe``/``call_soon``) when none is pending
yet; the payloads waiting for the drain are bounded **by count and by bytes**: beyond either bound new payloads are
dropped and counted at once (reason ``overload``), so a flood of large payloads cannot exhaust memory.  A payload
above ``max_payload_bytes`` is never copied: it is counted as received and rejected (reason ``too_large``) at once,
in the same hand-over.

MQTT 3.1.1 and 5, TLS (CA pinning, client certificate and key with passphrase), username/password, QoS 0/1.
"""

from __future__ import annotations

import asyncio
import contextlib
import json
import math
import threading
import time
from collections import deque
from collections.abc import Callable, Iterable

from edgevib.daemon.config import MqttConnection, MqttSourceConfig
from edgevib.daemon.interfaces import Ingest, SourceError
from edgevib.daemon.logs import get_logger
from edgevib.daemon.mqtt_client import MqttLink, describe_connect_failure, make_client

__all__ = ["MqttSource", "describe_connect_failure", "make_client", "parse_speed_payload"]

log = get_logger("edgevib.sources.mqtt")
MAX_PENDING = 20_000
MAX_PENDING_BYTES = 64 * 1024 * 1024


def parse_speed_payload(payload: bytes) -> float | None:
    """A speed tag value: a plain number, a JSON number, or a JSON object with ``value`` (``None`` if neither)."""
    if len(payload) > 1024:
        return None
    try:
        text = payload.decode("utf-8").strip()
    except UnicodeDecodeError:
        return None
    try:
        return float(text)
    except ValueError:
        pass
    try:
        doc = json.loads(text)
    except (json.JSONDecodeError, RecursionError):
        return None
    if isinstance(doc, dict):
        doc = doc.get("value")
    if isinstance(doc, bool) or not isinstance(doc, int | float):
        return None
    return float(doc)


class MqttSource:
    """Blocks and speed tags from one MQTT broker; implements :class:`~edgevib.daemon.interfaces.Source`."""

    def __init__(self, *, name: str, ingest: Ingest, connection: MqttConnection, topics: Iterable[str],
                 qos: int = 1, speed_topics: Iterable[str] = (), max_payload_bytes: int = 4 * 1024 * 1024,
                 max_pending: int = MAX_PENDING, max_pending_bytes: int = MAX_PENDING_BYTES) -> None:
        self.name = name
        self.ingest = ingest
        self.conn = connection
        self.topics = list(topics)
        self.speed_topics = set(speed_topics)
        self.qos = qos
        self.max_payload_bytes = max_payload_bytes
        self.max_pending = max_pending
        self.max_pending_bytes = max_pending_bytes
        self._stop = asyncio.Event()
        self._loop: asyncio.AbstractEventLoop | None = None
        self._loop_thread = 0
        self._lock = threading.Lock()
        self._pending = 0
        self._pending_bytes = 0
        self._inbox: deque[tuple[str, bytes, int]] = deque()  # paho's read → the drain, under _lock
        self._drops: dict[str, tuple[int, str, int, str]] = {}  # reason -> (count, last topic, size, queue state)
        self._wake_scheduled = False  # a _drain is queued on the loop: no need to wake it again
        subs = [(t, qos) for t in [*self.topics, *sorted(self.speed_topics - set(self.topics))]]
        self.link = MqttLink(connection, role=f"source {name}", subscriptions=subs, on_payload=self._on_payload,
                             on_state=self._on_state)
        self.rlog = self.link.rlog

    @classmethod
    def from_config(cls, cfg: MqttSourceConfig, ingest: Ingest, speed_topics: Iterable[str] = ()) -> MqttSource:
        return cls(name=cfg.name, ingest=ingest, connection=cfg.connection, topics=cfg.topics, qos=cfg.qos,
                   speed_topics=speed_topics, max_payload_bytes=cfg.max_payload_bytes,
                   max_pending_bytes=cfg.max_pending_bytes)

    @property
    def connected(self) -> bool:
        return self.link.connected

    @property
    def pending_bytes(self) -> int:
        """Bytes of payloads handed to the event loop and not yet delivered to the ingest."""
        return self._pending_bytes

    # -- inside paho's read (or any thread): hand over, never raise (MqttLink catches what escapes)

    def _on_payload(self, topic: str, payload: bytes) -> None:
        received_ns = time.time_ns()
        size = len(payload)
        if size <= self.max_payload_bytes and threading.get_ident() == self._loop_thread and not self._pending:
            # on the event loop with nothing waiting (the usual case): straight to the ingest, in order
            self._deliver(topic, payload, received_ns)
            return
        with self._lock:
            if size > self.max_payload_bytes:
                self._drop("too_large", topic, size, "")
            elif self._pending >= self.max_pending or self._pending_bytes + size > self.max_pending_bytes:
                self._drop("overload", topic, size, f"{self._pending} payloads, {self._pending_bytes} bytes")
            else:
                self._pending += 1
                self._pending_bytes += size
                self._inbox.append((topic, payload, received_ns))
            wake = not self._wake_scheduled
            self._wake_scheduled = True
        if wake:  # one hand-over per burst: the event loop drains everything queued by then
            self._to_loop(self._drain)

    def _drop(self, reason: str, topic: str, size: int, queue: str) -> None:
        """(under the lock) Count a dropped payload; the next drain reports it."""
        count = self._drops.get(reason, (0, "", 0, ""))[0]
        self._drops[reason] = (count + 1, topic, size, queue)

    def _to_loop(self, fn: Callable[..., None], *args: object) -> None:
        loop = self._loop
        if loop is None or loop.is_closed():
            return
        if threading.get_ident() == self._loop_thread:
            loop.call_soon(fn, *args)
        else:
            with contextlib.suppress(RuntimeError):
                loop.call_soon_threadsafe(fn, *args)

    # -- event loop

    def _drain(self) -> None:
        """Count the dropped payloads and hand every queued one to the ingest (on the event loop), in order."""
        with self._lock:
            batch, drops = self._inbox, self._drops
            self._inbox, self._drops = deque(), {}
            self._wake_scheduled = False
            self._pending -= len(batch)
            self._pending_bytes -= sum(len(p) for _, p, _ in batch)
        for reason, (count, topic, size, queue) in drops.items():
            if reason == "too_large":
                detail = (f"payload of {size} bytes exceeds the limit of {self.max_payload_bytes} bytes "
                          f"(max_payload_bytes)")
            else:
                detail = (f"payload of {size} bytes dropped: the event loop is behind ({queue} waiting; bounds "
                          f"{self.max_pending} payloads, {self.max_pending_bytes} bytes)")
            for _ in range(count):
                self.ingest.reject(self.name, reason, detail, topic, received=True)
        for item in batch:
            self._deliver(*item)

    def _deliver(self, topic: str, payload: bytes, received_ns: int) -> None:
        if topic in self.speed_topics:
            value = parse_speed_payload(payload)
            if value is None or not math.isfinite(value):
                self.ingest.reject(self.name, "invalid_speed", "speed payload is not a number", topic)
            else:
                self.ingest.speed(self.name, topic, value, received_ns)
            return
        self.ingest.payload(self.name, topic, payload, received_ns)

    def _on_state(self, connected: bool) -> None:
        self.ingest.connection(self.name, connected)

    async def run(self) -> None:
        self._loop = asyncio.get_running_loop()
        self._loop_thread = threading.get_ident()
        self._stop.clear()
        try:
            await self.link.start()
        except SourceError as exc:
            log.error("MQTT source cannot start", source=self.name, error=str(exc))
            await self._stop.wait()
            return
        try:
            log.info("MQTT source started", source=self.name, url=self.conn.url, topics=self.topics,
                     protocol=self.conn.protocol)
            await self._stop.wait()
        finally:
            await self.link.stop(flush_s=0.0)

    async def stop(self) -> None:
        self._stop.set()

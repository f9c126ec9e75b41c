"""MQTT source (paho-mqtt 2.x): subscribe to block topics and speed tags, hand raw payloads to the ingest.

paho runs its network loop in its own thread (``loop_start``).  Its callbacks only hand the payload to the event
loop: they append it to a hand-over queue and wake the loop with ``loop.call_soon_threadsafe`` only when no wake-up
is pending yet (one per burst of messages, not one per message).  Decoding, validation and analysis never run on
paho's thread, and no exception escapes a callback.  The number of payloads waiting for the event loop is bounded:
beyond it new payloads are dropped and counted (reason ``overload``), so a flood cannot exhaust memory.

Reconnection is paho's own loop with bounded exponential backoff (``reconnect_delay_set``); every (re)connect
resubscribes in ``on_connect`` and reports the state through ``Ingest.connection`` (which counts reconnects).
A connection the broker refuses (TCP refused, TLS handshake failure, CONNACK with a failure reason such as bad
credentials) is logged as a rate-limited warning naming the URL and the reason, never a secret.
MQTT 3.1.1 and 5, TLS (CA pinning, client certificate and key with passphrase), username/password, QoS 0/1.
"""

from __future__ import annotations

import asyncio
import contextlib
import json
import math
import socket
import ssl
import sys
import threading
import time
from collections import deque
from collections.abc import Iterable
from typing import Any

import paho.mqtt.client as mqtt
from paho.mqtt.enums import CallbackAPIVersion

from edgevib.daemon.config import MqttConnection, MqttSourceConfig
from edgevib.daemon.interfaces import Ingest, SourceError
from edgevib.daemon.logs import RateLimitedLogger, get_logger

__all__ = ["MqttSource", "describe_connect_failure", "make_client", "parse_speed_payload"]

log = get_logger("edgevib.sources.mqtt")
MAX_PENDING = 20_000


def make_client(conn: MqttConnection, client_id: str | None = None) -> mqtt.Client:
    """A configured (not yet connected) paho client for ``conn``; library errors become :class:`SourceError`."""
    v5 = conn.protocol == "5"
    kwargs: dict[str, Any] = {"client_id": client_id or conn.client_id,
                              "protocol": mqtt.MQTTv5 if v5 else mqtt.MQTTv311}
    if not v5:
        kwargs["clean_session"] = True
    client = mqtt.Client(CallbackAPIVersion.VERSION2, **kwargs)
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
    return client


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
                 max_pending: int = MAX_PENDING) -> None:
        self.name = name
        self.ingest = ingest
        self.conn = connection
        self.topics = list(topics)
        self.speed_topics = set(speed_topics)
        self.qos = qos
        self.max_payload_bytes = max_payload_bytes
        self.max_pending = max_pending
        self._connected = False
        self._stop = asyncio.Event()
        self._loop: asyncio.AbstractEventLoop | None = None
        self._client: mqtt.Client | None = None
        self._lock = threading.Lock()
        self._pending = 0
        self._inbox: deque[tuple[str, bytes, int]] = deque()  # paho thread → event loop, under _lock
        self._wake_scheduled = False  # a _drain is queued on the loop: no need to wake it again
        self._overflow = 0
        self._oversize = 0
        self.rlog = RateLimitedLogger(log.bind(source=name), interval_s=10.0)

    @classmethod
    def from_config(cls, cfg: MqttSourceConfig, ingest: Ingest, speed_topics: Iterable[str] = ()) -> MqttSource:
        return cls(name=cfg.name, ingest=ingest, connection=cfg.connection, topics=cfg.topics, qos=cfg.qos,
                   speed_topics=speed_topics, max_payload_bytes=cfg.max_payload_bytes)

    @property
    def connected(self) -> bool:
        return self._connected

    # -- paho thread: do almost nothing, never raise

    def _on_connect(self, client: mqtt.Client, _userdata: Any, _flags: Any, reason_code: Any,
                    _properties: Any) -> None:
        try:
            if getattr(reason_code, "is_failure", False):
                self._to_loop(self._log_refused, f"broker answered {reason_code}")
                return
            subs = [(t, self.qos) for t in [*self.topics, *sorted(self.speed_topics - set(self.topics))]]
            client.subscribe(subs)
            self._to_loop(self._set_connected, True)
        except Exception as exc:  # never let an exception escape into paho's loop
            self._to_loop(self._log_error, "on_connect", repr(exc))

    def _on_connect_fail(self, _client: mqtt.Client, _userdata: Any) -> None:
        # paho calls this inside its ``except OSError`` around the connect attempt: the error is the one handled
        with contextlib.suppress(Exception):
            self._to_loop(self._log_refused, describe_connect_failure(sys.exc_info()[1]))

    def _on_disconnect(self, _client: mqtt.Client, _userdata: Any, _flags: Any, reason_code: Any,
                       _properties: Any) -> None:
        with contextlib.suppress(Exception):
            failure = bool(getattr(reason_code, "is_failure", False))
            self._to_loop(self._set_connected, False, str(reason_code), failure)

    def _on_message(self, _client: mqtt.Client, _userdata: Any, msg: mqtt.MQTTMessage) -> None:
        try:
            received_ns = time.time_ns()
            if len(msg.payload) > self.max_payload_bytes:
                with self._lock:
                    self._oversize += 1
                return
            with self._lock:
                if self._pending >= self.max_pending:
                    self._overflow += 1
                    return
                self._pending += 1
                self._inbox.append((msg.topic, bytes(msg.payload), received_ns))
                wake = not self._wake_scheduled
                self._wake_scheduled = True
            if wake:  # one hand-over per burst: the event loop drains everything queued by then
                self._to_loop(self._drain)
        except Exception:  # a malformed topic (bad UTF-8) or a closed loop: drop it
            with self._lock:
                self._overflow += 1

    def _to_loop(self, fn: Any, *args: Any) -> None:
        loop = self._loop
        if loop is not None and not loop.is_closed():
            with contextlib.suppress(RuntimeError):
                loop.call_soon_threadsafe(fn, *args)

    # -- event loop

    def _drain(self) -> None:
        """Hand every queued payload to the ingest (on the event loop), in arrival order."""
        with self._lock:
            batch = self._inbox
            self._inbox = deque()
            self._wake_scheduled = False
        for item in batch:
            self._deliver(*item)

    def _deliver(self, topic: str, payload: bytes, received_ns: int) -> None:
        with self._lock:
            self._pending -= 1
            overflow, oversize = self._overflow, self._oversize
            self._overflow = self._oversize = 0
        if overflow:
            for _ in range(overflow):
                self.ingest.reject(self.name, "overload", f"{overflow} payload(s) dropped: the event loop is behind")
        if oversize:
            for _ in range(oversize):
                self.ingest.reject(self.name, "too_large",
                                   f"payload above the limit of {self.max_payload_bytes} bytes", topic)
        if topic in self.speed_topics:
            value = parse_speed_payload(payload)
            if value is None or not math.isfinite(value):
                self.ingest.reject(self.name, "invalid_speed", "speed payload is not a number", topic)
            else:
                self.ingest.speed(self.name, topic, value, received_ns)
            return
        self.ingest.payload(self.name, topic, payload, received_ns)

    def _set_connected(self, connected: bool, reason: str = "", failure: bool = False) -> None:
        if not connected and not self._connected and failure and not self._stop.is_set():
            # closed before it was ever up: e.g. the broker dropped the TLS session after the handshake because
            # it wanted a client certificate
            self._log_refused(f"connection closed before it was established ({reason})")
            return
        if connected == self._connected:
            return
        self._connected = connected
        if not connected and reason:
            self.rlog.warning("disconnect", "broker connection lost", url=self.conn.url, reason=reason)
        self.ingest.connection(self.name, connected)

    def _log_refused(self, reason: str) -> None:
        if self._stop.is_set():
            return
        self.rlog.warning("refused", "broker refused the connection; retrying with backoff", url=self.conn.url,
                          reason=reason)

    def _log_error(self, where: str, error: str) -> None:
        self.rlog.error(("error", where), "MQTT callback failed", where=where, error=error)

    async def run(self) -> None:
        self._loop = asyncio.get_running_loop()
        self._stop.clear()
        try:
            client = make_client(self.conn)
        except SourceError as exc:
            log.error("MQTT source cannot start", source=self.name, error=str(exc))
            await self._stop.wait()
            return
        client.on_connect = self._on_connect
        client.on_connect_fail = self._on_connect_fail
        client.on_disconnect = self._on_disconnect
        client.on_message = self._on_message
        self._client = client
        try:
            client.connect_async(self.conn.host, self.conn.port, keepalive=max(5, round(self.conn.keepalive_s)))
            client.loop_start()
            log.info("MQTT source started", source=self.name, url=self.conn.url, topics=self.topics,
                     protocol=self.conn.protocol)
            await self._stop.wait()
        finally:
            with contextlib.suppress(Exception):
                client.disconnect()
            await asyncio.to_thread(client.loop_stop)
            self._client = None
            if self._connected:
                self._set_connected(False)

    async def stop(self) -> None:
        self._stop.set()

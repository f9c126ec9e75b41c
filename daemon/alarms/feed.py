"""The alarm feed: CloudEvents 1.0 (structured-mode JSON) from the outbox to MQTT and, optionally, an HTTP webhook.

Event types (our own names under a neutral reverse-DNS prefix, versioned)::

    io.edgevib.alarm.v1.transition   an alarm changed state (raised, escalated, cleared, acknowledged, ...)
    io.edgevib.sensor.v1.fault       a sensor fault was raised or cleared (never a machine fault)
    io.edgevib.baseline.v1.learned   a baseline finished learning (or was reset for re-learning)

MQTT: every event is published with QoS 1 and stays pending in the outbox until its PUBACK arrives; each point's
current state is published retained on its state topic (again after every reconnect).  Commands arrive on the
command topic and are answered on the response topic.  paho's own network thread reconnects with bounded
exponential backoff; its callbacks only hand work to the event loop.

Webhook: each event is POSTed as ``application/cloudevents+json``; a 2xx confirms it, a network error or a
5xx/408/425/429 is retried with exponential backoff, any other status is counted as rejected and not retried.
"""

from __future__ import annotations

import asyncio
import contextlib
import json
import ssl
import urllib.error
import urllib.request
from collections.abc import Callable
from typing import Any

import paho.mqtt.client as mqtt
import structlog
from paho.mqtt.enums import CallbackAPIVersion

from edgevib.daemon.alarms.config import FeedConfig, WebhookConfig
from edgevib.daemon.alarms.outbox import Outbox, OutboxEvent, new_event_id
from edgevib.daemon.timestamps import rfc3339_utc

__all__ = [
    "ALARM_TYPE",
    "BASELINE_TYPE",
    "SENSOR_TYPE",
    "MqttFeed",
    "WebhookFeed",
    "cloud_event",
]

log = structlog.get_logger("edgevib.alarms.feed")

ALARM_TYPE = "io.edgevib.alarm.v1.transition"
SENSOR_TYPE = "io.edgevib.sensor.v1.fault"
BASELINE_TYPE = "io.edgevib.baseline.v1.learned"
PUBACK_TIMEOUT_S = 15.0
BATCH = 50


def cloud_event(*, type_: str, source: str, subject: str, data: dict[str, Any], time_ns: int,
                event_id: str | None = None) -> dict[str, Any]:
    """A CloudEvents 1.0 event in structured mode (all required and the used optional attributes)."""
    return {"specversion": "1.0", "id": event_id or new_event_id(), "source": source, "type": type_,
            "subject": subject, "time": rfc3339_utc(time_ns), "datacontenttype": "application/json", "data": data}


async def _next_batch(outbox: Outbox, sink: str, wake: asyncio.Event) -> list[OutboxEvent]:
    """The next pending events of ``sink``; when there are none, an empty list after waiting (at most 5 s) for
    ``wake`` (set when an event is committed)."""
    batch = await asyncio.to_thread(outbox.pending, sink, BATCH)
    if not batch:
        wake.clear()
        with contextlib.suppress(TimeoutError):
            await asyncio.wait_for(wake.wait(), timeout=5.0)
    return batch


class MqttFeed:
    """Publishes pending outbox events to the feed broker with QoS 1 and keeps the retained state topics fresh.

    ``states()`` returns ``{point: (topic, payload)}`` of every point's retained state message;
    ``on_command(payload)`` answers a command (JSON bytes in, JSON bytes out).  ``published`` counts confirmed events.
    """

    sink = "mqtt"

    def __init__(self, cfg: FeedConfig, outbox: Outbox, states: Callable[[], dict[str, tuple[str, bytes]]],
                 on_command: Callable[[bytes], bytes] | None = None) -> None:
        if cfg.connection is None:
            raise ValueError("the MQTT feed needs a broker connection ([feed] source or url)")
        self.cfg = cfg
        self.conn = cfg.connection
        self.outbox = outbox
        self.states = states
        self.on_command = on_command
        self.published = 0
        self.reconnects = 0
        self._loop: asyncio.AbstractEventLoop | None = None
        self._client: mqtt.Client | None = None
        self._connected = asyncio.Event()
        self._wake = asyncio.Event()
        self._acks: dict[int, asyncio.Future[bool]] = {}
        self._stopping = False
        self._ever_connected = False

    @property
    def connected(self) -> bool:
        return self._connected.is_set()

    def wake(self) -> None:
        """New events are in the outbox."""
        self._wake.set()

    # ---- paho callbacks (paho's thread): hand over to the loop, never raise
    def _post(self, fn: Callable[..., None], *args: Any) -> None:
        loop = self._loop
        if loop is not None and not loop.is_closed():
            with contextlib.suppress(RuntimeError):
                loop.call_soon_threadsafe(fn, *args)

    def _cb_connect(self, client: Any, userdata: Any, flags: Any, reason: Any, props: Any = None) -> None:
        if not getattr(reason, "is_failure", False):
            if self.cfg.command_topic and self.on_command is not None:
                client.subscribe(self.cfg.command_topic, qos=1)
            self._post(self._on_connected)

    def _cb_disconnect(self, client: Any, userdata: Any, flags: Any, reason: Any = None, props: Any = None) -> None:
        self._post(self._on_disconnected)

    def _cb_publish(self, client: Any, userdata: Any, mid: int, reason: Any = None, props: Any = None) -> None:
        self._post(self._on_puback, mid, not getattr(reason, "is_failure", False))

    def _cb_message(self, client: Any, userdata: Any, msg: Any) -> None:
        self._post(self._on_message, bytes(msg.payload))

    # ---- on the loop
    def _on_connected(self) -> None:
        if self._ever_connected:
            self.reconnects += 1
        self._ever_connected = True
        self._connected.set()
        log.info("feed broker connected", url=self.conn.url)
        self.publish_states()
        self._wake.set()

    def _on_disconnected(self) -> None:
        if self._connected.is_set():
            log.warning("feed broker connection lost", url=self.conn.url)
        self._connected.clear()
        for fut in self._acks.values():
            if not fut.done():
                fut.set_result(False)
        self._acks.clear()

    def _on_puback(self, mid: int, ok: bool) -> None:
        fut = self._acks.pop(mid, None)
        if fut is not None and not fut.done():
            fut.set_result(ok)

    def _on_message(self, payload: bytes) -> None:
        if self.on_command is None or self._client is None or not self.cfg.response_topic:
            return
        try:
            response = self.on_command(payload)
        except Exception as exc:  # a command handler never takes the feed down
            log.warning("command failed", error=str(exc))
            return
        self._client.publish(self.cfg.response_topic, response, qos=1)

    def publish_states(self, points: set[str] | None = None) -> None:
        """Publish the retained state messages of all points (or of ``points``) when connected."""
        if self._client is None or not self.connected:
            return
        for point, (topic, payload) in self.states().items():
            if points is None or point in points:
                self._client.publish(topic, payload, qos=1, retain=True)

    def _make_client(self) -> mqtt.Client:
        c = self.conn
        proto = mqtt.MQTTv5 if c.protocol == "5" else mqtt.MQTTv311
        client = mqtt.Client(callback_api_version=CallbackAPIVersion.VERSION2, client_id=c.client_id,
                             protocol=proto)
        if c.username is not None:
            client.username_pw_set(c.username, c.password.reveal() if c.password is not None else None)
        if c.tls:
            client.tls_set(ca_certs=c.ca_file, certfile=c.cert_file, keyfile=c.key_file,
                           keyfile_password=c.key_password.reveal() if c.key_password is not None else None,
                           cert_reqs=ssl.CERT_REQUIRED)
        client.reconnect_delay_set(min_delay=max(1, round(c.reconnect_min_s)), max_delay=max(1, round(
            c.reconnect_max_s)))
        client.max_inflight_messages_set(BATCH)
        client.on_connect = self._cb_connect
        client.on_disconnect = self._cb_disconnect
        client.on_publish = self._cb_publish
        client.on_message = self._cb_message
        return client

    async def run(self) -> None:
        """Connect (retrying with backoff), then deliver pending events until :meth:`stop`."""
        self._loop = asyncio.get_running_loop()
        self._client = client = self._make_client()
        # paho's network thread connects, and reconnects with its bounded backoff, on its own.
        client.connect_async(self.conn.host, self.conn.port, max(5, round(self.conn.keepalive_s)))
        client.loop_start()
        try:
            while not self._stopping:
                await self._connected.wait()
                if self._stopping:
                    break
                batch = await _next_batch(self.outbox, self.sink, self._wake)
                if not batch:
                    continue
                done = await self._send(batch)
                if done:
                    await asyncio.to_thread(self.outbox.mark_delivered, self.sink, [e.seq for e in done])
                    self.published += len(done)
                if len(done) < len(batch):
                    await asyncio.sleep(min(1.0, self.conn.reconnect_min_s))
        finally:
            client.loop_stop()

    async def _send(self, batch: list[OutboxEvent]) -> list[OutboxEvent]:
        assert self._client is not None
        futs: list[tuple[OutboxEvent, asyncio.Future[bool]]] = []
        for e in batch:
            if not self.connected:
                break
            info = self._client.publish(e.topic, e.body.encode("utf-8"), qos=1)
            if info.rc != mqtt.MQTT_ERR_SUCCESS:
                break
            fut: asyncio.Future[bool] = asyncio.get_running_loop().create_future()
            self._acks[info.mid] = fut
            futs.append((e, fut))
        done: list[OutboxEvent] = []
        for e, fut in futs:
            try:
                ok = await asyncio.wait_for(fut, timeout=PUBACK_TIMEOUT_S)
            except TimeoutError:
                ok = False
            if not ok:
                break  # keep order: the rest is retried
            done.append(e)
        return done

    async def stop(self) -> None:
        self._stopping = True
        self._connected.set()
        self._wake.set()
        client = self._client
        if client is not None:
            with contextlib.suppress(Exception):
                await asyncio.to_thread(client.disconnect)


class WebhookFeed:
    """POSTs pending outbox events to an HTTP endpoint, retrying with exponential backoff."""

    sink = "webhook"

    def __init__(self, cfg: WebhookConfig, outbox: Outbox) -> None:
        self.cfg = cfg
        self.outbox = outbox
        self.published = 0
        self.rejected = 0
        self._stopping = False
        self._wake = asyncio.Event()

    def wake(self) -> None:
        self._wake.set()

    def _post(self, body: str) -> int:
        req = urllib.request.Request(self.cfg.url, data=body.encode("utf-8"), method="POST",
                                     headers={"Content-Type": "application/cloudevents+json; charset=utf-8"})
        if self.cfg.token is not None:
            req.add_header("Authorization", f"Bearer {self.cfg.token.reveal()}")
        try:
            with urllib.request.urlopen(req, timeout=self.cfg.timeout_s) as resp:
                return int(resp.status)
        except urllib.error.HTTPError as exc:
            return int(exc.code)
        except (urllib.error.URLError, OSError, TimeoutError):
            return 0

    async def run(self) -> None:
        delay = self.cfg.retry_min_s
        while not self._stopping:
            batch = await _next_batch(self.outbox, self.sink, self._wake)
            if not batch:
                continue
            for e in batch:
                if self._stopping:
                    return
                status = await asyncio.to_thread(self._post, e.body)
                if 200 <= status < 300:
                    self.published += 1
                elif status and status < 500 and status not in (408, 425, 429):
                    self.rejected += 1
                    log.warning("webhook rejected an event; not retried", status=status, id=e.id)
                else:
                    log.warning("webhook delivery failed; retrying", status=status or "no connection",
                                retry_s=delay)
                    await asyncio.to_thread(self.outbox.mark_attempt, self.sink, [e.seq])
                    self._wake.clear()
                    with contextlib.suppress(TimeoutError):
                        await asyncio.wait_for(self._stop_wait(), timeout=delay)
                    delay = min(2 * delay, self.cfg.retry_max_s)
                    break
                delay = self.cfg.retry_min_s
                await asyncio.to_thread(self.outbox.mark_delivered, self.sink, [e.seq])

    async def _stop_wait(self) -> None:
        while not self._stopping:
            await asyncio.sleep(0.1)

    async def stop(self) -> None:
        self._stopping = True
        self._wake.set()


def event_body(event: dict[str, Any]) -> str:
    return json.dumps(event, separators=(",", ":"), allow_nan=False)

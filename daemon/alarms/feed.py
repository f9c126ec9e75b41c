"""The alarm feed: CloudEvents 1.0 from the outbox to MQTT and, optionally, an HTTP webhook.

Event types (our own names under a neutral reverse-DNS prefix, versioned)::

    io.edgevib.alarm.v1.transition   an alarm changed state (raised, escalated, cleared, acknowledged, ...)
    io.edgevib.sensor.v1.fault       a sensor fault was raised or cleared (never a machine fault)
    io.edgevib.baseline.v1.learned   a baseline finished learning (or was reset for re-learning)
    io.edgevib.source.v1.down        a source's data path is lost (connection down, or none of its points delivers)
    io.edgevib.source.v1.up          it is back

MQTT (CloudEvents MQTT protocol binding 1.0): every event is published with QoS 1 and stays pending in the outbox
until its PUBACK arrives.  Structured mode (the default) carries the whole event as JSON; on MQTT 5 the PUBLISH has
Content Type ``application/cloudevents+json`` and Payload Format Indicator 1.  Binary mode (MQTT 5 only) carries
``data`` as the payload with Content Type ``datacontenttype`` and every other attribute as a User Property of the
same name.  An event the broker will not take (a topic it refuses, a PUBACK with a failure reason code, a topic
after which the broker keeps closing the connection) is set aside — counted in ``rejected``, logged with the
reason, removed from this sink's queue — and never blocks the events behind it.

Each point's state is published retained on its state topic when it changes (a new value or time alone is not a
change) and for every point after each (re)connect.  Commands arrive on the command topic (a persistent session,
so commands sent while edgevib restarts wait at the broker); the answer goes to the request's MQTT 5 Response Topic
with its Correlation Data, else to the configured response topic.  An availability topic holds a retained
``online`` while the feed is connected and ``offline`` after a clean stop or, as the Last Will, when edgevib dies.
The connection itself is :class:`edgevib.daemon.mqtt_client.MqttLink` (paho's reconnect loop with bounded
backoff; refusals logged with the broker's reason).

Webhook (CloudEvents HTTP protocol binding 1.0.2): structured mode POSTs the event as
``application/cloudevents+json``; binary mode POSTs ``data`` with ``Content-Type: application/json`` and the other
attributes as ``ce-`` headers.  A 2xx confirms it, a network error or a 5xx/408/425/429 is retried with
exponential backoff, any other status is counted as rejected and not retried.
"""

from __future__ import annotations

import asyncio
import contextlib
import json
import urllib.error
import urllib.parse
import urllib.request
from collections.abc import Awaitable, Callable, Iterable
from typing import Any, Protocol

import structlog

from edgevib.daemon.alarms.config import FeedConfig, WebhookConfig
from edgevib.daemon.alarms.outbox import OutboxEvent, new_event_id
from edgevib.daemon.mqtt_client import Availability, MqttLink, TopicRefused, publish_properties
from edgevib.daemon.timestamps import rfc3339_utc

__all__ = [
    "ALARM_TYPE",
    "BASELINE_TYPE",
    "SENSOR_TYPE",
    "SOURCE_DOWN_TYPE",
    "SOURCE_UP_TYPE",
    "STRUCTURED_CONTENT_TYPE",
    "MqttFeed",
    "WebhookFeed",
    "binary_parts",
    "cloud_event",
    "event_body",
    "state_fingerprint",
]

log = structlog.get_logger("edgevib.alarms.feed")

ALARM_TYPE = "io.edgevib.alarm.v1.transition"
SENSOR_TYPE = "io.edgevib.sensor.v1.fault"
BASELINE_TYPE = "io.edgevib.baseline.v1.learned"
SOURCE_DOWN_TYPE = "io.edgevib.source.v1.down"
SOURCE_UP_TYPE = "io.edgevib.source.v1.up"
STRUCTURED_CONTENT_TYPE = "application/cloudevents+json"  # CloudEvents JSON event format 1.0, §3 (media type)
PUBACK_TIMEOUT_S = 15.0
BATCH = 50
RESPONSE_EXPIRY_S = 300  # a command answer nobody picked up within 5 minutes is of no use to anyone


def cloud_event(*, type_: str, source: str, subject: str, data: dict[str, Any], time_ns: int,
                event_id: str | None = None, dataschema: str | None = None) -> dict[str, Any]:
    """A CloudEvents 1.0 event in structured mode (all required and the used optional attributes)."""
    event: dict[str, Any] = {"specversion": "1.0", "id": event_id or new_event_id(), "source": source, "type": type_,
             "subject": subject, "time": rfc3339_utc(time_ns), "datacontenttype": "application/json"}
    if dataschema:
        event["dataschema"] = dataschema
    event["data"] = data
    return event


def event_body(event: dict[str, Any]) -> str:
    return json.dumps(event, separators=(",", ":"), allow_nan=False)


def binary_parts(body: str) -> tuple[dict[str, str], str, bytes]:
    """A stored structured event split for binary mode: ``(attributes as strings, datacontenttype, data bytes)``."""
    event = json.loads(body)
    data = event.pop("data", None)
    content_type = str(event.pop("datacontenttype", "application/json"))
    attrs = {k: v if isinstance(v, str) else json.dumps(v) for k, v in event.items()}
    payload = json.dumps(data, separators=(",", ":"), allow_nan=False).encode("utf-8")
    return attrs, content_type, payload


_VOLATILE = ("time",)
_VOLATILE_ALARM = ("value",)
_VOLATILE_BASELINE = ("mean", "std", "frames")


def state_fingerprint(payload: bytes) -> str:
    """The part of a state message whose change warrants a new retained message: everything but the time, the
    latest values and a learning baseline's running statistics."""
    try:
        doc = json.loads(payload)
    except (ValueError, UnicodeDecodeError):
        return payload.decode("utf-8", "replace")
    if not isinstance(doc, dict):
        return json.dumps(doc, sort_keys=True)
    for k in _VOLATILE:
        doc.pop(k, None)
    alarms = doc.get("alarms")
    if isinstance(alarms, dict):
        for row in alarms.values():
            if isinstance(row, dict):
                for k in _VOLATILE_ALARM:
                    row.pop(k, None)
                base = row.get("baseline")
                if isinstance(base, dict):
                    for k in _VOLATILE_BASELINE:
                        base.pop(k, None)
    return json.dumps(doc, sort_keys=True, separators=(",", ":"))


Io = Callable[..., Awaitable[Any]]
"""How a feed runs the outbox's blocking calls: ``await io(fn, *args)`` (the alarm store's worker; by default a
thread of its own)."""


class Pending(Protocol):
    """The pending events a feed delivers: an :class:`Outbox`, or the alarm store in front of its own."""

    def pending(self, sink: str, limit: int = 100) -> list[OutboxEvent]: ...
    def mark_delivered(self, sink: str, seqs: Iterable[int]) -> None: ...
    def mark_attempt(self, sink: str, seqs: Iterable[int]) -> None: ...


async def _next_batch(outbox: Pending, sink: str, wake: asyncio.Event, limit: int = BATCH,
                      io: Io = asyncio.to_thread) -> list[OutboxEvent]:
    """The next pending events of ``sink``; when there are none, an empty list after waiting (at most 5 s) for
    ``wake`` (set when an event is committed)."""
    batch: list[OutboxEvent] = await io(outbox.pending, sink, limit)
    if not batch:
        wake.clear()
        with contextlib.suppress(TimeoutError):
            await asyncio.wait_for(wake.wait(), timeout=5.0)
    return batch


class MqttFeed:
    """Publishes pending outbox events to the feed broker with QoS 1 and keeps the retained state topics fresh.

    ``states()`` returns ``{point: (topic, payload)}`` of every point's retained state message;
    ``on_command(payload)`` answers a command (JSON bytes in, JSON bytes out; run in a worker thread).
    ``published`` counts confirmed events, ``rejected`` the events set aside because the broker will not take them.
    """

    sink = "mqtt"

    def __init__(self, cfg: FeedConfig, outbox: Pending, states: Callable[[], dict[str, tuple[str, bytes]]],
                 on_command: Callable[[bytes], bytes] | None = None, io: Io = asyncio.to_thread) -> None:
        if cfg.connection is None:
            raise ValueError("the MQTT feed needs a broker connection ([feed] source or url)")
        self.cfg = cfg
        self.conn = cfg.connection
        self.outbox = outbox
        self.io = io
        self.states = states
        self.on_command = on_command
        self.published = 0
        self.rejected = 0
        self._binary = cfg.content_mode == "binary" and self.conn.protocol == "5"
        subs = [(cfg.command_topic, 1)] if cfg.command_topic and on_command is not None else []
        self.link = MqttLink(
            self.conn, role="alarm feed", subscriptions=subs, persistent_session=bool(subs),
            session_expiry_s=cfg.session_expiry_s,
            availability=Availability(cfg.availability_topic) if cfg.availability_topic else None,
            on_state=self._on_state, on_message=self._cb_message, on_ack=self._on_ack, redeliver=False,
            max_inflight=BATCH)
        self._connected = asyncio.Event()
        self._wake = asyncio.Event()
        self._acks: dict[int, asyncio.Future[tuple[str, str]]] = {}
        self._last_state: dict[str, str] = {}  # topic -> fingerprint of the retained message last published
        self._stopping = False
        self._commands: set[asyncio.Task[None]] = set()

    @property
    def connected(self) -> bool:
        return self._connected.is_set()

    @property
    def reconnects(self) -> int:
        return self.link.reconnects

    def wake(self) -> None:
        """New events are in the outbox."""
        self._wake.set()

    # ---- on the loop
    def _on_state(self, up: bool) -> None:
        if up:
            self._connected.set()
            self._last_state.clear()  # republish every state after a (re)connect
            self.publish_states()
            self._wake.set()
            return
        if self._stopping:
            return
        self._connected.clear()

    def _on_ack(self, mid: int, status: str, reason: str) -> None:
        fut = self._acks.pop(mid, None)
        if fut is not None and not fut.done():
            fut.set_result((status, reason))

    def _cb_message(self, msg: Any) -> None:
        """A command (on the event loop: the link drives paho from it); answered by a task of its own."""
        if self.on_command is None:
            return
        props = getattr(msg, "properties", None)
        response_topic = getattr(props, "ResponseTopic", None) if props is not None else None
        correlation = getattr(props, "CorrelationData", None) if props is not None else None
        task = asyncio.get_running_loop().create_task(self._answer(
            bytes(msg.payload), response_topic, bytes(correlation) if correlation is not None else None))
        self._commands.add(task)
        task.add_done_callback(self._commands.discard)

    async def _answer(self, payload: bytes, response_topic: str | None, correlation: bytes | None) -> None:
        assert self.on_command is not None
        try:  # the handler commits to SQLite: off the event loop
            response = await asyncio.to_thread(self.on_command, payload)
        except Exception as exc:  # a command handler never takes the feed down
            log.warning("command failed", error=str(exc))
            return
        topic = response_topic or self.cfg.response_topic
        if not topic:
            return
        props = publish_properties(content_type="application/json", utf8=True, expiry_s=RESPONSE_EXPIRY_S,
                                   correlation=correlation)
        try:
            self.link.publish(topic, response, qos=1, properties=props)
        except TopicRefused as exc:
            log.warning("command response not sent: the broker will not take its topic", topic=topic,
                        reason=str(exc))

    def publish_states(self, points: set[str] | None = None) -> None:
        """Publish the retained state messages of all points (or of ``points``) that changed, when connected."""
        if not self.connected:
            return
        props = publish_properties(content_type="application/json", utf8=True)
        for point, (topic, payload) in self.states().items():
            if points is not None and point not in points:
                continue
            fp = state_fingerprint(payload)
            if self._last_state.get(topic) == fp:
                continue
            try:
                info = self.link.publish(topic, payload, qos=1, retain=True, properties=props)
            except TopicRefused as exc:
                self.link.rlog.warning(("state", topic), "state message not published: the broker will not take "
                                       "its topic", point=point, topic=topic, reason=str(exc))
                continue
            if info.rc == 0:
                self._last_state[topic] = fp

    def _event_message(self, e: OutboxEvent) -> tuple[bytes, Any]:
        if self._binary:
            attrs, content_type, payload = binary_parts(e.body)
            props = publish_properties(content_type=content_type, utf8=True, expiry_s=self.cfg.message_expiry_s,
                                       user=sorted(attrs.items()))
            return payload, props
        props = publish_properties(content_type=STRUCTURED_CONTENT_TYPE, utf8=True,
                                   expiry_s=self.cfg.message_expiry_s)
        return e.body.encode("utf-8"), props

    async def run(self) -> None:
        """Connect (retrying with backoff), then deliver pending events until :meth:`stop`."""
        await self.link.start()
        log.info("alarm feed started", url=self.conn.url, mode="binary" if self._binary else "structured",
                 commands=self.cfg.command_topic or None, availability=self.cfg.availability_topic or None)
        single = False  # after a lost connection, events go one at a time until one is confirmed
        try:
            while not self._stopping:
                await self._connected.wait()
                if self._stopping:
                    break
                batch = await _next_batch(self.outbox, self.sink, self._wake, 1 if single else BATCH, self.io)
                if not batch or self._stopping:
                    continue
                done, refused, retry = await self._send(batch)
                if done or refused:
                    await self.io(self.outbox.mark_delivered, self.sink,
                                  [e.seq for e in done] + [e.seq for e, _ in refused])
                    self.published += len(done)
                for e, reason in refused:
                    self.rejected += 1
                    log.error("feed event refused by the broker; set aside, the others go on", id=e.id, type=e.type,
                              subject=e.subject, topic=e.topic, reason=reason)
                single = retry and not done
                if retry:
                    await asyncio.sleep(min(1.0, self.conn.reconnect_min_s))
        finally:
            await self.link.stop()

    async def _send(self, batch: list[OutboxEvent]
                    ) -> tuple[list[OutboxEvent], list[tuple[OutboxEvent, str]], bool]:
        """Publish a batch; returns (confirmed, refused with reasons, whether some must be retried)."""
        loop = asyncio.get_running_loop()
        futs: list[tuple[OutboxEvent, asyncio.Future[tuple[str, str]]]] = []
        refused: list[tuple[OutboxEvent, str]] = []
        retry = False
        for e in batch:
            if not self.connected:
                retry = True
                break
            payload, props = self._event_message(e)
            try:
                info = self.link.publish(e.topic, payload, qos=1, properties=props)
            except TopicRefused as exc:
                refused.append((e, str(exc)))
                continue
            if info.rc != 0:
                retry = True
                break
            fut: asyncio.Future[tuple[str, str]] = loop.create_future()
            self._acks[info.mid] = fut
            futs.append((e, fut))
        done: list[OutboxEvent] = []
        for e, fut in futs:
            try:
                status, reason = await asyncio.wait_for(fut, timeout=PUBACK_TIMEOUT_S)
            except TimeoutError:
                status, reason = "retry", f"no PUBACK within {PUBACK_TIMEOUT_S:g} s"
            if status == "ok":
                done.append(e)
            elif status == "refused":
                refused.append((e, reason))
            else:
                retry = True
        return done, refused, retry

    async def stop(self) -> None:
        self._stopping = True
        self._connected.set()
        self._wake.set()
        for fut in self._acks.values():
            if not fut.done():
                fut.set_result(("retry", "stopping"))
        for task in list(self._commands):
            with contextlib.suppress(Exception):
                await asyncio.wait_for(task, 2.0)


def _header_value(value: str) -> str:
    """A ``ce-`` header value (CloudEvents HTTP binding §3.1.3.2: percent-encode space, '"', '%' and everything
    outside printable ASCII)."""
    return urllib.parse.quote(value, safe="".join(chr(c) for c in range(0x21, 0x7F) if chr(c) not in '"%'))


class WebhookFeed:
    """POSTs pending outbox events to an HTTP endpoint, retrying with exponential backoff."""

    sink = "webhook"

    def __init__(self, cfg: WebhookConfig, outbox: Pending, io: Io = asyncio.to_thread) -> None:
        self.cfg = cfg
        self.outbox = outbox
        self.io = io
        self.published = 0
        self.rejected = 0
        self._stopping = False
        self._wake = asyncio.Event()

    def wake(self) -> None:
        self._wake.set()

    def request(self, body: str) -> urllib.request.Request:
        """The HTTP request of one stored event in the configured content mode."""
        if self.cfg.mode == "binary":
            attrs, content_type, data = binary_parts(body)
            headers = {f"ce-{k}": _header_value(v) for k, v in attrs.items()}
            headers["Content-Type"] = content_type
            req = urllib.request.Request(self.cfg.url, data=data, method="POST", headers=headers)
        else:
            req = urllib.request.Request(self.cfg.url, data=body.encode("utf-8"), method="POST",
                                         headers={"Content-Type": f"{STRUCTURED_CONTENT_TYPE}; charset=utf-8"})
        if self.cfg.token is not None:
            req.add_header("Authorization", f"Bearer {self.cfg.token.reveal()}")
        return req

    def _post(self, body: str) -> int:
        try:
            with urllib.request.urlopen(self.request(body), timeout=self.cfg.timeout_s) as resp:
                return int(resp.status)
        except urllib.error.HTTPError as exc:
            return int(exc.code)
        except (urllib.error.URLError, OSError, TimeoutError, ValueError):
            return 0

    async def run(self) -> None:
        delay = self.cfg.retry_min_s
        while not self._stopping:
            batch = await _next_batch(self.outbox, self.sink, self._wake, io=self.io)
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
                    await self.io(self.outbox.mark_attempt, self.sink, [e.seq])
                    self._wake.clear()
                    with contextlib.suppress(TimeoutError):
                        await asyncio.wait_for(self._stop_wait(), timeout=delay)
                    delay = min(2 * delay, self.cfg.retry_max_s)
                    break
                delay = self.cfg.retry_min_s
                await self.io(self.outbox.mark_delivered, self.sink, [e.seq])

    async def _stop_wait(self) -> None:
        while not self._stopping:
            await asyncio.sleep(0.1)

    async def stop(self) -> None:
        self._stopping = True
        self._wake.set()



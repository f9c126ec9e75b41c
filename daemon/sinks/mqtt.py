"""Indicators as JSON on MQTT: one message per point per analysed frame, for MQTT-fed historians.

The topic is a template with ``{site}``, ``{machine}`` and ``{point}``.  Keys carry their units
(``velocity_rms_mm_s``, ``acceleration_rms_g``, ``shaft_speed_hz`` …); an indicator that is unavailable for the
frame (speed unknown, no envelope band) is ``null``, never a made-up number.  The sink keeps its own broker
connection (``[publish.mqtt]``: another broker, or a source's settings reused), an
:class:`~edgevib.daemon.mqtt_client.MqttLink`; while it is down, QoS 1 messages queue up to a bound and QoS 0
messages are dropped and counted.  On MQTT 5 each message says what it is: Content Type ``application/json``,
Payload Format Indicator 1 (UTF-8) and, when ``message_expiry_s`` is set, a Message Expiry Interval.  A message
the broker refuses (a topic it will not take, a PUBACK with a failure reason) is counted and logged with the
reason; it never holds up the other points.
"""

from __future__ import annotations

import json
from typing import Any

import paho.mqtt.client as mqtt

from edgevib.daemon.config import Config, MqttConnection
from edgevib.daemon.indicators import document
from edgevib.daemon.interfaces import FrameResult, SourceError
from edgevib.daemon.logs import RateLimitedLogger, get_logger
from edgevib.daemon.mqtt_client import Availability, MqttLink, TopicRefused, publish_properties
from edgevib.daemon.timestamps import rfc3339_utc
from edgevib.pipelines.analysis import order_key

__all__ = ["MqttIndicatorSink", "indicator_document"]

log = get_logger("edgevib.sinks.mqtt")
MAX_QUEUED = 10_000


def indicator_document(site: str, axis: str, r: FrameResult, orders: tuple[str, ...] = ()) -> dict[str, Any]:
    """The JSON document of one frame: identity and frame metadata, then every indicator the registry publishes
    here (:func:`edgevib.daemon.indicators.document`; ``None`` for unavailable).  ``orders`` are the point's
    configured order keys, always present."""
    ind = r.indicators
    return {
        "site": site, "machine": r.machine_id, "point": r.point_id, "axis": axis,
        "time": rfc3339_utc(r.t_end_ns), "t_end_ns": r.t_end_ns, "fs_hz": r.fs_hz,
        "frame_samples": int(r.samples.shape[0]),
        "shaft_speed_estimated": ind.shaft_estimated if ind.shaft_hz else None, "iso_zone": r.iso_zone,
        "envelope_band_hz": list(ind.envelope_band_hz) if ind.envelope_band_hz is not None else None,
        "envelope_band_source": r.envelope_band_source if ind.envelope_band_hz is not None else None,
        **document(r, "mqtt", {"order": orders}),
    }


def _order_key(order: float) -> str:
    return str(order_key(order))


class MqttIndicatorSink:
    """Publishes each frame's indicators as JSON; implements :class:`~edgevib.daemon.interfaces.FrameSink`."""

    def __init__(self, *, site: str, connection: MqttConnection, topic: str, qos: int = 0, retain: bool = False,
                 points: dict[str, tuple[str, tuple[str, ...]]] | None = None, message_expiry_s: float = 0.0,
                 availability_topic: str = "") -> None:
        self.site = site
        self.conn = connection
        self.topic = topic
        self.qos = qos
        self.retain = retain
        self.points = points or {}  # point id -> (axis, order keys)
        self.published = 0
        self.dropped = 0
        self.refused = 0  # messages the broker refused (topic set aside, PUBACK failure)
        self.link = MqttLink(connection, role="indicator publisher", on_ack=self._on_ack, redeliver=True,
                             max_queued=MAX_QUEUED, max_inflight=100,
                             availability=Availability(availability_topic) if availability_topic else None)
        self.props = publish_properties(content_type="application/json", utf8=True, expiry_s=message_expiry_s)
        self.rlog = RateLimitedLogger(log, interval_s=30.0)

    @classmethod
    def from_config(cls, config: Config) -> MqttIndicatorSink:
        pc = config.publish.mqtt
        if pc.connection is None:
            raise SourceError("publish.mqtt has no broker connection")
        sink = cls(site=config.site.name, connection=pc.connection, topic=pc.topic, qos=pc.qos, retain=pc.retain,
                   message_expiry_s=pc.message_expiry_s,
                   availability_topic=pc.availability_topic.format(site=config.site.name))
        sink._configure(config)
        return sink

    @property
    def connected(self) -> bool:
        return self.link.connected

    async def reconfigure(self, config: Config) -> None:
        """After a reload: the site, topic and points (the broker connection stays until a restart)."""
        self._configure(config)

    def _configure(self, config: Config) -> None:
        self.site = config.site.name
        self.topic = config.publish.mqtt.topic
        self.points = {p.id: (p.axis, tuple(_order_key(o) for o in p.orders)) for p in config.points}

    def topic_for(self, machine: str, point: str) -> str:
        return self.topic.format(site=self.site, machine=machine, point=point)

    async def start(self) -> None:
        await self.link.start()
        log.info("MQTT indicator publishing started", url=self.conn.url, topic=self.topic)

    def _on_ack(self, _mid: int, status: str, _reason: str) -> None:
        if status == "refused":  # the link has logged the broker's reason
            self.refused += 1

    async def on_frames(self, results: list[FrameResult]) -> None:
        if self.link.client is None:
            return
        for r in results:
            axis, orders = self.points.get(r.point_id, (r.axis, ()))
            payload = json.dumps(indicator_document(self.site, axis, r, orders), separators=(",", ":"),
                                 allow_nan=False).encode("utf-8")
            topic = self.topic_for(r.machine_id, r.point_id)
            try:
                info = self.link.publish(topic, payload, qos=self.qos, retain=self.retain, properties=self.props)
            except TopicRefused as exc:
                self.dropped += 1
                self.refused += 1
                self.rlog.warning(("refused", topic), "indicator message not published: the broker will not take "
                                  "its topic", point=r.point_id, topic=topic, reason=str(exc))
                continue
            if info.rc == mqtt.MQTT_ERR_SUCCESS:
                self.published += 1
            else:
                self.dropped += 1
                self.rlog.warning("drop", "indicator message not published", reason=mqtt.error_string(info.rc),
                                  dropped=self.dropped)

    async def stop(self) -> None:
        await self.link.stop(flush_s=2.0)

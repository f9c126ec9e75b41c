"""The alarm feed's events read by the official CloudEvents Python SDK (``cloudevents``, an independent
implementation of CloudEvents 1.0 and its JSON format and HTTP binding): over MQTT 5 (mosquitto) in structured and
binary content mode, and over the HTTP webhook in structured and binary mode.

Binding rules checked (CloudEvents MQTT protocol binding 1.0 §3.1 and §3.2; HTTP protocol binding 1.0.2 §3.1 and
§3.2): structured mode sets Content Type ``application/cloudevents+json``; binary mode carries ``data`` as the
payload with Content Type = ``datacontenttype`` and every other attribute as a User Property (MQTT) or a ``ce-``
header (HTTP) of the same name.  Payload Format Indicator 1 = UTF-8 (MQTT 5.0 §3.3.2.3.2).
"""

from __future__ import annotations

import asyncio
import json
import threading
from http.server import BaseHTTPRequestHandler, HTTPServer
from pathlib import Path
from typing import Any, ClassVar

import pytest
from alarmkit import alarm_layer, frame_result, small_config
from cloudevents.core.bindings.http import HTTPMessage, from_http
from cloudevents.core.formats.json import JSONFormat
from cloudevents.core.v1.event import CloudEvent
from mqtt5 import Client5
from servers import Mosquitto

from edgevib.daemon.alarms.engine import AlarmLayer

pytestmark = pytest.mark.network

FEED = {"reconnect_min_s": 0.2, "reconnect_max_s": 1.0}
SCHEMA = "https://schemas.fennick.invalid/edgevib/{type}.json"


async def _raise_two_alarms(layer: AlarmLayer) -> None:
    for i, v in enumerate([1.0, 3.0, 3.0, 5.0, 5.0]):  # ISO G2 rigid: alert at 2.8, danger at 4.5 mm/s
        await layer.on_frames([frame_result("P-101-DE-H", "P-101", 1000.0 + i, v, seed=i)])


async def _until(pred: Any, timeout_s: float = 20.0) -> bool:
    for _ in range(int(timeout_s / 0.05)):
        if pred():
            return True
        await asyncio.sleep(0.05)
    return bool(pred())


def _check(event: Any) -> None:
    assert isinstance(event, CloudEvent)
    assert event.get_specversion() == "1.0"
    assert event.get_type() == "io.edgevib.alarm.v1.transition"
    assert event.get_source() == "urn:fennick:quarry-lane:edgevib"
    assert event.get_subject() == "P-101-DE-H"
    assert event.get_dataschema() == SCHEMA.format(type="io.edgevib.alarm.v1.transition")
    t = event.get_time()
    assert t is not None and t.utcoffset() is not None and t.utcoffset().total_seconds() == 0
    data = event.get_data()
    if isinstance(data, bytes | str):
        data = json.loads(data)
    assert isinstance(data, dict) and data["point"] == "P-101-DE-H" and data["state"] in ("alert", "danger")


@pytest.mark.parametrize("mode", ["structured", "binary"])
async def test_mqtt5_events_parse_with_the_sdk(mosquitto: Mosquitto, short_tmp: Path, mode: str) -> None:
    cfg = small_config(short_tmp, feed={"url": mosquitto.url, "protocol": "5", "content_mode": mode,
                                        "event_source": "urn:fennick:{site}:edgevib", "dataschema": SCHEMA, **FEED})
    sub = Client5(mosquitto.port, ["edgevib/quarry-lane/alarms/#"])
    layer = alarm_layer(cfg)
    await layer.start()
    try:
        await _raise_two_alarms(layer)
        assert await _until(lambda: len(sub.on("edgevib/quarry-lane/alarms/P-101")) >= 2)
    finally:
        await layer.stop()
        sub.close()
    msgs = sub.on("edgevib/quarry-lane/alarms/P-101")
    ids = set()
    for m in msgs:
        assert m.properties.get("PayloadFormatIndicator") == 1
        if mode == "structured":
            assert m.properties["ContentType"] == "application/cloudevents+json"
            event = JSONFormat().read(CloudEvent, m.payload)
        else:
            assert m.properties["ContentType"] == "application/json"  # = datacontenttype
            attrs = dict(m.properties["UserProperty"])
            assert "data" not in attrs and "datacontenttype" not in attrs
            assert set(attrs) >= {"specversion", "id", "source", "type", "time", "subject", "dataschema"}
            # the SDK's binary reader, fed the attributes under their HTTP names (same attribute set, §3.2)
            headers = {f"ce-{k}": v for k, v in attrs.items()} | {"content-type": m.properties["ContentType"]}
            event = from_http(HTTPMessage(headers=headers, body=m.payload), JSONFormat(), CloudEvent)
        _check(event)
        ids.add(event.get_id())
    assert len(ids) == len(msgs)


async def test_mqtt311_structured_mode_still_plain_json(mosquitto: Mosquitto, short_tmp: Path) -> None:
    """MQTT 3.1.1 has no properties: structured mode only (binding §1.3), the body is the same JSON event."""
    cfg = small_config(short_tmp, feed={"url": mosquitto.url, "event_source": "urn:fennick:{site}:edgevib",
                                        "dataschema": SCHEMA, **FEED})
    sub = Client5(mosquitto.port, ["edgevib/quarry-lane/alarms/#"], protocol="3.1.1")
    layer = alarm_layer(cfg)
    await layer.start()
    try:
        await _raise_two_alarms(layer)
        assert await _until(lambda: len(sub.on("edgevib/quarry-lane/alarms/P-101")) >= 2)
    finally:
        await layer.stop()
        sub.close()
    for m in sub.on("edgevib/quarry-lane/alarms/P-101"):
        _check(JSONFormat().read(CloudEvent, m.payload))


class _Hook(BaseHTTPRequestHandler):
    received: ClassVar[list[tuple[dict[str, str], bytes]]] = []

    def do_POST(self) -> None:
        body = self.rfile.read(int(self.headers.get("Content-Length", "0")))
        _Hook.received.append(({k.lower(): v for k, v in self.headers.items()}, body))
        self.send_response(204)
        self.end_headers()

    def log_message(self, *args: Any) -> None:
        pass


@pytest.mark.parametrize("mode", ["structured", "binary"])
async def test_webhook_events_parse_with_the_sdk(short_tmp: Path, mode: str) -> None:
    _Hook.received = []
    server = HTTPServer(("127.0.0.1", 0), _Hook)
    threading.Thread(target=server.serve_forever, daemon=True).start()
    url = f"http://127.0.0.1:{server.server_address[1]}/events"
    cfg = small_config(short_tmp, feed={"webhook": {"url": url, "mode": mode, "retry_min_s": 0.05},
                                        "event_source": "urn:fennick:{site}:edgevib", "dataschema": SCHEMA})
    layer = alarm_layer(cfg)
    await layer.start()
    try:
        await _raise_two_alarms(layer)
        assert await _until(lambda: len(_Hook.received) >= 2)
    finally:
        await layer.stop()
        server.shutdown()
        server.server_close()
    for headers, body in _Hook.received:
        if mode == "structured":
            assert headers["content-type"].startswith("application/cloudevents+json")
            assert not any(k.startswith("ce-") for k in headers)
        else:
            assert headers["content-type"] == "application/json"
            assert headers["ce-specversion"] == "1.0" and headers["ce-type"] == "io.edgevib.alarm.v1.transition"
        _check(from_http(HTTPMessage(headers=headers, body=body), JSONFormat(), CloudEvent))

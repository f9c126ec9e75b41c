"""The alarm feed against a real mosquitto on loopback: CloudEvents 1.0 attributes (FIELD_NOTES §8: id, source,
specversion "1.0", type; optional time, subject, datacontenttype), QoS 1 with the outbox kept until PUBACK,
retained state topics, broker outages, the webhook sink."""

from __future__ import annotations

import asyncio
import json
import threading
from http.server import BaseHTTPRequestHandler, HTTPServer
from pathlib import Path
from typing import Any, ClassVar

import pytest
from alarmkit import Subscriber, alarm_layer, frame_result, persistent_broker, small_config
from prometheus_client import CollectorRegistry
from servers import Mosquitto

from edgevib.daemon.alarms.engine import AlarmLayer

pytestmark = pytest.mark.network

FEED = {"reconnect_min_s": 0.2, "reconnect_max_s": 1.0}


async def feed_values(layer: AlarmLayer, values: list[float], t0: float) -> None:
    for i, v in enumerate(values):
        await layer.on_frames([frame_result("P-101-DE-H", "P-101", t0 + i, v, seed=i)])


async def until(pred: Any, timeout_s: float = 20.0) -> bool:
    for _ in range(int(timeout_s / 0.05)):
        if pred():
            return True
        await asyncio.sleep(0.05)
    return bool(pred())


def check_cloudevent(e: dict[str, Any]) -> None:
    assert e["specversion"] == "1.0"
    for key in ("id", "source", "type", "time", "subject", "datacontenttype"):
        assert isinstance(e[key], str) and e[key], key
    assert e["datacontenttype"] == "application/json" and e["time"].endswith("Z")


# These tests count every event: the data-gap checks (a source whose points stop delivering for no_data_frames
# frame periods raises a source-down event) are kept out of the way, since the frames stop after the test's feed.
QUIET = {"no_data_frames": 100000}


async def test_events_reach_the_broker_with_qos1_and_retained_state(mosquitto: Mosquitto, short_tmp: Path) -> None:
    cfg = small_config(short_tmp, alarms=QUIET, feed={"url": mosquitto.url, **FEED})
    sub = Subscriber(mosquitto.port, "edgevib/#", clean=True)
    layer = alarm_layer(cfg)
    await layer.start()
    try:
        await feed_values(layer, [1.0, 3.0, 3.0, 5.0, 5.0], 1000.0)
        assert await until(lambda: len(sub.events()) >= 2)
        evs = sub.events()
        for e in evs:
            check_cloudevent(e)
            assert e["type"] == "io.edgevib.alarm.v1.transition" and e["source"] == "edgevib/quarry-lane"
            assert e["subject"] == "P-101-DE-H"
        assert [(e["data"]["transition"], e["data"]["state"]) for e in evs] == [("raised", "alert"),
                                                                               ("escalated", "danger")]
        assert len({e["id"] for e in evs}) == 2
        assert await until(lambda: layer.store.outbox is not None and layer.store.outbox.depth() == 0)
        assert layer.mqtt is not None and layer.mqtt.published == 2
        # A late subscriber gets the retained state of the point.
        late = Subscriber(mosquitto.port, "edgevib/quarry-lane/alarm-state/#", client_id="late", clean=True)
        assert await until(lambda: any(r for _, _, r in late.messages))
        topic, payload, retained = late.messages[-1]
        state = json.loads(payload)
        assert retained and topic == "edgevib/quarry-lane/alarm-state/P-101/P-101-DE-H"
        assert state["state"] == "danger" and state["alarms"]["velocity_rms_mm_s"]["state"] == "unacknowledged"
        late.close()
        # An acknowledgement over the MQTT command topic, answered on the response topic.
        cmd = Subscriber(mosquitto.port, "edgevib/quarry-lane/alarms/response", client_id="op", clean=True)
        cmd.client.publish("edgevib/quarry-lane/alarms/command",
                           json.dumps({"cmd": "ack", "point": "P-101-DE-H", "id": "r1", "by": "shift-lead"}), qos=1)
        assert await until(lambda: bool(cmd.messages))
        assert json.loads(cmd.messages[0][1]) == {"ok": True, "result": {"changed": 1, "events": 1}, "id": "r1"}
        cmd.client.publish("edgevib/quarry-lane/alarms/command", b"{\"cmd\": \"trip\"}", qos=1)
        assert await until(lambda: len(cmd.messages) >= 2)
        assert "unknown command" in json.loads(cmd.messages[1][1])["error"]
        cmd.close()
        assert await until(lambda: len(sub.events()) >= 3)
        ack = sub.events()[2]["data"]
        assert ack["transition"] == "acknowledged" and ack["by"] == "shift-lead"
    finally:
        await layer.stop()
        sub.close()


async def test_broker_down_events_wait_in_the_outbox(short_tmp: Path) -> None:
    broker = persistent_broker()
    broker.start()
    cfg = small_config(short_tmp, alarms=QUIET, feed={"url": broker.url, **FEED})
    sub = Subscriber(broker.port, "edgevib/quarry-lane/alarms/#", client_id="maint-system")  # persistent session
    layer = alarm_layer(cfg)
    await layer.start()
    try:
        assert layer.mqtt is not None
        assert await until(lambda: layer.mqtt is not None and layer.mqtt.connected)
        broker.stop()
        assert await until(lambda: layer.mqtt is not None and not layer.mqtt.connected)
        await feed_values(layer, [3.0, 3.0, 5.0, 5.0, 1.0, 1.0], 1000.0)
        assert layer.store.outbox is not None and layer.store.outbox.depth() == 3  # raised, escalated, cleared
        await asyncio.sleep(1.0)
        assert layer.store.outbox.depth() == 3 and layer.mqtt.published == 0
        broker.start()
        assert await until(lambda: layer.store.outbox is not None and layer.store.outbox.depth() == 0, 30.0)
        assert await until(lambda: len(sub.events()) >= 3, 30.0)
        kinds = [e["data"]["transition"] for e in sub.events()]
        assert kinds[:3] == ["raised", "escalated", "cleared"]
        assert layer.mqtt.reconnects >= 1
    finally:
        await layer.stop()
        sub.close()
        broker.close()


class _Hook(BaseHTTPRequestHandler):
    received: ClassVar[list[tuple[str, bytes]]] = []
    fail_first = 0
    fail_status = 503

    def do_POST(self) -> None:
        body = self.rfile.read(int(self.headers["Content-Length"]))
        if _Hook.fail_first > 0:
            _Hook.fail_first -= 1
            self.send_response(_Hook.fail_status)
        else:
            _Hook.received.append((self.headers["Content-Type"], body))
            self.send_response(204)
        self.end_headers()

    def log_message(self, *args: Any) -> None:
        pass


async def test_webhook_retries_until_accepted(short_tmp: Path) -> None:
    _Hook.received, _Hook.fail_first, _Hook.fail_status = [], 2, 503
    server = HTTPServer(("127.0.0.1", 0), _Hook)
    threading.Thread(target=server.serve_forever, daemon=True).start()
    url = f"http://127.0.0.1:{server.server_address[1]}/events"
    cfg = small_config(short_tmp, alarms=QUIET, feed={"webhook": {"url": url, "retry_min_s": 0.1, "retry_max_s": 0.2}})
    layer = alarm_layer(cfg)
    await layer.start()
    try:
        await feed_values(layer, [3.0, 3.0], 1000.0)
        assert await until(lambda: len(_Hook.received) >= 1)
        ctype, body = _Hook.received[0]
        assert ctype.startswith("application/cloudevents+json")
        check_cloudevent(json.loads(body))
        assert _Hook.fail_first == 0 and layer.webhook is not None and layer.webhook.published == 1
        assert await until(lambda: layer.store.outbox is not None and layer.store.outbox.depth() == 0)
    finally:
        await layer.stop()
        server.shutdown()


async def test_webhook_refusal_is_counted_not_retried(short_tmp: Path) -> None:
    # RFC 9110: a 4xx (here 400) is the client's fault, so resending the same event cannot help
    _Hook.received, _Hook.fail_first, _Hook.fail_status = [], 1, 400
    server = HTTPServer(("127.0.0.1", 0), _Hook)
    threading.Thread(target=server.serve_forever, daemon=True).start()
    url = f"http://127.0.0.1:{server.server_address[1]}/events"
    cfg = small_config(short_tmp, alarms=QUIET, feed={"webhook": {"url": url, "retry_min_s": 0.1, "retry_max_s": 0.2}})
    registry = CollectorRegistry()
    layer = alarm_layer(cfg, registry=registry)
    await layer.start()
    try:
        await feed_values(layer, [3.0, 3.0, 5.0, 5.0], 1000.0)  # raised, then escalated
        assert await until(lambda: layer.store.outbox is not None and layer.store.outbox.depth() == 0)
        assert [json.loads(b)["data"]["transition"] for _, b in _Hook.received] == ["escalated"]  # first refused
        assert registry.get_sample_value("edgevib_feed_rejected_total", {"sink": "webhook"}) == 1.0
        assert registry.get_sample_value("edgevib_feed_published_total", {"sink": "webhook"}) == 1.0
    finally:
        await layer.stop()
        server.shutdown()

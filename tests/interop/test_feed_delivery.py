"""The alarm feed's delivery rules against real brokers (mosquitto; OASIS MQTT 3.1.1 and 5.0 semantics):

* one undeliverable event never blocks the others (issue 13 §1: a ``+`` in an id made every publish fail);
* command answers honour MQTT 5 Response Topic and Correlation Data (MQTT 5.0 §4.10, request/response);
* the command subscription is a persistent session: a command sent while edgevib is down is answered after the
  restart (MQTT 5.0 §3.1.2.4 Clean Start = 0 with a Session Expiry Interval; 3.1.1 §3.1.2.4 CleanSession = 0);
* a retained availability topic: ``online`` while connected, ``offline`` on a clean stop and as the Will when the
  connection dies (MQTT 5.0 §3.1.2.5 Will Flag);
* the retained state message is published when the state changes, not for every frame;
* the feed and the indicator publisher log why the broker refused them.
"""

from __future__ import annotations

import asyncio
import json
import time
from pathlib import Path
from typing import Any

import pytest
from alarmkit import alarm_layer, frame_result, small_config
from mqtt5 import Client5
from servers import Mosquitto
from structlog.testing import capture_logs

from edgevib.daemon.alarms.feed import MqttFeed, cloud_event, event_body
from edgevib.daemon.alarms.outbox import Database, Outbox, OutboxEvent

pytestmark = pytest.mark.network

FEED = {"reconnect_min_s": 0.2, "reconnect_max_s": 1.0}


async def until(pred: Any, timeout_s: float = 20.0) -> bool:
    for _ in range(int(timeout_s / 0.05)):
        if pred():
            return True
        await asyncio.sleep(0.05)
    return bool(pred())


def _event(i: int, topic: str) -> OutboxEvent:
    ev = cloud_event(type_="io.edgevib.alarm.v1.transition", source="edgevib/quarry-lane", subject=f"P-{i}",
                     data={"n": i}, time_ns=1_780_000_000_000_000_000 + i)
    return OutboxEvent(id=ev["id"], type=ev["type"], subject=f"P-{i}", topic=topic, body=event_body(ev),
                       created_ns=time.time_ns())


async def test_an_event_with_a_wildcard_topic_never_blocks_the_others(mosquitto: Mosquitto, short_tmp: Path) -> None:
    cfg = small_config(short_tmp, feed={"url": mosquitto.url, **FEED})
    db = Database(short_tmp / "feed.sqlite")
    outbox = Outbox(db, ["mqtt"])
    topics = [f"edgevib/quarry-lane/alarms/P-1/P-{i}" for i in range(5)]
    topics[1] = "edgevib/quarry-lane/alarms/P-1/P+101"  # an id with '+': paho refuses to publish it
    outbox.add([_event(i, t) for i, t in enumerate(topics)])
    sub = Client5(mosquitto.port, ["edgevib/quarry-lane/alarms/#"])
    feed = MqttFeed(cfg.alarm_settings.feed, outbox, lambda: {})
    with capture_logs() as logs:
        task = asyncio.create_task(feed.run())
        try:
            assert await until(lambda: feed.published == 4 and outbox.depth("mqtt") == 0)
        finally:
            await feed.stop()
            await asyncio.wait_for(task, 10)
            sub.close()
            db.close()
    assert feed.rejected == 1
    assert sorted(m.topic for m in sub.on("edgevib/")) == sorted(t for i, t in enumerate(topics) if i != 1)
    refused = [e for e in logs if e["event"].startswith("feed event refused by the broker")]
    assert len(refused) == 1 and refused[0]["topic"] == topics[1] and "wildcard" in refused[0]["reason"].lower()


async def test_commands_answer_on_response_topic_with_correlation_data(mosquitto: Mosquitto,
                                                                       short_tmp: Path) -> None:
    cfg = small_config(short_tmp, feed={"url": mosquitto.url, "protocol": "5", **FEED})
    layer = alarm_layer(cfg)
    await layer.start()
    op = Client5(mosquitto.port, ["operators/desk-3/#"], client_id="desk-3")
    try:
        assert await until(lambda: layer.mqtt is not None and layer.mqtt.connected)
        from paho.mqtt.packettypes import PacketTypes
        from paho.mqtt.properties import Properties

        props = Properties(PacketTypes.PUBLISH)
        props.ResponseTopic = "operators/desk-3/answers"
        props.CorrelationData = b"\x00req-17"
        op.client.publish("edgevib/quarry-lane/alarms/command", json.dumps({"cmd": "list"}), qos=1,
                          properties=props)
        assert await until(lambda: bool(op.on("operators/desk-3/answers")))
    finally:
        await layer.stop()
        op.close()
    answer = op.on("operators/desk-3/answers")[0]
    assert answer.properties["CorrelationData"] == b"\x00req-17"
    assert answer.properties["ContentType"] == "application/json"
    assert json.loads(answer.payload)["ok"] is True


@pytest.mark.parametrize("protocol", ["3.1.1", "5"])
async def test_command_sent_while_edgevib_is_down_is_answered_after_restart(short_tmp: Path, protocol: str) -> None:
    broker = Mosquitto().start()
    try:
        cfg = small_config(short_tmp, feed={"url": broker.url, "protocol": protocol, **FEED})
        layer = alarm_layer(cfg)
        await layer.start()  # first start: the broker learns the feed's persistent session and subscription
        assert await until(lambda: layer.mqtt is not None and layer.mqtt.connected)
        await layer.stop()
        op = Client5(broker.port, ["edgevib/quarry-lane/alarms/response"], client_id="op")
        op.client.publish("edgevib/quarry-lane/alarms/command", json.dumps({"cmd": "list", "id": "while-down"}),
                          qos=1)
        await asyncio.sleep(0.3)
        layer = alarm_layer(cfg)
        await layer.start()
        try:
            assert await until(lambda: bool(op.on("edgevib/quarry-lane/alarms/response")))
        finally:
            await layer.stop()
            op.close()
        assert json.loads(op.on("edgevib/quarry-lane/alarms/response")[0].payload)["id"] == "while-down"
    finally:
        broker.close()


async def test_availability_online_offline_and_last_will(mosquitto: Mosquitto, short_tmp: Path) -> None:
    cfg = small_config(short_tmp, feed={"url": mosquitto.url, **FEED})
    layer = alarm_layer(cfg)
    await layer.start()
    assert await until(lambda: layer.mqtt is not None and layer.mqtt.connected)
    await asyncio.sleep(0.5)  # "online" is published right after the CONNACK: subscribe once it is there
    watch = Client5(mosquitto.port, ["edgevib/quarry-lane/availability"], client_id="watch")
    try:
        assert await until(lambda: [m.payload for m in watch.on("edgevib/")] == [b"online"])
        assert watch.on("edgevib/")[0].retain  # retained: the late subscriber got it
    finally:
        await layer.stop()
    assert await until(lambda: [m.payload for m in watch.on("edgevib/")][-1:] == [b"offline"])
    # edgevib dies (no DISCONNECT): the broker publishes the Will
    layer = alarm_layer(cfg)
    await layer.start()
    assert await until(lambda: [m.payload for m in watch.on("edgevib/")][-1:] == [b"online"])
    assert layer.mqtt is not None and layer.mqtt.link.client is not None
    client = layer.mqtt.link.client
    client.loop_stop()  # paho's thread stops: no reconnect, no DISCONNECT packet
    sock = client.socket()
    assert sock is not None
    sock.close()
    try:
        assert await until(lambda: [m.payload for m in watch.on("edgevib/")][-1:] == [b"offline"])
    finally:
        watch.close()
        await layer.stop()


async def test_state_message_published_on_change_not_on_every_frame(mosquitto: Mosquitto, short_tmp: Path) -> None:
    cfg = small_config(short_tmp, feed={"url": mosquitto.url, **FEED})
    layer = alarm_layer(cfg)
    await layer.start()
    watch = Client5(mosquitto.port, ["edgevib/quarry-lane/alarm-state/#"], client_id="watch")
    try:
        assert await until(lambda: layer.mqtt is not None and layer.mqtt.connected)
        await asyncio.sleep(0.3)
        start = len(watch.on("edgevib/"))
        values = [1.0 + 0.01 * i for i in range(20)]  # normal all along: only values and times change
        for i, v in enumerate(values):
            await layer.on_frames([frame_result("P-101-DE-H", "P-101", 1000.0 + i, v, seed=i)])
        await asyncio.sleep(0.5)
        quiet = len(watch.on("edgevib/")) - start
        for i, v in enumerate([3.0, 3.0, 3.0]):  # alert after the 2-frame on-delay: one change
            await layer.on_frames([frame_result("P-101-DE-H", "P-101", 1100.0 + i, v, seed=i)])
        assert await until(lambda: any(json.loads(m.payload)["state"] == "alert" for m in watch.on("edgevib/")))
    finally:
        await layer.stop()
        watch.close()
    assert quiet <= 1  # at most the first frame's change (time and value set, state from 'no frame yet')
    states = [json.loads(m.payload) for m in watch.on("edgevib/")]
    assert states[-1]["state"] == "alert" and states[-1]["time"].endswith("Z")
    assert len(states) - start <= 4


async def test_feed_logs_why_the_broker_refused(short_tmp: Path) -> None:
    import shutil
    import subprocess

    mosq_passwd = shutil.which("mosquitto_passwd")
    assert mosq_passwd is not None, "mosquitto_passwd comes with mosquitto"
    broker = Mosquitto(listener=False)
    passwd = broker.dir / "passwd"
    subprocess.run([mosq_passwd, "-b", "-c", str(passwd), "edgevib", "right-horse-battery"], check=True,
                   timeout=30, capture_output=True)
    broker.dir.chmod(0o755)
    passwd.chmod(0o644)
    broker.conf.write_text(broker.conf.read_text() + f"listener {broker.port} 127.0.0.1\nallow_anonymous false\n"
                           f"password_file {passwd}\n")
    broker.start()
    secret = short_tmp / "pw"
    secret.write_text("wrong-staple-q7\n")
    try:
        cfg = small_config(short_tmp, feed={"url": broker.url, "username": "edgevib", "password_file": str(secret),
                                            **FEED})
        with capture_logs() as logs:
            layer = alarm_layer(cfg)
            await layer.start()
            await asyncio.sleep(1.5)
            await layer.stop()
    finally:
        broker.close()
    refused = [e for e in logs if e["event"].startswith("broker refused the connection")]
    assert refused and refused[0]["role"] == "alarm feed" and "Not authorized" in refused[0]["reason"]
    assert "wrong-staple-q7" not in repr(logs)


async def test_indicator_publisher_mqtt5_properties_and_refused_topic(mosquitto: Mosquitto, short_tmp: Path) -> None:
    """Indicator documents say what they are (Content Type, UTF-8, expiry); a point whose topic the broker will not
    take is counted and logged, and the other points go on."""
    from edgevib.daemon.config import MqttConnection
    from edgevib.daemon.sinks.mqtt import MqttIndicatorSink

    conn = MqttConnection.model_validate({"url": mosquitto.url, "protocol": "5", "client_id": "pub"})
    sink = MqttIndicatorSink(site="quarry-lane", connection=conn, topic="fwb/{site}/{machine}/{point}/indicators",
                             qos=1, message_expiry_s=600.0)
    watch = Client5(mosquitto.port, ["fwb/#"], client_id="historian")
    await sink.start()
    try:
        assert await until(lambda: sink.connected)
        frames = [frame_result("P-101-DE-H", "P-101", 1000.0, 1.0), frame_result("P+101", "P-101", 1000.0, 1.0),
                  frame_result("P-102-DE-H", "P-101", 1000.0, 1.0)]
        with capture_logs() as logs:
            await sink.on_frames(frames)
        assert await until(lambda: len(watch.on("fwb/")) == 2)
    finally:
        await sink.stop()
        watch.close()
    assert sink.published == 2 and sink.dropped == 1 and sink.refused == 1
    assert any(e["event"].startswith("indicator message not published") and "P+101" in e["topic"] for e in logs)
    for m in watch.on("fwb/"):
        assert m.properties["ContentType"] == "application/json"
        assert m.properties["PayloadFormatIndicator"] == 1
        assert 0 < m.properties["MessageExpiryInterval"] <= 600
        assert json.loads(m.payload)["time"].endswith("Z")

"""Feed and ingest through a second MQTT broker implementation: the NATS server's MQTT gateway (MQTT 3.1.1 over
JetStream).  Besides plain delivery this is the broker that closes the connection instead of refusing a message:
its MQTT topics may not contain '.' or ' ' (NATS subjects use '.' as the separator), so an id with a '.' once
stalled every event behind it (issue 13 §1).
"""

from __future__ import annotations

import asyncio
import time
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from alarmkit import small_config
from mqtt5 import Client5
from servers import NatsMqtt
from structlog.testing import capture_logs

from edgevib.common.wire import Block, decode, encode_binary
from edgevib.daemon.alarms.feed import MqttFeed, cloud_event, event_body
from edgevib.daemon.alarms.outbox import Database, Outbox, OutboxEvent
from edgevib.daemon.config import MqttConnection
from edgevib.daemon.sources.mqtt import MqttSource

pytestmark = pytest.mark.network

FEED = {"reconnect_min_s": 0.2, "reconnect_max_s": 0.5}


@pytest.fixture
def nats() -> Any:
    server = NatsMqtt().start()
    try:
        yield server
    finally:
        server.close()


async def until(pred: Any, timeout_s: float = 30.0) -> bool:
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


async def test_feed_through_nats_sets_aside_a_topic_the_broker_drops(nats: NatsMqtt, short_tmp: Path) -> None:
    cfg = small_config(short_tmp, feed={"url": nats.url, **FEED})
    db = Database(short_tmp / "feed.sqlite")
    outbox = Outbox(db, ["mqtt"])
    topics = [f"edgevib/quarry-lane/alarms/P-101/P-101-DE-{i}" for i in range(6)]
    topics[2] = "edgevib/quarry-lane/alarms/P-101/P-101.DE.V"  # the gateway closes the connection on '.'
    outbox.add([_event(i, t) for i, t in enumerate(topics)])
    sub = Client5(nats.port, ["edgevib/#"], protocol="3.1.1")
    feed = MqttFeed(cfg.alarm_settings.feed, outbox, lambda: {})
    with capture_logs() as logs:
        task = asyncio.create_task(feed.run())
        try:
            assert await until(lambda: feed.published == 5 and outbox.depth("mqtt") == 0, 60.0), \
                [e for e in logs if e.get("log_level") in ("warning", "error")]
            assert await until(lambda: len(sub.on("edgevib/quarry-lane/alarms/")) >= 5)
            # the availability topic is retained by the gateway (JetStream): a late subscriber sees "online"
            late = Client5(nats.port, ["edgevib/quarry-lane/availability"], client_id="late", protocol="3.1.1")
            assert await until(lambda: [m.payload for m in late.on("edgevib/")] == [b"online"])
            late.close()
        finally:
            await feed.stop()
            await asyncio.wait_for(task, 10)
            sub.close()
            db.close()
    assert feed.rejected == 1
    got = {m.topic for m in sub.on("edgevib/quarry-lane/alarms/")}
    assert got == {t for i, t in enumerate(topics) if i != 2}
    aside = [e for e in logs if e["event"].startswith("MQTT topic set aside")]
    assert len(aside) == 1 and aside[0]["topic"] == topics[2]
    assert any(e["event"].startswith("feed event refused") and e["topic"] == topics[2] for e in logs)


class _Ingest:
    def __init__(self) -> None:
        self.payloads: list[bytes] = []
        self.rejected: list[str] = []
        self.states: list[bool] = []

    def payload(self, _s: str, _t: str | None, payload: bytes, _r: int) -> None:
        self.payloads.append(payload)

    def block(self, *_a: object) -> None: ...
    def speed(self, *_a: object) -> None: ...

    def reject(self, _s: str, reason: str, _d: str, _t: str | None = None, *, received: bool = False) -> None:
        self.rejected.append(reason)

    def connection(self, _s: str, connected: bool) -> None:
        self.states.append(connected)


async def test_ingest_through_nats(nats: NatsMqtt, tmp_path: Path) -> None:
    conn = MqttConnection.model_validate({"url": nats.url, "reconnect_min_s": 0.2, "client_id": "edgevib-test"})
    ingest = _Ingest()
    src = MqttSource(name="station", ingest=ingest, connection=conn, topics=["fwb/quarry-lane/+/+/block"])
    task = asyncio.create_task(src.run())
    pub = Client5(nats.port, [], client_id="gateway", protocol="3.1.1")
    rng = np.random.default_rng(7)
    blocks = [Block(sensor_id="QL-P101-DE-H", seq=i, t0_ns=1_780_000_000_000_000_000 + i * 320_000_000,
                    fs_hz=12800.0, unit="g", samples=rng.standard_normal(4096).astype(np.float32))
              for i in range(20)]
    try:
        assert await until(lambda: src.connected)
        await asyncio.sleep(0.3)
        for b in blocks:
            pub.client.publish("fwb/quarry-lane/P-101/P-101-DE-H/block", encode_binary(b), qos=1)
        assert await until(lambda: len(ingest.payloads) == 20)
    finally:
        pub.close()
        await src.stop()
        await asyncio.wait_for(task, 10)
    got = [decode(p) for p in ingest.payloads]
    assert [b.seq for b in got] == list(range(20)) and ingest.rejected == []
    np.testing.assert_array_equal(got[5].samples, blocks[5].samples)  # bit-exact float32 through the gateway

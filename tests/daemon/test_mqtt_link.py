"""MqttLink driven from the event loop, against a real mosquitto (private, loopback, free port)."""

from __future__ import annotations

import asyncio
import time
from typing import Any

import paho.mqtt.client as mqtt
import pytest
from mqtt_roundtrip import packet_sizes, qos0_round_trip

from edgevib.daemon.config import MqttConnection
from edgevib.daemon.mqtt_client import READ_CHUNK, MqttLink

pytestmark = pytest.mark.network


async def _until(cond: Any, timeout_s: float = 10.0) -> bool:
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        if cond():
            return True
        await asyncio.sleep(0.02)
    return bool(cond())


async def test_an_unexpected_error_of_an_attempt_is_retried(mosquitto: Any, monkeypatch: pytest.MonkeyPatch) -> None:
    real = mqtt.Client.reconnect
    calls: list[int] = []

    def failing_once(self: mqtt.Client) -> Any:
        calls.append(1)
        if len(calls) == 1:
            raise RuntimeError("a surprise from the library")
        return real(self)

    monkeypatch.setattr(mqtt.Client, "reconnect", failing_once)
    conn = MqttConnection.model_validate({"url": mosquitto.url, "client_id": "edgevib-link-test",
                                          "reconnect_min_s": 0.05, "reconnect_max_s": 0.2})
    states: list[bool] = []
    link = MqttLink(conn, role="test", on_state=states.append)
    await link.start()
    try:
        assert await _until(lambda: link.connected)  # the reconnect loop went on after the error
        assert len(calls) == 2 and link.refusals == 1
    finally:
        await link.stop(flush_s=0.5)
    assert states == [True, False]


async def test_publish_and_receive_on_one_loop(mosquitto: Any) -> None:
    # one link subscribes, another publishes QoS 1: every message arrives once, in order (MQTT 3.1.1 §4.6), and
    # each QoS 1 publication is acknowledged (PUBACK, §4.3.2)
    got: list[bytes] = []
    acks: list[str] = []
    conn = MqttConnection.model_validate({"url": mosquitto.url, "client_id": "edgevib-link-sub"})
    sub = MqttLink(conn, role="sub", subscriptions=[("edgevib-test/#", 1)],
                   on_message=lambda m: got.append(bytes(m.payload)))
    pub = MqttLink(conn.model_copy(update={"client_id": "edgevib-link-pub"}), role="pub",
                   on_ack=lambda _mid, status, _r: acks.append(status))
    await sub.start()
    await pub.start()
    try:
        assert await _until(lambda: sub.connected and pub.connected)
        await asyncio.sleep(0.2)  # the subscription is in place
        payloads = [bytes([i % 256]) * (1000 + 7000 * i) for i in range(40)]  # up to 274 kB: several reads each
        for p in payloads:
            pub.publish("edgevib-test/blocks", p, qos=1)
        assert await _until(lambda: len(got) == len(payloads) and len(acks) == len(payloads))
        assert got == payloads
        assert acks == ["ok"] * len(payloads)
    finally:
        await pub.stop()
        await sub.stop()


@pytest.mark.parametrize("protocol", ["3.1.1", "5"])
async def test_qos0_messages_cut_by_the_link_arrive_whole(mosquitto: Any, protocol: str) -> None:
    # QoS 0 messages to a link with on_payload (as the MQTT source has): the link cuts the PUBLISH packets out of
    # its read chunks itself; every message arrives once, in order (MQTT 3.1.1 §4.6), payloads of 0 bytes to 273 kB
    # — and every one no longer than the link's read chunk was cut by the link (those crossing a read held until
    # whole), the longer ones read by paho
    conn = MqttConnection.model_validate({"url": mosquitto.url, "client_id": "edgevib-link-sub",
                                          "protocol": protocol})
    sent, got, cut = await qos0_round_trip(conn, "edgevib-test", timeout_s=10.0)
    assert got == sent
    assert cut == sum(size <= READ_CHUNK for size in packet_sizes(sent, protocol)) < len(sent)

"""MqttLink driven from the event loop, against a real mosquitto (private, loopback, free port)."""

from __future__ import annotations

import asyncio
import time
from typing import Any

import paho.mqtt.client as mqtt
import pytest

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
    # its read chunks itself; every message arrives once, in order (MQTT 3.1.1 §4.6), payloads of 0 bytes to 274 kB
    # (longer than a chunk: those go through paho) — and some were indeed cut by the link
    got: list[tuple[str, bytes]] = []
    conn = MqttConnection.model_validate({"url": mosquitto.url, "client_id": "edgevib-link-sub",
                                          "protocol": protocol})
    sub = MqttLink(conn, role="sub", subscriptions=[("edgevib-test/#", 0)],
                   on_payload=lambda topic, payload: got.append((topic, payload)))
    pub = MqttLink(conn.model_copy(update={"client_id": "edgevib-link-pub"}), role="pub")
    await sub.start()
    await pub.start()
    try:
        assert await _until(lambda: sub.connected and pub.connected)
        await asyncio.sleep(0.2)  # the subscription is in place
        sent = [(f"edgevib-test/s{i % 5}/block", bytes([i % 256]) * (7000 * i)) for i in range(40)]
        for topic, payload in sent:
            pub.publish(topic, payload, qos=0)
            await asyncio.sleep(0)
        assert await _until(lambda: len(got) == len(sent))
        assert got == sent
        assert sub.fast_publishes > 0
        # and every one no longer than the link's read chunk was (those crossing a read held until whole): the
        # packet's length from MQTT 3.1.1 §2.2.3 and §3.3 (MQTT 5.0 §3.3.2.3: a property length of 0 in one byte)
        lengths = [2 + len(t) + (protocol == "5") + len(p) for t, p in sent]
        sizes = [1 + (1 if n < 128 else 2 if n < 16_384 else 3) + n for n in lengths]
        assert sub.fast_publishes == sum(size <= READ_CHUNK for size in sizes) < len(sent)
    finally:
        await pub.stop()
        await sub.stop()

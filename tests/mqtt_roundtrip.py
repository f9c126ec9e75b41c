"""A QoS 0 round trip through two :class:`MqttLink` (a publisher and a subscriber with ``on_payload``), for the
tests of the link's own cutting of PUBLISH packets over plain TCP and over TLS."""

from __future__ import annotations

import asyncio
from typing import Any


def packet_sizes(sent: list[tuple[str, bytes]], protocol: str) -> list[int]:
    """Each QoS 0 PUBLISH's whole length on the wire: MQTT 3.1.1 §2.2.3 (remaining length) and §3.3 (topic, no
    packet identifier at QoS 0); MQTT 5.0 §3.3.2.3 adds a property length of 0 in one byte."""
    lengths = [2 + len(t.encode()) + (protocol == "5") + len(p) for t, p in sent]
    return [1 + (1 if n < 128 else 2 if n < 16_384 else 3) + n for n in lengths]


async def qos0_round_trip(conn: Any, prefix: str, timeout_s: float) -> tuple[list[tuple[str, bytes]],
                                                                             list[tuple[str, bytes]], int]:
    """Publish 40 QoS 0 messages of 0 bytes to 273 kB (longer than a read chunk: those go through paho) on topics
    under ``prefix`` through one link and receive them through another; returns what was sent, what arrived
    (once every message has, or at ``timeout_s``) and how many packets the subscriber's link cut itself."""
    from edgevib.daemon.mqtt_client import MqttLink

    got: list[tuple[str, bytes]] = []
    sub = MqttLink(conn, role="sub", subscriptions=[(f"{prefix}/#", 0)],
                   on_payload=lambda topic, payload: got.append((topic, payload)))
    pub = MqttLink(conn.model_copy(update={"client_id": f"{conn.client_id}-pub"}), role="pub")
    await sub.start()
    await pub.start()
    sent = [(f"{prefix}/s{i % 5}/block", bytes([i % 256]) * (7000 * i)) for i in range(40)]
    try:
        async with asyncio.timeout(10):
            while not (sub.connected and pub.connected):
                await asyncio.sleep(0.02)
        await asyncio.sleep(0.2)  # the subscription is in place
        for topic, payload in sent:
            pub.publish(topic, payload, qos=0)
            await asyncio.sleep(0)
        loop = asyncio.get_running_loop()
        deadline = loop.time() + timeout_s
        while len(got) < len(sent) and loop.time() < deadline:
            await asyncio.sleep(0.02)
        return sent, list(got), sub.fast_publishes
    finally:
        await pub.stop()
        await sub.stop()

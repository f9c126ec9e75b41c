"""The MQTT source hands payloads to the ingest in arrival order, from the event loop or from another thread."""

from __future__ import annotations

import asyncio
import threading

from edgevib.daemon.config import MqttConnection
from edgevib.daemon.sources.mqtt import MqttSource


class _Ingest:
    def __init__(self) -> None:
        self.payloads: list[bytes] = []
        self.rejected: list[str] = []

    def payload(self, _source: str, _topic: str | None, payload: bytes, _received_ns: int) -> None:
        self.payloads.append(payload)

    def block(self, *_a: object) -> None: ...
    def speed(self, *_a: object) -> None: ...
    def connection(self, *_a: object) -> None: ...

    def reject(self, _s: str, reason: str, _d: str, _t: str | None = None, *, received: bool = False) -> None:
        self.rejected.append(reason)


TOPIC = "fwb/quarry-lane/P-101/P-101-DE-H/block"


def _source(ingest: _Ingest, max_payload_bytes: int = 1024) -> MqttSource:
    conn = MqttConnection.model_validate({"url": "mqtt://127.0.0.1:1", "client_id": "t"})
    src = MqttSource(name="s", ingest=ingest, connection=conn, topics=["#"], max_payload_bytes=max_payload_bytes)
    src._loop = asyncio.get_running_loop()
    src._loop_thread = threading.get_ident()
    return src


async def test_payloads_keep_their_order_across_threads_and_the_loop() -> None:
    ingest = _Ingest()
    src = _source(ingest)
    src._on_payload(TOPIC, b"a")  # on the loop, nothing waiting
    t = threading.Thread(target=src._on_payload, args=(TOPIC, b"b"))  # from another thread: queued
    t.start()
    t.join()
    src._on_payload(TOPIC, b"c")  # on the loop while "b" waits: after it
    src._on_payload(TOPIC, b"x" * 2000)  # over max_payload_bytes: rejected, never copied
    await asyncio.sleep(0.05)
    src._on_payload(TOPIC, b"d")
    assert ingest.payloads == [b"a", b"b", b"c", b"d"]  # arrival order (MQTT keeps a topic's order, 3.1.1 §4.6)
    assert ingest.rejected == ["too_large"]
    assert src.pending_bytes == 0

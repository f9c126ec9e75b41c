"""An MQTT 5 test client that keeps every message with its PUBLISH properties (paho-mqtt 2.x)."""

from __future__ import annotations

import threading
import time
from dataclasses import dataclass, field
from typing import Any

import paho.mqtt.client as mqtt
from paho.mqtt.enums import CallbackAPIVersion


@dataclass
class Received:
    topic: str
    payload: bytes
    retain: bool
    properties: dict[str, Any] = field(default_factory=dict)


class Client5:
    """Subscribes ``topics`` (QoS 1) on a loopback broker; ``protocol`` "5" or "3.1.1"."""

    def __init__(self, port: int, topics: list[str], client_id: str = "interop-test", protocol: str = "5",
                 clean: bool = True) -> None:
        self.messages: list[Received] = []
        self.lock = threading.Lock()
        self.connected = threading.Event()
        v5 = protocol == "5"
        kwargs: dict[str, Any] = {} if v5 else {"clean_session": clean}
        self.client = mqtt.Client(CallbackAPIVersion.VERSION2, client_id=client_id,
                                  protocol=mqtt.MQTTv5 if v5 else mqtt.MQTTv311, **kwargs)
        self.topics = topics

        def on_connect(c: Any, u: Any, f: Any, rc: Any, p: Any = None) -> None:
            for t in self.topics:
                c.subscribe(t, qos=1)
            self.connected.set()

        def on_message(c: Any, u: Any, m: Any) -> None:
            props = {}
            if m.properties is not None:
                for name in ("ContentType", "PayloadFormatIndicator", "MessageExpiryInterval", "UserProperty",
                             "ResponseTopic", "CorrelationData"):
                    if hasattr(m.properties, name):
                        props[name] = getattr(m.properties, name)
            with self.lock:
                self.messages.append(Received(m.topic, bytes(m.payload), bool(m.retain), props))

        self.client.on_connect = on_connect
        self.client.on_message = on_message
        self.client.connect("127.0.0.1", port, 30)
        self.client.loop_start()
        if not self.connected.wait(10):
            raise TimeoutError("test client did not connect")
        time.sleep(0.2)  # let the SUBACKs arrive

    def on(self, prefix: str) -> list[Received]:
        with self.lock:
            return [m for m in self.messages if m.topic.startswith(prefix)]

    def wait(self, pred: Any, timeout_s: float = 20.0) -> bool:
        deadline = time.monotonic() + timeout_s
        while time.monotonic() < deadline:
            if pred():
                return True
            time.sleep(0.05)
        return bool(pred())

    def close(self) -> None:
        self.client.loop_stop()
        self.client.disconnect()

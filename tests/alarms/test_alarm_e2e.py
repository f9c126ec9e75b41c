"""End to end through real processes and brokers: simulator → ingest broker → ``edgevib run`` → feed broker →
a maintenance-system subscriber.

ISO 20816-3 group 2 rigid boundaries (FIELD_NOTES §1): B/C 2.8, C/D 4.5 mm/s r.m.s.  A sine of acceleration
amplitude A at f has velocity r.m.s. A/(2πf)/√2 (FIELD_NOTES §5).
"""

from __future__ import annotations

import asyncio
import json
import math
import os
import signal
import subprocess
import sys
import time
from pathlib import Path
from typing import Any

import numpy as np
import paho.mqtt.client as mqtt
import pytest
from alarmkit import Subscriber, persistent_broker
from servers import Mosquitto

from edgevib.common.wire import Block, encode_binary
from edgevib.daemon.alarms.control import request

pytestmark = [pytest.mark.network, pytest.mark.slow]
G = 9.80665  # standard gravity, m/s² (3rd CGPM 1901)


def start_daemon(cfg_path: Path, log_path: Path) -> subprocess.Popen[bytes]:
    env = {**os.environ, "PYTHONUNBUFFERED": "1"}
    return subprocess.Popen([sys.executable, "-m", "edgevib.daemon", "run", "--config", str(cfg_path),
                             "--metrics-listen", "127.0.0.1:0"], stdout=log_path.open("ab"),
                            stderr=subprocess.STDOUT, env=env)


def wait_for(pred: Any, timeout_s: float, what: str, proc: subprocess.Popen[bytes] | None = None,
             log: Path | None = None) -> Any:
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        if proc is not None and proc.poll() is not None:
            raise AssertionError(f"daemon exited ({proc.returncode}) waiting for {what}:\n"
                                 + (log.read_text()[-3000:] if log else ""))
        try:
            v = pred()
        except (OSError, ValueError):
            v = None
        if v:
            return v
        time.sleep(0.1)
    raise AssertionError(f"timed out waiting for {what}" + (":\n" + log.read_text()[-3000:] if log else ""))


def stop_daemon(proc: subprocess.Popen[bytes]) -> None:
    if proc.poll() is None:
        proc.send_signal(signal.SIGTERM)
        try:
            proc.wait(20)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait(10)


def alarm_events(sub: Subscriber) -> list[dict[str, Any]]:
    return [e for e in sub.events() if e["type"] == "io.edgevib.alarm.v1.transition"]


def test_progression_through_brokers_and_daemon(tmp_path: Path, mosquitto: Mosquitto) -> None:
    from edgevib.common.toml_writer import dump_toml as to_toml
    from edgevib.simulator.engine import Simulation, load_scenario
    from edgevib.simulator.publishers import MqttPublisher, stream

    feed = Mosquitto().start()  # the feed broker is not the ingest broker
    sub = Subscriber(feed.port, "fwb/#", client_id="cmms", clean=True)
    sim = Simulation(load_scenario("progression"), seed=5)
    state = tmp_path / "state"
    doc = sim.daemon_config(source={"name": "plant", "type": "mqtt", "url": mosquitto.url,
                                    "topics": ["fwb/quarry-lane/#"], "qos": 1},
                            extra={"site": {"name": "quarry-lane", "state_dir": str(state)},
                                   "feed": {"url": feed.url, "reconnect_min_s": 0.2, "reconnect_max_s": 1.0,
                                            "topic": "fwb/{site}/events/{machine}/{point}",
                                            "state_topic": "fwb/{site}/state/{machine}/{point}"},
                                   "alarms": {"startup_grace_s": 10.0}},
                            frame_samples=8192, overlap=0.5)
    (tmp_path / "edgevib.toml").write_text(to_toml(doc))
    log = tmp_path / "daemon.log"
    proc = start_daemon(tmp_path / "edgevib.toml", log)
    try:
        wait_for(lambda: (state / "alarms.sock").exists(), 60, "the control socket", proc, log)
        pub = MqttPublisher(mosquitto.url, qos=1, encoding="binary")
        pub.connect()
        asyncio.run(stream(sim, rate=16.0, duration_s=230.0, mqtt=pub))
        pub.close()
        time.sleep(2.0)
        events = [e for e in sub.events() if e["type"] == "io.edgevib.alarm.v1.transition"]
        mine = [e["data"] for e in events if e["data"]["point"] == "P-201-DE-H"
                and e["data"]["indicator"] == "velocity_rms_mm_s" and e["data"]["transition"] != "suppressed"]
        assert [(d["transition"], d["state"]) for d in mine][:2] == [("raised", "alert"), ("escalated", "danger")], \
            log.read_text()[-3000:]
        assert mine[0]["limit"] == pytest.approx(2.8) and mine[1]["limit"] == pytest.approx(4.5)
        others = [e["data"] for e in events if e["data"]["point"] != "P-201-DE-H"]
        assert others == []  # healthy machines, and the fan while it stood still, raised nothing
        faults = [e for e in sub.events() if e["type"] == "io.edgevib.sensor.v1.fault"
                  and e["data"]["fault"] != "no-data"]  # the stream ends: no-data after it is allowed
        assert faults == []
        with sub.lock:
            retained = {t: json.loads(p) for t, p, _ in sub.messages if "/state/" in t}
        assert retained["fwb/quarry-lane/state/P-201/P-201-DE-H"]["alarms"]["velocity_rms_mm_s"]["severity"] \
            == "danger"
    finally:
        stop_daemon(proc)
        sub.close()
        feed.close()


def _blocks(seq0: int, n_blocks: int, t0_ns: int, velocity_rms_mm_s: float, seed: int) -> list[Block]:
    fs, n, f = 12800.0, 4096, 24.75
    a_peak_g = velocity_rms_mm_s * 1e-3 * math.sqrt(2) * 2 * math.pi * f / G
    rng = np.random.default_rng(seed)
    out = []
    for k in range(seq0, seq0 + n_blocks):
        t = (k * n + np.arange(n)) / fs
        x = a_peak_g * np.sin(2 * np.pi * f * t) + 0.002 * rng.standard_normal(n)
        out.append(Block(sensor_id="QL-P101-DE-H", seq=k, t0_ns=t0_ns + round(k * n / fs * 1e9), fs_hz=fs,
                         unit="g", samples=x.astype(np.float32)))
    return out


def _publish(port: int, blocks: list[Block], pace_s: float = 0.02) -> None:
    c = mqtt.Client(callback_api_version=mqtt.CallbackAPIVersion.VERSION2, client_id=f"dev-{time.time_ns()}")
    c.connect("127.0.0.1", port, 30)
    c.loop_start()
    for b in blocks:
        c.publish("fwb/quarry-lane/P-101/P-101-DE-H/block", encode_binary(b), qos=1).wait_for_publish(10)
        time.sleep(pace_s)
    c.loop_stop()
    c.disconnect()


CONFIG = """
[site]
name = "quarry-lane"
state_dir = "{state}"

[analysis]
frame_samples = 8192
overlap = 0.0

[[sources]]
name = "plant"
type = "mqtt"
url = "{ingest}"
topics = ["fwb/quarry-lane/+/+/block"]
qos = 1

[[machines]]
id = "P-101"
group = 2
support = "rigid"
speed_rpm = 1485.0

[[points]]
id = "P-101-DE-H"
machine = "P-101"
axis = "horizontal"
source = "plant"
sensor = "QL-P101-DE-H"
fs_hz = 12800.0
block_samples = 4096

[alarms]
startup_grace_s = 0.0

[feed]
url = "{feed}"
reconnect_min_s = 0.2
reconnect_max_s = 1.0
"""


def test_durability_broker_down_sigkill_restart(tmp_path: Path, mosquitto: Mosquitto) -> None:
    feed = persistent_broker()
    feed.start()
    sub = Subscriber(feed.port, "edgevib/#", client_id="cmms")  # persistent session: the broker queues for it
    state = tmp_path / "state"
    cfg = tmp_path / "edgevib.toml"
    cfg.write_text(CONFIG.format(state=state, ingest=mosquitto.url, feed=feed.url))
    sock = state / "alarms.sock"
    log = tmp_path / "daemon.log"
    t0 = time.time_ns()
    feed.stop()  # the feed broker is down from here on
    proc = start_daemon(cfg, log)
    try:
        wait_for(lambda: sock.exists(), 60, "the control socket", proc, log)
        _publish(mosquitto.port, _blocks(0, 8, t0, 3.5, seed=1))  # alert zone (2.8 ≤ 3.5 < 4.5)

        def listing() -> dict[str, Any]:
            return request(sock, {"cmd": "list"}, timeout_s=5)["result"]

        res = wait_for(lambda: (r := listing())["alarms"][0]["severity"] == "alert" and r["outbox_pending"] >= 1
                       and r, 60, "the alert", proc, log)
        assert res["alarms"][0]["state"] == "unacknowledged"
        proc.send_signal(signal.SIGKILL)
        proc.wait(10)
        proc = start_daemon(cfg, log)
        wait_for(lambda: listing()["alarms"][0]["severity"] == "alert", 60, "the restored alert", proc, log)
        _publish(mosquitto.port, _blocks(8, 8, t0, 5.5, seed=2))  # danger zone (≥ 4.5)
        wait_for(lambda: listing()["alarms"][0]["severity"] == "danger", 60, "the danger", proc, log)
        assert listing()["outbox_pending"] >= 2
        feed.start()  # the feed broker comes back
        wait_for(lambda: len(alarm_events(sub)) >= 2, 60, "the events at the subscriber", proc, log)
        wait_for(lambda: listing()["outbox_pending"] == 0, 30, "an empty outbox", proc, log)
        evs = alarm_events(sub)
        kinds = [(e["data"]["transition"], e["data"]["state"]) for e in evs]
        distinct = list(dict.fromkeys((e["id"], k) for e, k in zip(evs, kinds, strict=True)))
        assert [k for _, k in distinct] == [("raised", "alert"), ("escalated", "danger")]  # no storm, none lost
        assert len({i for i, _ in distinct}) == 2
        wait_for(lambda: any("/alarm-state/" in t for t, _, _ in sub.messages), 20, "the state topic")
        with sub.lock:
            states = [json.loads(p) for t, p, _ in sub.messages if t == "edgevib/quarry-lane/alarm-state/P-101/"
                      "P-101-DE-H"]
        assert states[-1]["state"] == "danger"
    finally:
        stop_daemon(proc)
        sub.close()
        feed.close()



"""A broker outage while a point is in unacknowledged danger, through real processes and brokers: device →
ingest broker (killed, then started again) → ``edgevib run`` (optionally SIGKILLed during the outage) → feed
broker → a maintenance-system subscriber.

Practice (FIELD_NOTES §7): loss of the data path is a communication fault of the source, annunciated once,
neither a machine alarm nor a transducer fault; an active or unacknowledged alarm keeps its state through the loss
and returns to normal only on a good value (ANSI/ISA-18.2).  ISO 20816-3 group 2 rigid (FIELD_NOTES §1): C/D
4.5 mm/s r.m.s.; a sine of acceleration amplitude A at f has velocity r.m.s. A/(2πf)/√2 (FIELD_NOTES §5).

The outage is kept short here (a few seconds); nothing in the daemon depends on its length.
"""

from __future__ import annotations

import math
import signal
import subprocess
import sys
import time
from pathlib import Path
from typing import Any

import numpy as np
import paho.mqtt.client as mqtt
import pytest
from alarmkit import Subscriber
from servers import Mosquitto

from edgevib.common.wire import Block, encode_binary
from edgevib.daemon.alarms.control import request

pytestmark = [pytest.mark.network, pytest.mark.slow]
G = 9.80665  # standard gravity, m/s² (3rd CGPM 1901)
POINTS = {"P-101-DE-H": "QL-P101-DE-H", "P-101-NDE-H": "QL-P101-NDE-H"}
OUTAGE_S = 4.0

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
reconnect_min_s = 0.2
reconnect_max_s = 1.0

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

[[points]]
id = "P-101-NDE-H"
machine = "P-101"
axis = "horizontal"
source = "plant"
sensor = "QL-P101-NDE-H"
fs_hz = 12800.0
block_samples = 4096

[alarms]
startup_grace_s = 0.0

[feed]
url = "{feed}"
reconnect_min_s = 0.2
reconnect_max_s = 1.0
"""


def start_daemon(cfg_path: Path, log_path: Path) -> subprocess.Popen[bytes]:
    return subprocess.Popen([sys.executable, "-m", "edgevib.daemon", "run", "--config", str(cfg_path),
                             "--metrics-listen", "127.0.0.1:0"], stdout=log_path.open("ab"),
                            stderr=subprocess.STDOUT)


def wait_for(pred: Any, timeout_s: float, what: str, proc: subprocess.Popen[bytes], log: Path) -> Any:
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        if proc.poll() is not None:
            raise AssertionError(f"daemon exited ({proc.returncode}) waiting for {what}:\n{log.read_text()[-3000:]}")
        try:
            v = pred()
        except (OSError, ValueError, KeyError):
            v = None
        if v:
            return v
        time.sleep(0.1)
    raise AssertionError(f"timed out waiting for {what}:\n{log.read_text()[-3000:]}")


def stop_daemon(proc: subprocess.Popen[bytes]) -> None:
    if proc.poll() is None:
        proc.send_signal(signal.SIGTERM)
        try:
            proc.wait(20)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait(10)


class Device:
    """Blocks of a 24.75 Hz sine of chosen velocity r.m.s. per point, continuing sequence numbers and times."""

    def __init__(self, port: int) -> None:
        self.port = port
        self.seq = 0
        self.t0_ns = time.time_ns()
        self.rng = np.random.default_rng(7)

    def send(self, n_blocks: int, velocity_mm_s: dict[str, float]) -> None:
        fs, n, f = 12800.0, 4096, 24.75
        c = mqtt.Client(callback_api_version=mqtt.CallbackAPIVersion.VERSION2, client_id=f"dev-{time.time_ns()}")
        c.connect("127.0.0.1", self.port, 30)
        c.loop_start()
        try:
            for k in range(self.seq, self.seq + n_blocks):
                t = (k * n + np.arange(n)) / fs
                for pid, sensor in POINTS.items():
                    a_peak_g = velocity_mm_s[pid] * 1e-3 * math.sqrt(2) * 2 * math.pi * f / G
                    x = a_peak_g * np.sin(2 * np.pi * f * t) + 0.002 * self.rng.standard_normal(n)
                    b = Block(sensor_id=sensor, seq=k, t0_ns=self.t0_ns + round(k * n / fs * 1e9), fs_hz=fs,
                              unit="g", samples=x.astype(np.float32))
                    c.publish(f"fwb/quarry-lane/P-101/{pid}/block", encode_binary(b), qos=1).wait_for_publish(10)
                time.sleep(0.02)
        finally:
            c.loop_stop()
            c.disconnect()
        self.seq += n_blocks


def of_type(sub: Subscriber, kind: str) -> list[dict[str, Any]]:
    return [e for e in sub.events() if e["type"] == kind]


@pytest.mark.parametrize("sigkill", [False, True], ids=["daemon-running", "daemon-sigkilled-during-outage"])
def test_broker_outage_keeps_an_unacknowledged_danger(tmp_path: Path, mosquitto: Mosquitto, sigkill: bool) -> None:
    feed = Mosquitto().start()  # the feed broker stays up: the events can be watched during the outage
    sub = Subscriber(feed.port, "edgevib/#", client_id="cmms", clean=True)
    state = tmp_path / "state"
    cfg = tmp_path / "edgevib.toml"
    cfg.write_text(CONFIG.format(state=state, ingest=mosquitto.url, feed=feed.url))
    sock = state / "alarms.sock"
    log = tmp_path / "daemon.log"
    proc = start_daemon(cfg, log)
    device = Device(mosquitto.port)

    def row(point: str = "P-101-DE-H") -> dict[str, Any]:
        alarms = request(sock, {"cmd": "list", "point": point}, timeout_s=5)["result"]["alarms"]
        return next(a for a in alarms if a["indicator"] == "velocity_rms_mm_s")

    try:
        wait_for(lambda: sock.exists(), 60, "the control socket", proc, log)
        wait_for(lambda: request(sock, {"cmd": "list"}, timeout_s=5)["result"]["points"]["P-101-DE-H"]
                 ["source_state"] == "up" and b"source connected" in log.read_bytes(), 30, "the source", proc, log)
        device.send(8, {"P-101-DE-H": 5.5, "P-101-NDE-H": 1.0})  # danger (≥ C/D 4.5) and zone A
        wait_for(lambda: row()["severity"] == "danger", 60, "the danger", proc, log)
        assert row()["state"] == "unacknowledged"
        mosquitto.proc.kill()  # the ingest broker dies
        mosquitto.proc.wait(5)
        wait_for(lambda: of_type(sub, "io.edgevib.source.v1.down"), 30, "the source-down event", proc, log)
        if sigkill:
            proc.send_signal(signal.SIGKILL)
            proc.wait(10)
            proc = start_daemon(cfg, log)  # the broker is still down
            wait_for(lambda: sock.exists() and row(), 60, "the restarted daemon", proc, log)
        time.sleep(OUTAGE_S)
        r = row()
        assert (r["state"], r["severity"], r["stale"]) == ("unacknowledged", "danger", "source-down")
        assert of_type(sub, "io.edgevib.sensor.v1.fault") == []
        mosquitto.start()  # the broker returns on the same port
        wait_for(lambda: of_type(sub, "io.edgevib.source.v1.up"), 60, "the source-up event", proc, log)
        device.send(6, {"P-101-DE-H": 5.5, "P-101-NDE-H": 1.0})  # fresh frames, still in danger
        wait_for(lambda: row()["stale"] is None, 60, "fresh frames judged", proc, log)
        r = row()
        assert (r["state"], r["severity"]) == ("unacknowledged", "danger")  # not acknowledged by the outage
        device.send(6, {"P-101-DE-H": 1.0, "P-101-NDE-H": 1.0})  # good values below the clear threshold
        wait_for(lambda: row()["severity"] == "normal", 60, "the return to normal", proc, log)
        assert row()["state"] == "rtn-unacknowledged"  # returned to normal, still to be acknowledged
        time.sleep(1.0)
        down, up = of_type(sub, "io.edgevib.source.v1.down"), of_type(sub, "io.edgevib.source.v1.up")
        assert len({e["id"] for e in down}) == 1 and len({e["id"] for e in up}) == 1, log.read_text()[-3000:]
        assert down[0]["subject"] == "plant" and set(down[0]["data"]["points"]) == set(POINTS)
        assert down[0]["data"]["stale_alarms"] == [{"point": "P-101-DE-H", "indicator": "velocity_rms_mm_s",
                                                    "alarm_state": "unacknowledged", "severity": "danger"}]
        assert of_type(sub, "io.edgevib.sensor.v1.fault") == []
        alarms = [e["data"] for e in of_type(sub, "io.edgevib.alarm.v1.transition")]
        mine = list(dict.fromkeys((d["point"], d["transition"], d["state"]) for d in alarms))
        assert mine == [("P-101-DE-H", "raised", "danger"), ("P-101-DE-H", "cleared", "normal")]
        cleared = next(d for d in alarms if d["transition"] == "cleared")
        assert cleared["value"] < cleared["clear"]  # judged on a good value
    finally:
        stop_daemon(proc)
        sub.close()
        feed.close()

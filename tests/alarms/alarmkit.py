"""Helpers for the alarm tests: frames from the simulator through the real analysis and sensor-health checks (as
the daemon makes them), hand-made frames with chosen indicators, small configurations."""

from __future__ import annotations

from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from framekit import Tracked

from edgevib.daemon.alarms.engine import AlarmLayer
from edgevib.daemon.app import wire_alarms
from edgevib.daemon.config import Config, parse_config
from edgevib.daemon.interfaces import FrameResult
from edgevib.daemon.sensor_health import batch_health, judged_running
from edgevib.pipelines.analysis import analyze_frames
from edgevib.pipelines.health import SensorHealth
from edgevib.pipelines.machine_state import MachineState

RUNNING = MachineState(state="running")
"""A running machine's state, as hand-made frames carry it unless told otherwise."""


class SimFrames:
    """Cuts a simulation's blocks into frames (hop = frame × (1 − overlap)) and analyses them; each frame carries
    its sensor-health verdict and its machine's state as the daemon attaches them."""

    def __init__(self, sim: Any, cfg: Config) -> None:
        self.sim, self.cfg = sim, cfg
        self.by_sensor = {p.sensor: p for p in cfg.points}
        self.buf: dict[str, list[np.ndarray]] = {p.id: [] for p in cfg.points}
        self.buf_t0: dict[str, int] = {}
        self.next_seq: dict[str, int] = {}
        self.plans = {p.id: cfg.plan(p.id) for p in cfg.points}
        self.tracked = Tracked(cfg)  # each machine's state, as the daemon's tracker judges it

    def _health(self, p: Any, x: np.ndarray, ind: Any) -> Any:
        """The frame's sensor-health verdict as the daemon's analysis workers attach it (``edgevib.daemon.app``:
        the point's spec, judged against a running machine only while the machine runs)."""
        s = self.cfg.alarm_settings
        if not s.table.health.enabled:
            return None
        running = judged_running(self.tracked.machines.running(p.machine), ind.velocity_rms_mm_s,
                                 s.table.run_threshold_velocity_mm_s)
        (h,) = batch_health(x[None, :], p.fs_hz, [s.health[p.id]], [ind.acceleration_rms_g], [running], [p.id])
        return h

    def until(self, t_s: float) -> list[FrameResult]:
        jobs: list[tuple[Any, np.ndarray, int, float | None]] = []
        for b in self.sim.blocks_until(t_s):
            p = self.by_sensor[b.sensor_id]
            if self.next_seq.get(p.id, b.seq) != b.seq:  # gap: start the frame afresh
                self.buf[p.id] = []
            self.next_seq[p.id] = b.seq + 1
            if not self.buf[p.id]:
                self.buf_t0[p.id] = b.t0_ns
            self.buf[p.id].append(np.asarray(b.samples, dtype=np.float64))
            x = np.concatenate(self.buf[p.id])
            n, hop = p.frame_samples, p.hop_samples
            while x.size >= n:
                t_end = self.buf_t0[p.id] + round(n / p.fs_hz * 1e9)
                m = self.cfg.machine(p.machine)
                t_rel = (t_end - self.sim.t0_ns) / 1e9
                shaft = m.speed_rpm / 60.0 if m.speed_rpm else self.sim.speed_hz(p.machine, t_rel)
                jobs.append((p, x[:n].copy(), t_end, shaft if shaft > 0 else None))
                x = x[hop:]
                self.buf_t0[p.id] += round(hop / p.fs_hz * 1e9)
            self.buf[p.id] = [x]
        out = []
        for p, x, t_end, shaft in jobs:
            shaft_arr = None if shaft is None else np.array([shaft])
            ind = analyze_frames(x[None, :], self.plans[p.id], shaft_hz=shaft_arr)[0]
            r = FrameResult(point_id=p.id, machine_id=p.machine, t_end_ns=t_end, received_ns=t_end,
                            fs_hz=p.fs_hz, indicators=ind, iso_zone=None, samples=x, axis=p.axis,
                            health=self._health(p, x, ind))
            out += self.tracked([r])
        return out


@pytest.fixture
def sim_config(tmp_path: Path) -> Callable[..., tuple[Any, Config, SimFrames]]:
    """``sim_config(scenario, alarms=…, points_limits=…, seed=…)`` → (simulation, daemon config, frame maker)."""
    from edgevib.simulator.engine import Simulation, load_scenario

    def make(scenario: str, *, extra: dict[str, Any] | None = None, limits: dict[str, Any] | None = None,
             seed: int = 3, frame_samples: int = 8192, overlap: float = 0.0) -> tuple[Any, Config, SimFrames]:
        sim = Simulation(load_scenario(scenario), seed=seed, t0_ns=1_780_000_000_000_000_000)
        ex = {"site": {"name": "quarry-lane", "state_dir": str(tmp_path / "state")}, **(extra or {})}
        doc = sim.daemon_config(source={"name": "sim", "type": "simulated", "scenario": scenario}, extra=ex,
                                frame_samples=frame_samples, overlap=overlap)
        for p in doc["points"]:
            if limits:
                p["limits"] = limits
        cfg = parse_config(doc, tmp_path)
        return sim, cfg, SimFrames(sim, cfg)

    return make


@pytest.fixture
def short_tmp() -> Iterator[Path]:
    """A short temporary directory (Unix socket paths are limited to ~100 bytes)."""
    import shutil
    import tempfile

    d = Path(tempfile.mkdtemp(prefix="evb-"))
    try:
        yield d
    finally:
        shutil.rmtree(d, ignore_errors=True)


def alarm_layer(cfg: Config, registry: Any = None, **seams: Any) -> AlarmLayer:
    """The alarm layer of ``cfg`` as the daemon wires it (``edgevib.daemon.app.wire_alarms``: store, feeds, control
    socket, collector on ``registry``); ``seams``: the daemon's (``tracks_sources``, ``block_arrival`` …) and
    the clocks."""
    layer = wire_alarms(cfg, registry, **seams)
    assert layer is not None, "the configuration has alarms on"
    return layer


async def started_layer(cfg: Config, registry: Any = None, *, events: list[dict[str, Any]] | None = None,
                        **seams: Any) -> tuple[AlarmLayer, list[dict[str, Any]]]:
    """:func:`alarm_layer` started, with ``events`` (a new list unless given) receiving each committed event."""
    layer = alarm_layer(cfg, registry, **seams)
    events = [] if events is None else events
    layer.subscribe(events.append)
    await layer.start()
    return layer, events


def indicators(velocity_mm_s: float, **kw: Any) -> Any:
    """FrameIndicators with a chosen velocity r.m.s. (others plausible for a healthy machine)."""
    from framekit import frame_indicators

    base = dict(acceleration_rms_g=0.1, acceleration_peak_g=0.3, acceleration_peak_to_peak_g=0.6, crest_factor=3.0,
                kurtosis=3.0, skewness=0.0, mean_g=0.0, velocity_rms_mm_s=velocity_mm_s,
                velocity_peak_mm_s=1.414 * velocity_mm_s, displacement_pp_um=10.0, shaft_hz=24.75,
                shaft_estimated=False, orders_mm_s={"0.5x": 0.05, "1x": 0.5 * velocity_mm_s, "2x": 0.1, "3x": 0.05})
    base.update(kw)
    return frame_indicators(**base)


def frame_result(point: str, machine: str, t_s: float, velocity_mm_s: float, *, fs_hz: float = 12800.0,
                 n: int = 8192, seed: int = 0, health: SensorHealth | None = None,
                 machine_state: MachineState | None = RUNNING, **kw: Any) -> FrameResult:
    """A frame of a healthy-looking signal (24.75 Hz sine plus noise) with chosen indicators, its sensor-health
    verdict (``None``: not checked) and its machine's state (as the daemon's tracker attaches it; by default
    running)."""
    rng = np.random.default_rng(seed)
    t = np.arange(n) / fs_hz
    x = 0.2 * np.sin(2 * np.pi * 24.75 * t) + 0.01 * rng.standard_normal(n)
    return FrameResult(point_id=point, machine_id=machine, t_end_ns=round(t_s * 1e9), received_ns=round(t_s * 1e9),
                       fs_hz=fs_hz, indicators=indicators(velocity_mm_s, **kw), iso_zone=None, samples=x,
                       axis="horizontal", health=health, machine_state=machine_state)


def small_config(state_dir: Path, *, alarms: dict[str, Any] | None = None, limits: dict[str, Any] | None = None,
                 feed: dict[str, Any] | None = None, capture: dict[str, Any] | None = None) -> Config:
    """Pump P-101 (group 2, rigid: ISO B/C 2.8, C/D 4.5 mm/s) with one point, P-101-DE-H."""
    doc: dict[str, Any] = {
        "site": {"name": "quarry-lane", "state_dir": str(state_dir)},
        "analysis": {"frame_samples": 8192, "overlap": 0.0},
        "sources": [{"name": "sim", "type": "simulated", "scenario": "demo"}],
        "machines": [{"id": "P-101", "group": 2, "support": "rigid", "speed_rpm": 1485.0}],
        "points": [{"id": "P-101-DE-H", "machine": "P-101", "axis": "horizontal", "source": "sim",
                    "sensor": "QL-P101-DE-H", "fs_hz": 12800.0, "block_samples": 4096}],
        "alarms": {"startup_grace_s": 0.0, "on_delay_frames": 2, "off_delay_frames": 2, **(alarms or {})},
    }
    if limits is not None:
        doc["points"][0]["limits"] = limits
    if feed is not None:
        doc["feed"] = feed
    if capture is not None:
        doc["capture"] = capture
    return parse_config(doc, state_dir)


class Subscriber:
    """A paho subscriber (QoS 1) on a loopback broker; persistent session unless ``clean``."""

    def __init__(self, port: int, topic: str = "#", client_id: str = "alarm-test-sub", clean: bool = False) -> None:
        import threading

        import paho.mqtt.client as mqtt
        from paho.mqtt.enums import CallbackAPIVersion

        self.messages: list[tuple[str, bytes, bool]] = []
        self.lock = threading.Lock()
        self.connected = threading.Event()
        self.client = mqtt.Client(callback_api_version=CallbackAPIVersion.VERSION2, client_id=client_id,
                                  clean_session=clean)
        self.client.reconnect_delay_set(min_delay=1, max_delay=1)
        self.topic = topic

        def on_connect(c: Any, u: Any, f: Any, rc: Any, p: Any = None) -> None:
            c.subscribe(self.topic, qos=1)
            self.connected.set()

        def on_message(c: Any, u: Any, m: Any) -> None:
            with self.lock:
                self.messages.append((m.topic, bytes(m.payload), bool(m.retain)))

        self.client.on_connect = on_connect
        self.client.on_message = on_message
        self.client.connect("127.0.0.1", port, 30)
        self.client.loop_start()
        if not self.connected.wait(10):
            raise TimeoutError("subscriber did not connect")

    def events(self) -> list[dict[str, Any]]:
        import json

        with self.lock:
            return [json.loads(p) for _, p, _ in self.messages if p.startswith(b"{\"specversion\"")]

    def wait(self, pred: Any, timeout_s: float = 20.0) -> bool:
        import time

        deadline = time.monotonic() + timeout_s
        while time.monotonic() < deadline:
            if pred():
                return True
            time.sleep(0.05)
        return bool(pred())

    def close(self) -> None:
        self.client.loop_stop()
        self.client.disconnect()


def persistent_broker() -> Any:
    """A private mosquitto that keeps sessions and queued QoS 1 messages across its own restarts."""
    import os

    from servers import Mosquitto

    b = Mosquitto()
    os.chmod(b.dir, 0o777)  # mosquitto started as root drops to its own user before saving
    conf = b.conf.read_text().replace("persistence false", "")
    b.conf.write_text(conf + f"persistence true\npersistence_location {b.dir}/\nautosave_interval 1\n")
    return b

"""Plant conditions end to end: simulator scenarios with stops, run-ups and sensor faults → a private mosquitto →
the daemon (MQTT source, analysis, machine state, sensor health, alarm layer).

The references are outside the daemon: the simulator's truth (it never imports edgevib.pipelines) gives each
machine's state from its speed profile and each point's sensor faults from the scenario.  Practice (FIELD_NOTES
§6, §7): a stopped machine is a normal operating state, not a transducer fault; a dead output, a bias out of its
window, clipping and spikes are sensor faults whatever the machine does.
"""

from __future__ import annotations

import asyncio
from pathlib import Path
from typing import Any, cast

import pytest
from servers import Mosquitto

from edgevib.daemon.alarms.engine import AlarmLayer
from edgevib.daemon.alarms.feed import SENSOR_TYPE, SOURCE_DOWN_TYPE
from edgevib.daemon.app import Daemon
from edgevib.daemon.config import parse_config
from edgevib.daemon.interfaces import FrameResult

pytestmark = [pytest.mark.network, pytest.mark.slow]

# scenario -> (simulated seconds, rate × real time): the whole schedule of stops and starts, compressed
SCENARIOS = {"progression": (230.0, 12.0), "run-up": (70.0, 5.0), "sensor-faults": (40.0, 4.0),
             "stop-restart": (100.0, 5.0)}
WINDOW_S = 4.0  # a judged state may lead or lag the truth by the speed trend window (3 s) and a frame
LEVEL_WINDOW_S = 8.0  # machines judged by their level: the level lags the speed through a run-up or coast-down
# Which health verdicts a simulated sensor fault may give (a cable jumping to the rail shows as a bias, a DC
# step, clipping or spikes depending on where the episodes fall in a frame).
EXPECTED_FAULTS = {"flatline": {"flatline"}, "clipping": {"clipping"}, "bias_shift": {"bias"},
                   "cable_fault": {"bias", "dc-step", "clipping", "spikes"}, "spikes": {"spikes"}}


class Probe:
    """A lossless sink that keeps every analysed result."""

    batch_window_s = 0.0

    def __init__(self) -> None:
        self.results: list[FrameResult] = []

    async def start(self) -> None:
        pass

    async def on_frames(self, results: list[FrameResult]) -> None:
        self.results.extend(results)

    async def stop(self) -> None:
        pass


def _matches(judged: str, truth_states: set[str], by_level: bool) -> bool:
    if judged in truth_states:
        return True
    # A level cannot tell a coast-down: such machines go from running to stopped (README, machine state).
    return by_level and "coasting" in truth_states and judged in ("running", "stopped")


async def run_scenario(name: str, mosquitto: Mosquitto, tmp_path: Path) -> tuple[Any, Daemon, Probe,
                                                                                list[dict[str, Any]]]:
    from edgevib.simulator.engine import Simulation, load_scenario
    from edgevib.simulator.publishers import MqttPublisher, stream

    duration_s, rate = SCENARIOS[name]
    sim = Simulation(load_scenario(name), seed=11)
    prefix = sim.topic(sim.points[0].point_id).split("/")
    doc = sim.daemon_config(source={"name": "plant", "type": "mqtt", "url": mosquitto.url, "qos": 1,
                                    "topics": ["/".join(prefix[:2]) + "/+/+/block"], "reconnect_min_s": 0.1,
                                    "reconnect_max_s": 1.0},
                            extra={"site": {"state_dir": str(tmp_path / "state")}}, frame_samples=8192, overlap=0.5)
    doc["analysis"]["queue_frames"] = 256  # under a loaded test machine, frames wait rather than drop
    cfg = parse_config(doc)
    d = Daemon(cfg, metrics_listen=("127.0.0.1", 0))
    probe = Probe()
    d.add_lossless_sink(probe)
    layer = cast(AlarmLayer, d.alarm_view)
    events: list[dict[str, Any]] = []
    layer.subscribe(events.append)
    await d.start()
    try:
        async with asyncio.timeout(20):
            while not d.stats.connected.get("plant"):
                await asyncio.sleep(0.05)
        pub = MqttPublisher(mosquitto.url, qos=1, encoding="binary")
        await asyncio.to_thread(pub.connect)
        try:
            await stream(sim, rate=rate, duration_s=duration_s, mqtt=pub)
        finally:
            await asyncio.to_thread(pub.close)
        async with asyncio.timeout(120):  # every block analysed and judged
            while True:
                await asyncio.sleep(0.5)
                lossy = {p.point_id for p in sim.points if any(sf.type == "dropped_blocks" for sf in p.sensor_faults)}
                expected = {p.id: int(duration_s * p.fs_hz * (0.3 if p.id in lossy else 0.9)) // p.hop_samples
                            for p in cfg.points}
                seen: dict[str, int] = {}
                for r in probe.results:
                    seen[r.point_id] = seen.get(r.point_id, 0) + 1
                if all(seen.get(pid, 0) >= n for pid, n in expected.items()) and d.idle:
                    break
    finally:
        await d.stop()
    return sim, d, probe, events


def check_machine_states(sim: Any, d: Daemon, probe: Probe) -> None:
    tagged = {m.id for m in d.config.machines if m.speed_tag is not None}
    for m in sim.machines:
        mid = m.machine_id
        mine = [r for r in probe.results if r.machine_id == mid and r.machine_state is not None]
        assert mine, mid
        window = WINDOW_S if mid in tagged else LEVEL_WINDOW_S
        good, judged_states = 0, set()
        for r in mine:
            assert r.machine_state is not None
            t = (r.t_end_ns - sim.t0_ns) / 1e9
            if t < 5.0:  # the first judgement needs readings spanning the trend window
                continue
            states = {sim.machine_state(mid, max(0.0, t + dt)) for dt in (-window, -window / 2, 0.0, window / 2,
                                                                            window)}
            judged = r.machine_state.state
            judged_states.add(judged)
            good += _matches(judged, states, mid not in tagged)
        counted = sum(1 for r in mine if (r.t_end_ns - sim.t0_ns) / 1e9 >= 5.0)
        assert good >= 0.95 * counted, (mid, good, counted, sim.machine_state_timeline(mid))
        # every state the truth holds for a while is judged at some point
        timeline = sim.machine_state_timeline(mid)
        end = (max(r.t_end_ns for r in mine) - sim.t0_ns) / 1e9
        for (t0, s), t1 in zip(timeline, [t for t, _ in timeline[1:]] + [end], strict=True):
            if t1 - t0 >= 10.0 and not (s == "coasting" and mid not in tagged):
                assert s in judged_states, (mid, s, judged_states)


def check_sensor_faults(sim: Any, events: list[dict[str, Any]], rate_check: bool = True) -> None:
    faulty = {p.point_id: [sf for sf in p.sensor_faults if sf.type != "dropped_blocks"] for p in sim.points}
    raised = [e["data"] for e in events if e["type"] == SENSOR_TYPE and e["data"]["transition"] == "raised"]
    for d in raised:  # only real sensor faults: none on healthy sensors, whatever their machine does
        assert faulty[d["point"]], (d["point"], d["fault"], d["detail"], d["machine_state"])
        assert d["fault"] != "no-data", d
    for pid, faults in faulty.items():
        for sf in faults:
            end = sf.end_s if sf.end_s is not None else SCENARIOS[sim.scenario.name][0]
            if end - sf.start_s < 5.0:
                continue
            kinds = {d["fault"] for d in raised if d["point"] == pid}
            assert kinds & EXPECTED_FAULTS[sf.type], (pid, sf.type, kinds)


@pytest.mark.parametrize("name", list(SCENARIOS))
async def test_scenario_through_mosquitto(name: str, mosquitto: Mosquitto, tmp_path: Path) -> None:
    sim, d, probe, events = await run_scenario(name, mosquitto, tmp_path)
    assert sum(d.stats.analysis_errors.values()) == 0
    assert not d.stats.blocks_rejected
    check_machine_states(sim, d, probe)
    check_sensor_faults(sim, events)
    assert [e for e in events if e["type"] == SOURCE_DOWN_TYPE] == []  # the source never went away
    # a standing machine's frames carry no orders or bearing families (absent, not zero), and no analysis error
    for r in probe.results:
        if r.machine_state is not None and r.machine_state.state == "stopped":
            assert r.indicators.orders_mm_s == {} and r.indicators.envelope == {}

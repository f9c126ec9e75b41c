"""Scenarios: a simulated plant described in TOML, loaded and validated into frozen specs.

A scenario names a site, its machines (ISO group and support, shaft speed, faults) and its measurement points
(sensor type and model, sample rate, block length, bearing geometry, sensor faults).  The packaged scenarios
live in ``simulator/scenarios/*.toml``; ``load_scenario`` takes one of their names or a path.  Every problem
raises :class:`ScenarioError` naming the key path, e.g. ``machines[1].faults[0].velocity_mm_s: …``.

Schema (defaults in brackets)::

    [scenario]  name, description, duration_s [60]
    [site]      name, description [""], topic_prefix ["fwb/<name>"]
    [[machines]]
      id, description [""], group (1|2), support ("rigid"|"flexible")
      speed = { rpm = 1480 }                                  # fixed
            | { schedule = [[0, 1480], [90, 1480], [100, 0]] }  # (t_s, r/min), linear between, held outside
            | { ramp = [0, 1480], start_s = 5, duration_s = 20 }
            + optional wander = 0.01, wander_period_s [60], wander_phase_deg [0]
      reference_rpm [highest scheduled speed]   amplitudes below are given at this speed
      run_threshold_rpm [60]; speed_range_rpm [[0.5, 1.5] × reference]
      speed_tag [true]             false: the plant has no speed measurement of a machine whose speed varies;
                                   its emitted configuration has no speed tag (the daemon estimates the speed)
      residual_mm_s [0.5]          healthy residual 1× (with 0.3 of it at 2×) on a gain-1 axis
      process_noise_ug_rthz [150]  broadband process noise density at reference speed (∝ speed)
      [[machines.faults]]  type, points [all of the machine's], axis_gain {axis = gain}, stage ["developing"],
                           progression { curve = "logistic"|"exponential"|"linear", start_s, end_s,
                                         from, to, steepness [10] } (a multiplier of the amplitude), + params
    [longrun]   months in compressed time: see edgevib.simulator.longrun
    [[points]]
      id, machine, axis ("horizontal"|"vertical"|"axial"|"radial"), sensor [id], sensor_type ("piezo"|"mems"),
      fs_hz, block_samples, description [""], sensitivity_mv_per_g [100, piezo],
      bearing { elements, ball_diameter_mm, pitch_diameter_mm, contact_angle_deg [0] },
      resonance_hz [3000, ≤ 0.3·fs], resonance_damping [0.05], resonance_gain [4]   structure near the sensor
      velocity_band_hz [[10, 1000]; [2, 1000] below 600 r/min], envelope_band_hz (optional, for the config)
      [points.sensor_model]  see SENSOR_DEFAULTS
      [[points.sensor_faults]]  type, start_s [0], end_s [never], + params (see SENSOR_FAULT_PARAMS)
"""

from __future__ import annotations

import math
import tomllib
from collections.abc import Mapping
from dataclasses import dataclass, field
from importlib import resources
from pathlib import Path
from typing import Any

from edgevib.simulator.models import Curve, bearing_orders

__all__ = [
    "AXES",
    "FAULT_PARAMS",
    "SENSOR_FAULT_PARAMS",
    "BearingSpec",
    "FaultSpec",
    "MachineSpec",
    "PointSpec",
    "Scenario",
    "ScenarioError",
    "SensorFaultSpec",
    "SensorModel",
    "SpeedSpec",
    "builtin_scenarios",
    "load_scenario",
    "parse_scenario",
]

AXES = ("horizontal", "vertical", "axial", "radial")
_REQ = object()

# type -> {parameter: (default, low, high)}; _REQ marks a required parameter.
FAULT_PARAMS: dict[str, dict[str, tuple[Any, float, float]]] = {
    "imbalance": {"velocity_mm_s": (_REQ, 0.0, 100.0)},
    "misalignment": {"velocity_mm_s": (_REQ, 0.0, 100.0), "ratio_1x": (0.5, 0.0, 5.0),
                     "ratio_3x": (0.3, 0.0, 5.0)},
    "looseness": {"velocity_mm_s": (_REQ, 0.0, 100.0), "harmonics": (10, 2, 30), "decay": (0.75, 0.1, 1.0),
                  "subharmonic": (0.5, 0.0, 2.0), "truncation": (0.6, 0.1, 1.0)},
    "outer_race": {"impact_g": (_REQ, 0.0, 1000.0), "slip": (0.01, 0.0, 0.05), "jitter": (0.015, 0.0, 0.1),
                   "amplitude_spread": (0.1, 0.0, 0.5)},
    "inner_race": {"impact_g": (_REQ, 0.0, 1000.0), "slip": (0.01, 0.0, 0.05), "jitter": (0.015, 0.0, 0.1),
                   "amplitude_spread": (0.1, 0.0, 0.5), "modulation": (0.8, 0.0, 1.0)},
    "rolling_element": {"impact_g": (_REQ, 0.0, 1000.0), "slip": (0.01, 0.0, 0.05),
                        "jitter": (0.015, 0.0, 0.1), "amplitude_spread": (0.1, 0.0, 0.5),
                        "modulation": (0.6, 0.0, 1.0)},
    "cage": {"velocity_mm_s": (_REQ, 0.0, 100.0), "slip": (0.01, 0.0, 0.05)},
    "gear_mesh": {"teeth": (_REQ, 5, 500), "acceleration_g": (_REQ, 0.0, 100.0),
                  "sideband_ratio": (0.3, 0.0, 1.0), "sidebands": (2, 0, 5)},
}
BEARING_FAULTS = ("outer_race", "inner_race", "rolling_element", "cage")
INTEGER_PARAMS = frozenset({"harmonics", "teeth", "sidebands"})

# Default share of a machine fault seen on each axis (a fault's amplitude is given on a gain-1 axis).
# Imbalance is radial, misalignment shows most axially, looseness mostly vertically (common practice).
AXIS_GAINS: dict[str, dict[str, float]] = {
    "imbalance": {"horizontal": 1.0, "vertical": 0.8, "axial": 0.3, "radial": 1.0},
    "misalignment": {"horizontal": 0.6, "vertical": 0.5, "axial": 1.0, "radial": 0.6},
    "looseness": {"horizontal": 0.8, "vertical": 1.0, "axial": 0.4, "radial": 0.9},
    "residual": {"horizontal": 1.0, "vertical": 0.8, "axial": 0.5, "radial": 1.0},
}

SENSOR_FAULT_PARAMS: dict[str, dict[str, tuple[Any, float, float]]] = {
    "flatline": {"value_g": (None, -1000.0, 1000.0)},
    "clipping": {"level_g": (_REQ, 1e-6, 1000.0)},
    "bias_shift": {"offset_g": (_REQ, -1000.0, 1000.0)},
    "cable_fault": {"rail_g": (_REQ, -1000.0, 1000.0), "episodes_per_s": (0.5, 0.0, 1000.0),
                    "episode_s": (0.05, 1e-4, 10.0)},
    "spikes": {"rate_per_s": (_REQ, 0.0, 10000.0), "amplitude_g": (_REQ, 0.0, 1000.0)},
    "dropped_blocks": {"fraction": (_REQ, 0.0, 1.0)},
}

# Sensor models (FIELD_NOTES §6): piezo IEPE wide band and quiet; MEMS DC-responding, noisier, narrower.
SENSOR_DEFAULTS: dict[str, dict[str, float]] = {
    "piezo": {"noise_ug_rthz": 5.0, "range_g": 50.0, "adc_bits": 24, "hp_corner_hz": 0.5,
              "mounted_resonance_hz": 25000.0, "mounted_q": 15.0, "upper_hz": 10000.0},
    "mems": {"noise_ug_rthz": 100.0, "range_g": 8.0, "adc_bits": 16, "filter_order": 4},
}


class ScenarioError(ValueError):
    """An invalid scenario; the message starts with the key path."""

    def __init__(self, path: str, problem: str) -> None:
        super().__init__(f"{path}: {problem}" if path else problem)
        self.path = path
        self.problem = problem


@dataclass(frozen=True, slots=True)
class SpeedSpec:
    knots_rpm: tuple[tuple[float, float], ...]
    wander_fraction: float = 0.0
    wander_period_s: float = 60.0
    wander_phase_deg: float = 0.0

    @property
    def fixed(self) -> bool:
        return self.wander_fraction == 0.0 and len({r for _, r in self.knots_rpm}) == 1


@dataclass(frozen=True, slots=True)
class BearingSpec:
    elements: int
    ball_diameter_mm: float
    pitch_diameter_mm: float
    contact_angle_deg: float = 0.0

    def orders(self) -> dict[str, float]:
        """Defect frequencies as multiples of shaft speed (FTF, BPFO, BPFI, BSF)."""
        return bearing_orders(self.elements, self.ball_diameter_mm, self.pitch_diameter_mm, self.contact_angle_deg)


@dataclass(frozen=True, slots=True)
class FaultSpec:
    type: str
    index: int
    params: Mapping[str, float]
    points: tuple[str, ...]
    axis_gain: Mapping[str, float]
    stage: str = "developing"
    progression: Curve | None = None


@dataclass(frozen=True, slots=True)
class MachineSpec:
    machine_id: str
    description: str
    group: int
    support: str
    speed: SpeedSpec
    reference_rpm: float
    run_threshold_rpm: float
    speed_range_rpm: tuple[float, float]
    residual_mm_s: float
    process_noise_ug_rthz: float
    faults: tuple[FaultSpec, ...]
    speed_tag: bool = True


@dataclass(frozen=True, slots=True)
class SensorModel:
    noise_ug_rthz: float
    range_g: float
    adc_bits: int
    dc_offset_g: float = 0.0
    hp_corner_hz: float = 0.0            # piezo only
    mounted_resonance_hz: float = 0.0    # piezo only
    mounted_q: float = 15.0              # piezo only
    corner_hz: float = 0.0               # MEMS only (−3 dB)
    filter_order: int = 4                # MEMS only

    @property
    def lsb_g(self) -> float:
        """ADC quantization step: full range ±range_g over 2^bits counts."""
        return float(2 * self.range_g / 2**self.adc_bits)


@dataclass(frozen=True, slots=True)
class SensorFaultSpec:
    type: str
    params: Mapping[str, float | None]
    start_s: float = 0.0
    end_s: float | None = None

    def active(self, t_s: float) -> bool:
        return t_s >= self.start_s and (self.end_s is None or t_s < self.end_s)


@dataclass(frozen=True, slots=True)
class PointSpec:
    """One measurement point.  The fields the daemon needs come first."""

    point_id: str
    machine_id: str
    axis: str
    sensor_id: str
    fs_hz: float
    block_samples: int
    sensor_type: str
    bandwidth_hz: tuple[float, float]
    bearing: BearingSpec | None
    topic: str
    velocity_band_hz: tuple[float, float]
    envelope_band_hz: tuple[float, float] | None
    sensitivity_mv_per_g: float | None
    description: str
    resonance_hz: float
    resonance_damping: float
    resonance_gain: float
    sensor_model: SensorModel
    sensor_faults: tuple[SensorFaultSpec, ...] = field(default=())


@dataclass(frozen=True, slots=True)
class Scenario:
    name: str
    description: str
    site: str
    site_description: str
    topic_prefix: str
    duration_s: float
    machines: tuple[MachineSpec, ...]
    points: tuple[PointSpec, ...]
    path: str = ""
    longrun: Mapping[str, Any] | None = None  # [longrun] as written: see edgevib.simulator.longrun

    def machine(self, machine_id: str) -> MachineSpec:
        for m in self.machines:
            if m.machine_id == machine_id:
                return m
        raise KeyError(f"no machine {machine_id!r} in scenario {self.name!r}")

    def point(self, point_id: str) -> PointSpec:
        for p in self.points:
            if p.point_id == point_id:
                return p
        raise KeyError(f"no point {point_id!r} in scenario {self.name!r}")


# --------------------------------------------------------------------------------------------- validation


class _Table:
    """A TOML table being read: typed getters with ranges, and a check that no unknown key is left."""

    def __init__(self, doc: Any, path: str) -> None:
        if not isinstance(doc, dict):
            raise ScenarioError(path, f"must be a table, got {type(doc).__name__}")
        self.doc: dict[str, Any] = doc
        self.path = path
        self.used: set[str] = set()

    def key(self, key: str) -> str:
        return f"{self.path}.{key}" if self.path else key

    def has(self, key: str) -> bool:
        return key in self.doc

    def raw(self, key: str, default: Any = _REQ) -> Any:
        self.used.add(key)
        if key not in self.doc:
            if default is _REQ:
                raise ScenarioError(self.key(key), "is required")
            return default
        return self.doc[key]

    def text(self, key: str, default: Any = _REQ, choices: tuple[str, ...] | None = None) -> Any:
        v = self.raw(key, default)
        if v is default and default is not _REQ:
            return v
        if not isinstance(v, str) or not v:
            raise ScenarioError(self.key(key), f"must be a non-empty string, got {v!r}")
        if choices is not None and v not in choices:
            raise ScenarioError(self.key(key), f"{v!r} is not one of {', '.join(choices)}")
        return v

    def num(self, key: str, default: Any = _REQ, lo: float | None = None, hi: float | None = None,
            lo_open: bool = False, integer: bool = False) -> Any:
        v = self.raw(key, default)
        if v is default and default is not _REQ:
            return v
        return _check_num(self.key(key), v, lo, hi, lo_open, integer)

    def pair(self, key: str, default: Any = _REQ, lo: float | None = None) -> Any:
        v = self.raw(key, default)
        if v is default and default is not _REQ:
            return v
        if not isinstance(v, list) or len(v) != 2:
            raise ScenarioError(self.key(key), f"must be a [low, high] pair, got {v!r}")
        a = _check_num(self.key(key) + "[0]", v[0], lo, None, False, False)
        b = _check_num(self.key(key) + "[1]", v[1], lo, None, False, False)
        if not a < b:
            raise ScenarioError(self.key(key), f"low {a:g} must be below high {b:g}")
        return (float(a), float(b))

    def table(self, key: str) -> _Table | None:
        v = self.raw(key, None)
        return None if v is None else _Table(v, self.key(key))

    def tables(self, key: str) -> list[_Table]:
        v = self.raw(key, [])
        if not isinstance(v, list):
            raise ScenarioError(self.key(key), "must be an array of tables")
        return [_Table(item, f"{self.key(key)}[{i}]") for i, item in enumerate(v)]

    def done(self) -> None:
        unknown = sorted(set(self.doc) - self.used)
        if unknown:
            raise ScenarioError(self.key(unknown[0]), f"unknown key (known here: {', '.join(sorted(self.used))})")


def _check_num(path: str, v: Any, lo: float | None, hi: float | None, lo_open: bool, integer: bool) -> Any:
    if isinstance(v, bool) or not isinstance(v, int | float):
        raise ScenarioError(path, f"must be a number, got {v!r}")
    if integer and (not isinstance(v, int) and not float(v).is_integer()):
        raise ScenarioError(path, f"must be an integer, got {v!r}")
    if not math.isfinite(v):
        raise ScenarioError(path, f"must be finite, got {v!r}")
    if lo is not None and (v < lo or (lo_open and v == lo)):
        raise ScenarioError(path, f"{v:g} is below the minimum {'(exclusive) ' if lo_open else ''}{lo:g}")
    if hi is not None and v > hi:
        raise ScenarioError(path, f"{v:g} is above the maximum {hi:g}")
    return int(v) if integer else float(v)


def _params(t: _Table, schema: dict[str, tuple[Any, float, float]]) -> dict[str, Any]:
    out: dict[str, Any] = {}
    for name, (default, lo, hi) in schema.items():
        if default is None and not t.has(name):
            out[name] = None
            t.used.add(name)
            continue
        out[name] = t.num(name, default, lo, hi, integer=name in INTEGER_PARAMS)
    return out


def _speed(t: _Table) -> SpeedSpec:
    kinds = [k for k in ("rpm", "schedule", "ramp") if t.has(k)]
    if len(kinds) != 1:
        raise ScenarioError(t.path, "needs exactly one of rpm, schedule or ramp")
    knots: tuple[tuple[float, float], ...]
    if kinds[0] == "rpm":
        knots = ((0.0, t.num("rpm", lo=0.0, hi=100_000.0)),)
    elif kinds[0] == "ramp":
        a, b = t.raw("ramp"), None
        if not isinstance(a, list) or len(a) != 2:
            raise ScenarioError(t.key("ramp"), f"must be [from_rpm, to_rpm], got {a!r}")
        r0 = _check_num(t.key("ramp") + "[0]", a[0], 0.0, 100_000.0, False, False)
        r1 = _check_num(t.key("ramp") + "[1]", a[1], 0.0, 100_000.0, False, False)
        start = t.num("start_s", 0.0, lo=0.0)
        b = t.num("duration_s", lo=0.0, lo_open=True)
        knots = ((start, r0), (start + b, r1))
    else:
        sched = t.raw("schedule")
        if not isinstance(sched, list) or not sched:
            raise ScenarioError(t.key("schedule"), "must be a non-empty list of [t_s, rpm] pairs")
        pts = []
        for i, item in enumerate(sched):
            p = f"{t.key('schedule')}[{i}]"
            if not isinstance(item, list) or len(item) != 2:
                raise ScenarioError(p, f"must be a [t_s, rpm] pair, got {item!r}")
            pts.append((_check_num(p + "[0]", item[0], 0.0, None, False, False),
                        _check_num(p + "[1]", item[1], 0.0, 100_000.0, False, False)))
        for i in range(1, len(pts)):
            if pts[i][0] <= pts[i - 1][0]:
                raise ScenarioError(f"{t.key('schedule')}[{i}][0]",
                                    f"time {pts[i][0]:g} s must be after {pts[i - 1][0]:g} s")
        knots = tuple(pts)
    spec = SpeedSpec(knots, t.num("wander", 0.0, 0.0, 0.2), t.num("wander_period_s", 60.0, 1.0, lo_open=True),
                     t.num("wander_phase_deg", 0.0))
    t.done()
    if max(r for _, r in knots) <= 0:
        raise ScenarioError(t.path, "the machine never turns (all speeds are 0)")
    return spec


def _curve(t: _Table) -> Curve:
    kind = t.text("curve", "logistic", ("linear", "exponential", "logistic"))
    start_s = t.num("start_s", lo=0.0)
    end_s = t.num("end_s", lo=0.0)
    if end_s <= start_s:
        raise ScenarioError(t.key("end_s"), f"{end_s:g} s must be after start_s {start_s:g} s")
    lo = t.num("from", lo=0.0)
    hi = t.num("to", lo=0.0)
    if kind == "exponential" and (lo <= 0 or hi <= 0):
        raise ScenarioError(t.key("from"), "an exponential curve needs from > 0 and to > 0")
    steep = t.num("steepness", 10.0, 1.0, 50.0)
    t.done()
    return Curve(kind, start_s, end_s, lo, hi, steep)


def _sensor_model(t: _Table | None, sensor_type: str, fs_hz: float, axis: str) -> SensorModel:
    d = SENSOR_DEFAULTS[sensor_type]
    tt = t if t is not None else _Table({}, "")
    noise = tt.num("noise_ug_rthz", d["noise_ug_rthz"], 0.0, 100_000.0)
    rng = tt.num("range_g", d["range_g"], 0.01, 10_000.0, lo_open=True)
    bits = tt.num("adc_bits", d["adc_bits"], 8, 32, integer=True)
    if sensor_type == "piezo":
        m = SensorModel(noise, rng, bits, 0.0,
                        hp_corner_hz=tt.num("hp_corner_hz", d["hp_corner_hz"], 0.01, 100.0),
                        mounted_resonance_hz=tt.num("mounted_resonance_hz", d["mounted_resonance_hz"], 1000.0),
                        mounted_q=tt.num("mounted_q", d["mounted_q"], 1.0, 200.0))
    else:
        corner = tt.num("corner_hz", round(0.3125 * fs_hz, 3), 10.0)
        if corner >= 0.45 * fs_hz:
            raise ScenarioError(tt.key("corner_hz"), f"{corner:g} Hz must be below 0.45 × fs = {0.45 * fs_hz:g} Hz")
        m = SensorModel(noise, rng, bits, tt.num("dc_offset_g", 1.0 if axis == "vertical" else 0.0, -10.0, 10.0),
                        corner_hz=corner, filter_order=tt.num("filter_order", d["filter_order"], 1, 8, integer=True))
    tt.done()
    return m


def parse_scenario(doc: Mapping[str, Any], path: str = "") -> Scenario:
    """Validate a parsed TOML document into a :class:`Scenario`."""
    top = _Table(dict(doc), "")
    sc = top.table("scenario")
    if sc is None:
        raise ScenarioError("scenario", "table is required")
    name = sc.text("name")
    description = sc.text("description", "")
    duration_s = sc.num("duration_s", 60.0, 0.0, lo_open=True)
    sc.done()
    site_t = top.table("site")
    if site_t is None:
        raise ScenarioError("site", "table is required")
    site = site_t.text("name")
    site_desc = site_t.text("description", "")
    prefix = site_t.text("topic_prefix", f"fwb/{site}")
    site_t.done()

    machine_tables = top.tables("machines")
    point_tables = top.tables("points")
    longrun = top.raw("longrun", None)
    top.done()
    if not machine_tables:
        raise ScenarioError("machines", "at least one machine is required")
    if not point_tables:
        raise ScenarioError("points", "at least one point is required")

    # points first (faults refer to them)
    points: list[PointSpec] = []
    seen_points: set[str] = set()
    seen_sensors: set[str] = set()
    machine_ids = [m.doc.get("id") for m in machine_tables]
    for pt in point_tables:
        points.append(_point(pt, machine_tables, machine_ids, prefix, seen_points, seen_sensors))

    machines: list[MachineSpec] = []
    seen_machines: set[str] = set()
    for mt in machine_tables:
        machines.append(_machine(mt, points, seen_machines))
    scenario = Scenario(name, description, site, site_desc, prefix, duration_s, tuple(machines), tuple(points), path,
                        longrun)
    if longrun is not None:
        from edgevib.simulator.longrun import parse_longrun  # checked now, used by the long-run mode

        parse_longrun(scenario)
    return scenario


def _bearing_spec(bt: _Table) -> BearingSpec:
    bearing = BearingSpec(bt.num("elements", lo=3, hi=100, integer=True),
                          bt.num("ball_diameter_mm", lo=0.0, lo_open=True),
                          bt.num("pitch_diameter_mm", lo=0.0, lo_open=True),
                          bt.num("contact_angle_deg", 0.0, 0.0, 60.0))
    bt.done()
    try:
        bearing.orders()
    except ValueError as exc:
        raise ScenarioError(bt.path, str(exc)) from exc
    return bearing


def _sensor_faults(pt: _Table) -> tuple[SensorFaultSpec, ...]:
    sfaults = []
    for ft in pt.tables("sensor_faults"):
        ftype = ft.text("type", choices=tuple(SENSOR_FAULT_PARAMS))
        start = ft.num("start_s", 0.0, 0.0)
        end = ft.num("end_s", None, 0.0)
        if end is not None and end <= start:
            raise ScenarioError(ft.key("end_s"), f"{end:g} s must be after start_s {start:g} s")
        sfaults.append(SensorFaultSpec(ftype, _params(ft, SENSOR_FAULT_PARAMS[ftype]), start, end))
        ft.done()
    return tuple(sfaults)


def _point(pt: _Table, machine_tables: list[_Table], machine_ids: list[Any], prefix: str, seen_points: set[str],
           seen_sensors: set[str]) -> PointSpec:
    """One ``[[points]]`` table (ids checked against those seen so far)."""
    pid = pt.text("id")
    if pid in seen_points:
        raise ScenarioError(pt.key("id"), f"duplicate point id {pid!r}")
    seen_points.add(pid)
    mid = pt.text("machine")
    if mid not in machine_ids:
        raise ScenarioError(pt.key("machine"), f"unknown machine {mid!r}")
    axis = pt.text("axis", choices=AXES)
    sensor = pt.text("sensor", pid)
    if sensor in seen_sensors:
        raise ScenarioError(pt.key("sensor"), f"duplicate sensor id {sensor!r}")
    seen_sensors.add(sensor)
    stype = pt.text("sensor_type", choices=("piezo", "mems"))
    fs = pt.num("fs_hz", lo=100.0, hi=200_000.0)
    n = pt.num("block_samples", lo=64, hi=65536, integer=True)
    bt = pt.table("bearing")
    bearing = _bearing_spec(bt) if bt is not None else None
    model = _sensor_model(pt.table("sensor_model"), stype, fs, axis)
    if stype == "piezo":
        bw = (model.hp_corner_hz, min(SENSOR_DEFAULTS["piezo"]["upper_hz"], 0.45 * fs))
    else:
        bw = (0.0, model.corner_hz)
    mref = _machine_reference_rpm(machine_tables[machine_ids.index(mid)])
    vband = pt.pair("velocity_band_hz", (2.0, 1000.0) if mref < 600 else (10.0, 1000.0), lo=0.0)
    if vband[1] >= fs / 2:
        raise ScenarioError(pt.key("velocity_band_hz"), f"high edge {vband[1]:g} Hz is at or above Nyquist "
                            f"{fs / 2:g} Hz")
    eband = pt.pair("envelope_band_hz", None, lo=0.0)
    if eband is not None and eband[1] > bw[1]:
        raise ScenarioError(pt.key("envelope_band_hz"), f"high edge {eband[1]:g} Hz is above the usable "
                            f"bandwidth {bw[1]:g} Hz")
    res = pt.num("resonance_hz", min(3000.0, 0.3 * fs), 50.0)
    if res >= 0.4 * fs:
        raise ScenarioError(pt.key("resonance_hz"), f"{res:g} Hz must be below 0.4 × fs = {0.4 * fs:g} Hz")
    sfaults = _sensor_faults(pt)
    point = PointSpec(
        point_id=pid, machine_id=mid, axis=axis, sensor_id=sensor, fs_hz=fs, block_samples=n,
        sensor_type=stype, bandwidth_hz=bw, bearing=bearing, topic=f"{prefix}/{mid}/{pid}/block",
        velocity_band_hz=vband, envelope_band_hz=eband,
        sensitivity_mv_per_g=pt.num("sensitivity_mv_per_g", 100.0 if stype == "piezo" else None, 0.0,
                                    lo_open=True),
        description=pt.text("description", ""), resonance_hz=res,
        resonance_damping=pt.num("resonance_damping", 0.05, 0.005, 0.3),
        resonance_gain=pt.num("resonance_gain", 4.0, 1.0, 100.0),
        sensor_model=model, sensor_faults=sfaults)
    pt.done()
    return point


def _fault_points(ft: _Table, mid: str, own: list[PointSpec]) -> tuple[str, ...]:
    """The points a machine fault applies to (default: all of the machine's)."""
    sel = ft.raw("points", None)
    if sel is None:
        return tuple(p.point_id for p in own)
    if not isinstance(sel, list) or not all(isinstance(s, str) for s in sel) or not sel:
        raise ScenarioError(ft.key("points"), "must be a non-empty list of point ids")
    for s in sel:
        if s not in [p.point_id for p in own]:
            raise ScenarioError(ft.key("points"), f"{s!r} is not a point of machine {mid!r}")
    return tuple(sel)


def _axis_gains(ft: _Table, ftype: str) -> dict[str, float]:
    gains = dict(AXIS_GAINS.get(ftype, dict.fromkeys(AXES, 1.0)))
    gt = ft.table("axis_gain")
    if gt is not None:
        for ax in list(gt.doc):
            if ax not in AXES:
                raise ScenarioError(gt.key(ax), f"unknown axis (one of {', '.join(AXES)})")
            gains[ax] = gt.num(ax, lo=0.0, hi=10.0)
        gt.done()
    return gains


def _fault(ft: _Table, i: int, mid: str, own: list[PointSpec]) -> FaultSpec:
    """One ``[[machines.faults]]`` table of machine ``mid``."""
    ftype = ft.text("type", choices=tuple(FAULT_PARAMS))
    params = _params(ft, FAULT_PARAMS[ftype])
    sel_ids = _fault_points(ft, mid, own)
    gains = _axis_gains(ft, ftype)
    if ftype in BEARING_FAULTS:
        geoms = {p.bearing for p in own if p.point_id in sel_ids}
        if None in geoms:
            raise ScenarioError(ft.key("type"), f"a {ftype} fault needs bearing geometry on every point it "
                                f"applies to ({', '.join(sel_ids)})")
        if len(geoms) > 1:
            raise ScenarioError(ft.key("points"), "a bearing fault's points must share one bearing geometry")
    stage = ft.text("stage", "developing", ("incipient", "developing", "advanced", "critical"))
    pt_ = ft.table("progression")
    curve = _curve(pt_) if pt_ is not None else None
    ft.done()
    return FaultSpec(ftype, i, params, sel_ids, gains, stage, curve)


def _machine(mt: _Table, points: list[PointSpec], seen_machines: set[str]) -> MachineSpec:
    """One ``[[machines]]`` table (its points already parsed)."""
    mid = mt.text("id")
    if mid in seen_machines:
        raise ScenarioError(mt.key("id"), f"duplicate machine id {mid!r}")
    seen_machines.add(mid)
    own = [p for p in points if p.machine_id == mid]
    st = mt.table("speed")
    if st is None:
        raise ScenarioError(mt.key("speed"), "is required")
    speed = _speed(st)
    ref = mt.num("reference_rpm", max(r for _, r in speed.knots_rpm), 1.0)
    faults = [_fault(ft, i, mid, own) for i, ft in enumerate(mt.tables("faults"))]
    lo_default = (0.5 * ref, 1.5 * ref)
    srange = mt.pair("speed_range_rpm", lo_default, lo=0.0)
    machine = MachineSpec(
        machine_id=mid, description=mt.text("description", ""),
        group=mt.num("group", lo=1, hi=2, integer=True),
        support=mt.text("support", choices=("rigid", "flexible")),
        speed=speed, reference_rpm=ref, run_threshold_rpm=mt.num("run_threshold_rpm", 60.0, 0.0),
        speed_range_rpm=srange, residual_mm_s=mt.num("residual_mm_s", 0.5, 0.0, 100.0),
        process_noise_ug_rthz=mt.num("process_noise_ug_rthz", 150.0, 0.0, 1e6), faults=tuple(faults),
        speed_tag=_flag(mt, "speed_tag", True))
    mt.done()
    return machine


def _flag(t: _Table, key: str, default: bool) -> bool:
    v = t.raw(key, default)
    if not isinstance(v, bool):
        raise ScenarioError(t.key(key), f"must be true or false, got {v!r}")
    return v


def _machine_reference_rpm(mt: _Table) -> float:
    """Reference speed peeked before the machine table is validated (for the ISO band default)."""
    ref = mt.doc.get("reference_rpm")
    if isinstance(ref, int | float) and not isinstance(ref, bool):
        return float(ref)
    sp = mt.doc.get("speed")
    if isinstance(sp, dict):
        if isinstance(sp.get("rpm"), int | float):
            return float(sp["rpm"])
        for key in ("schedule", "ramp"):
            vals = sp.get(key)
            if isinstance(vals, list):
                nums = [v[1] if isinstance(v, list) and len(v) == 2 else v for v in vals]
                nums = [float(x) for x in nums if isinstance(x, int | float)]
                if nums:
                    return float(max(nums))
    return 1e9


# --------------------------------------------------------------------------------------------- loading


def _scenario_dir() -> Any:
    return resources.files("edgevib.simulator") / "scenarios"


def builtin_scenarios() -> dict[str, Any]:
    """Packaged scenario name → resource (file stem = name)."""
    out = {}
    for entry in _scenario_dir().iterdir():
        if entry.name.endswith(".toml"):
            out[entry.name[:-5]] = entry
    return dict(sorted(out.items()))


def load_scenario(name_or_path: str | Path) -> Scenario:
    """A packaged scenario by name, or a scenario TOML file by path."""
    text: str
    src = str(name_or_path)
    builtins = builtin_scenarios()
    if src in builtins:
        text = builtins[src].read_text(encoding="utf-8")
    else:
        p = Path(src)
        if not p.is_file():
            raise ScenarioError("", f"no built-in scenario named {src!r} (known: {', '.join(builtins)}) and no "
                                f"such file")
        text = p.read_text(encoding="utf-8")
    try:
        doc = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ScenarioError("", f"{src}: invalid TOML: {exc}") from exc
    return parse_scenario(doc, src)

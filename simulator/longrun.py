"""Months in compressed time: short snapshots of a scenario, one per simulated interval, with analytic truth.

A scenario with a ``[longrun]`` table describes a plant over months: every ``interval_h`` of simulated time each
point takes one snapshot of ``snapshot_blocks`` blocks (rendered by :class:`edgevib.simulator.engine.Simulation`
at that moment, not streamed in real time).  On top of the scenario's own signal model:

* **progressions** — one point's indicator (``velocity_rms_mm_s`` or ``acceleration_rms_g``) follows a linear or
  an exponential law in time, from its healthy value (or ``from``) at ``start_day`` through ``to`` at
  ``end_day`` and on at the same law; the amplitude of one of the machine's faults is set so that the expected
  indicator is exactly that law (the indicator's square is a quadratic in the fault's amplitude, solved in
  closed form), so the time at which each limit is crossed is analytic:
  linear t = t₀ + (L − v₀)(t₁ − t₀)/(v₁ − v₀), exponential t = t₀ + (t₁ − t₀)·ln(L/v₀)/ln(v₁/v₀);
* **operating scatter** — each snapshot's vibration is scaled by a log-normal factor of median 1 (``scatter`` is
  the standard deviation of its logarithm), shared by the points of a machine: load, flow and temperature move
  vibration levels from one measurement to the next (common practice);
* **transients** — brief episodes (``transients_per_day``, lasting ``transient_snapshots`` snapshots) that scale
  the vibration by a factor drawn from ``transient_factor``;
* **stops** — periods when a machine stands still (its speed ramps to 0 within a minute and back).

The expected indicators are the stationary model's values at each time (the median over the scatter); degradation
advances with calendar time, also while a machine stands.  Schema (defaults in brackets)::

    [longrun]
      days, interval_h [24], snapshot_blocks [1], scatter [0.05], transients_per_day [0],
      transient_factor [[2.0, 4.0]], transient_snapshots [1]
      [[longrun.progressions]]  point, fault [0] (index among the machine's faults), indicator
                                ["velocity_rms_mm_s"], curve ("linear" | "exponential"), start_day, end_day,
                                from [the healthy value], to
      [[longrun.stops]]         machine, start_day, end_day
      [[longrun.limits]]        point, indicator, value, label ["limit"]   (crossing times in the truth)

The simulator never imports the analysis code: everything here comes from the model parameters.
"""

from __future__ import annotations

import json
import math
from collections.abc import Iterator
from dataclasses import dataclass, replace
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import numpy as np
import numpy.typing as npt

from edgevib.simulator import models as M
from edgevib.simulator.engine import Simulation, _key
from edgevib.simulator.scenario import MachineSpec, PointSpec, Scenario, ScenarioError, SpeedSpec, _Table

__all__ = [
    "LONGRUN_INDICATORS",
    "LimitSpec",
    "LongRun",
    "LongRunSpec",
    "ProgressionSpec",
    "Snapshot",
    "StopSpec",
    "parse_longrun",
]

F64 = npt.NDArray[np.float64]
DAY_S = 86400.0
LONGRUN_INDICATORS = ("velocity_rms_mm_s", "acceleration_rms_g")
_STREAM_SCATTER, _STREAM_TRANSIENT, _STREAM_TRANSIENT_SIZE = 7000, 7001, 7002
_DRAW_CHUNK = 1024  # per-snapshot random draws come in chunks keyed by (seed, machine, stream, chunk)
_STOP_RAMP_S = 60.0


@dataclass(frozen=True, slots=True)
class ProgressionSpec:
    point: str
    fault: int
    indicator: str
    curve: str
    start_s: float
    end_s: float
    start: float | None
    end: float


@dataclass(frozen=True, slots=True)
class StopSpec:
    machine: str
    start_s: float
    end_s: float


@dataclass(frozen=True, slots=True)
class LimitSpec:
    point: str
    indicator: str
    value: float
    label: str = "limit"


@dataclass(frozen=True, slots=True)
class LongRunSpec:
    duration_s: float
    interval_s: float
    snapshot_blocks: int = 1
    scatter: float = 0.05
    transients_per_day: float = 0.0
    transient_factor: tuple[float, float] = (2.0, 4.0)
    transient_snapshots: int = 1
    progressions: tuple[ProgressionSpec, ...] = ()
    stops: tuple[StopSpec, ...] = ()
    limits: tuple[LimitSpec, ...] = ()


def parse_longrun(scenario: Scenario) -> LongRunSpec:
    """Validate the scenario's ``[longrun]`` table (raises :class:`ScenarioError` naming the key)."""
    if scenario.longrun is None:
        raise ScenarioError("longrun", f"scenario {scenario.name!r} has no [longrun] table")
    t = _Table(dict(scenario.longrun), "longrun")
    days = t.num("days", lo=0.0, lo_open=True, hi=36600.0)
    interval_s = 3600.0 * t.num("interval_h", 24.0, lo=0.0, lo_open=True, hi=24 * 366.0)
    if interval_s > days * DAY_S:
        raise ScenarioError(t.key("interval_h"), f"{interval_s / 3600:g} h is longer than the run ({days:g} days)")
    spec_kw: dict[str, Any] = dict(
        snapshot_blocks=t.num("snapshot_blocks", 1, lo=1, hi=64, integer=True),
        scatter=t.num("scatter", 0.05, lo=0.0, hi=1.0),
        transients_per_day=t.num("transients_per_day", 0.0, lo=0.0, hi=1000.0),
        transient_factor=t.pair("transient_factor", (2.0, 4.0), lo=0.0),
        transient_snapshots=t.num("transient_snapshots", 1, lo=1, hi=1000, integer=True))
    machines = {m.machine_id: m for m in scenario.machines}
    points = {p.point_id: p for p in scenario.points}
    progs: list[ProgressionSpec] = []
    seen_machines: set[str] = set()
    for pt in t.tables("progressions"):
        progs.append(_progression(pt, machines, points, seen_machines))
    stops: list[StopSpec] = []
    for st in t.tables("stops"):
        stops.append(_stop(st, machines, stops))
    limits: list[LimitSpec] = []
    for lt in t.tables("limits"):
        pid = lt.text("point")
        if pid not in points:
            raise ScenarioError(lt.key("point"), f"unknown point {pid!r}")
        limits.append(LimitSpec(pid, lt.text("indicator", choices=LONGRUN_INDICATORS),
                                float(lt.num("value", lo=0.0, lo_open=True)), lt.text("label", "limit")))
        lt.done()
    t.done()
    return LongRunSpec(duration_s=days * DAY_S, interval_s=interval_s, progressions=tuple(progs),
                       stops=tuple(sorted(stops, key=lambda s: (s.machine, s.start_s))), limits=tuple(limits),
                       **spec_kw)


def _progression(pt: _Table, machines: dict[str, MachineSpec], points: dict[str, PointSpec],
                 seen_machines: set[str]) -> ProgressionSpec:
    """One ``[[longrun.progressions]]`` table (one per machine)."""
    pid = pt.text("point")
    if pid not in points:
        raise ScenarioError(pt.key("point"), f"unknown point {pid!r}")
    m = machines[points[pid].machine_id]
    if m.machine_id in seen_machines:
        raise ScenarioError(pt.key("point"), f"machine {m.machine_id} already has a progression (one per machine)")
    seen_machines.add(m.machine_id)
    fi = pt.num("fault", 0, lo=0, integer=True)
    if fi >= len(m.faults):
        raise ScenarioError(pt.key("fault"), f"machine {m.machine_id} has {len(m.faults)} fault(s); "
                            f"index {fi} does not exist")
    fault = m.faults[int(fi)]
    if pid not in fault.points:
        raise ScenarioError(pt.key("fault"), f"fault {fi} ({fault.type}) does not reach point {pid}")
    if fault.progression is not None:
        raise ScenarioError(pt.key("fault"), f"fault {fi} ({fault.type}) has its own progression; remove it")
    ind = pt.text("indicator", "velocity_rms_mm_s", LONGRUN_INDICATORS)
    curve = pt.text("curve", choices=("linear", "exponential"))
    start_s, end_s = DAY_S * pt.num("start_day", lo=0.0), DAY_S * pt.num("end_day", lo=0.0)
    if end_s <= start_s:
        raise ScenarioError(pt.key("end_day"), f"{end_s / DAY_S:g} must be after start_day {start_s / DAY_S:g}")
    v0 = pt.num("from", None, lo=0.0, lo_open=True)
    v1 = pt.num("to", lo=0.0, lo_open=True)
    if v0 is not None and v1 <= v0:
        raise ScenarioError(pt.key("to"), f"{v1:g} must be above from {v0:g} (a growing fault)")
    pt.done()
    return ProgressionSpec(pid, int(fi), ind, curve, start_s, end_s, None if v0 is None else float(v0), float(v1))


def _stop(st: _Table, machines: dict[str, MachineSpec], stops: list[StopSpec]) -> StopSpec:
    """One ``[[longrun.stops]]`` table (checked against the stops before it)."""
    mid = st.text("machine")
    if mid not in machines:
        raise ScenarioError(st.key("machine"), f"unknown machine {mid!r}")
    if not machines[mid].speed.fixed:
        raise ScenarioError(st.key("machine"), f"stops need a fixed-speed machine; {mid} has a speed schedule")
    a, b = DAY_S * st.num("start_day", lo=0.0), DAY_S * st.num("end_day", lo=0.0)
    if b <= a + 2 * _STOP_RAMP_S:
        raise ScenarioError(st.key("end_day"), "a stop must last more than two minutes")
    st.done()
    for other in stops:
        if other.machine == mid and a < other.end_s + _STOP_RAMP_S and other.start_s < b + _STOP_RAMP_S:
            raise ScenarioError(st.key("start_day"), f"overlaps another stop of {mid}")
    return StopSpec(mid, a, b)


@dataclass(frozen=True, slots=True)
class Snapshot:
    """One snapshot of one point: samples in g, the time of its first sample, whether its machine was running,
    the operating factor applied (scatter × transient), and the expected indicators at that time."""

    point: str
    index: int
    t_s: float
    t0_ns: int
    fs_hz: float
    samples: F64
    running: bool
    factor: float
    expected: dict[str, float]


class _Law:
    """A progression's indicator value v(t) and the fault multiplier that realises it (vectorised in t)."""

    def __init__(self, spec: ProgressionSpec, quad: tuple[float, float, float]) -> None:
        self.spec = spec
        self.a, self.b, self.c = quad        # v² = a + b·m + c·m²
        healthy = math.sqrt(max(self.a, 0.0))
        self.v0 = spec.start if spec.start is not None else healthy
        if self.v0 < healthy * (1 - 1e-9):
            raise ScenarioError("longrun.progressions", f"{spec.point}: from {self.v0:g} is below the healthy "
                                f"{spec.indicator} {healthy:.4g}")
        self.v1 = spec.end

    def value(self, t: npt.ArrayLike) -> F64:
        tt = np.asarray(t, dtype=np.float64)
        u = np.maximum(tt - self.spec.start_s, 0.0) / (self.spec.end_s - self.spec.start_s)
        if self.spec.curve == "exponential":
            return np.asarray(self.v0 * (self.v1 / self.v0) ** u, dtype=np.float64)
        return np.asarray(self.v0 + (self.v1 - self.v0) * u, dtype=np.float64)

    def multiplier(self, t: npt.ArrayLike) -> F64:
        v2 = self.value(t) ** 2
        disc = np.maximum(self.b * self.b - 4 * self.c * (self.a - v2), 0.0)
        return np.asarray(np.maximum((-self.b + np.sqrt(disc)) / (2 * self.c), 0.0), dtype=np.float64)

    def crossing_s(self, limit: float) -> float | None:
        """Analytic time at which the law reaches ``limit`` (None when it starts at or above it)."""
        s = self.spec
        if limit <= self.v0:
            return None
        if s.curve == "exponential":
            return s.start_s + (s.end_s - s.start_s) * math.log(limit / self.v0) / math.log(self.v1 / self.v0)
        return s.start_s + (limit - self.v0) * (s.end_s - s.start_s) / (self.v1 - self.v0)


def _with_stops(m: MachineSpec, stops: list[StopSpec]) -> MachineSpec:
    rpm = float(m.speed.knots_rpm[0][1])
    knots: list[tuple[float, float]] = [(0.0, rpm)]
    for s in stops:
        knots += [(s.start_s, rpm), (s.start_s + _STOP_RAMP_S, 0.0), (s.end_s, 0.0), (s.end_s + _STOP_RAMP_S, rpm)]
    if knots[1:] and knots[1][0] <= 0.0:
        knots = knots[1:]
        knots[0] = (0.0, knots[0][1])
    return replace(m, speed=SpeedSpec(tuple(knots)))


class LongRun:
    """Snapshots and analytic truth of a scenario's ``[longrun]`` (see the module docstring).

    ``t0_ns``: wall-clock time of simulated time 0 (default 2026-01-01T00:00:00Z, so file names are stable).
    """

    def __init__(self, scenario: Scenario, *, seed: int = 0, t0_ns: int | None = None) -> None:
        self.spec = parse_longrun(scenario)
        stops: dict[str, list[StopSpec]] = {}
        for s in self.spec.stops:
            stops.setdefault(s.machine, []).append(s)
        machines = tuple(_with_stops(m, stops[m.machine_id]) if m.machine_id in stops else m
                         for m in scenario.machines)
        self.scenario = replace(scenario, machines=machines)
        self.seed = int(seed)
        self.t0_ns = 1_767_225_600 * 10**9 if t0_ns is None else int(t0_ns)
        self.sim = Simulation(self.scenario, seed=self.seed, t0_ns=self.t0_ns)
        self.laws: dict[str, _Law] = {}
        for p in self.spec.progressions:
            law = _Law(p, self._quadratic(p))
            self.laws[p.point] = law
            machine = self.scenario.machine(self.scenario.point(p.point).machine_id)
            fault = machine.faults[p.fault]
            for pid in fault.points:
                self.sim._models[pid].curves[fault.index] = law.multiplier  # type: ignore[assignment]
        self._expected_cache: dict[tuple[str, bool], dict[str, float]] = {}
        self._draw_cache: dict[tuple[str, int, int], F64] = {}

    # ------------------------------------------------------------------ set-up

    def _running_time(self, machine_id: str) -> float:
        """A time at which the machine runs (for the stationary truth)."""
        t = 0.0
        for s in self.spec.stops:
            if s.machine == machine_id and s.start_s <= t <= s.end_s + _STOP_RAMP_S:
                t = s.end_s + 2 * _STOP_RAMP_S
        return t

    def _quadratic(self, p: ProgressionSpec) -> tuple[float, float, float]:
        """(a, b, c) with indicator² = a + b·m + c·m² for the fault multiplier m (exact: the fault adds coherent
        lines or an impact train whose power is quadratic in its amplitude)."""
        model = self.sim._models[p.point]
        machine = self.scenario.machine(self.scenario.point(p.point).machine_id)
        fi = machine.faults[p.fault].index
        t = self._running_time(machine.machine_id)
        vals = []
        for m in (0.0, 1.0, 2.0, 3.0):
            model.curves[fi] = (lambda mm: (lambda tt: np.full(np.shape(tt), mm) if np.ndim(tt) else mm))(m)  # type: ignore[assignment]
            vals.append(float(model.truth(t)[p.indicator]) ** 2)
        del model.curves[fi]
        a = vals[0]
        c = (vals[2] - 2 * vals[1] + a) / 2
        b = vals[1] - a - c
        if not c > 0:
            raise ScenarioError("longrun.progressions", f"{p.point}: fault {p.fault} does not change "
                                f"{p.indicator}")
        if abs(a + 3 * b + 9 * c - vals[3]) > 1e-6 * vals[3]:  # pragma: no cover - the model is quadratic
            raise ScenarioError("longrun.progressions", f"{p.point}: {p.indicator} is not quadratic in the fault")
        return a, b, c

    # ------------------------------------------------------------------ time axis

    @property
    def count(self) -> int:
        """Snapshots per point."""
        return math.floor(self.spec.duration_s / self.spec.interval_s + 1e-9) + 1

    def times_s(self) -> F64:
        return np.arange(self.count, dtype=np.float64) * self.spec.interval_s

    def _block(self, point: str, j: int) -> int:
        p = self.scenario.point(point)
        return round(j * self.spec.interval_s * p.fs_hz / p.block_samples)

    def running(self, machine_id: str, t_s: float) -> bool:
        m = self.scenario.machine(machine_id)
        return self.sim.speed_hz(machine_id, t_s) * 60.0 >= m.run_threshold_rpm

    # ------------------------------------------------------------------ operating factor

    def _draws(self, machine_id: str, stream: int, c: int) -> F64:
        """Chunk ``c`` of a machine's per-snapshot random draws (uniform or normal by stream), cached."""
        key = (machine_id, stream, c)
        arr = self._draw_cache.get(key)
        if arr is None:
            rng = np.random.default_rng([self.seed, _key(machine_id), stream, c])
            arr = rng.standard_normal(_DRAW_CHUNK) if stream == _STREAM_SCATTER else rng.random(_DRAW_CHUNK)
            self._draw_cache[key] = arr
        return arr

    def _draw(self, machine_id: str, stream: int, j: npt.NDArray[np.int64]) -> F64:
        out = np.empty(j.size)
        for c in np.unique(j // _DRAW_CHUNK):
            sel = j // _DRAW_CHUNK == c
            out[sel] = self._draws(machine_id, stream, int(c))[j[sel] % _DRAW_CHUNK]
        return out

    def factors(self, machine_id: str, j: npt.ArrayLike) -> F64:
        """Scatter × transient factor of snapshots ``j`` of a machine (deterministic in seed, machine, j)."""
        s = self.spec
        jj = np.atleast_1d(np.asarray(j, dtype=np.int64))
        f = np.exp(s.scatter * self._draw(machine_id, _STREAM_SCATTER, jj))
        p = s.transients_per_day * s.interval_s / DAY_S
        if p > 0:
            hit = np.zeros(jj.size, dtype=bool)
            size = np.ones(jj.size)
            for back in range(s.transient_snapshots):  # a transient started up to that many snapshots ago
                i = jj - back
                ok = (i >= 0) & ~hit
                if not np.any(ok):
                    continue
                starts = np.zeros(jj.size, dtype=bool)
                starts[ok] = self._draw(machine_id, _STREAM_TRANSIENT, i[ok]) < p
                lo, hi = s.transient_factor
                size[starts] = lo + (hi - lo) * self._draw(machine_id, _STREAM_TRANSIENT_SIZE, i[starts])
                hit |= starts
            f = f * size
        return f

    def factor(self, machine_id: str, j: int) -> float:
        return float(self.factors(machine_id, [j])[0])

    # ------------------------------------------------------------------ truth

    def expected(self, point: str, t_s: float, indicator: str | None = None) -> dict[str, float]:
        """Expected velocity r.m.s. (mm/s) and acceleration r.m.s. (g) of a point at ``t_s`` (median over the
        scatter; the progression's law exactly).  ``indicator``: only that one is needed (faster)."""
        p = self.scenario.point(point)
        running = self.running(p.machine_id, t_s)
        law = self.laws.get(point)
        if law is not None and running and indicator == law.spec.indicator:
            return {indicator: float(law.value(t_s))}
        if (law is None or not running) and (point, running) in self._expected_cache:
            return dict(self._expected_cache[(point, running)])
        tr = self.sim._models[point].truth(t_s)
        out = {k: float(tr[k]) for k in LONGRUN_INDICATORS}
        if law is None or not running:  # stationary (a standing machine shows no fault lines at any amplitude)
            self._expected_cache[(point, running)] = dict(out)
        else:
            out[law.spec.indicator] = float(law.value(t_s))
        return out

    def indicator_series(self, point: str, indicator: str = "velocity_rms_mm_s"
                         ) -> tuple[F64, F64, npt.NDArray[np.bool_]]:
        """(times s, expected value × operating factor, running) per snapshot: the indicator each snapshot would
        show without the estimation noise of a short record (a fast path for many seeded runs)."""
        p = self.scenario.point(point)
        m = self.scenario.machine(p.machine_id)
        t = self.times_s()
        run = self.sim._speeds[p.machine_id].hz(t) * 60.0 >= m.run_threshold_rpm
        law = self.laws.get(point)
        vals = np.empty(t.size)
        if law is not None and indicator == law.spec.indicator:
            vals[run] = law.value(t[run])
        else:
            t_run = self._running_time(p.machine_id)
            vals[run] = self.expected(point, t_run)[indicator] if law is None else \
                [self.expected(point, float(x))[indicator] for x in t[run]]
        if np.any(~run):
            stopped = next(float(x) for x in t[~run])
            vals[~run] = self.expected(point, stopped)[indicator]
        return t, vals * self.factors(p.machine_id, np.arange(t.size)), run

    def crossings(self, point: str) -> list[dict[str, Any]]:
        """Analytic crossing times of the point's limits: the ISO 20816-3 boundaries (velocity r.m.s.) and the
        ``[[longrun.limits]]`` of the point, for its progression's indicator."""
        law = self.laws.get(point)
        if law is None:
            return []
        m = self.scenario.machine(self.scenario.point(point).machine_id)
        marks: list[tuple[str, str, float]] = []
        if law.spec.indicator == "velocity_rms_mm_s":
            for label, v in zip(("zone B", "zone C", "zone D"), M.ISO_ZONE_BOUNDARIES_MM_S[(m.group, m.support)],
                                strict=True):
                marks.append(("velocity_rms_mm_s", label, float(v)))
        marks += [(lim.indicator, lim.label, lim.value) for lim in self.spec.limits if lim.point == point]
        out = []
        for ind, label, v in marks:
            if ind != law.spec.indicator:
                continue
            ts = law.crossing_s(v)
            out.append({"indicator": ind, "label": label, "value": v, "t_s": ts,
                        "t_ns": None if ts is None else self.t0_ns + round(ts * 1e9),
                        "time": None if ts is None else _stamp(self.t0_ns + round(ts * 1e9), iso=True)})
        return out

    def truth(self) -> dict[str, Any]:
        """The run's analytic truth (JSON-ready)."""
        points: dict[str, Any] = {}
        for p in self.scenario.points:
            law = self.laws.get(p.point_id)
            t_run = self._running_time(p.machine_id)
            healthy = self.expected(p.point_id, t_run) if law is None else None
            entry: dict[str, Any] = {"machine": p.machine_id, "fs_hz": p.fs_hz,
                                     "snapshot_samples": p.block_samples * self.spec.snapshot_blocks}
            if law is not None:
                s = law.spec
                entry["progression"] = {"indicator": s.indicator, "curve": s.curve, "start_s": s.start_s,
                                        "end_s": s.end_s, "from": law.v0, "to": law.v1}
                entry["crossings"] = self.crossings(p.point_id)
            else:
                entry["stationary"] = healthy
            points[p.point_id] = entry
        return {"scenario": self.scenario.name, "seed": self.seed, "t0_ns": self.t0_ns,
                "interval_s": self.spec.interval_s, "snapshots": self.count, "duration_s": self.spec.duration_s,
                "scatter": self.spec.scatter, "transients_per_day": self.spec.transients_per_day,
                "stops": [{"machine": s.machine, "start_s": s.start_s, "end_s": s.end_s} for s in self.spec.stops],
                "points": points,
                "notes": "crossings[].t_s is the analytic time (s after t0) at which the expected indicator reaches "
                         "the limit; expected values are medians over the operating scatter."}

    # ------------------------------------------------------------------ snapshots

    def snapshot(self, point: str, j: int) -> Snapshot:
        """Snapshot ``j`` (0 … count − 1) of a point."""
        if not 0 <= j < self.count:
            raise IndexError(f"snapshot {j} is outside 0..{self.count - 1}")
        p = self.scenario.point(point)
        k = self._block(point, j)
        x = self.sim.record(point, self.spec.snapshot_blocks, k)
        f = self.factor(p.machine_id, j)
        dc = p.sensor_model.dc_offset_g
        y = dc + f * (x - dc)
        t_s = k * p.block_samples / p.fs_hz
        return Snapshot(point=point, index=j, t_s=t_s, t0_ns=self.sim.block_t0_ns(point, k), fs_hz=p.fs_hz,
                        samples=y, running=self.running(p.machine_id, t_s), factor=f,
                        expected=self.expected(point, t_s))

    def snapshots(self, point: str) -> Iterator[Snapshot]:
        for j in range(self.count):
            yield self.snapshot(point, j)

    def write(self, directory: str | Path, fmt: str = "npy", points: list[str] | None = None,
              until_s: float | None = None) -> Path:
        """Write every snapshot (up to ``until_s`` of simulated time) as a file under ``directory/<point>/``
        named ``<point>_<UTC time>.<fmt>`` (``npy`` float32 in g, ``wav`` float32 at the sample rate, ``csv`` one
        column) and ``truth.json``."""
        if fmt not in ("npy", "wav", "csv"):
            raise ValueError(f"format {fmt!r} is not npy, wav or csv")
        root = Path(directory)
        root.mkdir(parents=True, exist_ok=True)
        for pid in points or [p.point_id for p in self.scenario.points]:
            d = root / pid
            d.mkdir(exist_ok=True)
            for snap in self.snapshots(pid):
                if until_s is not None and snap.t_s > until_s:
                    break
                path = d / f"{_safe(pid)}_{_stamp(snap.t0_ns)}.{fmt}"
                data = snap.samples.astype(np.float32)
                if fmt == "npy":
                    np.save(path, data)
                elif fmt == "csv":
                    path.write_text("\n".join(f"{v:.7g}" for v in data) + "\n", encoding="utf-8")
                else:
                    _write_wav(path, data, snap.fs_hz)
        (root / "truth.json").write_text(json.dumps(self.truth(), indent=1, allow_nan=False) + "\n",
                                         encoding="utf-8")
        return root


def _safe(name: str) -> str:
    return "".join(c if c.isalnum() or c in "-_." else "_" for c in name)


def _stamp(t_ns: int, iso: bool = False) -> str:
    dt = datetime.fromtimestamp(t_ns // 10**9, UTC)
    frac = f"{t_ns % 10**9 // 1000:06d}"
    if iso:
        return dt.strftime("%Y-%m-%dT%H:%M:%S.") + frac[:3] + "Z"
    return dt.strftime("%Y%m%dT%H%M%S.") + frac + "Z"


def _write_wav(path: Path, data: npt.NDArray[np.float32], fs_hz: float) -> None:
    """Mono IEEE-float WAV (format 3), as the daemon's captures are written."""
    import struct

    rate = max(1, round(fs_hz))
    body = data.astype("<f4").tobytes()
    fmt_chunk = struct.pack("<4sIHHIIHH", b"fmt ", 16, 3, 1, rate, rate * 4, 4, 32)
    fact = struct.pack("<4sII", b"fact", 4, data.size)
    header = struct.pack("<4sI4s", b"RIFF", 4 + len(fmt_chunk) + len(fact) + 8 + len(body), b"WAVE")
    path.write_bytes(header + fmt_chunk + fact + struct.pack("<4sI", b"data", len(body)) + body)

"""The simulation: blocks of accelerometer samples for every point of a scenario, and their analytic truth.

Signal of one point (acceleration in g, sample n at t = n/fs since the start)::

    physical  = tonal lines (residual 1×/2×, imbalance, misalignment, looseness, cage, gear mesh)
              + bearing impact trains (each impact a decaying structural resonance)
              + process noise (white, coloured by the structure, ∝ speed)
    sensor    = FIR(physical + sensor noise)   (piezo: mounted-resonance rise; MEMS: Butterworth band limit)
              + DC (MEMS gravity) → sensor faults → range clipping → ADC quantization

Every random draw is keyed by (seed, point or machine, stream, chunk index), and shaft phases come from the
closed-form integral of the speed, so a block depends only on (seed, point, block index): output is
deterministic and independent of how ``blocks_until`` calls are spaced.

The truth is computed from the model parameters alone: line spectra of the tonal components and of the
impact trains (with their jitter, amplitude spread, modulation sidebands and aliasing), noise PSDs integrated
analytically over frequency, all through the exact magnitude response of the sensor's FIR.

Tonal amplitudes are specified as velocity r.m.s. on a gain-1 axis at the machine's reference speed; velocity
scales with speed (acceleration with speed²), impact amplitudes with speed², process noise with speed.
"""

from __future__ import annotations

import itertools
import math
import time
import zlib
from collections import OrderedDict
from collections.abc import Mapping
from dataclasses import dataclass
from fractions import Fraction
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
import numpy.typing as npt

from edgevib.common.toml_writer import dump_toml
from edgevib.common.wire import Block
from edgevib.simulator import models as M
from edgevib.simulator.scenario import (
    AXIS_GAINS,
    BEARING_FAULTS,
    FaultSpec,
    MachineSpec,
    PointSpec,
    Scenario,
    ScenarioError,
    builtin_scenarios,
)
from edgevib.simulator.scenario import load_scenario as _load_scenario

if TYPE_CHECKING:
    from edgevib.daemon.config import MachineConfig, PointConfig, PointLimits

__all__ = [
    "Scenario",
    "ScenarioError",
    "Simulation",
    "list_scenarios",
    "load_scenario",
]

F64 = npt.NDArray[np.float64]
_CHUNK = 4096             # white-noise chunk length (samples)
_IMPACT_CHUNK = 512       # impacts per jitter chunk
_STREAM_PROCESS, _STREAM_SENSOR, _STREAM_DROP, _STREAM_SPIKES, _STREAM_CABLE = 1, 2, 3, 4, 5
_AXIS_PHASE = {"horizontal": 0.0, "vertical": -math.pi / 2, "radial": -math.pi / 4}


def list_scenarios() -> dict[str, str]:
    """Packaged scenario name → its one-line description."""
    return {name: load_scenario(name).description for name in builtin_scenarios()}


def load_scenario(name_or_path: str | Path) -> Scenario:
    """A built-in scenario by name or a scenario TOML file by path (raises :class:`ScenarioError`)."""
    return _load_scenario(name_or_path)


def _key(text: str) -> int:
    return zlib.crc32(text.encode("utf-8"))


def _v_to_a_peak_g(velocity_mm_s: float, freq_hz: float) -> float:
    """Acceleration peak (g) of a sine with velocity r.m.s. ``velocity_mm_s`` at ``freq_hz`` (FIELD_NOTES §5)."""
    return math.sqrt(2) * velocity_mm_s * 1e-3 * 2 * math.pi * freq_hz / M.G0_M_S2


# --------------------------------------------------------------------------------------------- point model


@dataclass
class _Impacts:
    fault: FaultSpec
    key: tuple[int, int]          # (machine key, fault index): impacts shared by the machine's points
    order: float                  # impacts per revolution, slip included
    mod_order: float              # modulation frequency in shaft orders (0: none)
    modulation: float
    mod_phase: float
    jitter: float
    spread: float
    amp_g: float                  # peak per impact at reference speed, axis gain included
    response: M.ImpactResponse


class _PointModel:
    def __init__(self, sim: Simulation, point: PointSpec, machine: MachineSpec) -> None:
        self.sim = sim
        self.p = point
        self.m = machine
        self.fs = point.fs_hz
        self.key = _key(point.point_id)
        self.mkey = _key(machine.machine_id)
        self.f_ref = machine.reference_rpm / 60.0
        sm = point.sensor_model
        if point.sensor_type == "piezo":
            self.sensor = M.piezo_response(self.fs, sm.mounted_resonance_hz, sm.mounted_q)
        else:
            self.sensor = M.mems_response(self.fs, sm.corner_hz, sm.filter_order)
        self.color = M.process_coloring(self.fs, point.resonance_hz, point.resonance_damping, point.resonance_gain)
        self.sigma_process = machine.process_noise_ug_rthz * 1e-6 * math.sqrt(self.fs / 2)
        self.sigma_sensor = sm.noise_ug_rthz * 1e-6 * math.sqrt(self.fs / 2)
        self.faults = [f for f in machine.faults if point.point_id in f.points]
        self.curves = {f.index: f.progression for f in self.faults if f.progression is not None}
        self.tones: dict[float, list[tuple[int, complex]]] = {}
        self.impacts: list[_Impacts] = []
        self._build_tones()
        self._chunks: OrderedDict[tuple[int, int], F64] = OrderedDict()
        self._static: dict[str, tuple[float, float]] | None = None
        self._impact_power_cache: dict[tuple[int, float], tuple[float, float]] = {}

    # ------------------------------------------------------------------ components

    def _phase(self, fault_index: int, order: float) -> complex:
        rng = np.random.default_rng([self.sim.seed, self.mkey, 1000 + fault_index, round(order * 1000)])
        ph = rng.uniform(0, 2 * math.pi)
        axis = _AXIS_PHASE.get(self.p.axis)
        if axis is None:
            axis = float(np.random.default_rng([self.sim.seed, self.mkey, 2000 + fault_index]).uniform(0, 2 * math.pi))
        return complex(np.exp(1j * (ph + axis)))

    def _add_tone(self, fault_index: int, order: float, a_peak_g: float, phase: complex | None = None) -> None:
        if a_peak_g <= 0:
            return
        ph = self._phase(fault_index, order) if phase is None else phase
        self.tones.setdefault(round(order, 9), []).append((fault_index, a_peak_g * ph))

    def _build_tones(self) -> None:
        fr = self.f_ref
        axis = self.p.axis
        res = self.m.residual_mm_s * AXIS_GAINS["residual"][axis]
        self._add_tone(-1, 1.0, _v_to_a_peak_g(res, fr))
        self._add_tone(-1, 2.0, _v_to_a_peak_g(0.3 * res, 2 * fr))
        orders = self.p.bearing.orders() if self.p.bearing is not None else None
        for f in self.faults:
            g = f.axis_gain.get(axis, 1.0)
            q = f.params
            if f.type == "imbalance":
                self._add_tone(f.index, 1.0, _v_to_a_peak_g(q["velocity_mm_s"] * g, fr))
            elif f.type == "misalignment":
                v = q["velocity_mm_s"] * g
                self._add_tone(f.index, 2.0, _v_to_a_peak_g(v, 2 * fr))
                self._add_tone(f.index, 1.0, _v_to_a_peak_g(q["ratio_1x"] * v, fr))
                self._add_tone(f.index, 3.0, _v_to_a_peak_g(q["ratio_3x"] * v, 3 * fr))
            elif f.type == "looseness":
                for order, coeff in self._looseness(f, q["velocity_mm_s"] * g).items():
                    self._add_tone(f.index, order, abs(coeff), coeff / abs(coeff))
            elif f.type == "cage":
                assert orders is not None
                ftf = orders["ftf"] * (1 - q["slip"])
                for h, ratio in ((1, 1.0), (2, 0.4), (3, 0.2)):
                    self._add_tone(f.index, h * ftf, _v_to_a_peak_g(ratio * q["velocity_mm_s"] * g, h * ftf * fr))
            elif f.type == "gear_mesh":
                z = float(q["teeth"])
                a = math.sqrt(2) * q["acceleration_g"] * g
                self._add_tone(f.index, z, a)
                for k in range(1, int(q["sidebands"]) + 1):
                    self._add_tone(f.index, z - k, a * q["sideband_ratio"] ** k)
                    self._add_tone(f.index, z + k, a * q["sideband_ratio"] ** k)
            elif f.type in BEARING_FAULTS:
                assert orders is not None
                slip = 1 - q["slip"]
                if f.type == "outer_race":
                    order, mod_order, mod = orders["bpfo"] * slip, 0.0, 0.0
                elif f.type == "inner_race":
                    order, mod_order, mod = orders["bpfi"] * slip, 1.0, q["modulation"]
                else:
                    order, mod_order, mod = 2 * orders["bsf"] * slip, orders["ftf"] * slip, q["modulation"]
                rng = np.random.default_rng([self.sim.seed, self.mkey, 3000 + f.index])
                self.impacts.append(_Impacts(
                    f, (self.mkey, f.index), order, mod_order, mod, float(rng.uniform(0, 2 * math.pi)),
                    q["jitter"], q["amplitude_spread"], q["impact_g"] * g,
                    M.ImpactResponse(self.p.resonance_hz, self.p.resonance_damping)))

    def _looseness(self, f: FaultSpec, v1_mm_s: float) -> dict[float, complex]:
        """Fourier series (half orders) of a truncated multi-harmonic waveform over two revolutions."""
        q = f.params
        n = 4096
        theta = 2 * math.pi * 2 * np.arange(n) / n          # two revolutions
        rng = np.random.default_rng([self.sim.seed, self.mkey, 4000 + f.index])
        hmax = int(q["harmonics"])
        u = np.zeros(n)
        for j in range(1, 2 * hmax + 1):                     # half orders j/2
            order = j / 2
            amp = q["decay"] ** (order - 1) if j % 2 == 0 else q["subharmonic"] * q["decay"] ** max(order - 1, 0)
            u += amp * np.cos(order * theta + rng.uniform(0, 2 * math.pi))
        y = np.minimum(u, q["truncation"] * u.max())
        y -= y.mean()
        c = 2 * np.fft.rfft(y) / n
        scale = _v_to_a_peak_g(v1_mm_s, self.f_ref) / abs(c[2])
        out = {}
        for i in range(1, 4 * hmax + 1):
            if abs(c[i]) > 1e-4 * abs(c[2]):
                out[i / 2] = complex(c[i] * scale)
        return out

    # ------------------------------------------------------------------ random streams

    def _chunk(self, stream: int, c: int) -> F64:
        k = (stream, c)
        arr = self._chunks.get(k)
        if arr is None:
            arr = np.random.default_rng([self.sim.seed, self.key, stream, c + 2**40]).standard_normal(_CHUNK)
            self._chunks[k] = arr
            if len(self._chunks) > 16:
                self._chunks.popitem(last=False)
        return arr

    def _white(self, stream: int, start: int, stop: int) -> F64:
        c0, c1 = start // _CHUNK, (stop - 1) // _CHUNK
        arr = np.concatenate([self._chunk(stream, c) for c in range(c0, c1 + 1)])
        return arr[start - c0 * _CHUNK: stop - c0 * _CHUNK]

    def _block_rng(self, stream: int, k: int) -> np.random.Generator:
        return np.random.default_rng([self.sim.seed, self.key, stream, k])

    # ------------------------------------------------------------------ rendering

    def multiplier(self, fault_index: int, t: Any) -> Any:
        curve = self.curves.get(fault_index)
        return 1.0 if curve is None else curve(t)

    def dropped(self, k: int) -> bool:
        t_start = k * self.p.block_samples / self.fs
        for sf in self.p.sensor_faults:
            if sf.type == "dropped_blocks" and sf.active(t_start):
                frac = sf.params["fraction"]
                assert frac is not None
                if self._block_rng(_STREAM_DROP, k).random() < frac:
                    return True
        return False

    def render(self, k: int) -> F64:
        """Samples of block ``k`` in g (dropped blocks are rendered too; the caller skips them)."""
        n = self.p.block_samples
        d = self.sensor.half
        n0 = k * n
        lo, hi = n0 - d, n0 + n + d
        t = np.arange(lo, hi, dtype=np.float64) / self.fs
        speed = self.sim._speeds[self.m.machine_id]
        f = speed.hz(t)
        s = f / self.f_ref
        x = np.zeros(t.size)
        if self.tones:
            base = speed.revs(t)
            for order, comps in self.tones.items():
                c: Any = 0.0
                for fi, coeff in comps:
                    c = c + coeff * self.multiplier(fi, t)
                nu = order * f
                fac: npt.NDArray[np.float64] | npt.NDArray[np.complex128] = (s * s) * M.aa_taper(nu, self.fs)
                if self.p.sensor_type == "piezo":
                    fac = fac * M.piezo_hp_factor(np.maximum(nu, 1e-12), self.p.sensor_model.hp_corner_hz)
                x += np.real(c * fac * np.exp(2j * math.pi * ((order * base) % 1.0)))
        for imp in self.impacts:
            x += self._render_impacts(imp, lo, hi)
        dc = self.color.half
        w = self._white(_STREAM_PROCESS, lo - dc, hi + dc) * self.sigma_process
        x += self.color.apply(w) * np.minimum(s, 2.0)
        x += self._white(_STREAM_SENSOR, lo, hi) * self.sigma_sensor
        y = self.sensor.apply(x) + self.p.sensor_model.dc_offset_g
        y = self._sensor_faults(y, k, t[d:d + n])
        sm = self.p.sensor_model
        y = np.clip(y, -sm.range_g, sm.range_g)
        y = np.round(y / sm.lsb_g) * sm.lsb_g
        return y

    def _impact_eps(self, imp: _Impacts, i0: int, i1: int) -> tuple[F64, F64]:
        c0, c1 = i0 // _IMPACT_CHUNK, (i1 - 1) // _IMPACT_CHUNK
        parts = []
        for c in range(c0, c1 + 1):
            key = (imp.key[0], imp.key[1], c)
            arr = self.sim._impact_cache.get(key)
            if arr is None:
                arr = np.random.default_rng([self.sim.seed, imp.key[0], 5000 + imp.key[1], c + 2**40]) \
                    .standard_normal((2, _IMPACT_CHUNK))
                self.sim._impact_cache[key] = arr
                if len(self.sim._impact_cache) > 256:
                    self.sim._impact_cache.popitem(last=False)
            parts.append(arr)
        a = np.concatenate(parts, axis=1)[:, i0 - c0 * _IMPACT_CHUNK: i1 - c0 * _IMPACT_CHUNK]
        return a[0], a[1]

    def _render_impacts(self, imp: _Impacts, lo: int, hi: int) -> F64:
        speed = self.sim._speeds[self.m.machine_id]
        ldec = math.ceil(imp.response.decay_s * self.fs) + 1
        g_lo = lo - ldec
        tg = np.arange(g_lo, hi, dtype=np.float64) / self.fs
        rg = speed.revs(tg)
        rg = rg + 1e-12 * np.arange(rg.size)           # strictly increasing even while stopped
        i0 = math.floor(rg[0] * imp.order) - 2
        i1 = math.ceil(rg[-1] * imp.order) + 3
        out = np.zeros(hi - lo)
        if i1 <= i0:
            return out
        eps_t, eps_a = self._impact_eps(imp, i0, i1)
        theta = (np.arange(i0, i1) + imp.jitter * eps_t) / imp.order
        sel = (theta >= rg[0]) & (theta <= rg[-1])
        if not sel.any():
            return out
        theta, eps_a = theta[sel], eps_a[sel]
        ti = np.interp(theta, rg, tg)
        s = speed.hz(ti) / self.f_ref
        amp = imp.amp_g * s * s * (1 + imp.spread * eps_a) * self.multiplier(imp.fault.index, ti)
        if imp.modulation:
            amp = amp * (1 + imp.modulation * np.cos(2 * math.pi * imp.mod_order * theta + imp.mod_phase))
        first = np.ceil(ti * self.fs).astype(np.int64)            # first sample at or after the impact
        idx = first[:, None] + np.arange(ldec)[None, :]
        tau = idx / self.fs - ti[:, None]
        vals = amp[:, None] * imp.response(tau)
        pos = idx - lo
        ok = (pos >= 0) & (pos < out.size)
        np.add.at(out, pos[ok], vals[ok])
        return out

    def _sensor_faults(self, y: F64, k: int, t: F64) -> F64:
        for sf in self.p.sensor_faults:
            if sf.type == "dropped_blocks":
                continue
            act = (t >= sf.start_s) & ((t < sf.end_s) if sf.end_s is not None else True)
            if not np.any(act):
                continue
            q = sf.params

            def num(key: str, q: Mapping[str, float | None] = q, kind: str = sf.type) -> float:
                v = q[key]
                if v is None:
                    raise ScenarioError("sensor_faults", f"{kind}: {key} is not set")
                return float(v)

            if sf.type == "bias_shift":
                y = y + act * num("offset_g")
            elif sf.type == "spikes":
                rng = self._block_rng(_STREAM_SPIKES, k)
                hit = rng.random(y.size) < (q["rate_per_s"] or 0.0) / self.fs
                sign = np.where(rng.random(y.size) < 0.5, -1.0, 1.0)
                y = y + act * hit * sign * num("amplitude_g")
            elif sf.type == "cable_fault":
                y = np.where(act & self._cable_mask(sf, k), num("rail_g"), y)
            elif sf.type == "clipping":
                level = num("level_g")
                y = np.where(act, np.clip(y, -level, level), y)
            elif sf.type == "flatline":
                value = q["value_g"] if q["value_g"] is not None else self.p.sensor_model.dc_offset_g
                y = np.where(act, value, y)
        return y

    def _cable_mask(self, sf: Any, k: int) -> npt.NDArray[np.bool_]:
        """Open-circuit episodes (start per sample at ``episodes_per_s``, lasting ``episode_s``), carried
        across block boundaries from the previous blocks."""
        n = self.p.block_samples
        length = max(1, round(sf.params["episode_s"] * self.fs))
        back = math.ceil(length / n)
        mask = np.zeros(n, dtype=bool)
        p_start = sf.params["episodes_per_s"] / self.fs
        for j in range(max(0, k - back), k + 1):
            starts = np.flatnonzero(self._block_rng(_STREAM_CABLE, j).random(n) < p_start) + (j - k) * n
            for s0 in starts:
                a, b = max(0, s0), min(n, s0 + length)
                if a < b:
                    mask[a:b] = True
        return mask

    # ------------------------------------------------------------------ truth

    def _tone_lines(self, f: float, t_s: float) -> tuple[F64, F64, dict[str, float]]:
        """The tonal lines at shaft frequency ``f`` and time ``t_s`` as the sensor sees them: frequencies (Hz),
        powers (g²) and the velocity r.m.s. (mm/s) of orders 0.5, 1, 2 and 3."""
        p, s = self.p, f / self.f_ref
        line_nu: list[F64] = []
        line_pw: list[F64] = []
        orders_mm_s: dict[str, float] = {}
        for order, comps in self.tones.items():
            c = sum(coeff * float(self.multiplier(fi, t_s)) for fi, coeff in comps)
            nu = order * f
            if nu <= 0:
                continue
            amp = abs(c) * s * s * float(M.aa_taper(nu, self.fs))
            if p.sensor_type == "piezo":
                amp *= abs(complex(M.piezo_hp_factor(nu, p.sensor_model.hp_corner_hz)))
            amp *= float(self.sensor.gain(nu)[0])
            line_nu.append(np.array([nu]))
            line_pw.append(np.array([amp * amp / 2]))
            v = amp / math.sqrt(2) * M.G0_M_S2 * 1e3 / (2 * math.pi * nu)
            name = f"{order:g}"
            if order in (0.5, 1.0, 2.0, 3.0):
                orders_mm_s[name] = v
        nus = np.concatenate(line_nu) if line_nu else np.zeros(0)
        pws = np.concatenate(line_pw) if line_pw else np.zeros(0)
        return nus, pws, orders_mm_s

    def _fault_entries(self, t_s: float) -> list[dict[str, Any]]:
        """Each fault of the point with its parameters and stage at ``t_s`` (and its progression, if any)."""
        faults = []
        for fs_ in self.faults:
            mult = float(self.multiplier(fs_.index, t_s))
            entry: dict[str, Any] = {"type": fs_.type, **{k: v for k, v in fs_.params.items()}}
            if fs_.progression is not None:
                entry["stage"] = M.stage_name(mult / fs_.progression.end if fs_.progression.end else 0.0)
                entry["multiplier"] = mult
                entry["progression"] = fs_.progression.describe()
            else:
                entry["stage"] = fs_.stage
            faults.append(entry)
        return faults

    def truth(self, t_s: float) -> dict[str, Any]:
        p, m = self.p, self.m
        f = float(self.sim._speeds[m.machine_id].hz(t_s))
        s = f / self.f_ref
        band = p.velocity_band_hz
        active_sf = [sf for sf in p.sensor_faults if sf.active(t_s) and sf.type != "dropped_blocks"]
        flat = [sf for sf in active_sf if sf.type == "flatline"]
        mean_g = p.sensor_model.dc_offset_g + sum(sf.params["offset_g"] or 0.0 for sf in active_sf
                                                    if sf.type == "bias_shift")
        nus, pws, orders_mm_s = self._tone_lines(f, t_s)
        to_v = M.G0_M_S2 * 1e3 / (2 * math.pi)
        in_band = (nus >= band[0]) & (nus <= band[1])
        v2 = float(np.sum(pws[in_band] * (to_v / nus[in_band]) ** 2))
        a2 = float(np.sum(pws[nus > 0]))
        # impact trains: lines and continuous part, per unit amplitude at this speed (cached), scaled by a²
        impacts_info = []
        for imp in self.impacts:
            a = imp.amp_g * s * s * float(self.multiplier(imp.fault.index, t_s))
            lam = imp.order * f
            impacts_info.append({"fault": imp.fault.type, "impact_rate_hz": lam, "impact_peak_g": a})
            if lam > 0 and a > 0:
                uv2, ua2 = self._impact_unit_power(imp, f)
                v2 += a * a * uv2
                a2 += a * a * ua2
        # noise floors: process noise (∝ speed), sensor noise, ADC quantization, electrical spikes
        st = self._static_powers()
        sp = min(s, 2.0)
        v2 += sp * sp * st["process"][0] + st["sensor"][0] + st["quant"][0]
        a2 += sp * sp * st["process"][1] + st["sensor"][1] + st["quant"][1]
        for sf in active_sf:
            if sf.type == "spikes":
                var = (sf.params["rate_per_s"] or 0.0) / self.fs * (sf.params["amplitude_g"] or 0.0) ** 2
                v2 += var * st["white"][0]
                a2 += var * st["white"][1]
        velocity = math.sqrt(v2)
        accel = math.sqrt(a2)
        exact = not any(sf.type in ("clipping", "cable_fault", "spikes") for sf in active_sf)
        if flat:
            velocity, accel, exact = 0.0, 0.0, True
            mean_g = flat[-1].params["value_g"] if flat[-1].params["value_g"] is not None else mean_g
        running = f * 60 >= m.run_threshold_rpm
        zone = M.iso_zone(velocity, m.group, m.support)
        if active_sf:
            state = "sensor-fault"
        elif not running:
            state = "stopped"
        else:
            state = {"A": "normal", "B": "normal", "C": "alert", "D": "danger"}[zone]
        faults = self._fault_entries(t_s)
        main = max(faults, key=lambda e: M.STAGES.index(e["stage"])) if faults else None
        out: dict[str, Any] = {
            "machine": m.machine_id, "axis": p.axis, "sensor": p.sensor_id, "sensor_type": p.sensor_type,
            "fs_hz": p.fs_hz, "speed_rpm": f * 60, "speed_hz": f, "running": running,
            "velocity_band_hz": list(band), "velocity_rms_mm_s": velocity, "acceleration_rms_g": accel,
            "mean_g": mean_g, "orders_mm_s": orders_mm_s,
            "iso": {"group": m.group, "support": m.support, "zone": zone,
                    "boundaries_mm_s": list(M.ISO_ZONE_BOUNDARIES_MM_S[(m.group, m.support)])},
            "expected_state": state, "fault": main["type"] if main else "none",
            "stage": main["stage"] if main else "none", "faults": faults,
            "sensor_fault": [{"type": sf.type, **{k: v for k, v in sf.params.items()}, "start_s": sf.start_s,
                              "end_s": sf.end_s} for sf in active_sf] or None,
            "truth_exact": exact,
        }
        if p.bearing is not None:
            o = p.bearing.orders()
            out["defect_frequencies_hz"] = {k: v * f for k, v in o.items()} | {"2xbsf": 2 * o["bsf"] * f}
            out["defect_orders"] = o
        if impacts_info:
            out["impacts"] = impacts_info
        return out

    def _grids(self) -> tuple[F64, F64]:
        band = self.p.velocity_band_hz
        return np.geomspace(band[0], band[1], 4001), np.linspace(0, self.fs / 2, 8193)

    def _integrals(self, psd: Any) -> tuple[float, float]:
        """(velocity² in mm²/s² over the ISO band, acceleration² in g² over 0..fs/2) of a one-sided PSD in g²/Hz."""
        grid, full = self._grids()
        to_v = M.G0_M_S2 * 1e3 / (2 * math.pi)
        return (float(np.trapezoid(psd(grid) * (to_v / grid) ** 2, grid)), float(np.trapezoid(psd(full), full)))

    def _static_powers(self) -> dict[str, tuple[float, float]]:
        if self._static is None:
            sm = self.p.sensor_model
            n_p, n_s = self.m.process_noise_ug_rthz * 1e-6, sm.noise_ug_rthz * 1e-6
            self._static = {
                "process": self._integrals(lambda nu: n_p**2 * (self.color.gain(nu) * self.sensor.gain(nu)) ** 2),
                "sensor": self._integrals(lambda nu: n_s**2 * self.sensor.gain(nu) ** 2),
                # white at the output: quantization (LSB²/12) and spikes, density var/(fs/2)
                "quant": self._integrals(lambda nu: np.full_like(nu, sm.lsb_g**2 / 12 / (self.fs / 2))),
                "white": self._integrals(lambda nu: np.full_like(nu, 1 / (self.fs / 2))),
            }
        return self._static

    def _impact_unit_power(self, imp: _Impacts, fr: float) -> tuple[float, float]:
        key = (id(imp), round(fr, 9))
        hit = self._impact_power_cache.get(key)
        if hit is None:
            lam = imp.order * fr
            band = self.p.velocity_band_hz
            nus, pws = self._impact_lines(imp, 1.0, lam, fr)
            to_v = M.G0_M_S2 * 1e3 / (2 * math.pi)
            inb = (nus >= band[0]) & (nus <= band[1])
            lv2 = float(np.sum(pws[inb] * (to_v / nus[inb]) ** 2))
            la2 = float(np.sum(pws[nus > 0]))
            cv2, ca2 = self._integrals(lambda nu: self._impact_continuous(imp, 1.0, lam, fr, nu)
                                       * self.sensor.gain(nu) ** 2)
            hit = (lv2 + cv2, la2 + ca2)
            if len(self._impact_power_cache) > 4096:
                self._impact_power_cache.clear()
            self._impact_power_cache[key] = hit
        return hit

    def _impact_lines(self, imp: _Impacts, a: float, lam: float, fr: float) -> tuple[F64, F64]:
        """One-sided line powers (g²) at the sampled frequencies of an impact train.

        Impulse train p = Σ(1 + σ_a ε_i)δ(t − t_i), position jitter σ_t = jitter/λ: lines λ²|Φ(kλ)|² at kλ,
        |Φ(ν)|² = exp(−4π²ν²σ_t²); amplitude modulation (1 + m cos 2πf_m t) adds ±f_m copies × m²/4; each
        line is filtered by the impact response H(ν) and aliased to the sampled band."""
        fmod = imp.mod_order * fr
        nu_max = max(10 * self.fs, 20 * self.p.resonance_hz)
        kmax = int(nu_max / lam) + 1
        k = np.arange(-kmax, kmax + 1, dtype=np.float64)
        sig_t = imp.jitter / lam
        phi2 = np.exp(-4 * math.pi**2 * (k * lam) ** 2 * sig_t**2)
        base = (a * lam) ** 2 * phi2
        shifts = [(0.0, 1.0)]
        if imp.modulation and fmod > 0:
            shifts += [(fmod, imp.modulation**2 / 4), (-fmod, imp.modulation**2 / 4)]
        nus, pws = [], []
        for sh, wgt in shifts:
            nu = k * lam + sh
            pw = base * wgt * np.abs(imp.response.spectrum(nu)) ** 2
            nu_a = np.abs((nu + self.fs / 2) % self.fs - self.fs / 2)
            nus.append(nu_a)
            pws.append(pw * self.sensor.gain(nu_a) ** 2)
        nu_all, pw_all = np.concatenate(nus), np.concatenate(pws)
        keep = pw_all > 0
        return nu_all[keep], pw_all[keep]

    def _impact_continuous(self, imp: _Impacts, a: float, lam: float, fr: float, nu: F64) -> F64:
        """One-sided continuous PSD (g²/Hz) of an impact train, folded into the sampled band."""
        sig_t = imp.jitter / lam
        fmod = imp.mod_order * fr
        m2 = imp.modulation**2 / 4 if (imp.modulation and fmod > 0) else 0.0
        kf = int(max(10 * self.fs, 20 * self.p.resonance_hz) / self.fs) + 1
        total = np.zeros_like(nu)
        sp2 = imp.spread**2

        def cont(x: F64) -> F64:
            return np.asarray(1 + sp2 - np.exp(-4 * math.pi**2 * x * x * sig_t**2), dtype=np.float64)

        for j in range(-kf, kf + 1):
            v = nu + j * self.fs
            c = cont(v)
            if m2:
                c = c + m2 * (cont(v - fmod) + cont(v + fmod))
            total += np.abs(imp.response.spectrum(v)) ** 2 * c
        return np.asarray(2 * a * a * lam * total, dtype=np.float64)


# --------------------------------------------------------------------------------------------- simulation


class Simulation:
    """Blocks and truth of one scenario.  ``t0_ns`` is the wall-clock time of sample 0 (default: now)."""

    def __init__(self, scenario: Scenario, *, seed: int = 0, t0_ns: int | None = None) -> None:
        self.scenario = scenario
        self.seed = int(seed)
        if self.seed < 0:
            raise ValueError(f"seed must be >= 0, got {seed}")
        self.t0_ns = time.time_ns() if t0_ns is None else int(t0_ns)
        self._speeds = {
            m.machine_id: M.SpeedProfile([(t, r / 60.0) for t, r in m.speed.knots_rpm], m.speed.wander_fraction,
                                         m.speed.wander_period_s, math.radians(m.speed.wander_phase_deg))
            for m in scenario.machines}
        self._impact_cache: OrderedDict[tuple[int, int, int], F64] = OrderedDict()
        self._state_cache: dict[tuple[str, float, tuple[tuple[str, float], ...]], list[tuple[float, str]]] = {}
        self._models = {p.point_id: _PointModel(self, p, scenario.machine(p.machine_id)) for p in scenario.points}
        self._next = dict.fromkeys(self._models, 0)
        self._now_s = 0.0

    # ------------------------------------------------------------------ description

    @property
    def points(self) -> list[PointSpec]:
        return list(self.scenario.points)

    @property
    def machines(self) -> list[MachineSpec]:
        return list(self.scenario.machines)

    def topic(self, point_id: str) -> str:
        """MQTT topic of a point's blocks: ``<prefix>/<machine>/<point>/block``."""
        return self.scenario.point(point_id).topic

    def speed_topic(self, machine_id: str) -> str:
        """MQTT topic of a machine's speed: ``<prefix>/<machine>/speed``, payload r/min as plain text."""
        self.scenario.machine(machine_id)
        return f"{self.scenario.topic_prefix}/{machine_id}/speed"

    def speed_hz(self, machine_id: str, t_s: float) -> float:
        """Shaft speed in Hz at simulation time ``t_s`` (0 when stopped)."""
        if machine_id not in self._speeds:
            raise KeyError(f"no machine {machine_id!r} in scenario {self.scenario.name!r}")
        return float(self._speeds[machine_id].hz(t_s))

    # ------------------------------------------------------------------ blocks

    def block_t0_ns(self, point_id: str, k: int) -> int:
        p = self._models[point_id].p
        return self.t0_ns + round(Fraction(k * p.block_samples * 10**9) / Fraction(p.fs_hz))

    def block(self, point_id: str, k: int) -> Block | None:
        """Block ``k`` (sequence number) of a point, or ``None`` when that block is dropped."""
        model = self._models[point_id]
        if model.dropped(k):
            return None
        x = model.render(k)
        x.flags.writeable = False
        p = model.p
        return Block(sensor_id=p.sensor_id, seq=k, t0_ns=self.block_t0_ns(point_id, k), fs_hz=p.fs_hz, unit="g",
                     samples=x)

    def record(self, point_id: str, n_blocks: int, start_block: int = 0) -> F64:
        """Samples of consecutive blocks (including ones a dropped-blocks fault would drop), for analysis."""
        model = self._models[point_id]
        return np.concatenate([model.render(k) for k in range(start_block, start_block + n_blocks)])

    def blocks_until(self, t_s: float) -> list[Block]:
        """Every block whose last sample is at or before ``t_s`` and was not returned before, in time order."""
        if not math.isfinite(t_s):
            raise ValueError(f"t_s {t_s!r} must be a finite number of seconds")
        due: list[tuple[Fraction, int, str, int]] = []
        for i, (pid, model) in enumerate(self._models.items()):
            n = model.p.block_samples
            last_sample = math.floor(t_s * model.fs + 1e-6)
            k_last = (last_sample - n + 1) // n
            for k in range(self._next[pid], k_last + 1):
                due.append((Fraction((k + 1) * n - 1) / Fraction(model.fs), i, pid, k))
            self._next[pid] = max(self._next[pid], k_last + 1)
        self._now_s = max(self._now_s, t_s)
        due.sort()
        out = []
        for _, _, pid, k in due:
            b = self.block(pid, k)
            if b is not None:
                out.append(b)
        return out

    # ------------------------------------------------------------------ truth

    def machine_state(self, machine_id: str, t_s: float, **params: float) -> str:
        """The machine's state at ``t_s`` (``stopped``, ``starting``, ``running``, ``coasting``), from its speed
        profile alone (:func:`~edgevib.simulator.models.machine_state_timeline`).  ``params`` override
        :data:`~edgevib.simulator.models.MACHINE_STATE_DEFAULTS` (``startup_grace_s``, ``run_hysteresis``,
        ``speed_change_per_s``), as the daemon configuration given to the daemon does."""
        return M.state_at(self.machine_state_timeline(machine_id, t_s, **params), t_s)

    def machine_state_timeline(self, machine_id: str, t_end_s: float | None = None,
                               **params: float) -> list[tuple[float, str]]:
        """``[(t_start_s, state), …]`` of a machine up to ``t_end_s`` (default: the scenario's duration)."""
        m = self.scenario.machine(machine_id)
        unknown = set(params) - set(M.MACHINE_STATE_DEFAULTS)
        if unknown:
            raise TypeError(f"unknown machine-state parameter(s): {', '.join(sorted(unknown))}")
        p = {**M.MACHINE_STATE_DEFAULTS, **params}
        end = max(self.scenario.duration_s, float(t_end_s or 0.0))
        key = (machine_id, end, tuple(sorted(p.items())))
        cached = self._state_cache.get(key)
        if cached is None:
            cached = M.machine_state_timeline(self._speeds[machine_id], m.run_threshold_rpm / 60.0, end,
                                              startup_grace_s=p["startup_grace_s"],
                                              run_hysteresis=p["run_hysteresis"],
                                              speed_change_per_s=p["speed_change_per_s"])
            self._state_cache[key] = cached
        return cached

    def truth(self, t_s: float | None = None, **machine_state_params: float) -> dict[str, Any]:
        """The expected indicators of every point at simulation time ``t_s`` (default: the time reached by
        :meth:`blocks_until`, 0 before the first call).  See the package README for the fields.
        ``machine_state_params`` as for :meth:`machine_state`."""
        t = self._now_s if t_s is None else float(t_s)
        if not math.isfinite(t) or t < 0:
            raise ValueError(f"t_s {t_s!r} must be a finite time >= 0 s")
        points = {pid: model.truth(t) for pid, model in self._models.items()}
        machines = {}
        for m in self.scenario.machines:
            rpm = self.speed_hz(m.machine_id, t) * 60
            timeline = self.machine_state_timeline(m.machine_id, t, **machine_state_params)
            machines[m.machine_id] = {
                "description": m.description, "group": m.group, "support": m.support, "speed_rpm": rpm,
                "running": rpm >= m.run_threshold_rpm, "fixed_speed": m.speed.fixed,
                "machine_state": M.state_at(timeline, t),
                "machine_state_changes": [{"t_s": t0, "state": s} for t0, s in timeline],
                "speed_schedule_rpm": [list(k) for k in m.speed.knots_rpm],
                "speed_wander_fraction": m.speed.wander_fraction,
            }
        for pt in points.values():
            pt["machine_state"] = machines[pt["machine"]]["machine_state"]
        for pid, model in self._models.items():
            if model.curves:
                points[pid]["progression"] = self._timeline(model)
        return {
            "scenario": self.scenario.name, "site": self.scenario.site, "seed": self.seed, "t_s": t,
            "t_ns": self.t0_ns + round(t * 1e9), "t0_ns": self.t0_ns,
            "notes": "velocity_rms_mm_s is the ISO 20816 band r.m.s. (velocity_band_hz), acceleration_rms_g the AC "
                     "r.m.s. over 0..fs/2 (mean removed, mean_g separate); expected values of the stationary "
                     "model at t_s, computed analytically from the model parameters.",
            "machines": machines, "points": points,
        }

    def _timeline(self, model: _PointModel) -> dict[str, Any]:
        curves = list(model.curves.values())
        t_end = max(c.end_s for c in curves)
        t_start = min(c.start_s for c in curves)
        span = t_end - t_start
        times = np.linspace(0.0, t_end + 0.1 * span, 61)

        def vel(t: float) -> float:
            return float(model.truth(t)["velocity_rms_mm_s"])

        rows = []
        for t in times:
            tr = model.truth(float(t))
            rows.append({"t_s": float(t), "velocity_rms_mm_s": tr["velocity_rms_mm_s"],
                         "acceleration_rms_g": tr["acceleration_rms_g"], "zone": tr["iso"]["zone"],
                         "expected_state": tr["expected_state"]})
        changes = []
        for a, b in itertools.pairwise(rows):
            if a["zone"] != b["zone"]:
                lo_t, hi_t = a["t_s"], b["t_s"]
                for _ in range(30):
                    mid = 0.5 * (lo_t + hi_t)
                    if M.iso_zone(vel(mid), model.m.group, model.m.support) == a["zone"]:
                        lo_t = mid
                    else:
                        hi_t = mid
                changes.append({"t_s": hi_t, "from": a["zone"], "to": b["zone"]})
        return {"curves": [{"fault": f.type, **f.progression.describe()} for f in model.faults
                           if f.progression is not None],
                "timeline": rows, "zone_changes": changes}

    # ------------------------------------------------------------------ daemon configuration

    def daemon_config(self, *, source: Mapping[str, Any], extra: Mapping[str, Any] | None = None,
                      frame_samples: int = 8192, overlap: float = 0.5, limits: bool = False) -> dict[str, Any]:
        """A daemon configuration for this scenario, built with the daemon's configuration models (so it is
        checked as the daemon checks it, and sized by the same rules), as a plain TOML-ready document.

        ``source`` is the ``[[sources]]`` table (its ``name`` is what points and speed tags refer to);
        ``extra`` adds or replaces top-level tables (e.g. ``[alarms]``, ``[feed]``).  Fixed-speed machines get
        ``speed_rpm``; the others a ``speed_tag`` (MQTT/in-process: ``topic`` = :meth:`speed_topic`; OPC UA:
        ``node`` = the speed variable's node id), unit r/min.  A point whose frame would be shorter than its plan
        accepts gets a longer ``frame_samples`` (a power of two).  ``limits`` adds each point's alarm limits
        (:func:`point_limits`).  Raises the daemon's ``ConfigError`` for a table the daemon would refuse.
        """
        from edgevib.daemon.config import (
            BearingConfig,
            MachineConfig,
            PointConfig,
            SpeedTag,
            parse_config,
            validate_document,
        )

        if "name" not in source or "type" not in source:
            raise ValueError("source needs at least 'name' and 'type'")
        sname, opcua = str(source["name"]), source["type"] == "opcua"
        sc = self.scenario
        machines: dict[str, MachineConfig] = {}
        for m in sc.machines:
            tag = None if m.speed.fixed or not m.speed_tag else SpeedTag(  # no tag: the daemon estimates the speed
                source=sname, unit="rpm", **({"node": opcua_speed_node(sc, m.machine_id)} if opcua
                                            else {"topic": self.speed_topic(m.machine_id)}))
            machines[m.machine_id] = MachineConfig(
                id=m.machine_id, **({"description": m.description} if m.description else {}), group=m.group,
                support=m.support,
                speed_rpm=float(m.speed.knots_rpm[0][1]) if m.speed.fixed else None, speed_tag=tag,
                speed_range_rpm=m.speed_range_rpm, run_threshold_rpm=float(m.run_threshold_rpm))
        points = []
        for p in sc.points:
            b = p.bearing
            point = PointConfig(
                id=p.point_id, machine=p.machine_id, axis=p.axis, source=sname, sensor=p.sensor_id,
                fs_hz=float(p.fs_hz), block_samples=p.block_samples, sensor_type=p.sensor_type,
                sensitivity_mv_per_g=p.sensitivity_mv_per_g, bandwidth_hz=p.bandwidth_hz,
                velocity_band_hz=p.velocity_band_hz, envelope_band_hz=p.envelope_band_hz,
                node=opcua_node(sc, p.point_id) if opcua else None,
                bearing=None if b is None else BearingConfig(
                    elements=b.elements, ball_diameter_mm=b.ball_diameter_mm, pitch_diameter_mm=b.pitch_diameter_mm,
                    contact_angle_deg=b.contact_angle_deg))
            machine = machines[p.machine_id]
            need = point.min_frame_samples(machine)
            update: dict[str, Any] = {"frame_samples": 1 << (need - 1).bit_length()} if need > frame_samples else {}
            if limits:
                update["limits"] = point_limits(point, machine) or None
            points.append(point.model_copy(update=update) if update else point)
        cfg = validate_document({
            "site": {"name": sc.site}, "analysis": {"frame_samples": int(frame_samples), "overlap": float(overlap)},
            "sources": [dict(source)], "machines": list(machines.values()), "points": points, **(extra or {})})
        doc: dict[str, Any] = cfg.model_dump(mode="json", by_alias=True, exclude_unset=True, exclude_none=True)
        parse_config(doc, plans=False)  # references between the tables, as the daemon checks them
        return doc

    def daemon_config_toml(self, *, source: Mapping[str, Any], extra: Mapping[str, Any] | None = None,
                           frame_samples: int = 8192, overlap: float = 0.5, limits: bool = True) -> str:
        """:meth:`daemon_config` as TOML text with a header comment (with the alarm limits by default)."""
        sc = self.scenario
        header = (f"# edgevib daemon configuration for the simulated scenario {sc.name!r} "
                  f"(site {sc.site}: {sc.site_description or 'invented plant'}).\n"
                  f"# Generated by `edgevib simulate --scenario {sc.name} --emit-config`; regenerate rather than "
                  "edit.\n# edgevib monitors and advises; it is not a machinery protection (trip) system.\n\n")
        if limits:
            header = header[:-1] + (
                "# Alarm limits: ISO 20816-3 zones for velocity r.m.s. (alert B/C, danger C/D); the order lines\n"
                "# 1x (imbalance), 2x (misalignment) and the other orders (looseness) at alert "
                f"{FAULT_PATTERN_ALERT_FRACTION:g} x B/C and\n# danger B/C; on points with a bearing and envelope "
                f"bandwidth, an alert when a defect family stands {ENVELOPE_ALERT_DB:g} dB\n# above the envelope "
                "floor (demo values: set real limits with a qualified analyst).\n\n")
        return header + dump_toml(self.daemon_config(source=source, extra=extra, frame_samples=frame_samples,
                                                     overlap=overlap, limits=limits))


# A defect family "clearly above the floor".  On the CWRU recordings the families that are not the fault reach
# 12–36 dB envelope SNR (rig and shaft lines) while the faulty family reaches 48–57 dB, so 10 dB would false-alarm
# (demo choice; measured on the recordings in /work/shared/datasets).
ENVELOPE_ALERT_DB = 20.0
# Fault-pattern (narrow-band order) limits: alert at this fraction of the ISO B/C boundary, danger at B/C.
FAULT_PATTERN_INDICATORS = ("imbalance_1x_mm_s", "misalignment_2x_mm_s", "looseness_mm_s")
FAULT_PATTERN_ALERT_FRACTION = 0.5


def point_limits(p: PointConfig, m: MachineConfig) -> PointLimits | None:
    """A point's ``limits`` table, so that the feed says what kind of fault it sees.

    * Where the machine has an ISO group and support: ISO 20816-3 for velocity r.m.s. (alert B/C, danger C/D),
      and fault-pattern limits on the narrow-band order lines — ``imbalance_1x_mm_s`` (1×),
      ``misalignment_2x_mm_s`` (2×) and ``looseness_mm_s`` (the largest of the other orders: 0.5× and 3× with the
      daemon's default orders) — with alert 0.5 × and danger 1 × the machine's B/C boundary.  A single order line
      carrying the whole B/C level means that fault dominates the overall level (a starting point, common
      practice; adjust with a qualified analyst).
    * Where the point has a bearing and envelope bandwidth: an alert per bearing defect family at
      :data:`ENVELOPE_ALERT_DB` envelope SNR.  Bearing faults get an alert only: an early defect is watched and
      trended, not acted on at once (FIELD_NOTES §7, common practice); danger levels are the analyst's to set.
    """
    from edgevib.daemon.config import PointLimits

    out: dict[str, Any] = {}
    if m.group is not None and m.support is not None:
        out["velocity_rms_mm_s"] = {"rule": "iso"}
        bc = M.ISO_ZONE_BOUNDARIES_MM_S[(m.group, m.support)][1]
        for name in FAULT_PATTERN_INDICATORS:
            out[name] = {"alert": FAULT_PATTERN_ALERT_FRACTION * bc, "danger": bc}
    if p.bearing is not None and p.envelope_band_for(m) is not None:  # the daemon's own envelope rule
        for fam in ("bpfo", "bpfi", "bsf", "ftf"):
            out[f"bearing_{fam}_snr_db"] = {"alert": ENVELOPE_ALERT_DB}
    return PointLimits.model_validate(out) if out else None


def opcua_node(scenario: Scenario, point_id: str, leaf: str = "samples") -> str:
    """String node id of a point's variable on the simulator's OPC UA server (namespace index 2)."""
    p = scenario.point(point_id)
    return f"ns=2;s={scenario.site}/{p.machine_id}/{p.point_id}/{leaf}"


def opcua_speed_node(scenario: Scenario, machine_id: str) -> str:
    return f"ns=2;s={scenario.site}/{machine_id}/speed_rpm"

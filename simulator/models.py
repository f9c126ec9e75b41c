"""Physical building blocks of the simulator: shaft speed, bearing kinematics, impact responses, sensors, curves.

Everything here is deterministic numerics: time is a parameter, randomness comes in as arrays.  Each model
also gives the analytic description the truth is computed from (transfer functions, line spectra, PSDs), so
the truth never has to look at a generated signal.

Units: time in s, frequency in Hz, shaft position in revolutions, acceleration in g (gₙ = 9.80665 m/s²).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import numpy.typing as npt
from scipy import signal

__all__ = [
    "G0_M_S2",
    "ISO_ZONE_BOUNDARIES_MM_S",
    "Curve",
    "FirResponse",
    "ImpactResponse",
    "SpeedProfile",
    "bearing_orders",
    "iso_zone",
    "mems_response",
    "piezo_hp_factor",
    "piezo_response",
    "process_coloring",
    "stage_name",
]

F64 = npt.NDArray[np.float64]
C128 = npt.NDArray[np.complex128]

# Standard gravity, exact by definition (3rd CGPM 1901; FIELD_NOTES §5; scipy.constants.g).
G0_M_S2 = 9.80665

# ISO 20816-3 (formerly ISO 10816-3:2009 Annex A) zone boundaries A/B, B/C, C/D in mm/s r.m.s., 10–1000 Hz
# (FIELD_NOTES §1).  Our own copy: the simulator never imports edgevib.pipelines.
ISO_ZONE_BOUNDARIES_MM_S: dict[tuple[int, str], tuple[float, float, float]] = {
    (1, "rigid"): (2.3, 4.5, 7.1),
    (1, "flexible"): (3.5, 7.1, 11.0),
    (2, "rigid"): (1.4, 2.8, 4.5),
    (2, "flexible"): (2.3, 4.5, 7.1),
}


def iso_zone(velocity_rms_mm_s: float, group: int, support: str) -> str:
    """ISO 20816-3 evaluation zone ``"A".."D"`` of a broadband velocity r.m.s. (upper boundaries exclusive)."""
    ab, bc, cd = ISO_ZONE_BOUNDARIES_MM_S[(group, support)]
    if velocity_rms_mm_s < ab:
        return "A"
    if velocity_rms_mm_s < bc:
        return "B"
    if velocity_rms_mm_s < cd:
        return "C"
    return "D"


# --------------------------------------------------------------------------------------------- shaft speed


class SpeedProfile:
    """Shaft speed ``f(t) = L(t) · (1 + w·sin(2πt/P + ψ))`` with ``L`` piecewise linear through ``knots``.

    ``knots`` are ``(t_s, hz)`` pairs in increasing time; the speed is held before the first and after the last.
    A constant speed is one knot; a run-up, coast-down or stop/restart is a few.  ``w`` (the wander fraction) is
    a slow wander of the speed around the schedule.  The shaft position ``revs(t)`` (revolutions since t = 0)
    is the exact integral of ``f`` (closed form per segment), so phases stay continuous for any block layout.
    """

    def __init__(self, knots: Sequence[tuple[float, float]], wander_fraction: float = 0.0,
                 wander_period_s: float = 60.0, wander_phase_rad: float = 0.0) -> None:
        if not knots:
            raise ValueError("a speed profile needs at least one (t_s, hz) knot")
        ts = np.array([k[0] for k in knots], dtype=np.float64)
        fs = np.array([k[1] for k in knots], dtype=np.float64)
        if np.any(np.diff(ts) <= 0):
            raise ValueError(f"speed knots must be in strictly increasing time, got {ts.tolist()}")
        if np.any(fs < 0):
            raise ValueError(f"speeds must be >= 0, got {fs.tolist()}")
        self.knot_t = ts
        self.knot_hz = fs
        self.w = float(wander_fraction)
        self.omega = 2.0 * math.pi / float(wander_period_s)
        self.psi = float(wander_phase_rad)
        n = ts.size
        # segment j+1 (j = -1..n-1): L(t) = alpha + beta t on [anchor_t, next knot)
        alpha = np.empty(n + 1)
        beta = np.zeros(n + 1)
        anchor = np.empty(n + 1)
        alpha[0], anchor[0] = fs[0], ts[0]
        for j in range(n - 1):
            b = (fs[j + 1] - fs[j]) / (ts[j + 1] - ts[j])
            beta[j + 1] = b
            alpha[j + 1] = fs[j] - b * ts[j]
            anchor[j + 1] = ts[j]
        alpha[n], anchor[n] = fs[-1], ts[-1]
        self._alpha, self._beta, self._anchor = alpha, beta, anchor
        # revolutions at each anchor, with revs(0) = 0
        r_anchor = np.zeros(n + 1)
        for j in range(1, n + 1):
            # segment j starts where segment j-1 ends (at knot j-1)
            r_anchor[j] = r_anchor[j - 1] + self._g(j - 1, ts[j - 1]) - self._g(j - 1, anchor[j - 1])
        self._r_anchor = r_anchor
        self._r0 = float(self._revs_raw(np.array([0.0]))[0])

    @property
    def constant(self) -> bool:
        """True for a fixed speed (one speed value and no wander)."""
        return bool(self.w == 0.0 and np.all(self.knot_hz == self.knot_hz[0]))

    def _g(self, seg: Any, t: Any) -> Any:
        a, b = self._alpha[seg], self._beta[seg]
        g = a * t + 0.5 * b * t * t
        if self.w:
            ph = self.omega * t + self.psi
            g = g + self.w * (-(a + b * t) * np.cos(ph) / self.omega + b * np.sin(ph) / self.omega**2)
        return g

    def _seg(self, t: F64) -> npt.NDArray[np.intp]:
        return np.searchsorted(self.knot_t, t, side="right")

    def _revs_raw(self, t: F64) -> F64:
        seg = self._seg(t)
        return np.asarray(self._r_anchor[seg] + self._g(seg, t) - self._g(seg, self._anchor[seg]), dtype=np.float64)

    def hz(self, t: npt.ArrayLike) -> F64:
        """Shaft speed in Hz at times ``t`` (s)."""
        tt = np.asarray(t, dtype=np.float64)
        seg = self._seg(tt)
        lin = self._alpha[seg] + self._beta[seg] * tt
        if self.w:
            lin = lin * (1.0 + self.w * np.sin(self.omega * tt + self.psi))
        return np.asarray(np.maximum(lin, 0.0), dtype=np.float64)

    def revs(self, t: npt.ArrayLike) -> F64:
        """Shaft position in revolutions since t = 0 at times ``t`` (s)."""
        return self._revs_raw(np.asarray(t, dtype=np.float64)) - self._r0

    def hz_per_s(self, t: npt.ArrayLike) -> F64:
        """Rate of change of the shaft speed, Hz/s, at times ``t`` (the derivative of :meth:`hz`, exact:
        ``β(1 + w·sin φ) + L·w·ω·cos φ`` on each linear segment; 0 where the speed is clamped at 0)."""
        tt = np.asarray(t, dtype=np.float64)
        seg = self._seg(tt)
        lin = self._alpha[seg] + self._beta[seg] * tt
        rate = self._beta[seg] * np.ones_like(tt)
        if self.w:
            ph = self.omega * tt + self.psi
            rate = self._beta[seg] * (1.0 + self.w * np.sin(ph)) + lin * self.w * self.omega * np.cos(ph)
            lin = lin * (1.0 + self.w * np.sin(ph))
        return np.asarray(np.where(lin > 0, rate, 0.0), dtype=np.float64)


# --------------------------------------------------------------------------------------------- machine state

MACHINE_STATE_DEFAULTS: dict[str, float] = {"startup_grace_s": 30.0, "run_hysteresis": 0.2,
                                            "speed_change_per_s": 0.02}
"""The daemon's documented defaults of ``[alarms] startup_grace_s``, ``run_hysteresis`` and
``speed_change_per_s`` (README, configuration reference); the truth uses them unless told otherwise."""


def machine_state_timeline(profile: SpeedProfile, run_threshold_hz: float, t_end_s: float, *,
                           startup_grace_s: float = 30.0, run_hysteresis: float = 0.2,
                           speed_change_per_s: float = 0.02, dt_s: float = 0.01) -> list[tuple[float, str]]:
    """The machine's state over ``[0, t_end_s]`` as ``[(t_start_s, state), …]``, from its speed profile alone.

    The definitions the daemon documents (README, machine state), applied to the exact speed ``f(t)`` and its
    exact derivative ``f'(t)`` on a ``dt_s`` grid: turning at ``f ≥ run_threshold_hz`` (at
    ``f ≥ (1 − run_hysteresis) × run_threshold_hz`` once turning); a run-up or coast-down where
    ``|f'| / max(f, run_threshold_hz) ≥ speed_change_per_s``; ``starting`` from the moment a standing machine
    turns until the start-up grace is over and it no longer accelerates (``coasting`` at once if it slows down);
    ``coasting`` while a turning machine slows down; a machine turning at t = 0 was started before and is
    ``running`` unless it accelerates then.
    """
    n = math.floor(max(t_end_s, 0.0) / dt_s) + 1
    t = np.arange(n) * dt_s
    f = profile.hz(t)
    rate = profile.hz_per_s(t) / np.maximum(np.maximum(f, run_threshold_hz), 1e-9)
    out: list[tuple[float, str]] = []
    state = "unknown"
    started = 0.0
    for i in range(n):
        ti, fi, ri = float(t[i]), float(f[i]), float(rate[i])
        turning_before = state in ("starting", "running", "coasting")
        threshold = run_threshold_hz * (1.0 - run_hysteresis) if turning_before else run_threshold_hz
        turning = fi >= threshold and fi > 0
        accel, decel = ri >= speed_change_per_s, ri <= -speed_change_per_s
        if not turning:
            new = "stopped"
        elif state == "stopped" or (state == "unknown" and accel):
            started, new = ti, "starting"
        elif state == "unknown":
            new = "running"
        elif state == "starting":
            new = "coasting" if decel else "starting" if accel or ti - started < startup_grace_s else "running"
        else:
            new = "coasting" if decel else "running"
        if new == "starting" and not accel and ti - started >= startup_grace_s:
            new = "running"
        if new != state:
            out.append((ti, new))
            state = new
    return out


def state_at(timeline: Sequence[tuple[float, str]], t_s: float) -> str:
    """The state of a :func:`machine_state_timeline` at ``t_s`` (``"unknown"`` before its first entry)."""
    state = "unknown"
    for t0, s in timeline:
        if t0 > t_s + 1e-9:
            break
        state = s
    return state


# --------------------------------------------------------------------------------------------- bearings


def bearing_orders(elements: int, ball_diameter: float, pitch_diameter: float,
                   contact_angle_deg: float = 0.0) -> dict[str, float]:
    """Kinematic defect frequencies as multiples of the shaft speed (outer ring stationary).

    FIELD_NOTES §2: k = (d/D)·cos φ; FTF = (1 − k)/2; BPFO = n(1 − k)/2; BPFI = n(1 + k)/2;
    BSF = D/(2d)·(1 − k²).  Raises ``ValueError`` for impossible geometry.
    """
    if elements < 3:
        raise ValueError(f"a bearing needs at least 3 rolling elements, got {elements}")
    if not 0 < ball_diameter < pitch_diameter:
        raise ValueError(f"ball diameter {ball_diameter:g} must be > 0 and below the pitch diameter "
                         f"{pitch_diameter:g}")
    if not 0 <= contact_angle_deg < 90:
        raise ValueError(f"contact angle {contact_angle_deg:g}° must be in 0..90°")
    k = ball_diameter / pitch_diameter * math.cos(math.radians(contact_angle_deg))
    return {
        "ftf": 0.5 * (1 - k),
        "bpfo": 0.5 * elements * (1 - k),
        "bpfi": 0.5 * elements * (1 + k),
        "bsf": pitch_diameter / (2 * ball_diameter) * (1 - k * k),
    }


class ImpactResponse:
    """Acceleration response of the structure to one impact: a decaying resonance with a smooth onset.

    ``h(τ) = s·Re[e^{jθ}(e^{p₁τ} − e^{p₂τ})]`` for τ ≥ 0 with ``p₁ = −a + jω_d``, ``p₂ = p₁ − c``:
    ``a = ζω_n``, ``ω_d = ω_n√(1−ζ²)``, onset rate ``c = ω_n`` (a contact lasting a fraction of a resonance
    period).  θ makes the response zero-mean (no net velocity change, as for a real structure) and ``s``
    normalizes its peak to 1 g per unit amplitude.  ``spectrum`` is its exact Fourier transform.
    """

    def __init__(self, resonance_hz: float, damping: float) -> None:
        wn = 2 * math.pi * resonance_hz
        self.a = damping * wn
        wd = wn * math.sqrt(1 - damping * damping)
        self.p1 = complex(-self.a, wd)
        self.p2 = complex(-self.a - wn, wd)
        area = -1 / self.p1 + 1 / self.p2          # ∫ (e^{p1 τ} − e^{p2 τ}) dτ
        self.theta = math.pi / 2 - np.angle(area)  # Re[e^{jθ}·area] = 0
        self.scale = 1.0
        tau = np.linspace(0, 8 / self.a, 400_001)
        self.scale = 1.0 / float(np.max(np.abs(self(tau))))
        self.decay_s = math.log(1e5) / self.a      # −100 dB

    def __call__(self, tau: F64) -> F64:
        e = np.exp(1j * self.theta) * (np.exp(self.p1 * tau) - np.exp(self.p2 * tau))
        return np.asarray(self.scale * e.real * (tau >= 0), dtype=np.float64)

    def spectrum(self, nu: F64) -> C128:
        """Two-sided Fourier transform ∫h(τ)e^{−j2πντ}dτ (g·s per unit amplitude) at frequencies ``nu``."""
        jw = 2j * math.pi * np.asarray(nu, dtype=np.float64)
        e = np.exp(1j * self.theta)
        p1, p2 = self.p1, self.p2
        h = 0.5 * (e * (1 / (jw - p1) - 1 / (jw - p2)) + np.conj(e) * (1 / (jw - np.conj(p1)) - 1 / (jw - np.conj(p2))))
        return np.asarray(self.scale * h, dtype=np.complex128)


# --------------------------------------------------------------------------------------------- sensors


class FirResponse:
    """A linear-phase FIR applied centred (no delay): output sample n sees inputs n−D..n+D.

    Used for the sensor's magnitude response and the structure's colouring of process noise.  ``gain``
    evaluates the exact magnitude response of the taps (what the truth uses).
    """

    def __init__(self, taps: F64, fs_hz: float) -> None:
        self.taps = np.asarray(taps, dtype=np.float64)
        if self.taps.size % 2 != 1:
            raise ValueError("FIR needs an odd number of taps")
        self.half = self.taps.size // 2
        self.fs_hz = fs_hz

    @classmethod
    def identity(cls, fs_hz: float) -> FirResponse:
        return cls(np.array([1.0]), fs_hz)

    @classmethod
    def design(cls, fs_hz: float, target: Any, numtaps: int) -> FirResponse:
        """Frequency-sampling design (``scipy.signal.firwin2``) of the magnitude ``target(f_hz)``."""
        f = np.linspace(0, fs_hz / 2, 1025)
        return cls(signal.firwin2(numtaps, f, target(f), fs=fs_hz), fs_hz)

    def apply(self, x: F64) -> F64:
        """``len(x) − 2·half`` output samples (valid part of the convolution)."""
        if self.half == 0:
            return np.asarray(x * self.taps[0], dtype=np.float64)
        return np.asarray(signal.oaconvolve(x, self.taps, mode="valid"), dtype=np.float64)

    def gain(self, nu: npt.ArrayLike) -> F64:
        _, h = signal.freqz(self.taps, worN=np.atleast_1d(np.asarray(nu, dtype=np.float64)), fs=self.fs_hz)
        return np.asarray(np.abs(h), dtype=np.float64)


def piezo_response(fs_hz: float, mounted_resonance_hz: float, mounted_q: float) -> FirResponse:
    """IEPE accelerometer above its high-pass corner: the rise towards the mounted resonance
    ``|H| = 1/√((1 − r²)² + (r/Q)²)``, r = f/f_m (a second-order resonance, common practice)."""

    def target(f: F64) -> F64:
        r = f / mounted_resonance_hz
        return np.asarray(1 / np.sqrt((1 - r * r) ** 2 + (r / mounted_q) ** 2), dtype=np.float64)

    return FirResponse.design(fs_hz, target, 127)


def piezo_hp_factor(nu: npt.ArrayLike, corner_hz: float) -> C128:
    """First-order high-pass of an IEPE sensor (no DC response): ``(jν/f_c)/(1 + jν/f_c)``."""
    x = 1j * np.asarray(nu, dtype=np.float64) / corner_hz
    return np.asarray(x / (1 + x), dtype=np.complex128)


def mems_response(fs_hz: float, corner_hz: float, order: int = 4) -> FirResponse:
    """MEMS accelerometer band limit: Butterworth magnitude ``1/√(1 + (f/f_c)^{2N})`` (DC response kept)."""

    def target(f: F64) -> F64:
        return np.asarray(1 / np.sqrt(1 + (f / corner_hz) ** (2 * order)), dtype=np.float64)

    return FirResponse.design(fs_hz, target, 127)


def resonance_shape(f: F64, resonance_hz: float, damping: float) -> F64:
    """Second-order resonance magnitude normalized to 1 at its peak (structural transmission)."""
    r = f / resonance_hz
    mag = 1 / np.sqrt((1 - r * r) ** 2 + (2 * damping * r) ** 2)
    return np.asarray(mag * 2 * damping * math.sqrt(1 - damping * damping), dtype=np.float64)


def process_coloring(fs_hz: float, resonance_hz: float, damping: float, gain: float) -> FirResponse:
    """Broadband process noise seen through the structure: flat, plus the structural resonance raised
    ``gain`` times above the floor: ``|H| = √(1 + (gain² − 1)·shape²)``."""

    def target(f: F64) -> F64:
        shape = resonance_shape(f, resonance_hz, damping)
        return np.asarray(np.sqrt(1 + (gain * gain - 1) * shape * shape), dtype=np.float64)

    return FirResponse.design(fs_hz, target, 255)


def aa_taper(nu: npt.ArrayLike, fs_hz: float) -> F64:
    """Acquisition anti-alias: 1 up to 0.40·fs, raised-cosine to 0 at 0.45·fs (tonal components only)."""
    x = (np.asarray(nu, dtype=np.float64) / fs_hz - 0.40) / 0.05
    out = np.where(x <= 0, 1.0, np.where(x >= 1, 0.0, 0.5 * (1 + np.cos(np.pi * np.clip(x, 0, 1)))))
    return np.asarray(out, dtype=np.float64)


# --------------------------------------------------------------------------------------------- progression


STAGES = ("incipient", "developing", "advanced", "critical")
"""Words for how far a simulated fault has progressed (general usage, ours: not any product's grading)."""


def stage_name(fraction_of_final: float) -> str:
    """Stage of a progressing fault from its amplitude as a fraction of the final amplitude."""
    if fraction_of_final < 0.3:
        return "incipient"
    if fraction_of_final < 0.55:
        return "developing"
    if fraction_of_final < 0.8:
        return "advanced"
    return "critical"


@dataclass(frozen=True, slots=True)
class Curve:
    """A severity multiplier growing from ``start`` to ``end`` between ``start_s`` and ``end_s``.

    ``kind``: ``"linear"``; ``"exponential"`` (geometric growth ``start·(end/start)^u``, u the elapsed fraction);
    ``"logistic"`` (an S-curve of steepness ``steepness``, rescaled to hit both ends exactly).  Held before and
    after.  Months of degradation are compressed into ``end_s − start_s`` seconds.
    """

    kind: str
    start_s: float
    end_s: float
    start: float
    end: float
    steepness: float = 10.0

    def __call__(self, t: npt.ArrayLike) -> F64:
        tt = np.asarray(t, dtype=np.float64)
        u = np.clip((tt - self.start_s) / (self.end_s - self.start_s), 0.0, 1.0)
        if self.kind == "exponential":
            return np.asarray(self.start * (self.end / self.start) ** u, dtype=np.float64)
        if self.kind == "logistic":
            k = self.steepness
            lo, hi = 1 / (1 + math.exp(k / 2)), 1 / (1 + math.exp(-k / 2))
            s = (1 / (1 + np.exp(-k * (u - 0.5))) - lo) / (hi - lo)
        else:
            s = u
        return np.asarray(self.start + (self.end - self.start) * s, dtype=np.float64)

    def describe(self) -> dict[str, Any]:
        d: dict[str, Any] = {"curve": self.kind, "start_s": self.start_s, "end_s": self.end_s,
                             "from": self.start, "to": self.end}
        if self.kind == "logistic":
            d["steepness"] = self.steepness
        return d

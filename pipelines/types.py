"""Contracts of the numerical core: analysis plans in, small typed results out.

An :class:`AnalysisPlan` is built once per measurement-point configuration (sample rate, frame length, bands,
bearing, orders); :func:`edgevib.pipelines.analysis.analyze_frames` then turns a ``(channels, samples)`` array of
frames that share one plan into one :class:`FrameIndicators` per channel.  Nothing here does I/O.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Literal

__all__ = [
    "AnalysisPlan",
    "BearingGeometry",
    "DefectFrequencies",
    "FamilyResult",
    "FrameIndicators",
    "GeometryError",
    "PipelineError",
    "PlanError",
    "PlanNote",
    "SignalError",
    "Support",
]

Support = Literal["rigid", "flexible"]


class PipelineError(ValueError):
    """Base class of every error the numerical core raises on bad input.

    ``field`` names the :class:`AnalysisPlan` field at fault when there is one (``"n_samples"``,
    ``"velocity_band_hz"``, ``"envelope_band_hz"``, ``"orders"``, ``"speed_range_hz"``, ``"bearing"`` …), so that
    a caller can point at the setting it came from; ``None`` otherwise.
    """

    def __init__(self, message: str, *, field: str | None = None) -> None:
        super().__init__(message)
        self.field = field


class GeometryError(PipelineError):
    """Impossible bearing geometry (no elements, ball ≥ pitch diameter, contact angle out of range...)."""


class PlanError(PipelineError):
    """An analysis plan that cannot work (band above Nyquist, record too short for the resolution...)."""


class SignalError(PipelineError):
    """Samples that cannot be analysed (NaN/Inf, wrong shape, empty)."""


@dataclass(frozen=True, slots=True)
class BearingGeometry:
    """Rolling-element bearing geometry; diameters in any one length unit (only their ratio matters)."""

    elements: int
    ball_diameter: float
    pitch_diameter: float
    contact_angle_deg: float = 0.0


@dataclass(frozen=True, slots=True)
class DefectFrequencies:
    """Kinematic defect frequencies in Hz at one shaft speed (outer ring stationary)."""

    shaft_hz: float
    ftf_hz: float
    bpfo_hz: float
    bpfi_hz: float
    bsf_hz: float


@dataclass(frozen=True, slots=True)
class AnalysisPlan:
    """Everything needed to analyse frames of one shape; validated when built (see ``analysis.make_plan``).

    ``envelope_band_hz`` is ``None`` when the point gets no envelope indicators (for example a MEMS sensor
    whose bandwidth cannot carry the demodulation band).  ``speed_range_hz`` bounds the shaft-speed estimate
    used when no speed is given.  ``false_alarm`` is the probability that a defect family is called detected in
    one frame of stationary Gaussian noise; ``min_depth`` the squared-envelope modulation depth a detected
    family's line needs (see :mod:`edgevib.pipelines.envelope`).  A ``partial`` plan accepts records too short for
    some indicators and leaves those out (offline snapshots; see ``analysis.plan_notes``).
    """

    fs_hz: float
    n_samples: int
    velocity_band_hz: tuple[float, float] = (10.0, 1000.0)
    envelope_band_hz: tuple[float, float] | None = None
    bearing: BearingGeometry | None = None
    orders: tuple[float, ...] = (0.5, 1.0, 2.0, 3.0)
    order_tolerance: float = 0.03
    speed_range_hz: tuple[float, float] = (5.0, 100.0)
    slip_tolerance: float = 0.02
    harmonics: int = 3
    false_alarm: float = 1e-3
    min_depth: float = 0.3
    partial: bool = False


@dataclass(frozen=True, slots=True)
class PlanNote:
    """One indicator group that a partial plan's record is too short for (see ``analysis.plan_notes``).

    ``group`` says which group; ``items`` the orders or families left out (``("0.5x",)``, ``("FTF", "2×BSF")``;
    empty for the other groups); ``reason`` why, ``advice`` what to do about it (empty: nothing).  ``str(note)`` is
    the line shown: ``"speed estimate: the 0.05 s record resolves 20 Hz, too coarse …; give the speed"``.
    """

    group: Literal["velocity", "speed estimate", "orders", "envelope"]
    reason: str
    items: tuple[str, ...] = ()
    advice: str = ""

    def __str__(self) -> str:
        head = f"{self.group} {', '.join(self.items)}" if self.items else self.group
        return f"{head}: {self.reason}; {self.advice}" if self.advice else f"{head}: {self.reason}"


@dataclass(frozen=True, slots=True)
class FamilyResult:
    """One bearing defect family in the envelope spectra (method: :mod:`edgevib.pipelines.envelope`).

    ``expected_hz`` is the kinematic fundamental.  ``frequency_hz`` is the largest true local maximum of the
    squared-envelope spectrum within the slip tolerance (None where there is none), ``amplitude_g`` the envelope
    amplitude spectrum there (peak reading, g), ``snr_db`` its squared-envelope level over the local mean level
    (dB), ``depth`` the squared envelope's modulation depth there.  ``harmonics_found`` counts the fundamental and
    harmonics that are significant local maxima, ``sidebands_found`` the sidebands at ± 1 and ± 2 times the
    family's modulation frequency (0–4).  ``detected`` is the verdict; ``ambiguous_with`` names the family (or
    ``"shaft"``) whose line the fundamental coincides with when that family carries more evidence (the verdict is
    then withheld).  ``threshold_db`` is the level the fundamental had to exceed.  The ``bsf`` family is searched
    and reported at 2×BSF, where a rolling-element defect shows (it strikes both races).
    """

    expected_hz: float
    frequency_hz: float | None
    amplitude_g: float | None
    snr_db: float | None
    harmonics_found: int
    sidebands_found: int = 0
    depth: float | None = None
    detected: bool = False
    ambiguous_with: str | None = None
    threshold_db: float | None = None


@dataclass(frozen=True, slots=True)
class FrameIndicators:
    """Indicators of one frame of one channel.  Units are in the names; ``None`` means unavailable (velocity and
    displacement when the frame is too short to resolve the velocity band).  ``shaft_quality`` (0–1) is the
    confidence of an estimated speed (None for a given one; see
    :func:`edgevib.pipelines.spectrum.estimate_speed_hz`)."""

    acceleration_rms_g: float
    acceleration_peak_g: float
    acceleration_peak_to_peak_g: float
    crest_factor: float
    kurtosis: float
    skewness: float
    mean_g: float
    velocity_rms_mm_s: float | None
    velocity_peak_mm_s: float | None
    displacement_pp_um: float | None
    shaft_hz: float | None
    shaft_estimated: bool
    orders_mm_s: dict[str, float] = field(default_factory=dict)
    envelope_band_hz: tuple[float, float] | None = None
    envelope: dict[str, FamilyResult] = field(default_factory=dict)
    shaft_quality: float | None = None

    @property
    def envelope_detected(self) -> tuple[str, ...]:
        """The defect families called detected in this frame."""
        return tuple(name for name, fam in self.envelope.items() if fam.detected)

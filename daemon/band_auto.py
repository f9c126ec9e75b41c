"""Automatic demodulation bands of points configured with ``envelope_band_hz = "auto"``.

Such a point starts with the default band (the rule of :func:`edgevib.common.bands.envelope_band`; its frames say
``envelope_band_source = "default"``).  The daemon keeps the point's latest frames (up to :data:`AUTO_FRAMES`
consecutive ones, joined into one record without repeating their overlap) and selects a band from them
(:func:`edgevib.pipelines.kurtogram.select_band_for`: spectral kurtosis on the fast kurtogram's grid, among bands
whose squared envelope shows periodicity) — once when enough frames are there, then every
``[analysis] band_auto_interval_s`` and whenever asked (the control command ``select_band``), never per frame,
in the analysis thread pool (off the event loop).  A chosen band becomes the point's plan from the next frame on
(``envelope_band_source = "auto"``); when no band qualifies the current one is kept.  The choices are kept in
``envelope_bands.json`` in the state directory, so a restart resumes with them (a point whose sample rate, frame
length or bearing changed starts over).

Only arithmetic runs in the worker; this module's bookkeeping runs on the event loop.
"""

from __future__ import annotations

import json
import math
import os
import tempfile
from collections import deque
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import numpy.typing as npt

from edgevib.daemon.config import MachineConfig, PointConfig, plan_for
from edgevib.daemon.logs import get_logger
from edgevib.pipelines.types import AnalysisPlan, PipelineError

__all__ = ["AUTO_FRAMES", "STATE_FILE", "BandAuto", "BandSelection", "select_for_point"]

AUTO_FRAMES = 4
"""Contiguous frames joined for one selection (longer records estimate kurtosis and periodicity better)."""
STATE_FILE = "envelope_bands.json"
SPEED_MARGIN = 0.03  # a known speed is searched ± this (the order tolerance)
log = get_logger("edgevib.band_auto")


@dataclass(frozen=True, slots=True)
class BandSelection:
    """The outcome of one selection for one point (``band_hz`` None: no band qualified, ``reason`` says why)."""

    point_id: str
    band_hz: tuple[float, float] | None
    plan: AnalysisPlan | None
    selected_at_s: float  # wall clock, s since the Unix epoch
    kurtosis: float | None = None
    periodicity_db: float | None = None
    reason: str | None = None


def _key(point: PointConfig) -> dict[str, Any]:
    """What a stored choice must match to be reused."""
    b = point.bearing
    return {"fs_hz": point.fs_hz, "frame_samples": point.frame_samples,
            "bearing": None if b is None else [b.elements, b.ball_diameter_mm, b.pitch_diameter_mm,
                                               b.contact_angle_deg]}


def plan_with_band(point: PointConfig, machine: MachineConfig, band_hz: tuple[float, float]) -> AnalysisPlan:
    """The point's plan with ``band_hz`` as its demodulation band (raises PipelineError when it does not fit)."""
    return plan_for(point.model_copy(update={"envelope_band_hz": band_hz}), machine)


def select_for_point(point: PointConfig, machine: MachineConfig, record_g: npt.NDArray[np.float64],
                     shaft_hz: float | None, now_s: float) -> BandSelection:
    """Select a band for one point from ``record_g`` (shape (samples,)) and build its plan — the worker's part.

    ``shaft_hz`` is the latest known speed (searched ± 3 %), else the machine's speed range is used."""
    from edgevib.pipelines.kurtogram import select_band_for

    speed = machine.speed_range_hz if shaft_hz is None or not shaft_hz > 0 else \
        (shaft_hz * (1 - SPEED_MARGIN), shaft_hz * (1 + SPEED_MARGIN))
    upper = point.usable_bandwidth_hz[1]
    try:
        bearing = None if point.bearing is None else point.bearing.geometry()
        choice, reason = select_band_for(record_g, point.fs_hz, speed, bearing,
                                         upper_hz=upper if math.isfinite(upper) else None)
    except PipelineError as exc:
        return BandSelection(point.id, None, None, now_s, reason=str(exc))
    if choice.band_hz is None:
        return BandSelection(point.id, None, None, now_s, reason=reason)
    try:
        plan = plan_with_band(point, machine, choice.band_hz)
    except PipelineError as exc:
        return BandSelection(point.id, None, None, now_s, reason=f"band {choice.band_hz[0]:g}–"
                             f"{choice.band_hz[1]:g} Hz does not fit the point's plan: {exc}")
    return BandSelection(point.id, choice.band_hz, plan, now_s, kurtosis=choice.kurtosis,
                         periodicity_db=choice.periodicity_db)


class BandAuto:
    """Frames, schedule and stored choices of the automatic points (event-loop side; see the module docstring).

    Parameters
    ----------
    state_dir : where :data:`STATE_FILE` is kept (None: nothing stored)
    """

    def __init__(self, state_dir: str | None) -> None:
        self.path = None if state_dir is None else Path(state_dir) / STATE_FILE
        self._frames: dict[str, deque[tuple[int, int, int, npt.NDArray[np.float32]]]] = {}  # (t_end, hop, hop_ns, x)
        self._last_s: dict[str, float] = {}  # last selection attempt, wall clock
        self._requested: set[str] = set()
        self.running: set[str] = set()
        self.stored: dict[str, dict[str, Any]] = self._load()

    # -------------------------------------------------------------------------------------- stored choices

    def _load(self) -> dict[str, dict[str, Any]]:
        if self.path is None or not self.path.is_file():
            return {}
        try:
            doc = json.loads(self.path.read_text(encoding="utf-8"))
            return {str(k): v for k, v in doc.get("points", {}).items() if isinstance(v, dict)}
        except (OSError, ValueError, AttributeError) as exc:
            log.warning("stored envelope bands not readable; selecting again", path=str(self.path), error=repr(exc))
            return {}

    def stored_band(self, point: PointConfig) -> tuple[tuple[float, float], float] | None:
        """The stored band of ``point`` and when it was selected, when it still applies."""
        entry = self.stored.get(point.id)
        if entry is None or entry.get("key") != _key(point):
            return None
        band = entry.get("band_hz")
        if not (isinstance(band, list) and len(band) == 2 and all(isinstance(v, int | float) for v in band)):
            return None
        at = entry.get("selected_at_s")
        return (float(band[0]), float(band[1])), float(at) if isinstance(at, int | float) else 0.0

    def remember(self, point: PointConfig, sel: BandSelection) -> None:
        """Record a chosen band (the file is written by :meth:`save`, in a worker)."""
        if sel.band_hz is None:
            return
        self.stored[point.id] = {"band_hz": list(sel.band_hz), "selected_at_s": sel.selected_at_s,
                                 "kurtosis": sel.kurtosis, "periodicity_db": sel.periodicity_db, "key": _key(point)}

    def save(self, snapshot: dict[str, dict[str, Any]]) -> None:
        """Write the stored choices atomically (in a worker thread; a failure is logged, never raised)."""
        if self.path is None:
            return
        try:
            self.path.parent.mkdir(parents=True, exist_ok=True)
            fd, tmp = tempfile.mkstemp(prefix=".envelope_bands.", dir=self.path.parent)
            with os.fdopen(fd, "w", encoding="utf-8") as f:
                json.dump({"points": snapshot}, f, indent=1, sort_keys=True)
            os.replace(tmp, self.path)
        except OSError as exc:
            log.warning("envelope bands not stored", path=str(self.path), error=repr(exc))

    # -------------------------------------------------------------------------------------- frames, schedule

    def observe(self, point_id: str, t_end_ns: int, hop: int, hop_ns: int,
                samples: npt.NDArray[np.float32]) -> None:
        """Keep a frame of an automatic point (a copy: the batch array is not held).  ``hop`` is the point's frame
        advance in samples and ``hop_ns`` in time: consecutive frames are ``hop_ns`` apart."""
        q = self._frames.setdefault(point_id, deque(maxlen=AUTO_FRAMES))
        q.append((t_end_ns, hop, hop_ns, np.array(samples, dtype=np.float32)))

    def record(self, point_id: str) -> npt.NDArray[np.float64] | None:
        """The newest run of consecutive kept frames as one record: the first frame, then the ``hop`` new samples
        of each next one (overlapping frames share the rest).  A gap ends the run."""
        q = self._frames.get(point_id)
        if not q:
            return None
        items = list(q)
        run = [items[-1]]
        for t, hop, hop_ns, x in reversed(items[:-1]):
            t_next, hop_next, hop_ns_next, nxt = run[0]
            if hop != hop_next or hop_ns != hop_ns_next or x.size != nxt.size or not 0 < hop <= x.size \
                    or abs((t_next - t) - hop_ns) > max(1, hop_ns // 1000):
                break
            run.insert(0, (t, hop, hop_ns, x))
        parts = [run[0][3]] + [x[x.size - hop:] for _, hop, _, x in run[1:]]
        return np.concatenate(parts).astype(np.float64)

    def request(self, point_ids: list[str]) -> None:
        """Ask for a selection of these points as soon as they have frames."""
        self._requested.update(point_ids)

    def first_ready(self, point_id: str) -> bool:
        """The point has never been selected and now holds :data:`AUTO_FRAMES` frames (time for its first
        selection)."""
        q = self._frames.get(point_id)
        return point_id not in self._last_s and q is not None and len(q) >= AUTO_FRAMES

    def due(self, auto_points: list[str], now_s: float, interval_s: float) -> list[str]:
        """Automatic points to select now, with frames kept and no selection running: asked for, never selected
        (once :data:`AUTO_FRAMES` frames are there), or selected ``interval_s`` ago."""
        out = []
        for pid in auto_points:
            q = self._frames.get(pid)
            if pid in self.running or not q:
                continue
            last = self._last_s.get(pid)
            if pid in self._requested or (last is None and len(q) >= AUTO_FRAMES) \
                    or (last is not None and now_s - last >= interval_s):
                out.append(pid)
        return out

    def started(self, point_id: str, now_s: float) -> None:
        self.running.add(point_id)
        self._requested.discard(point_id)
        self._last_s[point_id] = now_s

    def selected_at(self, point_id: str, at_s: float) -> None:
        """A stored choice's time counts as the last selection (a restart keeps the interval)."""
        self._last_s.setdefault(point_id, at_s)

    def forget(self, keep: set[str]) -> None:
        """Drop the frames and schedule of points that are no longer automatic."""
        for d in (self._frames, self._last_s):
            for pid in [p for p in d if p not in keep]:
                d.pop(pid)
        self._requested &= keep

"""Waveform capture: the raw frame behind an alarm transition, as float32 WAV plus a JSON sidecar.

A WAV header carries an integer sample rate; the sidecar carries the exact ``fs_hz`` (they differ only for
non-integer rates).  Captures live under one directory with a disk budget (bytes and files); the oldest are
removed first.  ``edgevib analyze FILE.wav`` reads a capture directly.
"""

from __future__ import annotations

import bisect
import contextlib
import json
import os
import threading
import time
from dataclasses import asdict, is_dataclass
from pathlib import Path
from typing import Any

import numpy as np
import structlog
from scipy.io import wavfile

from edgevib.daemon.alarms.config import CaptureConfig
from edgevib.daemon.interfaces import FrameResult
from edgevib.daemon.timestamps import rfc3339_utc

__all__ = ["CaptureStore"]

log = structlog.get_logger("edgevib.alarms.capture")


def _safe(name: str) -> str:
    return "".join(c if c.isalnum() or c in "-_." else "_" for c in name)


def _plain(v: Any) -> Any:
    if is_dataclass(v) and not isinstance(v, type):
        return _plain(asdict(v))
    if isinstance(v, dict):
        return {str(k): _plain(x) for k, x in v.items()}
    if isinstance(v, list | tuple):
        return [_plain(x) for x in v]
    if isinstance(v, float) and not np.isfinite(v):
        return None
    return v


class CaptureStore:
    """Saves captures and keeps the directory within its budget.  Methods are thread-safe (called from a worker
    thread so disk writes never block the event loop).

    The directory is the store's own: it is listed once at start-up and then tracked in memory (oldest first), so
    a save costs the same however many captures are kept — many points raising at once (a plant-wide event)
    must not make every save list and stat the whole directory."""

    def __init__(self, cfg: CaptureConfig) -> None:
        self.cfg = cfg
        self.dir = Path(cfg.dir)
        self._lock = threading.Lock()
        self.count = 0
        self.bytes = 0
        self._index: list[tuple[float, str, int]] = []  # (mtime, WAV name, bytes with its sidecar), oldest first
        if cfg.enabled:
            self.dir.mkdir(parents=True, exist_ok=True)
            with self._lock:
                self._index = [(mtime, wav.name, size) for mtime, wav, size in self._entries()]
                self._rotate()

    def _entries(self) -> list[tuple[float, Path, int]]:
        out = []
        for wav in self.dir.glob("*.wav"):
            try:
                st = wav.stat()
            except OSError:
                continue
            side = wav.with_suffix(".json")
            size = st.st_size + (side.stat().st_size if side.exists() else 0)
            out.append((st.st_mtime, wav, size))
        out.sort(key=lambda e: (e[0], e[1].name))
        return out

    def _rotate(self) -> None:
        entries = self._index
        total = sum(e[2] for e in entries)
        drop = 0
        while drop < len(entries) and (total > self.cfg.max_bytes or len(entries) - drop > self.cfg.max_files):
            _, name, size = entries[drop]
            drop += 1
            wav = self.dir / name
            for p in (wav, wav.with_suffix(".json")):
                with contextlib.suppress(FileNotFoundError):
                    p.unlink()
            total -= size
            log.info("capture rotated out", file=name)
        del entries[:drop]
        self.count, self.bytes = len(entries), total

    def _add(self, wav: Path, side: Path) -> None:
        st = wav.stat()
        bisect.insort(self._index, (st.st_mtime, wav.name, st.st_size + side.stat().st_size))

    def save(self, result: FrameResult, *, indicator: str, transition: str, severity: str, event_id: str,
             limits: dict[str, Any], config_digest: str, site: str) -> str | None:
        """Write ``<point>_<time>_<indicator>_<severity>.wav`` and its ``.json``; returns the WAV file name
        (relative to the capture directory), or ``None`` when capture is off or the write failed."""
        if not self.cfg.enabled:
            return None
        t = result.t_end_ns
        stamp = time.strftime("%Y%m%dT%H%M%S", time.gmtime(t // 1_000_000_000)) + f".{(t // 1000) % 1_000_000:06d}Z"
        stem = f"{_safe(result.point_id)}_{stamp}_{_safe(indicator)}_{severity}"
        samples = np.asarray(result.samples, dtype=np.float32).reshape(-1)
        rate = max(1, round(result.fs_hz))
        sidecar = {
            "site": site, "point": result.point_id, "machine": result.machine_id,
            "t_end_ns": t, "t_start_ns": t - round(samples.size / result.fs_hz * 1e9),
            "time": rfc3339_utc(t),
            "fs_hz": result.fs_hz, "wav_rate_hz": rate, "n_samples": int(samples.size), "unit": "g",
            "indicator": indicator, "transition": transition, "severity": severity, "event_id": event_id,
            "iso_zone": result.iso_zone, "indicators": _plain(result.indicators), "limits": _plain(limits),
            "config_digest": config_digest,
        }
        try:
            with self._lock:
                wav_path = self.dir / f"{stem}.wav"
                n = 1
                while wav_path.exists():
                    wav_path = self.dir / f"{stem}-{n}.wav"
                    n += 1
                tmp = wav_path.with_suffix(".wav.tmp")
                with open(tmp, "wb") as fh:
                    wavfile.write(fh, rate, samples)
                    fh.flush()
                    os.fsync(fh.fileno())
                side = wav_path.with_suffix(".json")
                side.write_text(json.dumps(sidecar, indent=1, allow_nan=False) + "\n", encoding="utf-8")
                os.replace(tmp, wav_path)
                self._add(wav_path, side)
                self._rotate()
        except (OSError, ValueError) as exc:
            log.warning("capture failed", point=result.point_id, error=str(exc))
            return None
        return wav_path.name

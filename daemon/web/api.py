"""The view: the JSON API ``/api/v1/…``, its Server-Sent Events and the page at ``/``, on the daemon's listener.

:class:`ViewService` is a lossy :class:`~edgevib.daemon.interfaces.FrameSink`: it keeps each point's recent
indicator values (:mod:`edgevib.daemon.web.recent`), listens to the alarm layer's committed events and pushes a
small message per frame, per alarm event and per point whose data stops or resumes (``stale``) to every open
event stream.  The alarm history is the alarm layer's
durable one, read through its read-only view (``AlarmView.history``).  Spectra, envelope
spectra and waveforms are computed on request from the point's latest frame in a worker thread (at most
:data:`COMPUTE_SLOTS` at once, never on the event loop) and cached per frame.

Bounds: every list has a limit, every query parameter a range; each client address gets a token bucket
(:data:`RATE_PER_S` requests per second, bursts of :data:`RATE_BURST`); at most :data:`MAX_STREAMS` event streams,
each with a bounded queue (the oldest messages go first when a client reads slowly).  Read-only by default;
acknowledging and shelving are :mod:`edgevib.daemon.web.actions`.  The API is documented in README ("View and
JSON API"); its version is in the path.
"""

from __future__ import annotations

import asyncio
import contextlib
import dataclasses
import json
import math
import time
from collections import OrderedDict, deque
from collections.abc import Awaitable, Callable, Iterable, Mapping
from importlib import resources
from pathlib import Path
from typing import TYPE_CHECKING, Any, Protocol

import numpy as np
from aiohttp import web

from edgevib.daemon import __version__
from edgevib.daemon.indicators import INDICATORS, REGISTRY, Indicator
from edgevib.daemon.interfaces import AlarmView, FrameResult
from edgevib.daemon.logs import get_logger
from edgevib.daemon.timestamps import rfc3339_utc
from edgevib.daemon.web.listener import HttpListener
from edgevib.daemon.web.recent import RecentValues
from edgevib.pipelines import panels
from edgevib.pipelines.types import PipelineError

if TYPE_CHECKING:
    from edgevib.daemon.config import Config
    from edgevib.daemon.trendwatch import TrendWatch

__all__ = [
    "API_VERSION",
    "COMPUTE_SLOTS",
    "MAX_STREAMS",
    "RATE_BURST",
    "RATE_PER_S",
    "ViewHost",
    "ViewService",
    "dumps",
    "indicator_rows",
    "indicator_unit",
    "jsonable",
    "plan_for_frame",
    "rfc3339",
    "transition_row",
]

API_VERSION = "v1"
COMPUTE_SLOTS = 2
CACHE_ENTRIES = 64
MAX_STREAMS = 16
STREAM_QUEUE = 256
HEARTBEAT_S = 15.0
STALE_CHECK_S = 1.0  # how often the view looks for points whose data stopped (pushed as a "stale" event)
RATE_PER_S = 20.0
RATE_BURST = 60.0
MAX_CLIENTS_TRACKED = 1024
HISTORY_MAX_LIMIT = 1000  # the alarm layer's own bound on one history read
HISTORY_DEFAULT_LIMIT = 200
TREND_MAX_POINTS = 5000
ACTIVE_STATES = ("unacknowledged", "acknowledged", "latched", "rtn-unacknowledged", "shelved")
log = get_logger("edgevib.view")

STATIC = resources.files("edgevib.daemon.web") / "static"
PAGE_CSP = ("default-src 'none'; script-src 'self'; style-src 'self'; img-src 'self' data:; connect-src 'self'; "
            "font-src 'none'; base-uri 'none'; form-action 'self'; frame-ancestors 'none'")


# ---------------------------------------------------------------------------------------------- helpers


def rfc3339(t_ns: int | float | None) -> str | None:
    """RFC 3339 UTC with a ``Z`` and milliseconds (the daemon's one wire format), ``None`` for no time."""
    if t_ns is None or not math.isfinite(t_ns):
        return None
    return rfc3339_utc(round(t_ns))


def parse_time_s(text: str, now_s: float) -> float:
    """``since`` as RFC 3339 (``…Z`` or an offset), Unix seconds, or a relative ``-3600s`` / ``-90m`` / ``-2h``."""
    import datetime as dt

    s = text.strip()
    if s.startswith("-") and s[-1:] in ("s", "m", "h") and len(s) > 2:
        try:
            amount = float(s[1:-1])
        except ValueError:
            raise ValueError(f"since {text!r}: not a number of {s[-1]}") from None
        if not math.isfinite(amount) or amount < 0:
            raise ValueError(f"since {text!r} must be a finite duration")
        return now_s - amount * {"s": 1.0, "m": 60.0, "h": 3600.0}[s[-1]]
    try:
        v = float(s)
        if math.isfinite(v):
            return v
    except ValueError:
        pass
    try:
        d = dt.datetime.fromisoformat(s.replace("Z", "+00:00"))
    except ValueError:
        raise ValueError(f"since {text!r} is not an RFC 3339 time, Unix seconds or -N[s|m|h]") from None
    if d.tzinfo is None:
        raise ValueError(f"since {text!r} needs a time zone (Z or ±hh:mm)")
    return d.timestamp()


def indicator_unit(name: str) -> str:
    """The unit of a flat indicator name (``velocity_rms_mm_s``, ``order_velocity_rms_mm_s.1x``) from the registry."""
    ind = INDICATORS.get(name.split(".", 1)[0])
    return ind.unit if ind is not None else "1"


def _is_limit_view(ind: Indicator) -> bool:
    return ind.fault is not None and ind.mqtt is None and ind.report is None and ind.prometheus is None


_VALUE_INDICATORS = tuple(ind for ind in REGISTRY if not _is_limit_view(ind))


# (name, reader) of each scalar one, (name, None) of each per-order / per-family one: looked up once
_VALUE_READERS = tuple((ind.name, ind.read if ind.each is None else None) for ind in _VALUE_INDICATORS)
_VALUE_EACH = {ind.name: ind.each for ind in _VALUE_INDICATORS if ind.each is not None}


def indicator_values(r: FrameResult) -> dict[str, Any]:
    """``{name: value}`` of :func:`indicator_rows` without the limit views (NaN/Inf → None): what the recent-values
    buffer keeps per frame, without building each row's description text."""
    out: dict[str, Any] = {}
    isfinite = math.isfinite
    for name, read in _VALUE_READERS:
        if read is not None:
            v = read(r)
            out[name] = None if isinstance(v, float) and not isfinite(v) else v
            continue
        for key, v in _VALUE_EACH[name](r).items():
            out[f"{name}.{key}" if key else name] = None if isinstance(v, float) and not isfinite(v) else v
    return out


def indicator_rows(r: FrameResult) -> list[dict[str, Any]]:
    """Every registry indicator of a frame as ``{name, value, unit, kind, description}``: scalars by name,
    per-order and per-family ones as ``NAME.KEY`` (``order_velocity_rms_mm_s.1x``, ``envelope_snr_db.bpfo``);
    ``kind`` is ``overall``, ``order``, ``family`` or ``limit`` (the fault-named views that alarm limits use)."""
    rows: list[dict[str, Any]] = []
    for ind in REGISTRY:
        kind = "limit" if _is_limit_view(ind) else ind.per or "overall"
        for key, v in ind.values(r).items():
            if isinstance(v, float) and not math.isfinite(v):
                v = None
            rows.append({"name": f"{ind.name}.{key}" if key else ind.name, "value": v, "unit": ind.unit,
                         "kind": kind, "description": ind.text(key)})
    return rows


def jsonable(value: Any) -> Any:
    """JSON-ready: arrays → lists rounded to 6 significant digits, NaN/Inf → null, tuples → lists."""
    if isinstance(value, dict):
        return {str(k): jsonable(v) for k, v in value.items()}
    if isinstance(value, np.ndarray):
        return [None if not math.isfinite(v) else float(f"{v:.6g}") for v in value.tolist()]
    if isinstance(value, list | tuple):
        return [jsonable(v) for v in value]
    if isinstance(value, float | np.floating):
        f = float(value)
        return f if math.isfinite(f) else None
    if isinstance(value, np.integer):
        return int(value)
    return value


def dumps(doc: Any) -> bytes:
    """Compact JSON of ``doc`` (see :func:`jsonable`)."""
    return json.dumps(jsonable(doc), separators=(",", ":"), ensure_ascii=False, allow_nan=False).encode("utf-8")


def plan_for_frame(point: Any, machine: Any, plan: Any, r: FrameResult) -> Any:
    """The analysis plan a frame was analysed with: the point's present plan, or — when the frame was demodulated
    in another band (an automatic band re-selected since) — the point's plan with the frame's band."""
    band = r.indicators.envelope_band_hz
    if band is None or plan.envelope_band_hz is None or tuple(band) == tuple(plan.envelope_band_hz):
        return plan
    from edgevib.daemon.band_auto import plan_with_band

    return plan_with_band(point, machine, (float(band[0]), float(band[1])))


def transition_row(t: Any) -> dict[str, Any]:
    """One alarm-history record (:class:`~edgevib.daemon.interfaces.AlarmTransition`) as JSON fields, with its times
    also in RFC 3339 (``time`` for ``t_s``, ``at`` for ``at_s``)."""
    if dataclasses.is_dataclass(t) and not isinstance(t, type):
        row = {f.name: getattr(t, f.name) for f in dataclasses.fields(t)}
    else:
        row = dict(t)
    t_s, at_s = row.get("t_s"), row.get("at_s")
    row["time"] = rfc3339(t_s * 1e9) if isinstance(t_s, int | float) else None
    row["at"] = rfc3339(at_s * 1e9) if isinstance(at_s, int | float) else None
    return row


def json_response(doc: Any, status: int = 200, *, body: bytes | None = None) -> web.Response:
    return web.Response(status=status, body=dumps(doc) if body is None else body,
                        headers={"Content-Type": "application/json; charset=utf-8", "Cache-Control": "no-store"})


def problem(status: int, message: str, **extra: Any) -> web.Response:
    """An error answer: ``{"error": message, …}``."""
    return json_response({"error": message, "status": status, **extra}, status)


def _int_param(request: web.Request, name: str, lo: int, hi: int) -> int | None:
    text = request.query.get(name)
    if text is None:
        return None
    try:
        v = int(text)
    except ValueError:
        raise web.HTTPBadRequest(text=f"{name} {text!r} is not an integer") from None
    if not lo <= v <= hi:
        raise web.HTTPBadRequest(text=f"{name} {v} must be between {lo} and {hi}")
    return v


def _float_param(request: web.Request, name: str) -> float | None:
    text = request.query.get(name)
    if text is None:
        return None
    try:
        v = float(text)
    except ValueError:
        raise web.HTTPBadRequest(text=f"{name} {text!r} is not a number") from None
    if not math.isfinite(v) or v <= 0:
        raise web.HTTPBadRequest(text=f"{name} {text!r} must be a finite number > 0")
    return v


class _Bucket:
    __slots__ = ("t", "tokens")

    def __init__(self, now: float) -> None:
        self.tokens = RATE_BURST
        self.t = now


class RateLimiter:
    """Token buckets per client address (bounded: the least recently seen are forgotten first)."""

    def __init__(self, rate_per_s: float = RATE_PER_S, burst: float = RATE_BURST,
                 clock: Callable[[], float] = time.monotonic) -> None:
        self.rate = rate_per_s
        self.burst = burst
        self.clock = clock
        self._buckets: OrderedDict[str, _Bucket] = OrderedDict()
        self.refused = 0

    def allow(self, key: str, cost: float = 1.0) -> bool:
        now = self.clock()
        b = self._buckets.pop(key, None) or _Bucket(now)
        b.tokens = min(self.burst, b.tokens + (now - b.t) * self.rate)
        b.t = now
        self._buckets[key] = b
        while len(self._buckets) > MAX_CLIENTS_TRACKED:
            self._buckets.popitem(last=False)
        if b.tokens < cost:
            self.refused += 1
            return False
        b.tokens -= cost
        return True


class _Stream:
    """One open event stream: a bounded queue of encoded messages."""

    def __init__(self) -> None:
        self.queue: deque[bytes] = deque(maxlen=STREAM_QUEUE)
        self.event = asyncio.Event()
        self.closed = False

    def put(self, data: bytes) -> None:
        self.queue.append(data)
        self.event.set()


# ---------------------------------------------------------------------------------------------- the service


class ViewHost(Protocol):
    """What the view reads of the running daemon (:class:`~edgevib.daemon.app.Daemon` is one): its configuration,
    each point's latest frame and analysis state (``.plan``), readiness, the alarm layer's read-only view and the
    trend layer (``None`` when off)."""

    @property
    def config(self) -> Config: ...

    @property
    def latest(self) -> Mapping[str, FrameResult]: ...

    @property
    def points(self) -> Mapping[str, Any]: ...

    @property
    def alarm_view(self) -> AlarmView | None: ...

    @property
    def trend_watch(self) -> TrendWatch | None: ...

    def readiness(self) -> tuple[bool, str]: ...

    def state_text(self, point_id: str) -> str | None: ...



class ViewService:
    """The view on the daemon's listener (see the module docstring).

    Parameters
    ----------
    daemon : the running daemon (:class:`ViewHost`).
    http : the listener to add the routes to.
    """

    lossless = False

    def __init__(self, daemon: ViewHost, http: HttpListener, *, recent_capacity: int = 720,
                 recent_interval_s: float = 5.0, actions: Any = None,
                 clock_ns: Callable[[], int] = time.time_ns) -> None:
        self.daemon = daemon
        self.http = http
        self.clock_ns = clock_ns
        self.recent = RecentValues(recent_capacity, recent_interval_s)
        self.limiter = RateLimiter()
        self._streams: set[_Stream] = set()
        self._cache: OrderedDict[tuple[Any, ...], bytes] = OrderedDict()
        self._inflight: dict[tuple[Any, ...], asyncio.Future[bytes]] = {}
        self._slots = asyncio.Semaphore(COMPUTE_SLOTS)
        self._unsubscribe: Callable[[], None] | None = None
        self._stopping = False
        self._stale: dict[str, bool] = {}  # point id → stale as last pushed (while streams are open)
        self._stale_task: asyncio.Task[None] | None = None
        self.actions = actions
        http.hints = ["/ (the view)", "/api/v1", *[h for h in http.hints if h.startswith("/metrics")
                                                    or h.startswith("/healthz") or h.startswith("/readyz")]]
        self._routes(http)
        http.on_stopping.append(self._close_streams)

    # ------------------------------------------------------------------------------------------ routes

    def _routes(self, http: HttpListener) -> None:
        r: list[tuple[str, Callable[[web.Request], Awaitable[web.StreamResponse]]]] = [
            ("/", self._page),
            ("/static/{name:[A-Za-z0-9_.-]+}", self._static),
            ("/static/vendor/uplot/{name:[A-Za-z0-9_.-]+}", self._vendor),
            ("/api/v1", self._index),
            ("/api/v1/points", self._points),
            ("/api/v1/points/{point}", self._point),
            ("/api/v1/points/{point}/spectrum", self._spectrum),
            ("/api/v1/points/{point}/envelope", self._envelope),
            ("/api/v1/points/{point}/waveform", self._waveform),
            ("/api/v1/points/{point}/trend", self._trend),
            ("/api/v1/alarms", self._alarms),
            ("/api/v1/alarms/history", self._history),
            ("/api/v1/events", self._events),
        ]
        for path, handler in r:
            http.get(path, self._limited(handler))
        if self.actions is not None:
            self.actions.routes(http, self)

    def _limited(self, handler: Callable[[web.Request], Awaitable[web.StreamResponse]],
                 ) -> Callable[[web.Request], Awaitable[web.StreamResponse]]:
        async def wrapped(request: web.Request) -> web.StreamResponse:
            if not self.limiter.allow(request.remote or "?"):
                return problem(429, "too many requests; slow down", retry_after_s=1)
            try:
                return await handler(request)
            except web.HTTPBadRequest as exc:
                return problem(400, exc.text or "bad request")
        return wrapped

    # ------------------------------------------------------------------------------------------ sink

    async def start(self) -> None:
        self._stale_task = asyncio.get_running_loop().create_task(self._watch_staleness(), name="edgevib-view-stale")
        view = self.daemon.alarm_view
        if view is not None:
            self._unsubscribe = view.subscribe(self._on_alarm_event)

    @property
    def alarm_layer(self) -> AlarmView | None:
        """The daemon's alarm layer (None when ``[alarms] enabled = false``)."""
        return self.daemon.alarm_view

    async def on_frames(self, results: list[FrameResult]) -> None:
        self.recent.add_frames(((r.point_id, r.t_end_ns / 1e9, r) for r in results), indicator_values)
        if self._streams:  # the latest frame of each point, to the view's live streams
            latest = {r.point_id: r for r in results}
            for r in latest.values():
                if self._stale.get(r.point_id):  # data again: fresh now, not at the next check
                    self._push_stale(r.point_id, False, r)
                ind = r.indicators
                self._broadcast("frame", {"point": r.point_id, "frame_end": rfc3339(r.t_end_ns),
                                          "velocity_rms_mm_s": ind.velocity_rms_mm_s, "iso_zone": r.iso_zone,
                                          "shaft_hz": ind.shaft_hz, "state": self.daemon.state_text(r.point_id)})

    async def stop(self) -> None:
        self._close_streams()
        task, self._stale_task = self._stale_task, None
        if task is not None:
            task.cancel()
            with contextlib.suppress(asyncio.CancelledError):
                await task
        unsubscribe, self._unsubscribe = self._unsubscribe, None
        if unsubscribe is not None:
            unsubscribe()

    async def reconfigure(self, config: Config) -> None:
        self.recent.forget({p.id for p in config.points})
        self._cache.clear()

    # ------------------------------------------------------------------------------------------ alarm events

    def _on_alarm_event(self, event: dict[str, Any]) -> None:
        """Called by the alarm layer on the event loop with each committed CloudEvent."""
        data = event.get("data") or {}
        row = {"id": event.get("id"), "type": event.get("type"), "time": event.get("time"),
               "point": data.get("point") or event.get("subject"), "machine": data.get("machine"),
               **{k: data.get(k) for k in ("indicator", "unit", "fault_kind", "transition", "state", "from_state",
                                           "alarm_state", "value", "limit", "reason", "by", "advice", "fault",
                                           "detail", "iso_zone")}}
        self._broadcast("alarm", row)

    # ------------------------------------------------------------------------------------------ staleness

    @staticmethod
    def _age_stale(p: Any, r: FrameResult | None, now_ns: int) -> tuple[float | None, bool]:
        """A point's data age (s, since its latest frame arrived) and whether it is stale: no frame yet, or none for
        longer than max(10 s, 5 frame periods)."""
        if r is None:
            return None, True
        age = max(0.0, (now_ns - r.received_ns) / 1e9)
        return age, age > max(10.0, 5 * p.hop_samples / p.fs_hz)

    def check_staleness(self) -> None:
        """Push a ``stale`` event for every point whose data stopped or resumed since the last check (the first
        check while a stream is open only records: a client reads the state from ``/points``)."""
        if not self._streams:
            self._stale.clear()
            return
        now = self.clock_ns()
        for p in self.daemon.config.points:
            r = self.daemon.latest.get(p.id)
            stale = self._age_stale(p, r, now)[1]
            if p.id in self._stale and self._stale[p.id] != stale:
                self._push_stale(p.id, stale, r, now)
            self._stale[p.id] = stale

    def _push_stale(self, pid: str, stale: bool, r: FrameResult | None, now_ns: int | None = None) -> None:
        self._stale[pid] = stale
        age = None if r is None else max(0.0, ((now_ns or self.clock_ns()) - r.received_ns) / 1e9)
        self._broadcast("stale", {"point": pid, "stale": stale, "age_s": age,
                                  "frame_end": None if r is None else rfc3339(r.t_end_ns)})

    async def _watch_staleness(self) -> None:
        while True:
            await asyncio.sleep(STALE_CHECK_S)
            try:
                self.check_staleness()
            except Exception as exc:  # the watch must outlive a bad check
                log.error("view staleness check failed", error=repr(exc))

    # ------------------------------------------------------------------------------------------ streams

    def _broadcast(self, kind: str, doc: dict[str, Any]) -> None:
        if not self._streams:
            return
        data = b"event: " + kind.encode() + b"\ndata: " + dumps(doc) + b"\n\n"
        for s in self._streams:
            s.put(data)

    def _close_streams(self) -> None:
        self._stopping = True
        for s in self._streams:
            s.closed = True
            s.event.set()

    async def _events(self, request: web.Request) -> web.StreamResponse:
        if len(self._streams) >= MAX_STREAMS:
            return problem(503, f"at most {MAX_STREAMS} event streams at once")
        if self._stopping:
            return problem(503, "stopping")
        resp = web.StreamResponse(headers={"Content-Type": "text/event-stream", "Cache-Control": "no-store",
                                           "X-Content-Type-Options": "nosniff", "X-Accel-Buffering": "no"})
        await resp.prepare(request)
        stream = _Stream()
        self._streams.add(stream)
        try:
            await resp.write(b"retry: 2000\nevent: hello\ndata: " + dumps({"api": API_VERSION, "version": __version__})
                             + b"\n\n")
            while not stream.closed:
                with contextlib.suppress(TimeoutError):
                    async with asyncio.timeout(HEARTBEAT_S):
                        await stream.event.wait()
                stream.event.clear()
                if stream.closed:
                    break
                if not stream.queue:
                    await resp.write(b": keep-alive\n\n")
                    continue
                chunk = b"".join(stream.queue)
                stream.queue.clear()
                await resp.write(chunk)
        except (ConnectionResetError, asyncio.CancelledError):
            pass
        finally:
            self._streams.discard(stream)
        return resp

    # ------------------------------------------------------------------------------------------ page

    async def _page(self, _request: web.Request) -> web.StreamResponse:
        body = (STATIC / "index.html").read_bytes()
        return web.Response(body=body, headers={"Content-Type": "text/html; charset=utf-8",
                                                "Content-Security-Policy": PAGE_CSP, "Cache-Control": "no-cache",
                                                "X-Frame-Options": "DENY"})

    async def _static(self, request: web.Request) -> web.StreamResponse:
        return self._file(STATIC / request.match_info["name"])

    async def _vendor(self, request: web.Request) -> web.StreamResponse:
        return self._file(STATIC / "vendor" / "uplot" / request.match_info["name"])

    @staticmethod
    def _file(path: Any) -> web.StreamResponse:
        name = str(path.name)
        types = {".js": "text/javascript; charset=utf-8", ".css": "text/css; charset=utf-8",
                 ".svg": "image/svg+xml", ".txt": "text/plain; charset=utf-8", ".html": "text/html; charset=utf-8"}
        ctype = types.get(Path(name).suffix) or ("text/plain; charset=utf-8" if name == "LICENSE" else None)
        if ctype is None or not path.is_file():
            raise web.HTTPNotFound()
        return web.Response(body=path.read_bytes(), headers={"Content-Type": ctype, "Cache-Control": "no-cache"})

    # ------------------------------------------------------------------------------------------ documents

    async def _index(self, _request: web.Request) -> web.Response:
        return json_response({
            "api": API_VERSION, "version": __version__, "site": self.daemon.config.site.name,
            "endpoints": ["/api/v1/points", "/api/v1/points/{point}", "/api/v1/points/{point}/spectrum",
                          "/api/v1/points/{point}/envelope", "/api/v1/points/{point}/waveform",
                          "/api/v1/points/{point}/trend", "/api/v1/alarms", "/api/v1/alarms/history",
                          "/api/v1/events", "/api/v1/session"],
            "limits": {"requests_per_s": RATE_PER_S, "burst": RATE_BURST, "event_streams": MAX_STREAMS,
                       "spectrum_lines": panels.MAX_LINES, "waveform_points": panels.MAX_POINTS,
                       "trend_points": TREND_MAX_POINTS, "history_entries": HISTORY_MAX_LIMIT},
            "actions": self.actions is not None and self.actions.enabled,
            "advisory": "edgevib monitors and advises; it is not a machinery protection system.",
        })

    def _alarm_snapshot(self, point: str | None = None,
                        ) -> tuple[list[dict[str, Any]], dict[str, Any], dict[str, Any]]:
        """The alarm layer's limit rows, sensor states and per-point rows (machine state, data gap, source)."""
        layer = self.daemon.alarm_view
        if layer is None:
            return [], {}, {}
        snap: dict[str, Any] = layer.snapshot(point)
        return list(snap.get("alarms", [])), dict(snap.get("sensors", {})), dict(snap.get("points", {}))

    @staticmethod
    def _active(row: dict[str, Any]) -> bool:
        return (row.get("severity") != "normal" or row.get("state") in ACTIVE_STATES
                or row.get("shelved_until_s") is not None)

    def _machine_state(self, machine_id: str, r: FrameResult | None) -> tuple[str, str | None]:
        """The machine's state now and, while it is unknown because every point of the machine is stale, the last
        known one: the alarm layer's judgement, else the state the daemon judged the latest frame in."""
        view = self.daemon.alarm_view
        if view is not None:
            mv = view.machine_view(machine_id)
            state, last = mv.get("state"), mv.get("last_state")
            if isinstance(state, str):
                return state, last if isinstance(last, str) else None
        if r is not None and r.machine_state is not None:
            return r.machine_state.state, None
        return ("running" if r is not None and r.indicators.shaft_hz is not None else "unknown"), None

    def _point_doc(self, p: Any, rows: list[dict[str, Any]], sensors: dict[str, Any], now_ns: int,
                   judged: dict[str, Any] | None = None) -> dict[str, Any]:
        d = self.daemon
        m = d.config.machine(p.machine)
        r: FrameResult | None = d.latest.get(p.id)
        doc: dict[str, Any] = {
            "id": p.id, "machine": p.machine, "machine_description": m.description, "axis": p.axis,
            "sensor": p.sensor, "sensor_type": p.sensor_type, "description": p.description, "fs_hz": p.fs_hz,
            "frame_samples": p.frame_samples, "velocity_band_hz": list(p.velocity_band_hz),
            # the band configured (for an automatic one: its default until the first selection); a frame's own below
            "envelope_band_hz": list(p.envelope_band_hz) if p.envelope_band_hz else None,
            "envelope_band_source": p.envelope_band_origin if p.envelope_band_hz else None,
            "envelope_note": p.envelope_note, "bearing": p.bearing is not None,
            **dict(zip(("machine_state", "last_machine_state"), self._machine_state(m.id, r), strict=True)),
            "iso": None if m.group is None else {"group": m.group, "support": m.support},
            "alarm_state": self.daemon.state_text(p.id) or "-",
            "alarms": [row for row in rows if row.get("point") == p.id and self._active(row)],
            "limits": {row["indicator"]: {"alert": row.get("alert"), "danger": row.get("danger")}
                       for row in rows if row.get("point") == p.id},
            "sensor_fault": (sensors.get(p.id) or {}).get("fault"),
            # the alarm layer's view of the point's data: why it has no good data (None: data flows), its source
            "data_gap": (judged or {}).get("stale"), "source_state": (judged or {}).get("source_state"),
            "start_up_grace_left_s": (judged or {}).get("start_up_grace_left_s"),
            "frame_end": None, "age_s": None, "stale": True, "iso_zone": None, "speed": None, "indicators": [],
        }
        if m.group is not None and m.support is not None:
            from edgevib.pipelines.severity import zone_boundaries_mm_s

            with contextlib.suppress(PipelineError):
                doc["iso"]["boundaries_mm_s"] = list(zone_boundaries_mm_s(m.group, m.support))
        if r is not None:
            ind = r.indicators
            age, stale = self._age_stale(p, r, now_ns)
            source = ("estimated" if ind.shaft_estimated else m.speed_mode) if ind.shaft_hz is not None else "none"
            if ind.envelope_band_hz is not None:  # the band the latest frame was demodulated in, and where it is from
                doc.update(envelope_band_hz=list(ind.envelope_band_hz), envelope_band_source=r.envelope_band_source)
            doc.update(frame_end=rfc3339(r.t_end_ns), age_s=age, stale=stale,
                       iso_zone=r.iso_zone,
                       speed={"hz": ind.shaft_hz, "rpm": None if ind.shaft_hz is None else ind.shaft_hz * 60,
                              "source": source},
                       indicators=[row for row in indicator_rows(r) if row["kind"] != "limit"])
        return doc

    async def _points(self, _request: web.Request) -> web.Response:
        rows, sensors, judged = self._alarm_snapshot()
        now = self.clock_ns()
        docs = [self._point_doc(p, rows, sensors, now, judged.get(p.id)) for p in self.daemon.config.points]
        ready, detail = self.daemon.readiness()
        return json_response({"api": API_VERSION, "site": self.daemon.config.site.name, "time": rfc3339(now),
                              "ready": ready, "readiness": detail, "points": docs})

    def _point_config(self, request: web.Request) -> Any:
        pid = request.match_info["point"]
        for p in self.daemon.config.points:
            if p.id == pid:
                return p
        raise web.HTTPNotFound(text=json.dumps({"error": f"unknown point {pid[:128]!r}", "status": 404}),
                               content_type="application/json")

    async def _point(self, request: web.Request) -> web.Response:
        p = self._point_config(request)
        rows, sensors, judged = self._alarm_snapshot(p.id)
        return json_response(self._point_doc(p, rows, sensors, self.clock_ns(), judged.get(p.id)))

    # ------------------------------------------------------------------------------------------ frame panels

    async def _panel(self, request: web.Request, kind: str,
                     build: Callable[[FrameResult, Any], dict[str, Any]], params: tuple[Any, ...]) -> web.Response:
        p = self._point_config(request)
        r: FrameResult | None = self.daemon.latest.get(p.id)
        st = self.daemon.points.get(p.id)
        if r is None or st is None:
            return problem(404, f"point {p.id} has no analysed frame yet")
        key = (p.id, r.t_end_ns, kind, params)
        body = self._cache.get(key)
        if body is None:
            fut = self._inflight.get(key)
            if fut is None:
                fut = asyncio.get_running_loop().create_future()
                self._inflight[key] = fut
                try:
                    async with self._slots:
                        doc = await asyncio.to_thread(build, r, st.plan)
                        doc.update(api=API_VERSION, point=p.id, machine=p.machine, frame_end=rfc3339(r.t_end_ns))
                        body = await asyncio.to_thread(dumps, doc)
                    self._cache[key] = body
                    while len(self._cache) > CACHE_ENTRIES:
                        self._cache.popitem(last=False)
                    fut.set_result(body)
                except PipelineError as exc:
                    fut.set_exception(exc)
                    fut.exception()  # retrieved: waiters re-raise it
                    return problem(400, str(exc))
                finally:
                    self._inflight.pop(key, None)
            else:
                try:
                    body = await asyncio.shield(fut)
                except PipelineError as exc:
                    return problem(400, str(exc))
        return json_response(None, body=body)

    async def _spectrum(self, request: web.Request) -> web.Response:
        fmax = _float_param(request, "fmax")
        lines = _int_param(request, "max_lines", 16, panels.MAX_LINES)

        def build(r: FrameResult, plan: Any) -> dict[str, Any]:
            return panels.spectrum_panel(r.samples, r.fs_hz, plan, r.indicators.shaft_hz, fmax_hz=fmax,
                                         max_lines=lines)
        return await self._panel(request, "spectrum", build, (fmax, lines))

    async def _envelope(self, request: web.Request) -> web.Response:
        fmax = _float_param(request, "fmax")
        lines = _int_param(request, "max_lines", 16, panels.MAX_LINES)

        p = self._point_config(request)
        m = self.daemon.config.machine(p.machine)

        def build(r: FrameResult, plan: Any) -> dict[str, Any]:
            doc = panels.envelope_panel(r.samples, r.fs_hz, plan_for_frame(p, m, plan, r), r.indicators.shaft_hz,
                                        fmax_hz=fmax, max_lines=lines)
            doc["band_source"] = r.envelope_band_source if doc.get("available") else None
            return doc
        return await self._panel(request, "envelope", build, (fmax, lines))

    async def _waveform(self, request: web.Request) -> web.Response:
        points = _int_param(request, "max_points", 16, panels.MAX_POINTS)

        def build(r: FrameResult, _plan: Any) -> dict[str, Any]:
            doc = panels.waveform_panel(r.samples, r.fs_hz, max_points=points)
            doc["frame_start"] = rfc3339(r.t_end_ns - doc["duration_s"] * 1e9)
            return doc
        return await self._panel(request, "waveform", build, (points,))

    # ------------------------------------------------------------------------------------------ trend, alarms

    async def _trend(self, request: web.Request) -> web.Response:
        p = self._point_config(request)
        indicator = request.query.get("indicator", "velocity_rms_mm_s")
        if len(indicator) > 64:
            return problem(400, "indicator name too long")
        now_s = self.clock_ns() / 1e9
        since_text = request.query.get("since")
        try:
            since = -math.inf if since_text is None else parse_time_s(since_text, now_s)
        except ValueError as exc:
            return problem(400, str(exc))
        limit = _int_param(request, "max_points", 2, TREND_MAX_POINTS) or TREND_MAX_POINTS
        known = self.recent.indicators(p.id)
        rows, _, _ = self._alarm_snapshot(p.id)
        limits = self._limits_for(indicator, rows)
        lines = self._limit_lines(p, limits["indicator"], limits)
        stored = await self._history_trend(p.id, limits["indicator"], since, limit)
        if stored is not None:
            t_list = stored["t_s"]
            return json_response({
                "api": API_VERSION, "point": p.id, "indicator": limits["indicator"],
                "unit": indicator_unit(limits["indicator"]),
                "source": f"the daemon's severity history ({stored['resolution']} resolution) and the trend "
                          "layer's latest projection",
                "t_s": t_list, "time": [rfc3339(x * 1e9) for x in t_list], "values": stored["values"],
                "limits": limits, "limit_lines": lines, "projection": stored["projection"],
                "trend": stored["trend"], "indicators": known})
        if known and indicator not in known:
            return problem(404, f"point {p.id} has no indicator {indicator!r}", indicators=known)
        t, v = await asyncio.to_thread(self.recent.series, p.id, indicator, since)
        if t.size > limit:
            t, v = t[-limit:], v[-limit:]
        return json_response({
            "api": API_VERSION, "point": p.id, "indicator": indicator, "unit": indicator_unit(indicator),
            "source": "recent values held by the daemon in memory (at most "
                      f"{self.recent.capacity} per point, one per {self.recent.interval_s:g} s; lost on restart)",
            "t_s": t.tolist(), "time": [rfc3339(x * 1e9) for x in t.tolist()], "values": v,
            "limits": limits, "limit_lines": lines, "projection": None,
            "trend": None, "indicators": known,
        })

    def _limit_lines(self, p: Any, indicator: str, limits: dict[str, Any]) -> list[dict[str, Any]]:
        """Every limit line of a series (``{label, value, unit, kind}``): the trend layer's read-only view when it
        runs; otherwise the alarm layer's set points and the machine's ISO 20816-3 zone boundaries."""
        watch = self.daemon.trend_watch
        if watch is not None:
            return list(watch.limit_lines(p.id, indicator))
        from edgevib.daemon.trendwatch import limit_lines
        from edgevib.pipelines.severity import zone_boundaries_mm_s

        m = self.daemon.config.machine(p.machine)
        iso = None
        if indicator == "velocity_rms_mm_s" and m.group is not None and m.support is not None:
            with contextlib.suppress(PipelineError):
                iso = zone_boundaries_mm_s(m.group, m.support)
        return limit_lines(indicator_unit(indicator), alarm=(limits.get("alert"), limits.get("danger")), iso=iso)

    async def _history_trend(self, point: str, indicator: str, since: float, limit: int) -> dict[str, Any] | None:
        """The series from the daemon's severity history with the trend layer's projection, when it keeps one."""
        watch = self.daemon.trend_watch
        if watch is None:
            return None
        from edgevib.daemon.trendwatch import HISTORY_INDICATORS
        from edgevib.daemon.web.trend_source import history_trend

        if indicator not in HISTORY_INDICATORS:
            return None
        since_s = since if math.isfinite(since) else None
        return await asyncio.to_thread(
            history_trend, lambda: watch.history(point, indicator, since_s=since_s, max_points=min(limit, 2000)),
            watch.projection(point, indicator))

    @staticmethod
    def _limits_for(indicator: str, rows: Iterable[dict[str, Any]]) -> dict[str, Any]:
        # alarm limits name order and family indicators by fault (imbalance_1x_mm_s, bearing_bpfo_g…)
        aliases = {"order_velocity_rms_mm_s.1x": "imbalance_1x_mm_s", "order_velocity_rms_mm_s.2x":
                   "misalignment_2x_mm_s"}
        for fam in ("bpfo", "bpfi", "bsf", "ftf"):
            aliases[f"envelope_amplitude_g.{fam}"] = f"bearing_{fam}_g"
            aliases[f"envelope_snr_db.{fam}"] = f"bearing_{fam}_snr_db"
        name = aliases.get(indicator, indicator)
        for row in rows:
            if row.get("indicator") == name:
                return {"indicator": name, "alert": row.get("alert"), "danger": row.get("danger")}
        return {"indicator": name, "alert": None, "danger": None}

    async def _alarms(self, request: web.Request) -> web.Response:
        point = request.query.get("point")
        if point is not None and point not in {p.id for p in self.daemon.config.points}:
            return problem(404, f"unknown point {point[:128]!r}")
        rows, sensors, _ = self._alarm_snapshot(point)
        active = [row for row in rows if self._active(row)]
        return json_response({"api": API_VERSION, "time": rfc3339(self.clock_ns()),
                              "alarm_layer": self.daemon.alarm_view is not None, "alarms": active,
                              "sensor_faults": {k: v for k, v in sensors.items() if v.get("fault")}})

    async def _history(self, request: web.Request) -> web.Response:
        """Transitions with why, newest first, from the alarm layer's durable store (``AlarmView.history``)."""
        limit = _int_param(request, "limit", 1, HISTORY_MAX_LIMIT) or HISTORY_DEFAULT_LIMIT
        point = request.query.get("point")
        if point is not None and point not in {p.id for p in self.daemon.config.points}:
            return problem(404, f"unknown point {point[:128]!r}")
        since_text = request.query.get("since")
        try:
            since = None if since_text is None else parse_time_s(since_text, self.clock_ns() / 1e9)
        except ValueError as exc:
            return problem(400, str(exc))
        view = self.daemon.alarm_view
        if view is None:
            return json_response({"api": API_VERSION, "available": False, "events": [],
                                  "source": "no alarm history: no alarm layer ([alarms] enabled = false)"})
        try:
            rows = await asyncio.to_thread(view.history, point, since_s=since, limit=limit)
        except ValueError as exc:
            return problem(400, str(exc))
        return json_response({"api": API_VERSION, "available": True,
                              "source": "the alarm layer's durable history (newest first)",
                              "events": [transition_row(t) for t in rows]})

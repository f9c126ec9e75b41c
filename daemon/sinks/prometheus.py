"""Prometheus exposition of every point's latest indicators and the daemon's self-metrics, plus health probes.

Routes on the daemon's HTTP listener (:mod:`edgevib.daemon.web.listener`, which carries the TLS and
client-certificate options): ``/metrics`` (text or OpenMetrics by ``Accept``; encoded in a worker thread, never on
the event loop), ``/healthz`` (200 while the process serves) and ``/readyz`` (200 when every configured source is
connected, else 503 with the missing ones).  A custom collector yields fresh metric families from a snapshot on
each scrape, on an injected :class:`~prometheus_client.CollectorRegistry` (tests use a fresh one).

Indicators are in base units (m/s, m/s², Hz, s) with labels ``site``, ``machine``, ``point``, ``axis``; an
indicator that is unavailable for a frame (no speed known, no envelope band) is absent, never a made-up number.
"""

from __future__ import annotations

import asyncio
import contextlib
import math
import re
import threading
import time
from collections.abc import Callable, Iterable, Iterator, Mapping
from typing import Any

from aiohttp import web
from prometheus_client import CollectorRegistry
from prometheus_client.core import CounterMetricFamily, GaugeMetricFamily, HistogramMetricFamily, Metric
from prometheus_client.exposition import choose_encoder, generate_latest
from prometheus_client.registry import Collector

from edgevib.daemon import __version__
from edgevib.daemon.config import Config, PointConfig
from edgevib.daemon.frames import Stats
from edgevib.daemon.indicators import REGISTRY, Indicator, Si, Value, meaning
from edgevib.daemon.interfaces import FrameResult
from edgevib.daemon.logs import get_logger
from edgevib.daemon.web.listener import HttpListener
from edgevib.pipelines.machine_state import MACHINE_STATES

__all__ = ["PROMETHEUS", "IndicatorCollector", "PrometheusSink", "encode_text", "go_float"]

PROMETHEUS: list[tuple[Indicator, Si]] = [(i, i.si) for i in REGISTRY if i.prometheus is not None and i.si is not None]
"""The registry's indicators exposed as gauges (``edgevib_<prometheus>_<SI unit>``)."""
_LABELS = ["site", "machine", "point", "axis"]
# (family index, scalar reader or None, per-key values or None, SI factor) of each family in PROMETHEUS
_READERS = [(i, ind.read, ind.each, si.factor) for i, (ind, si) in enumerate(PROMETHEUS)]
YIELD_EVERY_POINTS = 8
YIELD_S = 0.0002
"""While writing the indicator families (tens of milliseconds at hundreds of points, in a worker thread), the
encoder sleeps :data:`YIELD_S` after every :data:`YIELD_EVERY_POINTS` points: the interpreter lock goes to the event
loop at once instead of at the next forced switch, which it would wait for again after each of its system calls."""
log = get_logger("edgevib.metrics")


def go_float(d: float) -> str:
    """A sample value as the text exposition writes it (prometheus_client's ``floatToGoString``: ``+Inf``, ``-Inf``,
    ``NaN``, else Python's shortest repr, with Go's exponent form for positive values of 1e6 and above)."""
    s = repr(d)
    if s[-1] > "9":  # "nan", "inf", "-inf": a finite value's repr ends in a digit
        return "NaN" if d != d else ("+Inf" if d > 0 else "-Inf")
    if d >= 1e6:
        dot = s.find(".")
        if dot > 6:
            mantissa = f"{s[0]}.{s[1:dot]}{s[dot + 1:]}".rstrip("0.")
            return f"{mantissa}e+{dot - 1:02d}"
    return s


def _escape(value: str) -> str:
    """A label value escaped for the text exposition (backslash, newline, double quote)."""
    return value.replace("\\", r"\\").replace("\n", r"\n").replace('"', r'\"')


def _sample_prefix(name: str, names: list[str], values: list[str]) -> str:
    """``name{label="value",…} `` with the labels sorted by name, as prometheus_client writes a sample."""
    pairs = sorted(zip(names, values, strict=False))
    return name + "{" + ",".join(f'{k}="{_escape(v)}"' for k, v in pairs) + "} "


class _Rendered(Metric):
    """Families already written in the text exposition format (``text``): what the collector yields to
    :func:`encode_text` instead of sample objects."""

    def __init__(self, text: str) -> None:
        super().__init__("edgevib_rendered", "", "untyped")
        self.text = text


class _One:
    """One metric family as a collector (to encode it alone with prometheus_client)."""

    def __init__(self, metric: Metric) -> None:
        self.metric = metric

    def collect(self) -> list[Metric]:
        return [self.metric]


_rendering = threading.local()  # set while encode_text collects on this thread
_LEGACY_NAME = re.compile(r"[a-zA-Z_:][a-zA-Z0-9_:]*")
_LEGACY_LABEL = re.compile(r"[a-zA-Z_][a-zA-Z0-9_]*")
_PREFIX_LIMIT = 200_000
# ``name{labels} `` of the samples seen, by (name, label items): labels repeat from scrape to scrape
_prefixes: dict[tuple[str, tuple[tuple[str, str], ...]], str] = {}


def _plain_family(m: Metric) -> str | None:
    """A gauge or counter family in the text format as prometheus_client writes it, or ``None`` for anything this
    short path does not cover (other types, unusual names, timestamps, exemplars, OpenMetrics-only samples)."""
    if m.type not in ("gauge", "counter") or not _LEGACY_NAME.fullmatch(m.name):
        return None
    mname = m.name + "_total" if m.type == "counter" else m.name
    sample_name = mname if m.type == "counter" else m.name
    doc = m.documentation.replace("\\", r"\\").replace("\n", r"\n")
    out = [f"# HELP {mname} {doc}\n# TYPE {mname} {m.type}\n"]
    if len(_prefixes) > _PREFIX_LIMIT:
        _prefixes.clear()
    for smp in m.samples:
        if (smp.name != sample_name or smp.timestamp is not None or smp.exemplar is not None
                or smp.native_histogram is not None):
            return None
        key = (smp.name, tuple(smp.labels.items()))
        p = _prefixes.get(key)
        if p is None:
            if not all(_LEGACY_LABEL.fullmatch(k) for k in smp.labels):
                return None
            p = _prefixes[key] = (_sample_prefix(smp.name, list(smp.labels), list(smp.labels.values()))
                                  if smp.labels else smp.name + " ")
        out.append(p + go_float(float(smp.value)) + "\n")
    return "".join(out)


def _family_text(m: Metric) -> bytes:
    if isinstance(m, _Rendered):
        return m.text.encode()
    text = _plain_family(m)
    return text.encode() if text is not None else generate_latest(_One(m))


def encode_text(registry: Collector) -> bytes:
    """The registry in the Prometheus text format 0.0.4, as ``prometheus_client.generate_latest`` writes it, with
    the per-point indicator families written by :class:`IndicatorCollector` itself (labels prepared once per point,
    one formatted value per sample) instead of one sample object each, plain gauges and counters with their label
    strings kept from scrape to scrape, and every other family by prometheus_client."""
    _rendering.on = True
    try:
        parts = [_family_text(m) for m in registry.collect()]
    finally:
        _rendering.on = False
    return b"".join(parts)


class IndicatorCollector:
    """Yields the indicator and self-metric families from the sink's snapshot (called on the HTTP thread)."""

    def __init__(self, site: str, stats: Stats, latest: Mapping[str, tuple[tuple[str, ...], FrameResult]],
                 version: str = __version__) -> None:
        self.site = site
        self.stats = stats
        self.latest = latest
        self.version = version
        self.point_sources: dict[str, tuple[str, str]] = {}  # point -> (machine, source), set by the sink
        self.machine_stale: Callable[[str], bool] | None = None  # the alarm layer's judgement, when there is one
        self._headers: list[str] | None = None  # HELP/TYPE lines of the indicator families and the frame time
        self._names: list[str] = []  # their metric names (with the unit)
        # label part of each sample per point labels, by (family index, key): kept across frames and scrapes
        self._prefixes: dict[tuple[str, ...], dict[tuple[int, str], str]] = {}
        self._lock = threading.Lock()  # two scrapes at once share the caches above

    def describe(self) -> list[Metric]:
        return []

    def collect(self) -> Iterator[Metric]:
        latest = list(self.latest.values())  # one C-level copy: safe against the event loop's updates
        if getattr(_rendering, "on", False):
            yield _Rendered(self._indicator_text(latest))
            yield self._machine_states(latest)
        else:
            yield from self._indicators(latest)
            yield self._machine_states(latest)
        yield from self._self_metrics()

    @staticmethod
    def _empty_families() -> tuple[list[tuple[Indicator, Si, GaugeMetricFamily]], GaugeMetricFamily]:
        families = [(ind, si, GaugeMetricFamily(f"edgevib_{ind.prometheus}", meaning(ind),
                                                labels=_LABELS + ([ind.per] if ind.per else []), unit=si.suffix))
                    for ind, si in PROMETHEUS]
        last = GaugeMetricFamily("edgevib_last_frame_timestamp_seconds", "End time of the latest analysed frame.",
                                 labels=_LABELS, unit="seconds")
        return families, last

    def _indicators(self, latest: list[tuple[tuple[str, ...], FrameResult]]) -> list[Metric]:
        """One gauge family per registry indicator published here (values in SI units; unavailable: absent), and
        the time of each point's latest frame."""
        families, last = self._empty_families()
        for labels, r in latest:
            lab = list(labels)
            for ind, si, fam in families:
                for key, v in ind.values(r).items():
                    if v is not None and math.isfinite(v):
                        fam.add_metric([*lab, key] if key else lab, v * si.factor)
            last.add_metric(lab, r.t_end_ns / 1e9)
        return [*(fam for _, _, fam in families), last]

    def _indicator_text(self, latest: list[tuple[tuple[str, ...], FrameResult]]) -> str:
        """The families of :meth:`_indicators` in the text format, byte for byte as prometheus_client writes them."""
        with self._lock:
            if self._headers is None:
                families, last = self._empty_families()
                metrics = [*(f for _, _, f in families), last]
                self._headers = [generate_latest(_One(m)).decode() for m in metrics]
                self._names = [m.name for m in metrics]
            chunks = [[h] for h in self._headers]
            if len(self._prefixes) > 2 * len(latest) + 16:  # points gone or relabelled: forget theirs
                keep = {labels for labels, _ in latest}
                self._prefixes = {k: v for k, v in self._prefixes.items() if k in keep}
            n_fam = len(PROMETHEUS)
            for n, (labels, r) in enumerate(latest, 1):
                if n % YIELD_EVERY_POINTS == 0:
                    time.sleep(YIELD_S)
                prefixes = self._prefixes.get(labels)
                if prefixes is None:
                    prefixes = self._prefixes[labels] = {}
                for i, read, each, factor in _READERS:
                    out = chunks[i]
                    if read is not None:
                        pairs: Iterable[tuple[str, Value]] = (("", read(r)),)
                    elif each is not None:
                        pairs = each(r).items()
                    else:
                        continue
                    for key, v in pairs:
                        if v is not None and math.isfinite(v):
                            p = prefixes.get((i, key))
                            if p is None:
                                ind = PROMETHEUS[i][0]
                                names = _LABELS + ([ind.per] if ind.per else [])
                                p = prefixes[(i, key)] = _sample_prefix(self._names[i], names,
                                                                        [*labels, key] if key else list(labels))
                            out.append(p + go_float(v * factor) + "\n")
                p = prefixes.get((n_fam, ""))
                if p is None:
                    p = prefixes[(n_fam, "")] = _sample_prefix(self._names[n_fam], _LABELS, list(labels))
                chunks[n_fam].append(p + go_float(r.t_end_ns / 1e9) + "\n")
        return "".join("".join(c) for c in chunks)

    def _machine_states(self, latest: list[tuple[tuple[str, ...], FrameResult]]) -> Metric:
        """The machine state of each machine (from its newest frame)."""
        machine_state = GaugeMetricFamily(
            "edgevib_machine_state", "Machine state after the machine's latest analysed frame: 1 for the present "
            "state (stopped, starting, running, coasting, unknown), 0 for the others.",
            labels=["site", "machine", "state"])
        newest: dict[str, tuple[int, str]] = {}  # machine -> (frame end, state) of its newest frame
        for _, r in latest:
            ms = r.machine_state
            if ms is not None and r.t_end_ns >= newest.get(r.machine_id, (-1, ""))[0]:
                newest[r.machine_id] = (r.t_end_ns, ms.state)
        for mid, (_, present) in sorted(newest.items()):
            if self._stale(mid):  # no fresh data from any of its points: its state now is not known
                present = "unknown"
            for name in MACHINE_STATES:
                machine_state.add_metric([self.site, mid, name], 1.0 if present == name else 0.0)
        return machine_state

    def _stale(self, machine: str) -> bool:
        """Whether every point of a machine is stale: as the alarm layer judges it (source down or sensor silent),
        else whether the sources of all its points are disconnected."""
        if self.machine_stale is not None:
            return self.machine_stale(machine)
        sources = [src for m, src in self.point_sources.values() if m == machine]
        return bool(sources) and not any(self.stats.connected.get(src, True) for src in sources)

    def _self_metrics(self) -> Iterable[Metric]:
        s = self.stats
        counters = [_counter(name, text, labels, getattr(s, counts)) for name, text, labels, counts in _COUNTERS]
        h = s.latency
        latency = HistogramMetricFamily("edgevib_analysis_latency_seconds",
                                        "Ingest-to-metric latency: last block of a frame received to its "
                                        "indicators published.", unit="seconds")
        latency.add_metric([], h.cumulative(), sum_value=h.sum_s)
        connected = GaugeMetricFamily("edgevib_source_connected", "1 while the source is connected.",
                                      labels=["source"])
        for src, c in dict(s.connected).items():
            connected.add_metric([src], 1.0 if c else 0.0)
        reconnects = _counter("edgevib_source_reconnects", "Reconnections after a lost connection.", ["source"],
                              s.reconnects)
        info = GaugeMetricFamily("edgevib_build_info", "edgevib build information.", labels=["version"])
        info.add_metric([self.version], 1.0)
        return [*counters, latency, connected, reconnects, info]


# the self-metric counters of labelled counts: (family name, help text, label names, Stats attribute)
_COUNTERS = (
    ("edgevib_blocks_received", "Block payloads received per source (before validation; rejects are counted by "
     "reason as well).", ["source"], "blocks_received"),
    ("edgevib_blocks_rejected", "Blocks rejected per source and reason.", ["source", "reason"], "blocks_rejected"),
    ("edgevib_blocks_ignored", "Valid blocks ignored per source and reason (other_shard: the point belongs to "
     "another instance of a shard set).", ["source", "reason"], "blocks_ignored"),
    ("edgevib_frames_analysed", "Frames analysed per point.", ["point"], "frames_analysed"),
    ("edgevib_frames_dropped", "Frames dropped (oldest first) when analysis was behind, per point.", ["point"],
     "frames_dropped"),
    ("edgevib_stream_gaps", "Stream discontinuities (sequence gaps, time jumps, device restarts) that restarted "
     "frame assembly, per point.", ["point"], "gaps"),
    ("edgevib_analysis_errors", "Frames whose analysis failed, per point.", ["point"], "analysis_errors"),
    ("edgevib_sink_results_dropped", "Frame results a lossy sink skipped (oldest first) because it fell behind, "
     "per sink and point.", ["sink", "point"], "sink_dropped"),
)


def _counter(name: str, text: str, labels: list[str], counts: Mapping[Any, int]) -> CounterMetricFamily:
    """A counter family with one sample per key of ``counts`` (a label value, or a tuple of them)."""
    family = CounterMetricFamily(name, text, labels=labels)
    for key, n in dict(counts).items():
        family.add_metric(list(key) if isinstance(key, tuple) else [str(key)], n)
    return family


class PrometheusSink:
    """The :class:`~edgevib.daemon.interfaces.FrameSink` behind ``/metrics`` (keeps the latest frame per point).

    ``http`` is the daemon's listener (the sink adds its routes to it; whoever owns it starts it); without one the
    sink makes, starts and stops its own on ``host:port`` with the TLS options given.
    """

    def __init__(self, *, site: str, points: Iterable[PointConfig], stats: Stats,
                 registry: CollectorRegistry | None = None, http: HttpListener | None = None,
                 host: str = "127.0.0.1", port: int = 9851,
                 ready: Callable[[], tuple[bool, str]] | None = None, tls_cert_file: str | None = None,
                 tls_key_file: str | None = None, tls_client_ca_file: str | None = None,
                 clock_ns: Callable[[], int] = time.time_ns, serve: bool = True) -> None:
        self.site = site
        self.stats = stats
        self.registry = registry if registry is not None else CollectorRegistry()
        self.clock_ns = clock_ns
        self.latest: dict[str, tuple[tuple[str, ...], FrameResult]] = {}
        self._axes: dict[str, str] = {}
        self._labels: dict[str, tuple[str, ...]] = {}  # point -> its labels (site, machine, point, axis), reused
        self.collector = IndicatorCollector(site, stats, self.latest)
        self.set_points(points)
        self._ready = ready or (lambda: (True, "no sources"))
        self._own_listener = http is None
        self.server = http if http is not None else HttpListener(
            host, port, tls_cert_file=tls_cert_file, tls_key_file=tls_key_file,
            tls_client_ca_file=tls_client_ca_file, serve=serve)
        self.server.get("/metrics", self._metrics)
        self.server.get("/healthz", self._healthz)
        self.server.get("/readyz", self._readyz)

    async def reconfigure(self, config: Config) -> None:
        """After a reload: the site label and the configured points (the listener stays)."""
        self.site = self.collector.site = config.site.name
        self.set_points(config.points)  # (forgets the labels made with the old site)

    def set_points(self, points: Iterable[PointConfig]) -> None:
        """(Re)declare the configured points; removed points vanish from the exposition."""
        points = list(points)
        self._axes = {p.id: p.axis for p in points}
        self._labels = {}
        self.collector.point_sources = {p.id: (p.machine, p.source) for p in points}
        for pid in [pid for pid in self.latest if pid not in self._axes]:
            self.latest.pop(pid, None)

    @property
    def url(self) -> str | None:
        """The ``/metrics`` URL while the listener serves, else ``None``."""
        return self.server.base_url + "/metrics" if self.server.running else None

    async def _metrics(self, request: web.Request) -> web.Response:
        encoder, ctype = choose_encoder(request.headers.get("Accept", ""))
        if encoder is generate_latest:
            encoder = encode_text  # the same text, written faster
        body = await asyncio.to_thread(encoder, self.registry)  # collectors take locks and copy: off the loop
        return web.Response(body=body, headers={"Content-Type": ctype})

    async def _healthz(self, _request: web.Request) -> web.Response:
        return web.Response(text="ok\n")

    async def _readyz(self, _request: web.Request) -> web.Response:
        ok, detail = self._ready()
        return web.Response(status=200 if ok else 503, text=("ready" if ok else "not ready") + f": {detail}\n")

    async def start(self) -> None:
        self.registry.register(self.collector)
        if self._own_listener:
            try:
                await self.server.start()
            except BaseException:
                self.registry.unregister(self.collector)
                raise

    async def on_frames(self, results: list[FrameResult]) -> None:
        now = self.clock_ns()
        axes, known, latest, observe = self._axes, self._labels, self.latest, self.stats.latency.observe
        for r in results:
            pid = r.point_id
            labels = known.get(pid)
            if labels is None or labels[1] != r.machine_id:
                axis = axes.get(pid)
                if axis is None:
                    continue
                labels = known[pid] = (self.site, r.machine_id, pid, axis)
            latest[pid] = (labels, r)
            observe((now - r.received_ns) / 1e9)

    async def stop(self) -> None:
        if self._own_listener:
            await self.server.stop()
        with contextlib.suppress(KeyError):
            self.registry.unregister(self.collector)

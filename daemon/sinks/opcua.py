"""OPC UA server namespace with every point's latest indicators, for SCADA historians (asyncua server).

The server listens on ``listen`` (``"HOST:PORT"``, loopback by default) at ``opc.tcp://HOST:PORT/edgevib/``,
security policy ``None`` and anonymous, read-only access (bind it beyond loopback only on a trusted network).
Its namespace ``urn:edgevib:indicators`` (index ``<idx>``, usually 2 — resolve it from the URI) holds::

    Objects/
      <site>/                                  folder   ns=<idx>;s=<site>
        <machine>/                             folder   ns=<idx>;s=<site>/<machine>
          <point>                              object   ns=<idx>;s=<site>/<machine>/<point>
            <indicator>                        Double   ns=<idx>;s=<site>/<machine>/<point>/<indicator>

for example ``ns=2;s=quarry-lane/P-101/P-101-DE-H/velocity_rms_mm_s``.  These node ids are stable: they depend only
on the site, machine and point ids of the configuration and on the indicator names below.

Indicators (unit in the name, also in each variable's Description and ``EngineeringUnits`` property):

=================================  ====================================================================
``velocity_rms_mm_s``              velocity r.m.s. in the point's ISO 20816 band, mm/s
``velocity_peak_mm_s``             velocity peak in that band, mm/s
``velocity_rms_trend_mm_s``        exponentially weighted trend of velocity r.m.s., mm/s
``acceleration_rms_g``             acceleration r.m.s., g
``acceleration_peak_g``            acceleration peak (absolute), g
``acceleration_peak_to_peak_g``    acceleration peak to peak, g
``crest_factor``                   peak / r.m.s. of acceleration (ratio)
``kurtosis``                       Pearson kurtosis of acceleration (3 for Gaussian noise)
``skewness``                       skewness of acceleration
``displacement_pp_um``             displacement peak to peak, µm
``shaft_hz``                       shaft speed used for the frame (given or estimated), Hz
``iso_zone``                       ISO 20816-3 zone of velocity r.m.s. as a number, 1..4 = A..D
``order_<k>x_velocity_rms_mm_s``   velocity r.m.s. at shaft order k (``order_1x_…``, ``order_0.5x_…``)
``envelope_<f>_amplitude_g``       envelope-spectrum amplitude of bearing family f (ftf, bpfo, bpfi, bsf), g
``envelope_<f>_snr_db``            level of family f over the envelope floor, dB
=================================  ====================================================================

Every update carries the frame's end time as ``SourceTimestamp``.  An indicator that is unavailable for a frame
(no speed known, no envelope band, no ISO group, a non-finite result) gets status ``BadNoData`` (OPC UA then
carries no value, Part 4 §7.7.1); before the first frame every variable reads ``BadWaitingForInitialData``.
Order variables beyond the standard 0.5×/1×/2×/3× are added when a point first reports them.  After a
configuration reload (:meth:`OpcUaIndicatorSink.reconfigure`) removed points' objects are deleted and new points
appear; a frame of a point not yet in the namespace adds it.
"""

from __future__ import annotations

import asyncio
import contextlib
import datetime
import math
from collections.abc import Iterable, Mapping
from typing import Any

import structlog
from asyncua import ua
from asyncua.common.node import Node
from asyncua.server.server import Server
from asyncua.ua.status_codes import StatusCodes

from edgevib.daemon.interfaces import ConfigError, FrameResult

__all__ = ["FAMILIES", "INDICATORS", "NAMESPACE_URI", "OpcUaIndicatorSink", "node_id_string"]

NAMESPACE_URI = "urn:edgevib:indicators"
FAMILIES = ("ftf", "bpfo", "bpfi", "bsf")
DEFAULT_ORDERS = ("0.5x", "1x", "2x", "3x")
_ZONE_NUMBER = {"A": 1.0, "B": 2.0, "C": 3.0, "D": 4.0}

INDICATORS: dict[str, tuple[str, str]] = {
    "velocity_rms_mm_s": ("mm/s", "Velocity r.m.s. in the ISO 20816 band"),
    "velocity_peak_mm_s": ("mm/s", "Velocity peak in the ISO 20816 band"),
    "velocity_rms_trend_mm_s": ("mm/s", "Exponentially weighted trend of velocity r.m.s."),
    "acceleration_rms_g": ("g", "Acceleration r.m.s."),
    "acceleration_peak_g": ("g", "Acceleration peak (absolute)"),
    "acceleration_peak_to_peak_g": ("g", "Acceleration peak to peak"),
    "crest_factor": ("1", "Acceleration crest factor (peak / r.m.s.)"),
    "kurtosis": ("1", "Acceleration kurtosis (Pearson; 3 for Gaussian noise)"),
    "skewness": ("1", "Acceleration skewness"),
    "displacement_pp_um": ("µm", "Displacement peak to peak"),
    "shaft_hz": ("Hz", "Shaft speed used for the frame (given or estimated)"),
    "iso_zone": ("1", "ISO 20816-3 zone of velocity r.m.s. (1..4 = A..D)"),
}
"""Fixed indicator variables of every point: name → (unit, description)."""

log = structlog.get_logger("edgevib.daemon.sinks.opcua")


def node_id_string(idx: int, site: str, machine: str, point: str, indicator: str | None = None) -> str:
    """The stable node id of a point object (``indicator=None``) or of one of its indicator variables."""
    path = f"{site}/{machine}/{point}" + (f"/{indicator}" if indicator else "")
    return f"ns={idx};s={path}"


def _order_variable(key: str) -> tuple[str, tuple[str, str]]:
    return f"order_{key}_velocity_rms_mm_s", ("mm/s", f"Velocity r.m.s. at shaft order {key}")


def _family_variables(family: str) -> list[tuple[str, tuple[str, str]]]:
    what = "2 × BSF" if family == "bsf" else family.upper()
    return [(f"envelope_{family}_amplitude_g", ("g", f"Envelope-spectrum amplitude of the {what} family")),
            (f"envelope_{family}_snr_db", ("dB", f"Level of the {what} family over the envelope floor"))]


def _parse_listen(listen: str) -> tuple[str, int]:
    host, sep, port_s = listen.rpartition(":")
    host = host.strip("[]")
    try:
        port = int(port_s)
    except ValueError:
        port = -1
    if not sep or not host or not 0 < port < 65536:
        raise ConfigError("publish.opcua.listen", f"{listen!r} is not HOST:PORT with a port in 1..65535")
    return host, port


def _points_of(points: Iterable[tuple[str, str]] | Mapping[str, Any]) -> list[tuple[str, str, tuple[str, ...]]]:
    """``(point_id, machine_id, order keys)`` from ``[(point, machine), …]`` or ``{point_id: PointConfig}``."""
    out: list[tuple[str, str, tuple[str, ...]]] = []
    if isinstance(points, Mapping):
        for pid, cfg in points.items():
            orders = tuple(f"{float(o):g}x" for o in getattr(cfg, "orders", ())) or DEFAULT_ORDERS
            out.append((str(pid), str(cfg.machine), orders))
    else:
        out = [(str(pid), str(mid), DEFAULT_ORDERS) for pid, mid in points]
    return out


def indicator_values(result: FrameResult) -> dict[str, float | None]:
    """The variable values of one frame (``None``: unavailable)."""
    ind = result.indicators
    trend = result.extra.get("trend", {}) if isinstance(result.extra, dict) else {}
    values: dict[str, float | None] = {
        "velocity_rms_mm_s": ind.velocity_rms_mm_s,
        "velocity_peak_mm_s": ind.velocity_peak_mm_s,
        "velocity_rms_trend_mm_s": trend.get("velocity_rms_mm_s") if isinstance(trend, dict) else None,
        "acceleration_rms_g": ind.acceleration_rms_g,
        "acceleration_peak_g": ind.acceleration_peak_g,
        "acceleration_peak_to_peak_g": ind.acceleration_peak_to_peak_g,
        "crest_factor": ind.crest_factor,
        "kurtosis": ind.kurtosis,
        "skewness": ind.skewness,
        "displacement_pp_um": ind.displacement_pp_um,
        "shaft_hz": ind.shaft_hz,
        "iso_zone": _ZONE_NUMBER.get(result.iso_zone) if result.iso_zone else None,
    }
    for key, value in ind.orders_mm_s.items():
        values[_order_variable(key)[0]] = value
    for family, fam in ind.envelope.items():
        values[f"envelope_{family}_amplitude_g"] = fam.amplitude_g
        values[f"envelope_{family}_snr_db"] = fam.snr_db
    return values


class OpcUaIndicatorSink:
    """A :class:`~edgevib.daemon.interfaces.FrameSink` serving the latest indicators in an OPC UA namespace.

    ``points`` lists ``(point_id, machine_id)`` pairs (a mapping ``point_id → PointConfig`` is accepted too, and
    then each point's configured orders get their variables up front).  ``listen`` is ``"HOST:PORT"``; ``host``
    and ``port``, when given, override its parts.
    """

    def __init__(self, *, listen: str = "127.0.0.1:4841", site: str,
                 points: Iterable[tuple[str, str]] | Mapping[str, Any], namespace: str = NAMESPACE_URI,
                 host: str | None = None, port: int | None = None) -> None:
        self.host, self.port = _parse_listen(listen)
        if host is not None:  # an already parsed listen address (host and port) takes precedence
            self.host = host
        if port is not None:
            if not 0 < port < 65536:
                raise ConfigError("publish.opcua.listen", f"port {port} is outside 1..65535")
            self.port = port
        if not site or "/" in site:
            raise ConfigError("site.name", f"{site!r} cannot name an OPC UA folder (empty or contains '/')")
        self.site = site
        self.namespace = namespace
        self._points = _points_of(points)
        for pid, mid, _ in self._points:
            if "/" in pid or "/" in mid or not pid or not mid:
                raise ConfigError("points", f"point {pid!r} of machine {mid!r}: ids for OPC UA node ids must be "
                                  f"non-empty and contain no '/'")
        host = f"[{self.host}]" if ":" in self.host else self.host
        self.endpoint = f"opc.tcp://{host}:{self.port}/edgevib/"
        self.idx = -1
        self._server: Server | None = None
        self._machines: dict[str, Node] = {}
        self._objects: dict[str, Node] = {}  # point id → point object
        self._machine_of: dict[str, str] = {}
        self._vars: dict[str, dict[str, ua.NodeId]] = {}  # point id → indicator name → variable node id
        self._site_folder: Node | None = None
        self._log = log.bind(endpoint=self.endpoint)

    # ------------------------------------------------------------------------------------------ lifecycle

    async def start(self) -> None:
        """Build the address space and listen (loading asyncua's standard nodes takes a second or two)."""
        server = Server()
        await server.init()
        server.set_endpoint(self.endpoint)
        server.set_server_name("edgevib indicators")
        await server.set_application_uri(f"{self.namespace}:server")
        server.set_security_policy([ua.SecurityPolicyType.NoSecurity])
        self.idx = await server.register_namespace(self.namespace)
        self._site_folder = await server.nodes.objects.add_folder(self._nid(self.site), self._qn(self.site))
        self._server = server
        for pid, mid, orders in self._points:
            await self._add_point(pid, mid, orders)
        try:
            await server.start()
        except OSError as exc:
            self._server = None
            raise ConfigError("publish.opcua.listen", f"cannot listen on {self.host}:{self.port}: {exc}") from exc
        self._log.info("opcua_indicator_server_started", namespace=self.namespace, namespace_index=self.idx,
                       points=len(self._points), example_node=node_id_string(
                           self.idx, self.site, self._points[0][1], self._points[0][0], "velocity_rms_mm_s")
                       if self._points else None)

    async def stop(self) -> None:
        server, self._server = self._server, None
        if server is not None:
            with contextlib.suppress(Exception):
                await server.stop()

    async def reconfigure(self, config: Any) -> None:
        """After a configuration reload: remove the objects of points no longer configured (or moved to another
        machine) and add the new points; untouched points keep their variables and values."""
        if self._server is None:
            return
        wanted = {pid: (mid, orders) for pid, mid, orders in _points_of({p.id: p for p in config.points})
                  if "/" not in pid and "/" not in mid}
        for pid in [pid for pid in self._vars if pid not in wanted or wanted[pid][0] != self._machine_of[pid]]:
            with contextlib.suppress(Exception):
                await self._server.delete_nodes([self._objects[pid]], recursive=True)
            for table in (self._vars, self._objects, self._machine_of):
                table.pop(pid, None)
            self._log.info("opcua_point_removed", point=pid)
        for pid, (mid, orders) in wanted.items():
            if pid not in self._vars:
                await self._add_point(pid, mid, orders)
                self._log.info("opcua_point_added", point=pid, machine=mid)

    async def on_frames(self, results: list[FrameResult]) -> None:
        """Write every result's indicators (one point at a time, yielding to the event loop in between)."""
        if self._server is None:
            return
        now = datetime.datetime.now(datetime.UTC)
        for result in results:
            try:
                await self._write(result, now)
            except Exception as exc:  # one bad result must not stop the others or the daemon
                self._log.error("opcua_indicator_write_failed", point=result.point_id, error=repr(exc))
            await asyncio.sleep(0)

    # ------------------------------------------------------------------------------------------ internals

    def _nid(self, path: str) -> ua.NodeId:
        return ua.NodeId(path, self.idx)

    def _qn(self, name: str) -> ua.QualifiedName:
        return ua.QualifiedName(name, self.idx)

    async def _add_point(self, pid: str, mid: str, orders: Iterable[str]) -> None:
        assert self._server is not None and self._site_folder is not None
        machine = self._machines.get(mid)
        if machine is None:
            machine = await self._site_folder.add_folder(self._nid(f"{self.site}/{mid}"), self._qn(mid))
            self._machines[mid] = machine
        obj = await machine.add_object(self._nid(f"{self.site}/{mid}/{pid}"), self._qn(pid))
        self._objects[pid] = obj
        self._machine_of[pid] = mid
        self._vars[pid] = {}
        spec = list(INDICATORS.items()) + [_order_variable(k) for k in orders]
        for family in FAMILIES:
            spec += _family_variables(family)
        for name, (unit, text) in spec:
            await self._add_variable(pid, mid, name, unit, text)

    async def _add_variable(self, pid: str, mid: str, name: str, unit: str, text: str) -> ua.NodeId:
        obj = self._objects[pid]
        nodeid = self._nid(f"{self.site}/{mid}/{pid}/{name}")
        var = await obj.add_variable(nodeid, self._qn(name), ua.Variant(math.nan, ua.VariantType.Double),
                                     datatype=ua.NodeId(ua.ObjectIds.Double))
        await var.write_attribute(ua.AttributeIds.Description,
                                  ua.DataValue(ua.Variant(ua.LocalizedText(f"{text}, {unit}" if unit != "1"
                                                                           else f"{text} (dimensionless)"))))
        # EUInformation (OPC UA Part 8 §5.6.3); UnitId -1 = no UNECE code given (from memory of Part 8)
        eu = ua.EUInformation(NamespaceUri="http://www.opcfoundation.org/UA/units/un/cefact", UnitId=-1,
                              DisplayName=ua.LocalizedText(unit), Description=ua.LocalizedText(text))
        await var.add_property(self._nid(f"{self.site}/{mid}/{pid}/{name}/EngineeringUnits"),
                               ua.QualifiedName("EngineeringUnits", 0),  # the standard property's browse name
                               ua.Variant(eu, ua.VariantType.ExtensionObject))
        await self._server_write(nodeid, None, StatusCodes.BadWaitingForInitialData, None)
        self._vars[pid][name] = nodeid
        return nodeid

    async def _server_write(self, nodeid: ua.NodeId, value: float | None, status: int,
                            source_ts: datetime.datetime | None, server_ts: datetime.datetime | None = None) -> None:
        assert self._server is not None
        variant = ua.Variant(value, ua.VariantType.Double) if value is not None else ua.Variant(None)
        dv = ua.DataValue(variant, StatusCode=ua.StatusCode(status), SourceTimestamp=source_ts,
                          ServerTimestamp=server_ts or datetime.datetime.now(datetime.UTC))
        await self._server.write_attribute_value(nodeid, dv)

    async def _write(self, result: FrameResult, now: datetime.datetime) -> None:
        pid = result.point_id
        if pid not in self._vars:  # a point added while running (e.g. by a configuration reload)
            if "/" in pid or "/" in result.machine_id:
                return
            await self._add_point(pid, result.machine_id, DEFAULT_ORDERS)
            self._log.info("opcua_point_added", point=pid, machine=result.machine_id)
        variables = self._vars[pid]
        mid = self._machine_of[pid]
        source_ts = datetime.datetime.fromtimestamp(result.t_end_ns / 1e9, datetime.UTC)
        values = indicator_values(result)
        for name in values:
            if name not in variables:
                if not name.startswith("order_"):
                    continue
                await self._add_variable(pid, mid, name, "mm/s", f"Velocity r.m.s. at shaft order "
                                         f"{name.removeprefix('order_').removesuffix('_velocity_rms_mm_s')}")
        for name, nodeid in variables.items():
            value = values.get(name)
            if value is None or not math.isfinite(value):
                await self._server_write(nodeid, None, StatusCodes.BadNoData, source_ts, now)
            else:
                await self._server_write(nodeid, float(value), StatusCodes.Good, source_ts, now)


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
on the site, machine and point ids of the configuration and on the indicator names.

The variables are the indicators of :data:`edgevib.daemon.indicators.REGISTRY` published here (``opcua`` name;
README "OPC UA indicator namespace" lists them): unit in the name, also in each variable's Description and
``EngineeringUnits`` property; one variable per configured order and per bearing family.

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

from edgevib.daemon.config import Config
from edgevib.daemon.indicators import FAMILIES, REGISTRY, Indicator
from edgevib.daemon.interfaces import ConfigError, FrameResult

__all__ = ["FAMILIES", "INDICATORS", "NAMESPACE_URI", "OpcUaIndicatorSink", "node_id_string"]

NAMESPACE_URI = "urn:edgevib:indicators"
DEFAULT_ORDERS = ("0.5x", "1x", "2x", "3x")
OPCUA: list[tuple[Indicator, str]] = [(i, i.opcua) for i in REGISTRY if i.opcua is not None]
"""The registry's indicators served here, with their variable names (``{key}``: order or family)."""
INDICATORS: dict[str, tuple[str, str]] = {name: (i.unit, i.text()) for i, name in OPCUA if i.per is None}
"""Fixed indicator variables of every point: name → (unit, description)."""

log = structlog.get_logger("edgevib.daemon.sinks.opcua")


def node_id_string(idx: int, site: str, machine: str, point: str, indicator: str | None = None) -> str:
    """The stable node id of a point object (``indicator=None``) or of one of its indicator variables."""
    path = f"{site}/{machine}/{point}" + (f"/{indicator}" if indicator else "")
    return f"ns={idx};s={path}"


def _variables(orders: Iterable[str]) -> list[tuple[str, str, str]]:
    """(name, unit, description) of a point's variables: every indicator, each order, each bearing family."""
    out = []
    for i, name in OPCUA:
        keys = tuple(orders) if i.per == "order" else FAMILIES if i.per == "family" else ("",)
        out += [(name.format(key=k), i.unit, i.text(k)) for k in keys]
    return out


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
            orders = tuple(f"{float(o):g}x" for o in cfg.orders) or DEFAULT_ORDERS
            out.append((str(pid), str(cfg.machine), orders))
    else:
        out = [(str(pid), str(mid), DEFAULT_ORDERS) for pid, mid in points]
    return out


def indicator_values(result: FrameResult) -> dict[str, tuple[float | None, str, str]]:
    """The variable values of one frame (``None``: unavailable), each with its unit and description."""
    return {name.format(key=k): (v, i.unit, i.text(k)) for i, name in OPCUA for k, v in i.values(result).items()}


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

    async def reconfigure(self, config: Config) -> None:
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
        for name, unit, text in _variables(orders):
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
        for name, (_, unit, text) in values.items():
            if name not in variables:  # an order beyond the configured ones, first reported now
                await self._add_variable(pid, mid, name, unit, text)
        for name, nodeid in variables.items():
            value = values[name][0] if name in values else None
            if value is None or not math.isfinite(value):
                await self._server_write(nodeid, None, StatusCodes.BadNoData, source_ts, now)
            else:
                await self._server_write(nodeid, float(value), StatusCodes.Good, source_ts, now)


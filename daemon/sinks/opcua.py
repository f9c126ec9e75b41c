"""OPC UA server namespace with every point's latest indicators, for SCADA historians (asyncua server).

The server listens on ``listen`` (``"HOST:PORT"``, loopback by default) at ``opc.tcp://HOST:PORT/edgevib/``,
read-only, anonymous.  It offers security policy ``None`` and ``Basic256Sha256`` (``Sign`` and
``SignAndEncrypt``) with its application certificate (``cert_file``/``key_file``, or one it makes itself in the
state directory); no user-name token is offered at all, so no password can travel over an unencrypted channel.
Its namespace ``urn:edgevib:indicators`` (index ``<idx>``, usually 2 — resolve it from the URI) holds::

    Objects/
      <site>/                                  folder   ns=<idx>;s=<site>
        <machine>/                             folder   ns=<idx>;s=<site>/<machine>
          <point>                              object   ns=<idx>;s=<site>/<machine>/<point>
            <indicator>                        AnalogItemType, Double
                                                        ns=<idx>;s=<site>/<machine>/<point>/<indicator>
            iso_zone                           MultiStateDiscreteType, UInt32 (EnumStrings A, B, C, D)
            envelope_<family>_detected         TwoStateDiscreteType, Boolean (TrueState "detected")

for example ``ns=2;s=quarry-lane/P-101/P-101-DE-H/velocity_rms_mm_s``.  These node ids are stable: they depend only
on the site, machine and point ids of the configuration and on the indicator names.

The variables are the indicators of :data:`edgevib.daemon.indicators.REGISTRY` published here (``opcua`` name;
README "OPC UA indicator namespace" lists them): unit in the name, also in each variable's Description and
``EngineeringUnits`` property; one variable per configured order and per bearing family.
EUInformation with the UNECE Recommendation 20 common code as ``UnitId`` (OPC 10000-8 §5.6.3), e.g. Hz = "HTZ" =
4740186; ``EURange`` is the range of values expected in operation, for scaling displays.  The ISO zone is a
MultiStateDiscreteType variable (UInt32 index into EnumStrings A, B, C, D), not a number to be averaged; a verdict
(an envelope family detected or not) a TwoStateDiscreteType Boolean (OPC 10000-8 §5.3.3.2: TrueState "detected",
FalseState "not detected").

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
import re
from collections.abc import Callable, Iterable, Mapping
from typing import Any

import structlog
from asyncua import ua
from asyncua.common.node import Node
from asyncua.server.server import Server
from asyncua.ua.status_codes import StatusCodes

from edgevib.daemon.config import Config, parse_listen
from edgevib.daemon.indicators import FAMILIES, REGISTRY, UNIT_RANGE, Indicator
from edgevib.daemon.interfaces import ConfigError, FrameResult

__all__ = ["FAMILIES", "INDICATORS", "NAMESPACE_URI", "VERDICTS", "OpcUaIndicatorSink", "node_id_string"]

NAMESPACE_URI = "urn:edgevib:indicators"
DEFAULT_ORDERS = ("0.5x", "1x", "2x", "3x")
OPCUA: list[tuple[Indicator, str]] = [(i, i.opcua) for i in REGISTRY if i.opcua is not None]
"""The registry's indicators served here, with their variable names (``{key}``: order or family)."""
INDICATORS: dict[str, tuple[str, str]] = {name: (i.unit, i.text()) for i, name in OPCUA if i.per is None}
"""Fixed indicator variables of every point: name → (unit, description)."""
VERDICTS: frozenset[str] = frozenset(name.format(key=k) for i, name in OPCUA if i.boolean
                                     for k in (FAMILIES if i.per == "family" else ("",)))
"""The Boolean (TwoStateDiscreteType) variables: the registry's verdicts."""
TWO_STATES = ("detected", "not detected")  # TrueState, FalseState
ZONES = ("A", "B", "C", "D")
ALARM_STATES = ("normal", "alert", "danger", "sensor-fault")
_ENUMS: dict[str, tuple[tuple[str, ...], str]] = {  # MultiStateDiscrete variables: name -> (EnumStrings, text)
    "iso_zone": (ZONES, "ISO 20816-3 zone of velocity r.m.s. (EnumStrings index: 0..3 = A..D)"),
    "alarm_state": (ALARM_STATES, "Worst alarm state of the point in edgevib's alarm layer (EnumStrings index: "
                    "0 normal, 1 alert, 2 danger, 3 sensor fault; suppressed alarms count as normal)"),
}
UNECE_NAMESPACE = "http://www.opcfoundation.org/UA/units/un/cefact"
UNECE: dict[str, tuple[str, str]] = {  # our unit -> (UNECE Rec. 20 common code, its name)
    "mm/s": ("C16", "millimetre per second"),
    "g": ("K40", "standard acceleration of free fall"),
    "µm": ("4H", "micrometre (micron)"),
    "Hz": ("HTZ", "hertz"),
    "dB": ("2N", "decibel"),
    "1": ("C62", "one"),
}
_EU_RANGE_NAMED: list[tuple[re.Pattern[str], tuple[float, float] | None]] = [
    (re.compile(re.escape(name).replace(re.escape("{key}"), ".+") + r"\Z"), i.display_range()) for i, name in OPCUA]
"""The display range (EURange) of each variable name: its registry entry's (``Indicator.display_range``)."""


def _eu_range(name: str, unit: str) -> tuple[float, float]:
    """The EURange of an analog variable (a registry entry's range, else its unit's)."""
    return next((r for pattern, r in _EU_RANGE_NAMED if r is not None and pattern.match(name)),
                UNIT_RANGE.get(unit, (0.0, 100.0)))


def unit_id(common_code: str) -> int:
    """EUInformation.UnitId of a UNECE common code: its (up to 4) ASCII bytes as a big-endian integer
    (OPC 10000-8 §5.6.3), e.g. ``"HTZ"`` → 4740186."""
    value = 0
    for ch in common_code[:4]:
        value = value * 256 + ord(ch)
    return value


log = structlog.get_logger("edgevib.daemon.sinks.opcua")
_ua: Any = ua  # asyncua 2.x annotates ids and builtins with its own NewTypes: build them through one untyped handle


def _std(object_id: str) -> ua.NodeId:
    """A namespace-0 node id by its standard name (``"AnalogItemType"``: i=2368)."""
    node_id: ua.NodeId = _ua.NodeId(getattr(_ua.ObjectIds, object_id))
    return node_id


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
                 host: str | None = None, port: int | None = None, cert_file: str | None = None,
                 key_file: str | None = None, state_dir: str | None = None) -> None:
        # listen, site and ids come checked from the configuration ([publish.opcua] listen: a fixed port; ids: no
        # '/', which separates the parts of a node id)
        self.host, self.port = parse_listen(listen, "publish.opcua.listen")
        if host is not None:  # an already parsed listen address (host and port) takes precedence
            self.host = host
        if port is not None:
            self.port = port
        self.site = site
        self.namespace = namespace
        self.cert_file, self.key_file, self.state_dir = cert_file, key_file, state_dir
        self.severity_of: Callable[[str], int] | None = None  # the alarm layer's point severity, when it runs
        self._points = _points_of(points)
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
        policies = [ua.SecurityPolicyType.NoSecurity]
        cert = await self._certificate()
        if cert is not None:
            await server.load_certificate(cert[0])
            await server.load_private_key(cert[1])
            policies += [ua.SecurityPolicyType.Basic256Sha256_SignAndEncrypt, ua.SecurityPolicyType.Basic256Sha256_Sign]
        server.set_security_policy(policies)
        # anonymous, read-only access only: no user-name token (a password over policy None would travel in clear)
        server.set_identity_tokens([ua.AnonymousIdentityToken])
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

    async def _certificate(self) -> tuple[str, str] | None:
        """The server's application certificate and key: configured, or made once in the state directory (a
        self-signed certificate for ``urn:edgevib:indicators:server``; clients must trust it)."""
        if self.cert_file and self.key_file:
            return self.cert_file, self.key_file
        if not self.state_dir:
            return None
        from pathlib import Path

        from asyncua.crypto.cert_gen import setup_self_signed_certificate
        from cryptography.x509.oid import ExtendedKeyUsageOID

        directory = Path(self.state_dir)
        cert, key = directory / "opcua-server-cert.der", directory / "opcua-server-key.pem"
        try:
            directory.mkdir(parents=True, exist_ok=True)
            await setup_self_signed_certificate(key, cert, f"{self.namespace}:server", self.host,
                                                [ExtendedKeyUsageOID.SERVER_AUTH, ExtendedKeyUsageOID.CLIENT_AUTH],
                                                {"commonName": "edgevib indicators", "organizationName": "edgevib"})
        except (OSError, ValueError) as exc:
            self._log.warning("opcua_server_certificate_unavailable", error=str(exc),
                              detail="only security policy None is offered")
            return None
        return str(cert), str(key)

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
        wanted = {pid: (mid, orders) for pid, mid, orders in _points_of({p.id: p for p in config.points})}
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
        node_id: ua.NodeId = _ua.NodeId(path, self.idx)
        return node_id

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
        if self.severity_of is not None:
            await self._add_variable(pid, mid, "alarm_state", "1", _ENUMS["alarm_state"][1])

    async def _add_variable(self, pid: str, mid: str, name: str, unit: str, text: str) -> ua.NodeId:
        obj = self._objects[pid]
        path = f"{self.site}/{mid}/{pid}/{name}"
        nodeid = self._nid(path)
        # OPC 10000-8 §5.3.2: AnalogItemType (EngineeringUnits, EURange); §5.3.3.2 TwoStateDiscreteType (TrueState,
        # FalseState); §5.3.3.3 MultiStateDiscreteType (EnumStrings)
        kind = "enum" if name in _ENUMS else "verdict" if name in VERDICTS else "analog"
        if kind == "enum":
            text, unit = _ENUMS[name][1], "1"
        data_type, variant_type, initial, type_def = {
            "enum": ("UInt32", ua.VariantType.UInt32, 0, "MultiStateDiscreteType"),
            "verdict": ("Boolean", ua.VariantType.Boolean, False, "TwoStateDiscreteType"),
            "analog": ("Double", ua.VariantType.Double, math.nan, "AnalogItemType")}[kind]
        attrs = ua.VariableAttributes()
        attrs.DisplayName = ua.LocalizedText(name)
        attrs.Description = ua.LocalizedText(f"{text}, {unit}" if unit != "1" else f"{text} (dimensionless)")
        attrs.DataType = _std(data_type)
        attrs.ValueRank = ua.ValueRank.Scalar
        attrs.AccessLevel = attrs.UserAccessLevel = ua.AccessLevel.CurrentRead.mask
        attrs.Value = ua.Variant(initial, variant_type)
        item = ua.AddNodesItem()
        item.RequestedNewNodeId = nodeid
        item.BrowseName = self._qn(name)
        item.NodeClass = ua.NodeClass.Variable
        item.ParentNodeId = obj.nodeid
        item.ReferenceTypeId = _std("HasComponent")
        item.TypeDefinition = _std(type_def)
        item.NodeAttributes = attrs
        results = await obj.session.add_nodes([item])
        results[0].StatusCode.check()
        var = Node(obj.session, nodeid)
        if kind == "enum":
            await self._property(var, path, "EnumStrings", [ua.LocalizedText(z) for z in _ENUMS[name][0]],
                                 ua.VariantType.LocalizedText, "LocalizedText")
        elif kind == "verdict":
            for prop, state in zip(("TrueState", "FalseState"), TWO_STATES, strict=True):
                await self._property(var, path, prop, ua.LocalizedText(state), ua.VariantType.LocalizedText,
                                     "LocalizedText")
        else:
            code, long_name = UNECE[unit]
            eu = ua.EUInformation(NamespaceUri=UNECE_NAMESPACE, UnitId=unit_id(code),
                                  DisplayName=ua.LocalizedText(unit), Description=ua.LocalizedText(long_name))
            await self._property(var, path, "EngineeringUnits", eu, ua.VariantType.ExtensionObject, "EUInformation")
            low, high = _eu_range(name, unit)
            await self._property(var, path, "EURange", ua.Range(Low=low, High=high), ua.VariantType.ExtensionObject,
                                 "Range")
        await self._server_write(nodeid, None, StatusCodes.BadWaitingForInitialData, None)
        self._vars[pid][name] = nodeid
        return nodeid

    async def _property(self, var: Node, path: str, name: str, value: Any, variant_type: ua.VariantType,
                        data_type: str) -> None:
        """A standard property (browse name in namespace 0: ``EngineeringUnits``, ``EnumStrings``, …)."""
        await var.add_property(self._nid(f"{path}/{name}"), ua.QualifiedName(name, 0), ua.Variant(value, variant_type),
                               datatype=_std(data_type))

    async def _server_write(self, nodeid: ua.NodeId, value: float | None, status: int,
                            source_ts: datetime.datetime | None, server_ts: datetime.datetime | None = None) -> None:
        assert self._server is not None
        leaf = str(nodeid.Identifier).rsplit("/", 1)[-1]
        if value is None:
            variant = ua.Variant(None)
        elif leaf in _ENUMS:
            variant = ua.Variant(int(value), ua.VariantType.UInt32)
        elif leaf in VERDICTS:
            variant = ua.Variant(bool(value), ua.VariantType.Boolean)
        else:
            variant = ua.Variant(value, ua.VariantType.Double)
        dv = _ua.DataValue(variant, StatusCode=_ua.StatusCode(status), SourceTimestamp=source_ts,
                           ServerTimestamp=server_ts or datetime.datetime.now(datetime.UTC))
        await self._server.write_attribute_value(nodeid, dv)

    async def _write(self, result: FrameResult, now: datetime.datetime) -> None:
        pid = result.point_id
        if pid not in self._vars:  # a point added while running (e.g. by a configuration reload)
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
            if name == "iso_zone" and value is not None:
                value -= 1  # the registry's zone number 1..4 → the EnumStrings index 0..3 (A..D)
            if name == "alarm_state" and self.severity_of is not None:
                value = float(self.severity_of(pid))  # as of the frames the alarm layer has processed so far
            if value is None or not math.isfinite(value):
                await self._server_write(nodeid, None, StatusCodes.BadNoData, source_ts, now)
            else:
                await self._server_write(nodeid, float(value), StatusCodes.Good, source_ts, now)


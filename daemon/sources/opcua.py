"""OPC UA source: array variables of an OPC UA server (asyncua client), subscribed to or polled.

Each configured variable holds one block of samples as a 1-D numeric array; every new value (a data-change
notification, or a polled value with a new source timestamp) becomes one :class:`~edgevib.common.wire.Block`:

* ``seq`` is generated per node by this source (OPC UA carries no sequence number).  When the server's source
  timestamps show that whole blocks were skipped between two values, the counter skips as many, so the ingest
  sees the gap;
* ``t0_ns`` is the value's ``SourceTimestamp`` minus the block duration (the stamp marks the time just after the
  block's last sample, ``source_timestamp="end"``, the default) or the stamp itself (``source_timestamp="start"``:
  servers that stamp a block with its first sample), or the receive time minus the block duration when the server
  sends no source timestamp;
* ``fs_hz`` comes from the node's :class:`NodeSpec`, or, when that says ``None``, from a property of the variable
  named ``SampleRate``/``fs_hz``/``SampleRateHz``/``sample_rate_hz`` (read once per connection).

Subscriptions ask for sampling interval 0 (every write is reported, however close together: OPC 10000-4 §5.12.1.2)
and a monitored-item queue of about ten seconds of blocks (from the point's sample rate and block length), and
check what the server grants: a sampling interval revised above 0 (the server samples instead of reporting every
write) or a smaller queue than asked for is logged as a warning naming the node, because blocks written back to
back would then be merged or lost.  Integer
arrays (Int16/Int32 counts from a gateway) are accepted and multiplied by the node's ``scale``.  When the variable
has an ``EngineeringUnits`` property or a sample-rate property, they are compared with the configuration: a
different unit (UNECE code of g or m/s²) or sample rate is rejected (reason ``config_mismatch``) and the node is not
read, since every indicator computed from it would be wrong.  A server that refuses this client's certificate is
reported in one line that says so and what to trust where.

Values that are not 1-D numeric arrays go to ``ingest.reject(source, "malformed", …)``, values with a bad status
to ``ingest.reject(source, "bad_status", …)``; an empty (null) value or ``BadWaitingForInitialData`` is "no block
yet" and is skipped.  Non-finite samples are passed on for the ingest's own validation.  Scalar speed nodes
(``speed_nodes``) go to ``ingest.speed``; a speed node without a value yet (null, ``BadWaitingForInitialData``) is
skipped the same way.

The connection loop lives in :meth:`OpcUaSource.run`: connect (security policy ``None`` or ``Basic256Sha256``
``Sign``/``SignAndEncrypt`` with certificate files), resolve the nodes, subscribe or poll, and on any loss — the
client's keepalive probe failing, a bad subscription status, a read error — drop the session and reconnect with
bounded exponential backoff, reporting every state change through ``ingest.connection``.  asyncua's own
reconnect supervisor is not used, so backoff and reporting stay in one place.  Library and OS errors are
translated into :class:`~edgevib.daemon.interfaces.SourceError` in :func:`_translated`.
"""

from __future__ import annotations

import asyncio
import contextlib
import math
import time
from collections.abc import Iterator
from dataclasses import dataclass
from datetime import datetime
from pathlib import Path
from typing import Any, Literal

import numpy as np
import numpy.typing as npt
import structlog
from asyncua import ua
from asyncua.client.client import Client
from asyncua.common.node import Node
from asyncua.crypto import security_policies
from asyncua.ua.status_codes import StatusCodes
from asyncua.ua.uaerrors import UaError, UaStatusCodeError
from cryptography import x509

from edgevib.common.wire import UNITS, Block
from edgevib.daemon.interfaces import ConfigError, Ingest, SourceError

__all__ = ["SAMPLE_RATE_PROPERTIES", "NodeSpec", "OpcUaSource"]

SAMPLE_RATE_PROPERTIES = ("samplerate", "fs_hz", "samplerate_hz", "sampleratehz", "sample_rate_hz")
"""Browse names (compared case-insensitively) of a variable's property that gives its sample rate in Hz."""

_DEFAULT_APPLICATION_URI = "urn:edgevib:client"
_PUBLISH_INTERVAL_MS = 100.0  # subscription publishing interval; blocks arrive every ~0.1–1 s
_QUEUE_SIZE = 32  # monitored-item queue when the block rate is unknown
_QUEUE_SECONDS = 10.0  # otherwise: this many seconds of blocks (bursts written back to back, a slow publish)
_MAX_QUEUE = 1000
_UNIT_IDS = {4928560: "g", 5067595: "m/s2"}  # UNECE K40 (standard acceleration of free fall), MSK (m/s²)
_BAD_SESSION_STATUSES = frozenset({
    StatusCodes.BadShutdown, StatusCodes.BadTimeout, StatusCodes.BadSessionClosed,
    StatusCodes.BadSessionIdInvalid, StatusCodes.BadSubscriptionIdInvalid, StatusCodes.BadServerHalted,
    StatusCodes.BadConnectionClosed, StatusCodes.BadCommunicationError,
})

log = structlog.get_logger("edgevib.daemon.sources.opcua")
_ua: Any = ua  # untyped handle for the names asyncua 2.x does not re-export


@dataclass(frozen=True, slots=True)
class NodeSpec:
    """What one array variable carries: the sensor id its blocks get, the sample rate (``None``: read the
    variable's sample-rate property) and the unit of its samples (``"g"`` or ``"m/s2"``)."""

    sensor_id: str
    fs_hz: float | None = None
    unit: str = "g"
    block_samples: int | None = None  # samples per block, to size the monitored-item queue
    scale: float | None = None  # integer arrays: value = count × scale (in ``unit``)


@dataclass(slots=True)
class _NodeState:
    """Per-node bookkeeping kept across reconnects (so sequence numbers keep counting)."""

    node_id: str
    spec: NodeSpec
    fs_hz: float | None = None
    next_seq: int = 0
    last_seen_ns: int | None = None  # source timestamp of the last value handled (block or rejection)
    last_block_ns: int | None = None  # source timestamp of the last block delivered
    last_value: Any = None  # the last value, for servers that send no source timestamps
    has_last_value: bool = False


def _seen_before(state: _NodeState, value: Any, source_ns: int | None) -> bool:
    """The value was handled already (the same source timestamp, or without timestamps the same value); records
    it otherwise."""
    if source_ns is not None:
        if source_ns == state.last_seen_ns:
            return True
        state.last_seen_ns = source_ns
        return False
    with contextlib.suppress(Exception):  # comparing odd values must not fail the handler
        if state.has_last_value and bool(np.array_equal(np.asarray(value), state.last_value)):
            return True
    state.last_value, state.has_last_value = value, True
    return False


@contextlib.contextmanager
def _translated(what: str, endpoint: str) -> Iterator[None]:
    """The one place where asyncua, OS and crypto errors become :class:`SourceError`."""
    try:
        yield
    except SourceError:
        raise
    except (TimeoutError, UaError, OSError, ValueError, TypeError) as exc:
        raise SourceError(f"OPC UA {what} ({endpoint}) failed: {type(exc).__name__}: {exc}") from exc


def _to_ns(ts: datetime | None) -> int | None:
    if ts is None or ts.year < 1971:  # asyncua reports "no timestamp" as None or as the 1601 epoch
        return None
    return round(ts.timestamp() * 1e9)


def queue_size(spec: NodeSpec, fs_hz: float | None) -> int:
    """Monitored-item queue for a block node: about :data:`_QUEUE_SECONDS` of blocks, at least 32."""
    if not spec.block_samples or not fs_hz:
        return _QUEUE_SIZE
    return int(min(_MAX_QUEUE, max(_QUEUE_SIZE, math.ceil(_QUEUE_SECONDS * fs_hz / spec.block_samples))))


def _certificate_problem(exc: BaseException) -> str | None:
    """A one-line explanation when ``exc`` says the server refused our application certificate."""
    text = f"{type(exc).__name__}: {exc}"
    codes = ("BadCertificateUntrusted", "BadSecurityChecksFailed", "BadCertificateInvalid",
             "BadCertificateUriInvalid", "BadCertificateHostNameInvalid")
    code = next((c for c in codes if c in text), None)
    if code is None and not (isinstance(exc, AssertionError) or "AssertionError" in text):
        return None
    why = code or "the secure channel was closed during the handshake"
    return (f"the server rejected this client's certificate ({why}): trust edgevib's certificate (cert_file) in the "
            f"server's trusted-certificate store, and the server's certificate here (server_cert_file)")


def _rate(value: Any) -> float | None:
    """A sample-rate property's value as Hz, or None when it is not a finite number > 0."""
    if isinstance(value, int | float) and not isinstance(value, bool) and math.isfinite(value) and value > 0:
        return float(value)
    return None


def _samples_of(value: Any, scale: float | None = None) -> tuple[npt.NDArray[np.float64] | None, str]:
    """A variable's value as a read-only 1-D float64 array, or ``(None, why not)``."""
    if value is None:
        return None, "the variable has no value (null)"
    if isinstance(value, str | bytes | bytearray):
        return None, f"value is a {type(value).__name__}, not a numeric array"
    try:
        arr = np.asarray(value)
    except (ValueError, TypeError) as exc:  # ragged nested lists
        return None, f"value is not an array of numbers: {exc}"
    if arr.ndim != 1:
        shape = "a scalar" if arr.ndim == 0 else f"a {arr.ndim}-D array of shape {arr.shape}"
        return None, f"value is {shape}, expected a 1-D array"
    if arr.dtype.kind not in "iuf":
        return None, f"array elements are of type {arr.dtype}, not numbers"
    if arr.size == 0:
        return None, "value is an empty array"
    x = arr.astype(np.float64)
    if arr.dtype.kind in "iu" and scale is not None:
        x *= scale
    x.flags.writeable = False
    return x, ""


def _application_uri(cert_file: str) -> str:
    """The URI in the client certificate's subjectAltName (OPC UA requires the client to present it)."""
    data = Path(cert_file).read_bytes()
    cert = x509.load_pem_x509_certificate(data) if b"-----BEGIN" in data else x509.load_der_x509_certificate(data)
    try:
        san = cert.extensions.get_extension_for_class(x509.SubjectAlternativeName)
    except x509.ExtensionNotFound:
        return _DEFAULT_APPLICATION_URI
    uris = san.value.get_values_for_type(x509.UniformResourceIdentifier)
    return uris[0] if uris else _DEFAULT_APPLICATION_URI


def _check_nodes(where: str, nodes: dict[str, NodeSpec], speed_nodes: dict[str, str] | None) -> None:
    if not nodes and not speed_nodes:
        raise ConfigError(f"{where}", "no nodes to read (neither block nor speed nodes)")
    for node_id, spec in nodes.items():
        if spec.unit not in UNITS:
            raise ConfigError(f"{where}.nodes[{node_id!r}].unit", f"{spec.unit!r} is not one of {UNITS}")
        if spec.fs_hz is not None and not (math.isfinite(spec.fs_hz) and spec.fs_hz > 0):
            raise ConfigError(f"{where}.nodes[{node_id!r}].fs_hz", f"{spec.fs_hz!r} must be finite and > 0")


def _canonical_ids(where: str, node_ids: list[str]) -> dict[str, str]:
    """asyncua's spelling of each node id -> the configured one; an invalid or repeated node is refused."""
    canonical_ids: dict[str, str] = {}
    for node_id in node_ids:
        try:
            canonical = ua.NodeId.from_string(node_id).to_string()
        except UaError as exc:
            raise ConfigError(f"{where}.nodes[{node_id!r}]", f"not a valid OPC UA node id: {exc}") from exc
        if canonical in canonical_ids:
            raise ConfigError(f"{where}.nodes[{node_id!r}]",
                              f"the same node as {canonical_ids[canonical]!r} (configured twice)")
        canonical_ids[canonical] = node_id
    return canonical_ids


class OpcUaSource:
    """Blocks from array variables of one OPC UA server; implements :class:`~edgevib.daemon.interfaces.Source`.

    ``nodes`` maps node id strings (``"ns=2;s=QL-P101-DE-H"``) to :class:`NodeSpec`; ``speed_nodes`` maps node ids
    to the speed tag names the ingest knows.  ``password`` is already resolved by the caller and never logged.
    """

    def __init__(self, *, name: str, endpoint: str, ingest: Ingest, nodes: dict[str, NodeSpec],
                 speed_nodes: dict[str, str] | None = None, mode: Literal["subscribe", "poll"] = "subscribe",
                 poll_interval_s: float = 1.0, security_policy: Literal["None", "Basic256Sha256"] = "None",
                 security_mode: Literal["Sign", "SignAndEncrypt"] = "SignAndEncrypt",
                 cert_file: str | None = None, key_file: str | None = None, server_cert_file: str | None = None,
                 username: str | None = None, password: str | None = None,
                 reconnect_min_s: float = 0.5, reconnect_max_s: float = 10.0, timeout_s: float = 5.0,
                 source_timestamp: Literal["end", "start"] = "end") -> None:
        # the connection settings are the configuration's (OpcUaSourceConfig checked them); the nodes are checked here
        where = f"sources.{name}"
        _check_nodes(where, nodes, speed_nodes)
        self._canonical = _canonical_ids(where, [*nodes, *(speed_nodes or {})])  # asyncua's spelling -> configured
        self.name = name
        self.endpoint = endpoint
        self._ingest = ingest
        self._nodes = {nid: _NodeState(nid, spec, spec.fs_hz) for nid, spec in nodes.items()}
        self._speed_nodes = dict(speed_nodes or {})
        self.mode = mode
        self.poll_interval_s = float(poll_interval_s)
        self._security_policy = security_policy
        self._security_mode = security_mode
        self._cert_file = cert_file
        self._key_file = key_file
        self._server_cert_file = server_cert_file
        self._username = username
        self._password = password
        self.reconnect_min_s = float(reconnect_min_s)
        self.reconnect_max_s = float(reconnect_max_s)
        self.timeout_s = float(timeout_s)
        self._stamp_is_end = source_timestamp == "end"
        self._connected = False
        self._stopping = asyncio.Event()
        self._lost = asyncio.Event()
        self._lost_reason = ""
        self._running: asyncio.Task[None] | None = None
        self._log = log.bind(source=name, endpoint=endpoint)

    @property
    def connected(self) -> bool:
        return self._connected

    # ------------------------------------------------------------------------------------------ lifecycle

    async def run(self) -> None:
        """Connect, read, and reconnect with bounded exponential backoff until :meth:`stop`."""
        self._running = asyncio.current_task()
        delay = self.reconnect_min_s
        while not self._stopping.is_set():
            was_connected = False
            try:
                was_connected = await self._session()
            except Exception as exc:  # a SourceError ends the session; a bug is logged with its traceback
                failed = isinstance(exc, SourceError)
                cause = exc.__cause__ if failed and exc.__cause__ is not None else exc
                problem = _certificate_problem(cause) if self._security_policy != "None" else None
                if problem:
                    self._log.warning("opcua_certificate_rejected", problem=problem, retry_in_s=round(delay, 3))
                elif failed:
                    self._log.warning("opcua_session_failed", error=str(exc), retry_in_s=round(delay, 3))
                else:
                    self._log.exception("opcua_session_crashed", error=repr(exc))
            finally:
                self._set_connected(False)
            if self._stopping.is_set():
                break
            if was_connected:
                delay = self.reconnect_min_s
            await self._pause(delay)
            delay = min(delay * 2.0, self.reconnect_max_s)

    async def _pause(self, delay_s: float) -> None:
        """Wait ``delay_s`` before the next attempt, or until :meth:`stop`."""
        with contextlib.suppress(TimeoutError):
            await asyncio.wait_for(self._stopping.wait(), delay_s)

    async def stop(self) -> None:
        self._stopping.set()
        self._lost.set()
        task = self._running
        if task is not None and task is not asyncio.current_task() and not task.done():
            try:
                await asyncio.wait_for(asyncio.shield(task), self.timeout_s + 2.0)
            except TimeoutError:
                task.cancel()
                with contextlib.suppress(asyncio.CancelledError, Exception):
                    await task

    def _set_connected(self, connected: bool) -> None:
        if connected != self._connected:
            self._connected = connected
            self._ingest.connection(self.name, connected)
            if connected:
                self._log.info("opcua_connected", mode=self.mode, nodes=len(self._nodes))
            elif self._stopping.is_set():
                self._log.info("opcua_disconnected", reason="stopped")
            else:
                self._log.warning("opcua_disconnected", reason=self._lost_reason or "session ended")

    def _mark_lost(self, reason: str) -> None:
        if not self._lost.is_set():
            self._lost_reason = reason
            self._lost.set()

    # ------------------------------------------------------------------------------------------ one session

    async def _session(self) -> bool:
        """One connection: returns when it is lost or the source stops; True when it got connected."""
        self._lost.clear()
        self._lost_reason = ""
        client = Client(self.endpoint, timeout=self.timeout_s, watchdog_intervall=min(1.0, self.timeout_s))
        client.name = client.description = f"edgevib {self.name}"

        async def on_lost(exc: Exception) -> None:
            self._mark_lost(f"connection lost: {type(exc).__name__}: {exc}")

        client.connection_lost_callback = on_lost
        connected = False
        try:
            await self._connect(client)
            connected = True
            with _translated("node setup", self.endpoint):
                block_nodes, speed_nodes = await self._resolve(client)
                if self.mode == "subscribe":
                    await self._subscribe(client, block_nodes, speed_nodes)
            self._set_connected(True)
            if self.mode == "subscribe":
                await self._lost.wait()
            else:
                await self._poll(client, block_nodes, speed_nodes)
            return True
        finally:
            if connected:
                with contextlib.suppress(Exception):
                    await asyncio.wait_for(client.disconnect(), self.timeout_s)
            else:
                with contextlib.suppress(Exception):
                    client.disconnect_socket()

    async def _connect(self, client: Client) -> None:
        with _translated("connect", self.endpoint):
            if self._security_policy != "None":
                assert self._cert_file and self._key_file
                client.application_uri = _application_uri(self._cert_file)
                mode = getattr(ua.MessageSecurityMode, self._security_mode)
                await client.set_security(security_policies.SecurityPolicyBasic256Sha256, self._cert_file,
                                          self._key_file, None, self._server_cert_file, mode)
            if self._username:
                client.set_user(self._username)
                if self._password is not None:
                    client.set_password(self._password)
            await asyncio.wait_for(client.connect(), self.timeout_s * 2)

    async def _resolve(self, client: Client) -> tuple[dict[str, Node], dict[str, Node]]:
        """Check that every node exists and find sample rates; a node that cannot work is rejected and skipped."""
        block_nodes: dict[str, Node] = {}
        for node_id, state in self._nodes.items():
            node = await self._existing(client, node_id, "node")
            if node is None:
                continue
            mismatch = await self._cross_check(node, state)
            if mismatch:
                self._ingest.reject(self.name, "config_mismatch", f"node {node_id}: {mismatch}; not read", node_id)
                continue
            if state.spec.fs_hz is None:
                state.fs_hz = await self._read_sample_rate(node)
                if state.fs_hz is None:
                    self._ingest.reject(self.name, "no_sample_rate",
                                        f"node {node_id}: no fs_hz configured and no valid sample-rate property "
                                        f"({', '.join(SAMPLE_RATE_PROPERTIES)})", node_id)
                    continue
            block_nodes[node_id] = node
        speed_nodes = {node_id: node for node_id in self._speed_nodes
                       if (node := await self._existing(client, node_id, "speed node")) is not None}
        return block_nodes, speed_nodes

    async def _existing(self, client: Client, node_id: str, what: str) -> Node | None:
        """The node, if the server has it (else rejected as ``unknown_node`` and None)."""
        try:
            node = client.get_node(node_id)
            await node.read_browse_name()
        except UaStatusCodeError as exc:
            self._ingest.reject(self.name, "unknown_node", f"{what} {node_id}: {exc}", node_id)
            return None
        return node

    async def _cross_check(self, node: Node, state: _NodeState) -> str | None:
        """The node's EngineeringUnits and sample-rate properties against the configuration (None: agree, or the
        node has no such property)."""
        try:
            props = await node.get_properties()
        except UaError:
            return None
        for prop in props:
            try:
                name = (await prop.read_browse_name()).Name
                if name == "EngineeringUnits":
                    eu = await prop.read_value()
                    unit = _UNIT_IDS.get(int(getattr(eu, "UnitId", -1)))
                    if unit is not None and unit != state.spec.unit:
                        return (f"the server's EngineeringUnits say {unit} (UNECE UnitId {eu.UnitId}) but the point "
                                f"is configured with unit = {state.spec.unit!r}")
                elif name.lower() in SAMPLE_RATE_PROPERTIES and state.spec.fs_hz is not None:
                    fs_hz = _rate(await prop.read_value())
                    if fs_hz is not None and abs(fs_hz - state.spec.fs_hz) > 1e-6 * state.spec.fs_hz:
                        return (f"the server's {name} property says {fs_hz:g} Hz but the point is configured "
                                f"with fs_hz = {state.spec.fs_hz:g}")
            except (UaError, ValueError, TypeError):
                continue
        return None

    async def _read_sample_rate(self, node: Node) -> float | None:
        for prop in await node.get_properties():
            name = (await prop.read_browse_name()).Name.lower()
            if name in SAMPLE_RATE_PROPERTIES:
                fs_hz = _rate(await prop.read_value())
                if fs_hz is not None:
                    return fs_hz
        return None

    async def _subscribe(self, client: Client, block_nodes: dict[str, Node], speed_nodes: dict[str, Node]) -> None:
        handler = _Handler(self)
        sub = await client.create_subscription(_PUBLISH_INTERVAL_MS, handler)
        ids = list(block_nodes) + list(speed_nodes)
        nodes = list(block_nodes.values()) + list(speed_nodes.values())
        if not nodes:
            return
        queues = [queue_size(self._nodes[i].spec, self._nodes[i].fs_hz) if i in self._nodes else _QUEUE_SIZE
                  for i in ids]
        make: Any = sub._make_monitored_item_request  # asyncua annotates its arguments with its own NewTypes
        requests = [make(node, _ua.AttributeIds.Value, None, q, ua.MonitoringMode.Reporting, 0.0)
                    for node, q in zip(nodes, queues, strict=True)]
        granted = _Granted(sub)
        results: list[Any] = await sub.create_monitored_items(requests)
        granted.restore()
        revised_all = granted.results + [None] * (len(ids) - len(granted.results))
        for node_id, node, result, asked, revised in zip(ids, nodes, results, queues, revised_all, strict=True):
            if isinstance(result, ua.StatusCode):
                self._ingest.reject(self.name, "unknown_node", f"cannot monitor node {node.nodeid.to_string()}: "
                                    f"{result.name}", node.nodeid.to_string())
                continue
            self._check_revised(node_id, asked, revised)

    def _check_revised(self, node_id: str, asked_queue: int, revised: Any) -> None:
        """Warn when the server grants a sampling interval or queue that loses blocks written back to back."""
        if revised is None or node_id not in self._nodes:
            return
        interval = float(getattr(revised, "RevisedSamplingInterval", 0.0) or 0.0)
        queue = int(getattr(revised, "RevisedQueueSize", asked_queue) or 0)
        if interval > 0:
            self._log.warning("opcua_sampling_revised", node=node_id, requested_ms=0, revised_ms=interval,
                              detail="the server samples this node instead of reporting every write: blocks "
                              "written closer together than the revised interval are merged and lost (configure "
                              "the server for exception-based reporting: MinimumSamplingInterval 0 on the "
                              "variable, MinSupportedSampleRate 0)")
        if queue < asked_queue:
            self._log.warning("opcua_queue_reduced", node=node_id, requested=asked_queue, revised=queue,
                              detail="blocks written in a burst faster than the publishing interval may be lost")

    async def _poll(self, client: Client, block_nodes: dict[str, Node], speed_nodes: dict[str, Node]) -> None:
        ids = list(block_nodes) + list(speed_nodes)
        nodes = list(block_nodes.values()) + list(speed_nodes.values())
        loop = asyncio.get_running_loop()
        next_at = loop.time()
        while not self._lost.is_set():
            if nodes:
                try:
                    with _translated("read", self.endpoint):
                        values = await client.read_attributes(nodes)
                except SourceError as exc:
                    self._mark_lost(str(exc))
                    return
                received_ns = time.time_ns()
                for node_id, dv in zip(ids, values, strict=True):
                    self._on_value(node_id, dv, received_ns, polled=True)
            next_at = max(next_at + self.poll_interval_s, loop.time())
            with contextlib.suppress(TimeoutError):
                await asyncio.wait_for(self._lost.wait(), next_at - loop.time())

    # ------------------------------------------------------------------------------------------ values

    def _on_value(self, node_id: str, dv: ua.DataValue | None, received_ns: int, polled: bool = False) -> None:
        """One new value of one node (runs on the event loop; never raises)."""
        try:
            if node_id in self._speed_nodes:
                self._on_speed(node_id, dv, received_ns)
                return
            state = self._nodes.get(node_id)
            if state is None or state.fs_hz is None:
                return
            if dv is None:
                self._ingest.reject(self.name, "malformed", f"node {node_id}: notification without a value", node_id)
                return
            value = dv.Value.Value if dv.Value is not None else None
            source_ns = _to_ns(dv.SourceTimestamp)
            if _seen_before(state, value, source_ns):
                return  # already handled (re-read by a poll, or re-sent after a reconnect)
            if dv.StatusCode is not None and not dv.StatusCode.is_good():
                code = dv.StatusCode.value
                if polled and code in _BAD_SESSION_STATUSES:
                    self._mark_lost(f"read status {dv.StatusCode.name}")
                elif code != StatusCodes.BadWaitingForInitialData:
                    self._ingest.reject(self.name, "bad_status", f"node {node_id}: status {dv.StatusCode.name}",
                                        node_id)
                return
            if value is None:
                return  # no value yet (a variable created empty): nothing to count
            samples, why = _samples_of(value, state.spec.scale)
            if samples is None:
                self._ingest.reject(self.name, "malformed", f"node {node_id}: {why}", node_id)
                return
            t0_ns = self._block_start(state, samples.shape[0], source_ns, received_ns)  # counts missed blocks
            block = Block(sensor_id=state.spec.sensor_id, seq=state.next_seq, t0_ns=t0_ns,
                          fs_hz=state.fs_hz, unit=state.spec.unit, samples=samples)
            state.next_seq += 1
            if source_ns is not None:
                state.last_block_ns = source_ns
            self._ingest.block(self.name, block, received_ns, node_id)
        except Exception as exc:  # never let one value break the subscription or the poll loop
            self._log.exception("opcua_value_failed", node=node_id, error=repr(exc))

    def _block_start(self, state: _NodeState, n: int, source_ns: int | None, received_ns: int) -> int:
        """The first sample's time of a block of ``n`` samples (from the source timestamp, its end or start, else
        the time of receipt as its end); whole blocks written since the last one but never seen advance the
        node's sequence number."""
        assert state.fs_hz is not None
        duration_ns = round(n * 1e9 / state.fs_hz)
        if source_ns is not None and state.last_block_ns is not None and duration_ns > 0:
            elapsed_ns = source_ns - state.last_block_ns
            if elapsed_ns > 1.5 * duration_ns:  # whole blocks were written that we never saw
                state.next_seq += round(elapsed_ns / duration_ns) - 1
        if source_ns is not None and not self._stamp_is_end:
            return source_ns
        return (source_ns if source_ns is not None else received_ns) - duration_ns

    def _on_speed(self, node_id: str, dv: ua.DataValue | None, received_ns: int) -> None:
        tag = self._speed_nodes[node_id]
        value = dv.Value.Value if dv is not None and dv.Value is not None else None
        if dv is None or (value is None and (dv.StatusCode is None or dv.StatusCode.is_good())):
            return  # no value yet (a variable created empty): nothing to count, like the samples path
        if dv.StatusCode is not None and not dv.StatusCode.is_good():
            if dv.StatusCode.value == StatusCodes.BadWaitingForInitialData:
                return  # the server has no value yet: not a fault of the speed tag
            self._ingest.reject(self.name, "bad_status", f"speed node {node_id}: status {dv.StatusCode.name}",
                                node_id)
            return
        if isinstance(value, bool) or not isinstance(value, int | float) or not math.isfinite(value):
            self._ingest.reject(self.name, "malformed", f"speed node {node_id}: value {value!r} is not a finite "
                                f"number", node_id)
            return
        self._ingest.speed(self.name, tag, float(value), received_ns)


class _Granted:
    """Captures the server's answer to CreateMonitoredItems (the revised sampling intervals and queue sizes, which
    asyncua does not return) while asyncua registers the items as usual."""

    def __init__(self, sub: Any) -> None:
        self.sub = sub
        self.results: list[Any] = []
        self._original = sub.server
        granted = self

        class _Proxy:
            def __getattr__(self, name: str) -> Any:
                return getattr(granted._original, name)

            async def create_monitored_items(self, params: Any) -> Any:
                results = await granted._original.create_monitored_items(params)
                granted.results = list(results)
                return results

        sub.server = _Proxy()

    def restore(self) -> None:
        self.sub.server = self._original


class _Handler:
    """asyncua subscription handler: hands every notification to the source (called on the event loop)."""

    def __init__(self, source: OpcUaSource) -> None:
        self._source = source

    def datachange_notification(self, node: Node, val: Any, data: Any) -> None:
        node_id = self._source._canonical.get(node.nodeid.to_string())
        if node_id is not None:
            self._source._on_value(node_id, data.monitored_item.Value, time.time_ns())

    def status_change_notification(self, status: ua.StatusChangeNotification) -> None:
        code = status.Status
        if not code.is_good():
            self._source._mark_lost(f"subscription status {code.name}")

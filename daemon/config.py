"""Loading and validating the daemon's TOML configuration (schema: ``config/example-plant.toml``).

:func:`load_config` / :func:`parse_config` turn a document into a frozen :class:`Config`; every problem is a
:class:`~edgevib.daemon.interfaces.ConfigError` naming the dotted key path (``points[1].envelope_band_hz``) and the
problem, with the numbers.  Secrets are never read from the TOML itself: a ``*_file`` or ``*_env`` key becomes a
:class:`Secret` that only reveals its value on request and prints as ``<from file …>``.

File paths (``*_file`` keys, ``site.state_dir``, the alarm layer's socket and capture directory) may use
``${CREDENTIALS_DIRECTORY}`` (systemd ``LoadCredential=``) and ``${STATE_DIRECTORY}`` (systemd
``StateDirectory=``; the first entry of a colon-separated list); no other variable is expanded.  Outside the unit
those are unset, and a credential file under an unset ``${CREDENTIALS_DIRECTORY}`` or under ``/run/credentials/``
cannot exist yet: :func:`load_config` then records the problem in ``Config.deferred`` instead of failing, so that
``check-config`` can print it as a warning, and :func:`verify_for_run` turns it into an error when the daemon
starts.

The alarm layer owns the top-level ``[alarms]``, ``[feed]``, ``[capture]`` tables and the per-point ``limits`` key:
when ``edgevib.daemon.alarms.config.parse_alarm_config`` exists it parses them into ``Config.alarms``; otherwise
they are kept as raw tables (``Config.alarm_tables`` and ``PointConfig.limits``).
"""

from __future__ import annotations

import hashlib
import math
import os
import re
import tomllib
from collections.abc import Iterator, Mapping
from contextlib import contextmanager
from contextvars import ContextVar
from dataclasses import dataclass, field, fields, is_dataclass, replace
from pathlib import Path
from typing import Any, TypeAlias
from urllib.parse import urlsplit

from edgevib.daemon.interfaces import ConfigError
from edgevib.daemon.shard import Shard, owns_point, validate_shard
from edgevib.daemon.wire import DEFAULT_MAX_PAYLOAD_BYTES, DEFAULT_MAX_SAMPLES
from edgevib.pipelines.analysis import default_envelope_band
from edgevib.pipelines.bearings import validate_geometry
from edgevib.pipelines.types import BearingGeometry, PipelineError

__all__ = [
    "AnalysisConfig",
    "BearingConfig",
    "Config",
    "LoggingConfig",
    "MachineConfig",
    "MetricsConfig",
    "MqttConnection",
    "MqttSourceConfig",
    "OpcUaSourceConfig",
    "PointConfig",
    "PublishMqttConfig",
    "PublishOpcUaConfig",
    "Secret",
    "SimulatedSourceConfig",
    "SiteConfig",
    "SpeedTag",
    "config_to_document",
    "default_state_dir",
    "deferred_warnings",
    "dump_toml",
    "expand_path_variables",
    "load_config",
    "parse_config",
    "parse_listen",
    "verify_for_run",
]

G_M_S2 = 9.80665  # standard gravity, exact (3rd CGPM 1901)
DEFAULT_LISTEN = ("127.0.0.1", 9851)
MAX_POINTS = 1000
MAX_FRAME_SAMPLES = 1 << 20
MIN_FRAME_SAMPLES = 256
ALARM_TABLES = ("alarms", "feed", "capture")
DEFAULT_STATE_DIR = "/var/lib/edgevib"
PATH_VARIABLES = ("CREDENTIALS_DIRECTORY", "STATE_DIRECTORY")
CREDENTIALS_ROOT = "/run/credentials/"
_VARIABLE = re.compile(r"\$\{([^}]*)\}")
# problems found while loading that only matter where the daemon runs (see the module docstring), per parse call
_DEFERRED: ContextVar[list[tuple[str, str, str, str]] | None] = ContextVar("edgevib_config_deferred", default=None)


# ------------------------------------------------------------------------------------------------ secrets


@dataclass(frozen=True, slots=True)
class Secret:
    """A secret read from a file or an environment variable; its value is never stored, printed or logged."""

    kind: str  # "file" | "env"
    ref: str

    def reveal(self) -> str:
        """Read the secret now (a trailing newline of a file is stripped)."""
        if self.kind == "env":
            value = os.environ.get(self.ref)
            if value is None:
                raise ConfigError("", f"environment variable {self.ref} is not set")
            return value
        try:
            return Path(self.ref).read_text(encoding="utf-8").rstrip("\r\n")
        except OSError as exc:
            raise ConfigError("", f"cannot read secret file {self.ref}: {exc.strerror}") from exc

    def __repr__(self) -> str:
        return f"<from {self.kind} {self.ref}>"

    __str__ = __repr__


# ------------------------------------------------------------------------------------------------ dataclasses


@dataclass(frozen=True, slots=True)
class SiteConfig:
    name: str = "edgevib"
    state_dir: str = "/var/lib/edgevib"
    shard: Shard | None = None


@dataclass(frozen=True, slots=True)
class LoggingConfig:
    level: str = "info"
    format: str = "auto"


@dataclass(frozen=True, slots=True)
class MetricsConfig:
    listen: str = "127.0.0.1:9851"
    host: str = "127.0.0.1"
    port: int = 9851
    tls_cert_file: str | None = None
    tls_key_file: str | None = None
    tls_client_ca_file: str | None = None


@dataclass(frozen=True, slots=True)
class AnalysisConfig:
    frame_samples: int = 16384
    overlap: float = 0.5
    queue_frames: int = 4
    workers: int = 1
    trend_halflife_s: float = 600.0


@dataclass(frozen=True, slots=True)
class MqttConnection:
    """Broker connection settings shared by MQTT sources and the MQTT publisher."""

    url: str
    host: str
    port: int
    tls: bool
    protocol: str = "3.1.1"
    client_id: str = ""
    keepalive_s: float = 30.0
    reconnect_min_s: float = 0.5
    reconnect_max_s: float = 30.0
    username: str | None = None
    password: Secret | None = None
    ca_file: str | None = None
    cert_file: str | None = None
    key_file: str | None = None
    key_password: Secret | None = None


@dataclass(frozen=True, slots=True)
class MqttSourceConfig:
    name: str
    connection: MqttConnection
    topics: tuple[str, ...]
    qos: int = 1
    sensor_from: str = "payload"
    max_payload_bytes: int = DEFAULT_MAX_PAYLOAD_BYTES
    type: str = "mqtt"

    @property
    def sensor_topic_level(self) -> int | None:
        return int(self.sensor_from.split(":", 1)[1]) if self.sensor_from.startswith("topic:") else None


@dataclass(frozen=True, slots=True)
class OpcUaSourceConfig:
    name: str
    endpoint: str
    mode: str = "subscribe"
    poll_interval_s: float = 1.0
    security_policy: str = "None"
    security_mode: str = "SignAndEncrypt"
    cert_file: str | None = None
    key_file: str | None = None
    server_cert_file: str | None = None
    username: str | None = None
    password: Secret | None = None
    reconnect_min_s: float = 0.5
    reconnect_max_s: float = 30.0
    type: str = "opcua"


@dataclass(frozen=True, slots=True)
class SimulatedSourceConfig:
    name: str
    scenario: str = "demo"
    seed: int = 0
    rate: float = 1.0
    type: str = "simulated"


SourceConfig = MqttSourceConfig | OpcUaSourceConfig | SimulatedSourceConfig


@dataclass(frozen=True, slots=True)
class PublishMqttConfig:
    enabled: bool = False
    source: str | None = None
    connection: MqttConnection | None = None
    topic: str = "edgevib/{site}/{machine}/{point}/indicators"
    qos: int = 0
    retain: bool = False


@dataclass(frozen=True, slots=True)
class PublishOpcUaConfig:
    enabled: bool = False
    listen: str = "127.0.0.1:4841"
    host: str = "127.0.0.1"
    port: int = 4841
    namespace: str = "urn:edgevib:indicators"


@dataclass(frozen=True, slots=True)
class SpeedTag:
    source: str
    topic: str | None = None  # MQTT
    node: str | None = None   # OPC UA
    unit: str = "rpm"
    max_age_s: float = 60.0

    @property
    def tag(self) -> str:
        return self.topic if self.topic is not None else str(self.node)

    def to_hz(self, value: float) -> float:
        return value / 60.0 if self.unit == "rpm" else value


@dataclass(frozen=True, slots=True)
class MachineConfig:
    id: str
    description: str = ""
    group: int | None = None
    support: str | None = None
    speed_rpm: float | None = None
    speed_tag: SpeedTag | None = None
    speed_range_rpm: tuple[float, float] = (300.0, 3600.0)
    run_threshold_rpm: float = 60.0

    @property
    def speed_mode(self) -> str:
        return "fixed" if self.speed_rpm is not None else "tag" if self.speed_tag is not None else "estimated"


@dataclass(frozen=True, slots=True)
class BearingConfig:
    elements: int
    ball_diameter_mm: float
    pitch_diameter_mm: float
    contact_angle_deg: float = 0.0


@dataclass(frozen=True, slots=True)
class PointConfig:
    """One measurement point.  ``envelope_band_hz`` is the band actually used (``None``: no envelope
    indicators, with the reason in ``envelope_note``)."""

    id: str
    machine: str
    source: str
    sensor: str
    fs_hz: float
    block_samples: int
    axis: str = "radial"
    description: str = ""
    sensor_type: str = "piezo"
    sensitivity_mv_per_g: float | None = None
    bandwidth_hz: tuple[float, float] = (0.5, 10000.0)
    velocity_band_hz: tuple[float, float] = (10.0, 1000.0)
    envelope_band_hz: tuple[float, float] | None = None
    envelope_note: str | None = None
    bearing: BearingConfig | None = None
    orders: tuple[float, ...] = (0.5, 1.0, 2.0, 3.0)
    frame_samples: int = 16384
    overlap: float = 0.5
    node: str | None = None
    unit: str = "g"
    limits: Mapping[str, Any] | None = None

    @property
    def hop_samples(self) -> int:
        return max(1, self.frame_samples - round(self.overlap * self.frame_samples))


@dataclass(frozen=True, slots=True)
class Config:
    site: SiteConfig
    logging: LoggingConfig
    metrics: MetricsConfig
    analysis: AnalysisConfig
    sources: tuple[SourceConfig, ...]
    machines: tuple[MachineConfig, ...]
    points: tuple[PointConfig, ...]
    publish_mqtt: PublishMqttConfig = field(default_factory=PublishMqttConfig)
    publish_opcua: PublishOpcUaConfig = field(default_factory=PublishOpcUaConfig)
    alarms: object | None = None
    alarm_tables: Mapping[str, Any] = field(default_factory=dict)
    skipped_points: tuple[str, ...] = ()  # configured but owned by another shard
    skipped_sensors: tuple[tuple[str, str], ...] = ()  # their (source, sensor) keys: blocks ignored quietly
    deferred: tuple[tuple[str, str, str, str], ...] = ()  # (key path, problem, why, file): see verify_for_run
    base_dir: str = "."
    digest: str = ""

    def source(self, name: str) -> SourceConfig:
        for s in self.sources:
            if s.name == name:
                return s
        raise KeyError(name)

    def machine(self, machine_id: str) -> MachineConfig:
        for m in self.machines:
            if m.id == machine_id:
                return m
        raise KeyError(machine_id)

    def point(self, point_id: str) -> PointConfig:
        for p in self.points:
            if p.id == point_id:
                return p
        raise KeyError(point_id)


# ------------------------------------------------------------------------------------------------ table reader

_REQUIRED = object()


def _type_name(value: object) -> str:
    return {bool: "boolean", int: "integer", float: "float", str: "string", list: "array",
            dict: "table"}.get(type(value), type(value).__name__)


# The reader's methods below shadow these names inside its class body.
_Str: TypeAlias = str
_Int: TypeAlias = int
_Float: TypeAlias = float
_Bool: TypeAlias = bool


class _Table:
    """Reads one TOML table, tracking its dotted path and which keys were used (the rest are unknown keys)."""

    def __init__(self, doc: object, path: _Str) -> None:
        if not isinstance(doc, dict):
            raise ConfigError(path, f"must be a table, got {_type_name(doc)}")
        self.doc: dict[str, Any] = doc
        self.path = path
        self.used: set[str] = set()

    def key(self, name: _Str) -> _Str:
        return f"{self.path}.{name}" if self.path else name

    def has(self, name: _Str) -> _Bool:
        return name in self.doc

    def raw(self, name: _Str, default: Any = None) -> Any:
        self.used.add(name)
        return self.doc.get(name, default)

    def _get(self, name: _Str, default: Any) -> Any:
        self.used.add(name)
        if name not in self.doc:
            if default is _REQUIRED:
                raise ConfigError(self.key(name), "required key is missing")
            return default
        return self.doc[name]

    def str(self, name: _Str, default: Any = _REQUIRED, choices: tuple[_Str, ...] | None = None) -> Any:
        v = self._get(name, default)
        if v is default and name not in self.doc:
            return v
        if not isinstance(v, str):
            raise ConfigError(self.key(name), f"must be a string, got {_type_name(v)}")
        if choices is not None and v not in choices:
            raise ConfigError(self.key(name), f"{v!r} is not one of {', '.join(map(repr, choices))}")
        if any(ord(c) < 32 for c in v):
            raise ConfigError(self.key(name), "contains control characters")
        return v

    def int(self, name: _Str, default: Any = _REQUIRED, lo: _Int | None = None, hi: _Int | None = None) -> Any:
        v = self._get(name, default)
        if v is default and name not in self.doc:
            return v
        if isinstance(v, bool) or not isinstance(v, int):
            raise ConfigError(self.key(name), f"must be an integer, got {_type_name(v)}")
        self._range(name, v, lo, hi)
        return v

    def float(self, name: _Str, default: Any = _REQUIRED, lo: _Float | None = None, hi: _Float | None = None,
              lo_open: _Bool = False) -> Any:
        v = self._get(name, default)
        if v is default and name not in self.doc:
            return v
        v = self._number(self.key(name), v)
        self._range(name, v, lo, hi, lo_open)
        return v

    def bool(self, name: _Str, default: Any = _REQUIRED) -> Any:
        v = self._get(name, default)
        if v is default and name not in self.doc:
            return v
        if not isinstance(v, bool):
            raise ConfigError(self.key(name), f"must be true or false, got {_type_name(v)}")
        return v

    def pair(self, name: _Str, default: Any = _REQUIRED, lo: _Float = 0.0) -> Any:
        """A ``[low, high]`` pair of numbers with ``lo <= low < high``."""
        v = self._get(name, default)
        if v is default and name not in self.doc:
            return v
        path = self.key(name)
        if not isinstance(v, list) or len(v) != 2:
            raise ConfigError(path, f"must be a [low, high] pair of numbers, got {v!r}")
        a, b = (self._number(f"{path}[{i}]", x) for i, x in enumerate(v))
        if a < lo:
            raise ConfigError(path, f"low edge {a:g} is below {lo:g}")
        if not a < b:
            raise ConfigError(path, f"low edge {a:g} must be below high edge {b:g}")
        return (a, b)

    def str_list(self, name: _Str, default: Any = _REQUIRED) -> Any:
        v = self._get(name, default)
        if v is default and name not in self.doc:
            return v
        if not isinstance(v, list) or not all(isinstance(x, str) and x for x in v):
            raise ConfigError(self.key(name), "must be an array of non-empty strings")
        return tuple(v)

    def table(self, name: _Str) -> _Table | None:
        self.used.add(name)
        if name not in self.doc:
            return None
        return _Table(self.doc[name], self.key(name))

    def tables(self, name: _Str) -> list[_Table]:
        self.used.add(name)
        v = self.doc.get(name, [])
        if not isinstance(v, list):
            raise ConfigError(self.key(name), f"must be an array of tables ([[{name}]]), got {_type_name(v)}")
        return [_Table(t, f"{self.key(name)}[{i}]") for i, t in enumerate(v)]

    def secret(self, name: _Str, base_dir: Path) -> Secret | None:
        """``name_file`` or ``name_env``; a literal ``name`` is rejected with a message saying how."""
        if name in self.doc:
            raise ConfigError(self.key(name), f"secrets are not accepted in the configuration file; put it in a "
                              f"file and set {name}_file = \"/path\" (e.g. a systemd credential), or in an "
                              f"environment variable and set {name}_env = \"NAME\"")
        f, e = self.str(f"{name}_file", None), self.str(f"{name}_env", None)
        if f is not None and e is not None:
            raise ConfigError(self.key(name), f"give either {name}_file or {name}_env, not both")
        if f is not None:
            p = _resolve_path(f, base_dir, self.key(f"{name}_file"))
            if not Path(p).is_file():
                _missing(self.key(f"{name}_file"), f"secret file {p} does not exist", f, p)
            return Secret("file", p)
        if e is not None:
            if e not in os.environ:
                raise ConfigError(self.key(f"{name}_env"), f"environment variable {e} is not set")
            return Secret("env", e)
        return None

    def path_key(self, name: _Str, base_dir: Path, must_exist: _Bool = True) -> _Str | None:
        v = self.str(name, None)
        if v is None:
            return None
        p = _resolve_path(v, base_dir, self.key(name))
        if must_exist and not Path(p).is_file():
            _missing(self.key(name), f"file {p} does not exist", v, p)
        return p

    def done(self) -> None:
        unknown = sorted(set(self.doc) - self.used)
        if unknown:
            known = ", ".join(sorted(self.used)) or "none"
            raise ConfigError(self.key(unknown[0]), f"unknown key (known keys here: {known})")

    def _range(self, name: _Str, v: _Float, lo: _Float | None, hi: _Float | None, lo_open: _Bool = False) -> None:
        if lo is not None and (v < lo or (lo_open and v == lo)):
            raise ConfigError(self.key(name), f"{v:g} is out of range: must be {'>' if lo_open else '>='} {lo:g}")
        if hi is not None and v > hi:
            raise ConfigError(self.key(name), f"{v:g} is out of range: must be <= {hi:g}")

    @staticmethod
    def _number(path: _Str, v: object) -> _Float:
        if isinstance(v, bool) or not isinstance(v, int | float):
            raise ConfigError(path, f"must be a number, got {_type_name(v)}")
        f = float(v)
        if not math.isfinite(f):
            raise ConfigError(path, f"must be finite, got {v!r}")
        return f


def default_state_dir() -> str:
    """``[site] state_dir`` when the file has none: ``$STATE_DIRECTORY`` under systemd, else /var/lib/edgevib."""
    return "${STATE_DIRECTORY}" if os.environ.get("STATE_DIRECTORY") else DEFAULT_STATE_DIR


def expand_path_variables(value: str, path: str = "") -> tuple[str, list[str]]:
    """Expand ``${CREDENTIALS_DIRECTORY}`` and ``${STATE_DIRECTORY}`` in ``value``; returns the result and the
    names that are unset (their references stay as written).  Any other ``${…}`` is a :class:`ConfigError`."""
    unset: list[str] = []

    def sub(m: re.Match[str]) -> str:
        name = m.group(1)
        if name not in PATH_VARIABLES:
            raise ConfigError(path, f"${{{name}}} is not expanded: a path may use only "
                              f"{' and '.join('${' + v + '}' for v in PATH_VARIABLES)}")
        v = os.environ.get(name, "").split(":", 1)[0]
        if not v:
            unset.append(name)
            return m.group(0)
        return v

    return _VARIABLE.sub(sub, value), unset


def _resolve_path(value: str, base_dir: Path, path: str = "") -> str:
    expanded, unset = expand_path_variables(value, path)
    if unset:  # kept as written; check-config warns, verify_for_run refuses it
        return expanded
    p = Path(expanded).expanduser()
    return str(p if p.is_absolute() else (base_dir / p))


def _missing(path: str, problem: str, written: str, resolved: str) -> None:
    """A file that does not exist: an error now, unless it is a credential that only the unit provides."""
    deferred = _DEFERRED.get()
    _, unset = expand_path_variables(written, path)
    outside_unit = not os.environ.get("CREDENTIALS_DIRECTORY")
    if deferred is not None and (unset or (resolved.startswith(CREDENTIALS_ROOT) and outside_unit)):
        why = (f"${{{unset[0]}}} is not set" if unset else
               f"{CREDENTIALS_ROOT}… exists only inside the systemd unit (LoadCredential=)")
        deferred.append((path, problem, why, resolved))
        return
    raise ConfigError(path, problem)


@contextmanager
def _collect_deferred() -> Iterator[list[tuple[str, str, str, str]]]:
    found: list[tuple[str, str, str, str]] = []
    token = _DEFERRED.set(found)
    try:
        yield found
    finally:
        _DEFERRED.reset(token)


def verify_for_run(cfg: Config) -> None:
    """Refuse to start with what ``load_config`` let pass for ``check-config``: an unresolved ``state_dir``, a
    missing secret or certificate file.  Raises :class:`ConfigError` naming the key."""
    if _VARIABLE.search(cfg.site.state_dir):
        _, unset = expand_path_variables(cfg.site.state_dir, "site.state_dir")
        raise ConfigError("site.state_dir", f"{cfg.site.state_dir!r}: ${{{unset[0] if unset else '?'}}} is not "
                          f"set (systemd sets STATE_DIRECTORY from StateDirectory=); give --state-dir DIR")
    for path, problem, why, file in cfg.deferred:
        if not Path(file).is_file():
            raise ConfigError(path, f"{problem} ({why})")


def deferred_warnings(cfg: Config) -> list[str]:
    """The problems :func:`verify_for_run` will check again, as lines for ``check-config``."""
    lines = [f"{path}: {problem} ({why}; checked again when the daemon starts)"
             for path, problem, why, _file in cfg.deferred]
    if _VARIABLE.search(cfg.site.state_dir):
        lines.insert(0, f"site.state_dir: {cfg.site.state_dir!r} is not resolved here (STATE_DIRECTORY is set by "
                     f"systemd from StateDirectory=); outside the unit `edgevib run` needs --state-dir DIR")
    return lines


def parse_listen(value: str, path: str = "metrics.listen") -> tuple[str, int]:
    """``HOST:PORT`` (``[v6]:PORT`` for IPv6) → ``(host, port)``; port 0 picks a free port."""
    host, sep, port_s = value.rpartition(":")
    if not sep or not host:
        raise ConfigError(path, f"{value!r} is not HOST:PORT")
    host = host.strip("[]")
    try:
        port = int(port_s)
    except ValueError:
        raise ConfigError(path, f"port {port_s!r} is not a number") from None
    if not 0 <= port <= 65535:
        raise ConfigError(path, f"port {port} is outside 0..65535")
    return host, port


# ------------------------------------------------------------------------------------------------ sections


def _parse_mqtt_connection(t: _Table, base_dir: Path, default_client_id: str) -> MqttConnection:
    url = t.str("url")
    parts = urlsplit(url)
    if parts.scheme not in ("mqtt", "mqtts") or not parts.hostname:
        raise ConfigError(t.key("url"), f"{url!r} is not mqtt://host:port or mqtts://host:port")
    try:
        port = parts.port or (8883 if parts.scheme == "mqtts" else 1883)
    except ValueError as exc:
        raise ConfigError(t.key("url"), f"{url!r}: {exc}") from None
    if parts.username or parts.password:
        raise ConfigError(t.key("url"), "credentials in the URL are not accepted; use username and password_file "
                          "or password_env")
    rmin = t.float("reconnect_min_s", 0.5, lo=0.01, hi=3600.0)
    rmax = t.float("reconnect_max_s", 30.0, lo=0.01, hi=3600.0)
    if rmax < rmin:
        raise ConfigError(t.key("reconnect_max_s"), f"{rmax:g} s is below reconnect_min_s {rmin:g} s")
    cert = t.path_key("cert_file", base_dir)
    key = t.path_key("key_file", base_dir)
    if key is not None and cert is None:
        raise ConfigError(t.key("cert_file"), "key_file is given without cert_file")
    ca = t.path_key("ca_file", base_dir)
    key_password = t.secret("key_password", base_dir)
    if key_password is not None and cert is None:
        raise ConfigError(t.key("key_password_file"), "a key passphrase needs cert_file and key_file")
    tls = parts.scheme == "mqtts" or ca is not None or cert is not None
    return MqttConnection(
        url=url, host=parts.hostname, port=port, tls=tls,
        protocol=t.str("protocol", "3.1.1", choices=("3.1.1", "5")),
        client_id=t.str("client_id", default_client_id),
        keepalive_s=t.float("keepalive_s", 30.0, lo=5.0, hi=3600.0),
        reconnect_min_s=rmin, reconnect_max_s=rmax,
        username=t.str("username", None), password=t.secret("password", base_dir),
        ca_file=ca, cert_file=cert, key_file=key, key_password=key_password,
    )


def _valid_filter(topic: str) -> str | None:
    levels = topic.split("/")
    for i, level in enumerate(levels):
        if "#" in level and (level != "#" or i != len(levels) - 1):
            return "'#' must be a whole last level"
        if "+" in level and level != "+":
            return "'+' must be a whole level"
    return None


def _parse_source(t: _Table, base_dir: Path, site: str) -> SourceConfig:
    name = t.str("name")
    kind = t.str("type", choices=("mqtt", "opcua", "simulated"))
    src: SourceConfig
    if kind == "mqtt":
        conn = _parse_mqtt_connection(t, base_dir, f"edgevib-{site}-{name}")
        topics = t.str_list("topics")
        if not topics:
            raise ConfigError(t.key("topics"), "needs at least one topic filter")
        for i, topic in enumerate(topics):
            problem = _valid_filter(topic)
            if problem:
                raise ConfigError(f"{t.key('topics')}[{i}]", f"invalid topic filter {topic!r}: {problem}")
        sensor_from = t.str("sensor_from", "payload")
        if sensor_from != "payload":
            level = sensor_from.removeprefix("topic:")
            if not sensor_from.startswith("topic:") or not level.isdigit():
                raise ConfigError(t.key("sensor_from"), f"{sensor_from!r} is not \"payload\" or \"topic:N\"")
        src = MqttSourceConfig(
            name=name, connection=conn, topics=topics, qos=t.int("qos", 1, lo=0, hi=1), sensor_from=sensor_from,
            max_payload_bytes=t.int("max_payload_bytes", DEFAULT_MAX_PAYLOAD_BYTES, lo=64, hi=64 * 1024 * 1024))
    elif kind == "opcua":
        endpoint = t.str("endpoint")
        if not endpoint.startswith("opc.tcp://"):
            raise ConfigError(t.key("endpoint"), f"{endpoint!r} is not an opc.tcp:// URL")
        policy = t.str("security_policy", "None", choices=("None", "Basic256Sha256"))
        src = OpcUaSourceConfig(
            name=name, endpoint=endpoint, mode=t.str("mode", "subscribe", choices=("subscribe", "poll")),
            poll_interval_s=t.float("poll_interval_s", 1.0, lo=0.01, hi=3600.0), security_policy=policy,
            security_mode=t.str("security_mode", "SignAndEncrypt", choices=("Sign", "SignAndEncrypt")),
            cert_file=t.path_key("cert_file", base_dir), key_file=t.path_key("key_file", base_dir),
            server_cert_file=t.path_key("server_cert_file", base_dir),
            username=t.str("username", None), password=t.secret("password", base_dir),
            reconnect_min_s=t.float("reconnect_min_s", 0.5, lo=0.01, hi=3600.0),
            reconnect_max_s=t.float("reconnect_max_s", 30.0, lo=0.01, hi=3600.0))
        if policy != "None" and (src.cert_file is None or src.key_file is None):
            raise ConfigError(t.key("security_policy"), f"{policy} needs cert_file and key_file")
    else:
        src = SimulatedSourceConfig(name=name, scenario=t.str("scenario", "demo"), seed=t.int("seed", 0, lo=0),
                                    rate=t.float("rate", 1.0, lo=0.01, hi=1000.0))
    t.done()
    return src


def _parse_speed_tag(t: _Table, sources: dict[str, SourceConfig]) -> SpeedTag:
    source = t.str("source")
    if source not in sources:
        raise ConfigError(t.key("source"), f"unknown source {source!r} (configured: {', '.join(sources) or 'none'})")
    kind = sources[source].type
    topic, node = t.str("topic", None), t.str("node", None)
    if kind != "opcua" and topic is None:
        raise ConfigError(t.key("topic"), f"source {source!r} is {kind}: the speed tag needs a topic")
    if kind == "opcua" and node is None:
        raise ConfigError(t.key("node"), f"source {source!r} is OPC UA: the speed tag needs a node")
    tag = SpeedTag(source=source, topic=topic if kind != "opcua" else None, node=node if kind == "opcua" else None,
                   unit=t.str("unit", "rpm", choices=("rpm", "hz")),
                   max_age_s=t.float("max_age_s", 60.0, lo=0.1, hi=86400.0))
    t.done()
    return tag


def _parse_machine(t: _Table, sources: dict[str, SourceConfig]) -> MachineConfig:
    mid = t.str("id")
    if not mid:
        raise ConfigError(t.key("id"), "must not be empty")
    group = t.int("group", None, lo=1, hi=2)
    support = t.str("support", None, choices=("rigid", "flexible"))
    if (group is None) != (support is None):
        raise ConfigError(t.key("group" if group is None else "support"),
                          "ISO 20816-3 zones need both group and support")
    speed_rpm = t.float("speed_rpm", None, lo=0.0, hi=120000.0, lo_open=True)
    tag_t = t.table("speed_tag")
    if speed_rpm is not None and tag_t is not None:
        raise ConfigError(t.key("speed_tag"), "give either speed_rpm (fixed) or speed_tag, not both")
    speed_tag = _parse_speed_tag(tag_t, sources) if tag_t is not None else None
    rng = t.pair("speed_range_rpm", (300.0, 3600.0))
    if rng[0] <= 0:
        raise ConfigError(t.key("speed_range_rpm"), f"low edge {rng[0]:g} r/min must be > 0")
    m = MachineConfig(id=mid, description=t.str("description", ""), group=group, support=support,
                      speed_rpm=speed_rpm, speed_tag=speed_tag, speed_range_rpm=rng,
                      run_threshold_rpm=t.float("run_threshold_rpm", 60.0, lo=0.0))
    t.done()
    return m


def _parse_bearing(t: _Table) -> BearingConfig:
    b = BearingConfig(elements=t.int("elements"), ball_diameter_mm=t.float("ball_diameter_mm"),
                      pitch_diameter_mm=t.float("pitch_diameter_mm"),
                      contact_angle_deg=t.float("contact_angle_deg", 0.0))
    t.done()
    problem = None
    if b.elements < 3:
        problem = f"{b.elements} rolling elements: a bearing needs at least 3"
    elif b.ball_diameter_mm <= 0 or b.pitch_diameter_mm <= 0:
        problem = f"diameters must be > 0 (ball {b.ball_diameter_mm:g} mm, pitch {b.pitch_diameter_mm:g} mm)"
    elif b.ball_diameter_mm >= b.pitch_diameter_mm:
        problem = (f"ball diameter {b.ball_diameter_mm:g} mm must be below the pitch diameter "
                   f"{b.pitch_diameter_mm:g} mm")
    elif not 0.0 <= b.contact_angle_deg < 90.0:
        problem = f"contact angle {b.contact_angle_deg:g}° is outside 0..90°"
    elif b.elements * b.ball_diameter_mm > math.pi * b.pitch_diameter_mm:
        problem = (f"{b.elements} elements of {b.ball_diameter_mm:g} mm do not fit on a pitch circle of "
                   f"{b.pitch_diameter_mm:g} mm (circumference {math.pi * b.pitch_diameter_mm:.1f} mm)")
    if problem:
        raise ConfigError(t.path, f"impossible bearing geometry: {problem}")
    try:
        validate_geometry(BearingGeometry(b.elements, b.ball_diameter_mm, b.pitch_diameter_mm, b.contact_angle_deg))
    except PipelineError as exc:
        raise ConfigError(t.path, f"impossible bearing geometry: {exc}") from None
    return b


def _default_envelope_band(fs_hz: float, bandwidth_hz: tuple[float, float],
                           shaft_hz_max: float | None) -> tuple[float, float] | None:
    band = default_envelope_band(fs_hz, bandwidth_hz, shaft_hz_max=shaft_hz_max)
    return None if band is None else (float(band[0]), float(band[1]))


def _parse_point(t: _Table, machines: dict[str, MachineConfig], sources: dict[str, SourceConfig],
                 analysis: AnalysisConfig) -> PointConfig:
    pid = t.str("id")
    if not pid:
        raise ConfigError(t.key("id"), "must not be empty")
    machine = t.str("machine")
    if machine not in machines:
        raise ConfigError(t.key("machine"),
                          f"unknown machine {machine!r} (configured: {', '.join(machines) or 'none'})")
    source = t.str("source")
    if source not in sources:
        raise ConfigError(t.key("source"), f"unknown source {source!r} (configured: {', '.join(sources) or 'none'})")
    fs = t.float("fs_hz", lo=1.0, hi=1e6)
    nyquist = fs / 2
    block = t.int("block_samples", lo=1, hi=DEFAULT_MAX_SAMPLES)
    sensor_type = t.str("sensor_type", "piezo", choices=("piezo", "mems"))
    bandwidth = t.pair("bandwidth_hz", (0.5, 10000.0) if sensor_type == "piezo" else (0.0, 1000.0))
    vband = t.pair("velocity_band_hz", (10.0, 1000.0), lo=0.0)
    if vband[0] <= 0:
        raise ConfigError(t.key("velocity_band_hz"), f"low edge {vband[0]:g} Hz must be > 0 (integration)")
    if vband[1] >= nyquist:
        raise ConfigError(t.key("velocity_band_hz"),
                          f"high edge {vband[1]:g} Hz is at or above Nyquist {nyquist:g} Hz (fs_hz {fs:g})")
    frame = t.int("frame_samples", analysis.frame_samples, lo=MIN_FRAME_SAMPLES, hi=MAX_FRAME_SAMPLES)
    overlap = t.float("overlap", analysis.overlap, lo=0.0, hi=0.95)
    m = machines[machine]
    speed_lo_hz = (m.speed_rpm if m.speed_rpm is not None else m.speed_range_rpm[0]) / 60.0
    speed_hi_hz = (m.speed_rpm if m.speed_rpm is not None else m.speed_range_rpm[1]) / 60.0
    frame_s = frame / fs
    if fs / frame > vband[0] / 2:
        need = math.ceil(2 * fs / vband[0])
        raise ConfigError(t.key("frame_samples"),
                          f"frame of {frame} samples at {fs:g} Hz is too short: its {fs / frame:.3g} Hz resolution "
                          f"cannot resolve the velocity band's {vband[0]:g} Hz low edge (needs >= {need} samples)")
    if frame_s < 2.0 / speed_lo_hz:
        need = math.ceil(2.0 / speed_lo_hz * fs)
        raise ConfigError(t.key("frame_samples"),
                          f"frame of {frame} samples ({frame_s:.3g} s) is too short for two revolutions at "
                          f"{speed_lo_hz * 60:g} r/min (needs >= {need} samples)")
    env_note = None
    if t.has("envelope_band_hz"):
        env = t.pair("envelope_band_hz")
        if env[1] >= nyquist:
            raise ConfigError(t.key("envelope_band_hz"),
                              f"high edge {env[1]:g} Hz is at or above Nyquist {nyquist:g} Hz (fs_hz {fs:g})")
        if env[1] > bandwidth[1]:
            raise ConfigError(t.key("envelope_band_hz"),
                              f"high edge {env[1]:g} Hz is above the sensor's usable bandwidth {bandwidth[1]:g} Hz")
        if env[0] < bandwidth[0]:
            raise ConfigError(t.key("envelope_band_hz"),
                              f"low edge {env[0]:g} Hz is below the sensor's usable bandwidth {bandwidth[0]:g} Hz")
    else:
        t.used.add("envelope_band_hz")
        env = _default_envelope_band(fs, bandwidth, speed_hi_hz)
        if env is None:
            env_note = (f"{sensor_type} sensor with usable bandwidth up to {bandwidth[1]:g} Hz at fs {fs:g} Hz "
                        f"cannot carry an envelope demodulation band: no envelope indicators for this point")
    bearing_t = t.table("bearing")
    bearing = _parse_bearing(bearing_t) if bearing_t is not None else None
    orders_raw = t.raw("orders", [0.5, 1.0, 2.0, 3.0])
    if not isinstance(orders_raw, list) or not orders_raw:
        raise ConfigError(t.key("orders"), "must be a non-empty array of positive numbers")
    orders = tuple(_Table._number(f"{t.key('orders')}[{i}]", o) for i, o in enumerate(orders_raw))
    if any(o <= 0 or o > 100 for o in orders):
        raise ConfigError(t.key("orders"), f"orders {list(orders)} must be in (0, 100]")
    if max(orders) * speed_hi_hz >= nyquist:
        raise ConfigError(t.key("orders"), f"order {max(orders):g}× at {speed_hi_hz * 60:g} r/min is at or above "
                          f"Nyquist {nyquist:g} Hz")
    node = t.str("node", None)
    if sources[source].type == "opcua" and node is None:
        raise ConfigError(t.key("node"), f"source {source!r} is OPC UA: the point needs the node id of its array")
    limits = t.raw("limits")
    if limits is not None and not isinstance(limits, dict):
        raise ConfigError(t.key("limits"), f"must be a table, got {_type_name(limits)}")
    p = PointConfig(
        id=pid, machine=machine, source=source, sensor=t.str("sensor", pid), fs_hz=fs, block_samples=block,
        axis=t.str("axis", "radial", choices=("horizontal", "vertical", "axial", "radial")),
        description=t.str("description", ""), sensor_type=sensor_type,
        sensitivity_mv_per_g=t.float("sensitivity_mv_per_g", None, lo=0.0, lo_open=True),
        bandwidth_hz=bandwidth, velocity_band_hz=vband, envelope_band_hz=env, envelope_note=env_note,
        bearing=bearing, orders=orders, frame_samples=frame, overlap=overlap, node=node,
        unit=t.str("unit", "g", choices=("g", "m/s2")), limits=limits)
    t.done()
    _check_plan(p, m, t.path)
    return p


def _check_plan(p: PointConfig, m: MachineConfig, path: str) -> None:
    """Let the numerical core validate the plan when it is available (its PlanError names the problem)."""
    from edgevib.daemon.frames import build_plan  # frames imports this module

    try:
        build_plan(p, m)
    except PipelineError as exc:
        raise ConfigError(path, f"analysis plan rejected: {exc}") from None


# ------------------------------------------------------------------------------------------------ entry points


def load_config(path: str | os.PathLike[str]) -> Config:
    """Read and validate a TOML configuration file."""
    p = Path(path)
    try:
        data = p.read_bytes()
    except OSError as exc:
        raise ConfigError("", f"cannot read the file: {exc.strerror}") from None
    try:
        doc = tomllib.loads(data.decode("utf-8"))
    except (UnicodeDecodeError, tomllib.TOMLDecodeError) as exc:
        raise ConfigError("", f"not valid TOML: {exc}") from None
    return parse_config(doc, p.resolve().parent, digest=hashlib.sha256(data).hexdigest()[:16])


def parse_config(doc: dict[str, Any], base_dir: str | os.PathLike[str] = ".", digest: str = "") -> Config:
    """Validate a parsed TOML document; relative file paths resolve against ``base_dir``."""
    with _collect_deferred() as deferred:
        cfg = _parse_config(doc, Path(base_dir), digest)
        return replace(cfg, deferred=tuple(deferred))


def _parse_config(doc: dict[str, Any], base: Path, digest: str) -> Config:
    root = _Table(doc, "")
    site_t = root.table("site") or _Table({}, "site")
    site_name = site_t.str("name", "edgevib")
    if not site_name or not all(c.isalnum() or c in "-_." for c in site_name):
        raise ConfigError("site.name", f"{site_name!r} must be non-empty letters, digits, '-', '_' or '.'")
    state_dir = _resolve_path(site_t.str("state_dir", default_state_dir()), base, "site.state_dir")
    shard_t = site_t.table("shard")

    log_t = root.table("logging") or _Table({}, "logging")
    logging_cfg = LoggingConfig(level=log_t.str("level", "info", choices=("debug", "info", "warning", "error")),
                                format=log_t.str("format", "auto", choices=("auto", "json", "console")))
    log_t.done()

    met_t = root.table("metrics") or _Table({}, "metrics")
    listen = met_t.str("listen", "127.0.0.1:9851")
    host, port = parse_listen(listen)
    metrics = MetricsConfig(listen=listen, host=host, port=port,
                            tls_cert_file=met_t.path_key("tls_cert_file", base),
                            tls_key_file=met_t.path_key("tls_key_file", base),
                            tls_client_ca_file=met_t.path_key("tls_client_ca_file", base))
    if (metrics.tls_cert_file is None) != (metrics.tls_key_file is None):
        raise ConfigError("metrics.tls_cert_file", "TLS needs both tls_cert_file and tls_key_file")
    if metrics.tls_client_ca_file is not None and metrics.tls_cert_file is None:
        raise ConfigError("metrics.tls_client_ca_file", "client certificates need TLS (tls_cert_file, tls_key_file)")
    met_t.done()

    an_t = root.table("analysis") or _Table({}, "analysis")
    analysis = AnalysisConfig(
        frame_samples=an_t.int("frame_samples", 16384, lo=MIN_FRAME_SAMPLES, hi=MAX_FRAME_SAMPLES),
        overlap=an_t.float("overlap", 0.5, lo=0.0, hi=0.95),
        queue_frames=an_t.int("queue_frames", 4, lo=1, hi=1024),
        workers=an_t.int("workers", 1, lo=1, hi=64),
        trend_halflife_s=an_t.float("trend_halflife_s", 600.0, lo=0.0, lo_open=True))
    an_t.done()

    sources: dict[str, SourceConfig] = {}
    for t in root.tables("sources"):
        s = _parse_source(t, base, site_name)
        if s.name in sources:
            raise ConfigError(t.key("name"), f"duplicate source name {s.name!r}")
        sources[s.name] = s

    machines: dict[str, MachineConfig] = {}
    for t in root.tables("machines"):
        m = _parse_machine(t, sources)
        if m.id in machines:
            raise ConfigError(t.key("id"), f"duplicate machine id {m.id!r}")
        machines[m.id] = m

    point_tables = root.tables("points")
    if len(point_tables) > MAX_POINTS:
        raise ConfigError("points", f"{len(point_tables)} points exceed the limit of {MAX_POINTS} per instance")
    points: dict[str, PointConfig] = {}
    sensors: dict[tuple[str, str], str] = {}
    for t in point_tables:
        p = _parse_point(t, machines, sources, analysis)
        if p.id in points:
            raise ConfigError(t.key("id"), f"duplicate point id {p.id!r}")
        key = (p.source, p.sensor)
        if key in sensors:
            raise ConfigError(t.key("sensor"), f"sensor {p.sensor!r} on source {p.source!r} is already point "
                              f"{sensors[key]!r}")
        points[p.id] = p
        sensors[key] = p.id

    shard: Shard | None = None
    if shard_t is not None:
        shard = validate_shard(shard_t.doc, "site.shard")
        listed = shard.points
        unknown = sorted(set(listed or ()) - set(points))
        if unknown:
            raise ConfigError("site.shard.points", f"unknown point(s) {', '.join(unknown)}")
    site_t.done()
    site = SiteConfig(name=site_name, state_dir=state_dir, shard=shard)
    kept, skipped = list(points.values()), []
    if shard is not None:
        kept = [p for p in points.values() if owns_point(p.id, shard)]
        skipped = [p for p in points.values() if p not in kept]

    pub = root.table("publish")
    publish_mqtt, publish_opcua = PublishMqttConfig(), PublishOpcUaConfig()
    if pub is not None:
        pm = pub.table("mqtt")
        if pm is not None:
            publish_mqtt = _parse_publish_mqtt(pm, sources, base, site_name)
        po = pub.table("opcua")
        if po is not None:
            plisten = po.str("listen", "127.0.0.1:4841")
            phost, pport = parse_listen(plisten, po.key("listen"))
            if pport == 0:
                raise ConfigError(po.key("listen"), "the OPC UA server needs a fixed port (1..65535), not 0")
            publish_opcua = PublishOpcUaConfig(enabled=po.bool("enabled", False), listen=plisten, host=phost,
                                               port=pport, namespace=po.str("namespace", "urn:edgevib:indicators"))
            po.done()
        pub.done()

    alarm_tables: dict[str, Any] = {}
    for name in ALARM_TABLES:
        v = root.raw(name)
        if v is not None:
            if not isinstance(v, dict):
                raise ConfigError(name, f"must be a table, got {_type_name(v)}")
            alarm_tables[name] = v
    root.done()
    cfg = Config(site=site, logging=logging_cfg, metrics=metrics, analysis=analysis,
                 sources=tuple(sources.values()), machines=tuple(machines.values()), points=tuple(kept),
                 publish_mqtt=publish_mqtt, publish_opcua=publish_opcua, alarm_tables=alarm_tables,
                 skipped_points=tuple(p.id for p in skipped),
                 skipped_sensors=tuple((p.source, p.sensor) for p in skipped), base_dir=str(base), digest=digest)
    from edgevib.daemon.alarms.config import parse_alarm_config  # it builds on this module's helpers

    return replace(cfg, alarms=parse_alarm_config(doc, cfg))


def _parse_publish_mqtt(t: _Table, sources: dict[str, SourceConfig], base: Path, site: str) -> PublishMqttConfig:
    enabled = t.bool("enabled", False)
    source = t.str("source", None)
    conn: MqttConnection | None = None
    if source is not None and t.has("url"):
        raise ConfigError(t.key("url"), "give either source (reuse its broker settings) or url, not both")
    if source is not None:
        src = sources.get(source)
        if src is None:
            raise ConfigError(t.key("source"), f"unknown source {source!r} (configured: {', '.join(sources)})")
        if not isinstance(src, MqttSourceConfig):
            raise ConfigError(t.key("source"), f"source {source!r} is {src.type}, not mqtt")
        conn = replace(src.connection, client_id=src.connection.client_id + "-publish")
    elif t.has("url"):
        conn = _parse_mqtt_connection(t, base, f"edgevib-{site}-publish")
    elif enabled:
        raise ConfigError(t.key("url"), "publishing needs a url or a source to reuse")
    topic = t.str("topic", "edgevib/{site}/{machine}/{point}/indicators")
    try:
        topic.format(site="s", machine="m", point="p")
    except (KeyError, IndexError, ValueError) as exc:
        raise ConfigError(t.key("topic"), f"template {topic!r} may only use {{site}}, {{machine}}, {{point}} "
                          f"({exc})") from None
    if "+" in topic or "#" in topic:
        raise ConfigError(t.key("topic"), f"a publish topic cannot contain wildcards: {topic!r}")
    cfg = PublishMqttConfig(enabled=enabled, source=source, connection=conn, topic=topic,
                            qos=t.int("qos", 0, lo=0, hi=1), retain=t.bool("retain", False))
    t.done()
    return cfg


# ------------------------------------------------------------------------------------------------ printing


def config_to_document(cfg: Config) -> dict[str, Any]:
    """The resolved configuration as a plain document (secrets as ``<from file …>``), for ``check-config``."""

    def conv(v: Any) -> Any:
        if isinstance(v, Secret):
            return repr(v)
        if is_dataclass(v) and not isinstance(v, type):
            return {f.name: conv(getattr(v, f.name)) for f in fields(v) if getattr(v, f.name) is not None}
        if isinstance(v, tuple | list):
            return [conv(x) for x in v]
        if isinstance(v, frozenset | set):
            return sorted(conv(x) for x in v)
        if isinstance(v, Mapping):
            return {str(k): conv(x) for k, x in v.items() if x is not None}
        return v

    doc = conv(cfg)
    for key in ("alarms", "base_dir", "digest", "skipped_sensors", "deferred"):
        doc.pop(key, None)
    if not doc.get("skipped_points"):
        doc.pop("skipped_points", None)
    tables = dict(doc.pop("alarm_tables", {}))
    if cfg.alarms is None:  # no alarm layer installed: its tables as written
        doc.update(tables)
    else:  # the alarm layer's tables ([alarms], [feed], [capture], per-point limits) as resolved
        settings = conv(cfg.alarms)
        if isinstance(settings, dict):
            settings.pop("config_digest", None)
            if isinstance(settings.get("socket_mode"), int):
                settings["socket_mode"] = f"{settings['socket_mode']:04o}"
        doc["alarm_settings"] = settings
    return dict(doc)


def _toml_value(v: Any) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, int | float):
        return repr(v)
    if isinstance(v, str):
        return '"' + v.replace("\\", "\\\\").replace('"', '\\"') + '"'
    if isinstance(v, list):
        return "[" + ", ".join(_toml_value(x) for x in v) + "]"
    if isinstance(v, dict):
        return "{ " + ", ".join(f"{_toml_key(k)} = {_toml_value(x)}" for k, x in v.items()) + " }"
    return _toml_value(str(v))


def _toml_key(k: str) -> str:
    return k if k and all(c.isalnum() or c in "-_" for c in k) else _toml_value(k)


def dump_toml(doc: Mapping[str, Any], prefix: str = "") -> str:
    """A small TOML writer for the resolved configuration (tables, arrays of tables, scalars, inline rest)."""
    lines: list[str] = []
    tables: list[tuple[str, Any]] = []
    for k, v in doc.items():
        nested = isinstance(v, dict) or (isinstance(v, list) and v and all(isinstance(x, dict) for x in v))
        if nested and prefix.count(".") < 2:  # [a] and [a.b] headers; deeper tables stay inline
            tables.append((k, v))
        else:
            lines.append(f"{_toml_key(k)} = {_toml_value(v)}")
    out = "\n".join(lines)
    for k, v in tables:
        name = f"{prefix}{_toml_key(k)}"
        if isinstance(v, list):
            for item in v:
                out += f"\n\n[[{name}]]\n" + dump_toml(item, prefix=name + ".")
        else:
            out += f"\n\n[{name}]\n" + dump_toml(v, prefix=name + ".")
    return out.strip("\n") + "\n" if not prefix else out.strip("\n")

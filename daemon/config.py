"""The daemon's configuration: one TOML file declared as pydantic models (annotated example:
``config/example-plant.toml``; reference: README "Configuration reference").

Each table is a frozen model whose field names are the TOML keys; ranges, choices and required keys are declared
on the fields, rules that tie a table's keys together in its validator.  :func:`load_config` /
:func:`parse_config` then resolve what needs the whole file — references between tables (a point's machine and
source), defaults that depend on other tables (a point's frame length, its envelope band, client ids), file paths
— check every point's analysis plan once with the numerical core (``make_plan`` decides feasibility), and resolve
the alarm layer's settings.  Every problem is a :class:`~edgevib.daemon.interfaces.ConfigError` naming the dotted
key path (``points[1].envelope_band_hz``), the value and the allowed range; an unknown key says which key was
meant.  :func:`config_to_document` and :func:`dump_toml` print the resolved configuration so that it loads back to
the same configuration.

Secrets are never read from the TOML itself: ``NAME_file`` / ``NAME_env`` keys give a :class:`Secret` that only
reveals its value on request.  File paths (``*_file`` keys, ``site.state_dir``, the alarm layer's socket and
capture directory) may use ``${CREDENTIALS_DIRECTORY}`` and ``${STATE_DIRECTORY}`` (systemd ``LoadCredential=`` /
``StateDirectory=``; the first entry of a colon-separated list); no other variable is expanded.  Outside the unit
those are unset, and a credential under an unset ``${CREDENTIALS_DIRECTORY}`` or under ``/run/credentials/`` cannot
exist yet: loading then records the problem in ``Config.deferred`` instead of failing, ``check-config`` prints it
as a warning and :func:`verify_for_run` turns it into an error when the daemon starts.

Ids that end up in MQTT topics and OPC UA node ids (site name, machine and point ids) use a portable character
set (:data:`ID_CHARACTERS`): see :func:`check_id` for which brokers restrict what.

This module never imports the numerical core at import time (the simulator builds its emitted configuration with
these models and must not load ``edgevib.pipelines``); plan checks import it when a configuration is loaded.
"""

from __future__ import annotations

import contextlib
import difflib
import hashlib
import math
import os
import re
import tomllib
from collections.abc import Callable, Iterator, Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Annotated, Any, ClassVar, Literal
from urllib.parse import quote, urlsplit

from pydantic import (
    AfterValidator,
    AllowInfNan,
    BaseModel,
    BeforeValidator,
    ConfigDict,
    Field,
    PlainSerializer,
    PlainValidator,
    PrivateAttr,
    SerializerFunctionWrapHandler,
    Strict,
    ValidationError,
    ValidatorFunctionWrapHandler,
    model_serializer,
    model_validator,
)

from edgevib.common.bands import envelope_band, min_frame_samples
from edgevib.common.toml_writer import dump_toml
from edgevib.common.wire import DEFAULT_MAX_PAYLOAD_BYTES, DEFAULT_MAX_SAMPLES
from edgevib.daemon.errors import ConfigError
from edgevib.daemon.indicators import LIMITABLE
from edgevib.daemon.shard import MAX_SHARDS, shard_of

if TYPE_CHECKING:
    from pydantic_core import ErrorDetails, InitErrorDetails

    from edgevib.daemon.alarms.config import AlarmSettings
    from edgevib.pipelines.types import AnalysisPlan, BearingGeometry

__all__ = [
    "ID_CHARACTERS",
    "AlarmsConfig",
    "AnalysisConfig",
    "BearingConfig",
    "CaptureConfig",
    "Config",
    "FeedConfig",
    "HistoryConfig",
    "LevelRule",
    "LimitConfigTable",
    "LoggingConfig",
    "MachineConfig",
    "MetricsConfig",
    "MqttConnection",
    "MqttSourceConfig",
    "OpcUaSourceConfig",
    "PointConfig",
    "PointLimits",
    "PublishMqttConfig",
    "PublishOpcUaConfig",
    "Secret",
    "ShardConfig",
    "SimulatedSourceConfig",
    "SiteConfig",
    "SourceConfig",
    "SpeedTag",
    "TrendConfig",
    "TrendLimit",
    "ViewConfig",
    "WebhookConfig",
    "check_id",
    "config_to_document",
    "default_state_dir",
    "deferred_warnings",
    "dump_toml",
    "expand_path_variables",
    "load_config",
    "parse_config",
    "parse_listen",
    "plan_for",
    "validate_document",
    "verify_for_run",
]

MAX_POINTS = 1000
MAX_FRAME_SAMPLES = 1 << 20
MIN_FRAME_SAMPLES = 256
DEFAULT_STATE_DIR = "/var/lib/edgevib"
DEFAULT_MAX_PENDING_BYTES = 64 * 1024 * 1024
_URI_CHAR = r"[A-Za-z0-9\-._~:/?#\[\]@!$&'()*+,;=]"
_URI_REFERENCE = re.compile(rf"^(?:{_URI_CHAR}|%[0-9A-Fa-f]{{2}})+$")
_URI_SCHEME = re.compile(r"^[A-Za-z][A-Za-z0-9+.\-]*$")


def uri_reference_problem(value: str, absolute: bool = False) -> str | None:
    """Why ``value`` is not an RFC 3986 URI-reference (an absolute URI with ``absolute``), or ``None``."""
    if not value:
        return "must not be empty"
    if not _URI_REFERENCE.match(value):
        bad = sorted({c for c in re.sub(r"%[0-9A-Fa-f]{2}", "", value) if not re.match(_URI_CHAR, c)})
        return (f"is not a URI-reference (RFC 3986): {', '.join(repr(c) for c in bad)} must be percent-encoded"
                if bad else "is not a URI-reference (RFC 3986): '%' must start a %XX escape")
    head = re.split(r"[/?#]", value, maxsplit=1)[0]
    if ":" in head:
        if not _URI_SCHEME.match(head.split(":", 1)[0]):
            return (f"is not a URI-reference (RFC 3986): {head.split(':', 1)[0]!r} before ':' is not a scheme (a "
                    f"relative reference cannot have ':' in its first segment)")
    elif absolute:
        return "must be an absolute URI with a scheme (e.g. https://… or urn:…)"
    return None
PATH_VARIABLES = ("CREDENTIALS_DIRECTORY", "STATE_DIRECTORY")
CREDENTIALS_ROOT = "/run/credentials/"
ID_CHARACTERS = "A-Z a-z 0-9 - _"
MAX_ID_LENGTH = 128
_ID = re.compile(r"[A-Za-z0-9_-]+")
_VARIABLE = re.compile(r"\$\{([^}]*)\}")


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


# ------------------------------------------------------------------------------------------------ value types


class _Problem(ValueError):
    """A validator's finding about ``key`` (relative to the table validated; ``""`` for the table itself)."""

    def __init__(self, key: str, problem: str) -> None:
        super().__init__(problem)
        self.key = key
        self.problem = problem


class _Unknown(_Problem):
    """A key that its table does not declare (worded with the table's place in the file by :func:`_unknown`)."""

    def __init__(self, key: str, value: object, known: list[str]) -> None:
        super().__init__(key, "unknown key")
        self.value = value
        self.known = known


def _text(v: str) -> str:
    if any(ord(c) < 32 for c in v):
        raise ValueError("contains control characters")
    return v


def check_id(v: str) -> str:
    """Check an id that becomes an MQTT topic level and part of OPC UA node ids (site, machine, point; a source's
    name is a level of the source events' topic).

    MQTT (3.1.1 §4.7, 5.0 §4.7): ``+`` and ``#`` are wildcards and may not appear in a topic a client publishes to,
    ``/`` separates levels, U+0000 is forbidden, a leading ``$`` is reserved for the broker.  NATS-based brokers
    (the NATS server's MQTT gateway) map levels onto subject tokens: ``.`` separates tokens there (refused by older
    releases, rewritten to ``//`` by newer ones) and a space is always refused; ``*`` and ``>`` are NATS wildcards.
    OPC UA node ids here are ``site/machine/point``.  So ids keep to :data:`ID_CHARACTERS` (ASCII letters, digits,
    ``-`` and ``_``), at most :data:`MAX_ID_LENGTH` characters: valid on every broker we know of.
    """
    if not v:
        raise ValueError("must not be empty")
    if len(v) > MAX_ID_LENGTH:
        raise ValueError(f"{len(v)} characters: at most {MAX_ID_LENGTH}")
    if _ID.fullmatch(v) is None:
        bad = "".join(sorted({c for c in v if _ID.fullmatch(c) is None}))
        why = []
        if set(bad) & set("+#"):
            why.append("'+' and '#' are MQTT wildcards: no message could be published on its topics")
        if "/" in bad:
            why.append("'/' separates MQTT topic levels and OPC UA node-id parts")
        if set(bad) & set(". *>"):
            why.append("'.', ' ', '*' and '>' break NATS-based brokers")
        reason = "; ".join(why) or "outside the portable set"
        raise ValueError(f"{v!r} contains {bad!r}: ids use only {ID_CHARACTERS} ({reason})")
    return v


def _pair_shape(v: object) -> object:
    if not isinstance(v, list | tuple) or len(v) != 2:
        raise ValueError(f"must be a [low, high] pair of numbers, got {v!r}")
    return v


def _ordered(v: tuple[float, float]) -> tuple[float, float]:
    a, b = v
    if a < 0:
        raise ValueError(f"low edge {a:g} is below 0")
    if not a < b:
        raise ValueError(f"low edge {a:g} must be below high edge {b:g}")
    return v


def _band_setting(v: object) -> tuple[float, float] | str:
    """A point's demodulation band: ``[low, high]`` in Hz or ``"auto"``."""
    if v == "auto":
        return "auto"
    if isinstance(v, str):
        raise ValueError(f"must be a [low, high] pair of numbers or \"auto\", got {v!r}")
    pair = _pair_shape(v)
    assert isinstance(pair, list | tuple)
    for x in pair:
        if isinstance(x, bool) or not isinstance(x, int | float) or not math.isfinite(x):
            raise ValueError(f"must be a [low, high] pair of finite numbers or \"auto\", got {v!r}")
    return _ordered((float(pair[0]), float(pair[1])))


def _level(v: object) -> LevelRule:
    """A limit level: a number, ``"iso"``, ``"iso-baseline"``, ``{ factor = F }`` or ``{ sigma = K }``."""
    if isinstance(v, LevelRule):
        return v
    if isinstance(v, bool):
        raise ValueError("must be a number, \"iso\", \"iso-baseline\", { factor = F } or { sigma = K }")
    if isinstance(v, int | float):
        if not math.isfinite(v):
            raise ValueError(f"must be finite, got {v!r}")
        return LevelRule("absolute", float(v))
    if isinstance(v, str):
        if v not in ("iso", "iso-baseline"):
            raise ValueError(f"{v!r} is not \"iso\" or \"iso-baseline\"")
        return LevelRule(v)  # type: ignore[arg-type]
    if isinstance(v, dict):
        if set(v) in ({"factor"}, {"sigma"}):
            ((kind, x),) = v.items()
            if isinstance(x, bool) or not isinstance(x, int | float) or not math.isfinite(x) or x <= 0:
                raise _Problem(kind, f"must be a number > 0, got {x!r}")
            if kind == "factor" and x <= 1.0:
                raise _Problem("factor", f"{x:g} must be above 1 (a limit above the baseline)")
            return LevelRule(kind, float(x))
        raise ValueError(f"a relative level is {{ factor = F }} or {{ sigma = K }}, got keys {sorted(v)}")
    raise ValueError(f"must be a number, a string or a table, got {_type_name(v)}")


@dataclass(frozen=True, slots=True)
class LevelRule:
    """How one level's set point is obtained (README "Per-point limits")."""

    kind: Literal["absolute", "iso", "iso-baseline", "factor", "sigma"]
    value: float = 0.0

    @property
    def needs_baseline(self) -> bool:
        return self.kind in ("iso-baseline", "factor", "sigma")

    def document(self) -> float | str | dict[str, float]:
        """The level as written in the file."""
        if self.kind == "absolute":
            return self.value
        if self.kind in ("iso", "iso-baseline"):
            return self.kind
        return {self.kind: self.value}


Float = Annotated[float, Strict(), AllowInfNan(False)]
Int = Annotated[int, Strict()]
Bool = Annotated[bool, Strict()]
Text = Annotated[str, Strict(), AfterValidator(_text)]
Id = Annotated[str, Strict(), AfterValidator(check_id)]
Pair = Annotated[tuple[Float, Float], BeforeValidator(_pair_shape), AfterValidator(_ordered)]
Level = Annotated[LevelRule, BeforeValidator(_level), PlainSerializer(LevelRule.document)]
BandSetting = Annotated[tuple[float, float] | Literal["auto"], PlainValidator(_band_setting),
                        PlainSerializer(lambda v: tuple(v) if isinstance(v, list | tuple) else v)]


class _Table(BaseModel):
    """A TOML table: unknown keys are errors, values are strict (no string→number, no bool→int), frozen."""

    model_config = ConfigDict(extra="forbid", frozen=True)

    @model_validator(mode="wrap")
    @classmethod
    def _known_keys(cls, data: Any, handler: ValidatorFunctionWrapHandler) -> Any:
        """Keys the table does not declare are reported together with the problems of the keys it does (each
        unknown key with the key that was probably meant; a misspelt required key is reported as the misspelling,
        not also as a missing key).  The table's own rules (its after validators, which tie keys together) run
        once all its keys are known."""
        known = cls._declared_keys()
        if not isinstance(data, dict) or known is None:
            return handler(data)
        undeclared = [cls._undeclared(str(key), value, known) for key, value in data.items() if key not in known]
        if not undeclared:
            return handler(data)
        meant = {(m,) for p in undeclared if isinstance(p, _Unknown) and (m := _meant(p.key, known)) is not None}
        errors: list[InitErrorDetails] = [{"type": "value_error", "loc": (), "input": data, "ctx": {"error": p}}
                                          for p in undeclared]
        try:
            handler({k: v for k, v in data.items() if k in known})
        except ValidationError as exc:
            errors += [_error_details(e) for e in exc.errors(include_url=False)
                       if not (e["type"] == "missing" and e["loc"] in meant)]
        raise ValidationError.from_exception_data(cls.__name__, errors)

    @classmethod
    def _declared_keys(cls) -> list[str] | None:
        """The keys the table takes (``None``: any key)."""
        if cls.model_config.get("extra") != "forbid":
            return None
        return [f.alias or n for n, f in cls.model_fields.items()]

    @classmethod
    def _undeclared(cls, key: str, value: object, known: list[str]) -> _Problem:
        """The problem with a key that the table does not declare."""
        return _Unknown(key, value, known)


class _WithSecrets(_Table):
    """A table with secrets given as ``NAME_file`` or ``NAME_env`` (never the secret itself)."""

    _SECRETS: ClassVar[tuple[str, ...]] = ()

    @classmethod
    def _undeclared(cls, key: str, value: object, known: list[str]) -> _Problem:
        if key in cls._SECRETS:
            return _Problem(key, f"secrets are not accepted in the configuration file; put it in a file and set "
                            f"{key}_file = \"/path\" (e.g. a systemd credential), or in an environment variable and "
                            f"set {key}_env = \"NAME\"")
        return super()._undeclared(key, value, known)

    @model_validator(mode="after")
    def _one_source_per_secret(self) -> _WithSecrets:
        for name in self._SECRETS:
            if getattr(self, f"{name}_file") is not None and getattr(self, f"{name}_env") is not None:
                raise _Problem(name, f"give either {name}_file or {name}_env, not both")
        return self

    def _secret(self, name: str) -> Secret | None:
        f, e = getattr(self, f"{name}_file"), getattr(self, f"{name}_env")
        return Secret("file", f) if f is not None else Secret("env", e) if e is not None else None


# ------------------------------------------------------------------------------------------------ tables


class ShardConfig(_Table):
    """``[site] shard``: ``{ count = N, index = I }`` (this instance keeps the points whose stable hash modulo N
    is I: :mod:`edgevib.daemon.shard`) or ``{ points = [...] }`` (an explicit list of point ids)."""

    count: Int | None = Field(None, ge=1, le=MAX_SHARDS)
    index: Int | None = Field(None, ge=0)
    points: tuple[Annotated[Text, Field(min_length=1)], ...] | None = Field(None, min_length=1)

    @model_validator(mode="after")
    def _one_form(self) -> ShardConfig:
        if self.points is not None:
            if self.count is not None or self.index is not None:
                raise _Problem("", "give either count and index, or points, not both")
            for i, p in enumerate(self.points):
                if p in self.points[:i]:
                    raise _Problem(f"points[{i}]", f"point {p!r} is listed twice")
        elif self.count is None or self.index is None:
            missing = " and ".join(k for k in ("count", "index") if getattr(self, k) is None)
            raise _Problem("", f"missing {missing}; a hash split needs both count and index (or give points)")
        elif self.index >= self.count:
            raise _Problem("index", f"{self.index} is out of range: must be below count {self.count}")
        return self

    def owns(self, point_id: str) -> bool:
        """Whether this instance owns ``point_id``."""
        if self.points is not None:
            return point_id in self.points
        assert self.count is not None and self.index is not None  # the table's rule
        return shard_of(point_id, self.count) == self.index


class SiteConfig(_Table):
    name: Id = "edgevib"
    state_dir: Text = Field(default_factory=lambda: default_state_dir())
    shard: ShardConfig | None = None


class LoggingConfig(_Table):
    level: Literal["debug", "info", "warning", "error"] = "info"
    format: Literal["auto", "json", "console"] = "auto"


def _listen(v: str) -> str:
    try:
        parse_listen(v)
    except ConfigError as exc:
        raise ValueError(exc.problem) from None
    return v


Listen = Annotated[Text, AfterValidator(_listen)]


class _Listens(_Table):
    """A table with a ``listen = "host:port"`` key (the default is each table's own)."""

    listen: Listen = "127.0.0.1:0"

    @property
    def host(self) -> str:
        return parse_listen(self.listen)[0]

    @property
    def port(self) -> int:
        return parse_listen(self.listen)[1]


class MetricsConfig(_Listens):
    listen: Listen = "127.0.0.1:9851"
    tls_cert_file: Text | None = None
    tls_key_file: Text | None = None
    tls_client_ca_file: Text | None = None

    @model_validator(mode="after")
    def _tls(self) -> MetricsConfig:
        if (self.tls_cert_file is None) != (self.tls_key_file is None):
            raise _Problem("tls_cert_file", "TLS needs both tls_cert_file and tls_key_file")
        if self.tls_client_ca_file is not None and self.tls_cert_file is None:
            raise _Problem("tls_client_ca_file", "client certificates need TLS (tls_cert_file, tls_key_file)")
        return self


class ViewConfig(_WithSecrets):
    """``[view]``: the page and JSON API on the metrics listener; acknowledging/shelving from the page only when
    ``actions`` is on and a caller authenticates (a client certificate, or a token of ``token_file``/``_env``)."""

    _SECRETS = ("token",)
    enabled: Bool = True
    actions: Bool = False
    token_file: Text | None = None
    token_env: Text | None = None
    recent_values: Int = Field(720, ge=10, le=100_000)
    recent_interval_s: Float = Field(5.0, ge=0.0, le=3600.0)

    @model_validator(mode="after")
    def _view(self) -> ViewConfig:
        if self.actions and not self.enabled:
            raise _Problem("actions", "actions need the view: [view] enabled = true")
        return self

    @property
    def token(self) -> Secret | None:
        """The operators' tokens (``NAME:TOKEN`` lines)."""
        return self._secret("token")


class AnalysisConfig(_Table):
    frame_samples: Int = Field(16384, ge=MIN_FRAME_SAMPLES, le=MAX_FRAME_SAMPLES)
    overlap: Float = Field(0.5, ge=0.0, le=0.95)
    queue_frames: Int = Field(4, ge=1, le=1024)
    workers: Int = Field(1, ge=1, le=64)
    trend_halflife_s: Float = Field(600.0, gt=0.0)
    band_auto_interval_s: Float = Field(3600.0, ge=10.0, le=30 * 86400.0)  # points with envelope_band_hz = "auto"


class MqttConnection(_WithSecrets):
    """The keys of a broker connection (an MQTT source, ``[publish.mqtt]`` and ``[feed]`` with their own url)."""

    _SECRETS = ("password", "key_password")
    url: Text | None = None
    protocol: Literal["3.1.1", "5"] = "3.1.1"
    client_id: Text = ""  # "" until loaded, then "edgevib-<site>-<name>"
    keepalive_s: Float = Field(30.0, ge=5.0, le=3600.0)
    reconnect_min_s: Float = Field(0.5, ge=0.01, le=3600.0)
    reconnect_max_s: Float = Field(30.0, ge=0.01, le=3600.0)
    ca_file: Text | None = None
    cert_file: Text | None = None
    key_file: Text | None = None
    key_password_file: Text | None = None
    key_password_env: Text | None = None
    username: Text | None = None
    password_file: Text | None = None
    password_env: Text | None = None

    @model_validator(mode="after")
    def _check_connection(self) -> MqttConnection:
        if self.url is not None:
            parts = urlsplit(self.url)
            if parts.scheme not in ("mqtt", "mqtts") or not parts.hostname:
                raise _Problem("url", f"{self.url!r} is not mqtt://host:port or mqtts://host:port")
            try:
                _ = parts.port
            except ValueError as exc:
                raise _Problem("url", f"{self.url!r}: {exc}") from None
            if parts.username or parts.password:
                raise _Problem("url", "credentials in the URL are not accepted; use username and password_file or "
                               "password_env")
        _not_below(self, "reconnect_min_s", "reconnect_max_s")
        if self.key_file is not None and self.cert_file is None:
            raise _Problem("cert_file", "key_file is given without cert_file")
        if (self.key_password_file or self.key_password_env) and self.cert_file is None:
            raise _Problem("key_password_file", "a key passphrase needs cert_file and key_file")
        return self

    @property
    def host(self) -> str:
        return str(urlsplit(self.url or "").hostname)

    @property
    def port(self) -> int:
        parts = urlsplit(self.url or "")
        return parts.port or (8883 if parts.scheme == "mqtts" else 1883)

    @property
    def tls(self) -> bool:
        return urlsplit(self.url or "").scheme == "mqtts" or self.ca_file is not None or self.cert_file is not None

    @property
    def password(self) -> Secret | None:
        return self._secret("password")

    @property
    def key_password(self) -> Secret | None:
        return self._secret("key_password")


def _valid_filter(topic: str) -> str | None:
    levels = topic.split("/")
    for i, level in enumerate(levels):
        if "#" in level and (level != "#" or i != len(levels) - 1):
            return "'#' must be a whole last level"
        if "+" in level and level != "+":
            return "'+' must be a whole level"
    return None


class MqttSourceConfig(MqttConnection):
    type: Literal["mqtt"]
    name: Id  # a topic level of the source events ([feed] source_topic), part of client ids
    topics: tuple[Annotated[Text, Field(min_length=1)], ...] = Field(min_length=1)
    qos: Int = Field(1, ge=0, le=1)
    sensor_from: Text = "payload"
    max_payload_bytes: Int = Field(DEFAULT_MAX_PAYLOAD_BYTES, ge=64, le=64 * 1024 * 1024)
    max_pending_bytes: Int = Field(DEFAULT_MAX_PENDING_BYTES, ge=1024, le=1 << 40)

    @model_validator(mode="after")
    def _source(self) -> MqttSourceConfig:
        if self.url is None:
            raise _Problem("url", "required key is missing")
        if self.max_pending_bytes < self.max_payload_bytes:
            raise _Problem("max_pending_bytes", f"{self.max_pending_bytes} bytes is below max_payload_bytes "
                           f"{self.max_payload_bytes}: not even one payload could wait for the event loop")
        for i, topic in enumerate(self.topics):
            problem = _valid_filter(topic)
            if problem:
                raise _Problem(f"topics[{i}]", f"invalid topic filter {topic!r}: {problem}")
        level = self.sensor_from.removeprefix("topic:")
        if self.sensor_from != "payload" and (not self.sensor_from.startswith("topic:") or not level.isdigit()):
            raise _Problem("sensor_from", f"{self.sensor_from!r} is not \"payload\" or \"topic:N\"")
        return self

    @property
    def connection(self) -> MqttConnection:
        return self

    @property
    def sensor_topic_level(self) -> int | None:
        return int(self.sensor_from.split(":", 1)[1]) if self.sensor_from.startswith("topic:") else None


class OpcUaSourceConfig(_WithSecrets):
    _SECRETS = ("password",)
    type: Literal["opcua"]
    name: Id  # a topic level of the source events ([feed] source_topic), part of client ids
    endpoint: Text
    mode: Literal["subscribe", "poll"] = "subscribe"
    poll_interval_s: Float = Field(1.0, ge=0.01, le=3600.0)
    security_policy: Literal["None", "Basic256Sha256"] = "None"
    security_mode: Literal["Sign", "SignAndEncrypt"] = "SignAndEncrypt"
    cert_file: Text | None = None
    key_file: Text | None = None
    server_cert_file: Text | None = None
    username: Text | None = None
    password_file: Text | None = None
    password_env: Text | None = None
    reconnect_min_s: Float = Field(0.5, ge=0.01, le=3600.0)
    # The backoff's cap: a server back after an outage is tried again within it (MQTT's paho loop is faster).
    reconnect_max_s: Float = Field(10.0, ge=0.01, le=3600.0)

    @model_validator(mode="after")
    def _opcua(self) -> OpcUaSourceConfig:
        _not_below(self, "reconnect_min_s", "reconnect_max_s")
        if not self.endpoint.startswith("opc.tcp://"):
            raise _Problem("endpoint", f"{self.endpoint!r} is not an opc.tcp:// URL")
        if self.security_policy != "None" and (self.cert_file is None or self.key_file is None):
            raise _Problem("security_policy", f"{self.security_policy} needs cert_file and key_file")
        return self

    @property
    def password(self) -> Secret | None:
        return self._secret("password")


class SimulatedSourceConfig(_Table):
    type: Literal["simulated"]
    name: Id  # a topic level of the source events ([feed] source_topic), part of client ids
    scenario: Text = "demo"
    seed: Int = Field(0, ge=0)
    rate: Float = Field(1.0, ge=0.01, le=1000.0)


SourceConfig = Annotated[MqttSourceConfig | OpcUaSourceConfig | SimulatedSourceConfig, Field(discriminator="type")]
_SOURCE_TYPES = ("mqtt", "opcua", "simulated")


def _fill(key: str, template: str, names: tuple[str, ...], sample: str = "x") -> str:
    """``template`` (the value of ``key``) with each of its placeholders ``names`` set to ``sample``; any other
    placeholder is a problem of ``key``."""
    try:
        return template.format(**dict.fromkeys(names, sample))
    except (KeyError, IndexError, ValueError) as exc:
        raise _Problem(key, f"template {template!r} may only use {', '.join('{' + n + '}' for n in names)} "
                       f"({exc})") from None


def _check_topics(table: BaseModel, **names: tuple[str, ...]) -> None:
    """Each topic template ``key`` of ``table`` (``""``: none) uses only its placeholders ``names[key]`` and no
    wildcard."""
    for key, allowed in names.items():
        value = getattr(table, key)
        if not value:
            continue
        _fill(key, value, allowed)
        if "+" in value or "#" in value:
            raise _Problem(key, f"a topic to publish on cannot contain wildcards: {value!r}")


class _ReusesSource(MqttConnection):
    """A publisher's broker: ``source`` (reuse an MQTT source's connection) or its own connection keys."""

    _SUFFIX: ClassVar[str] = ""
    source: Text | None = None
    _broker: MqttConnection | None = PrivateAttr(None)

    @model_validator(mode="after")
    def _source_or_url(self) -> _ReusesSource:
        given = [k for k in MqttConnection.model_fields if k in self.model_fields_set]
        if self.source is not None and given:
            raise _Problem(given[0], "give either source (reuse its broker settings) or url and its connection "
                           "keys, not both")
        return self

    @model_serializer(mode="wrap")
    def _without_unused_connection(self, handler: SerializerFunctionWrapHandler) -> dict[str, Any]:
        out: dict[str, Any] = handler(self)
        if self.source is not None or self.url is None:  # no connection of its own
            for k in MqttConnection.model_fields:
                out.pop(k, None)
        return out

    @property
    def connection(self) -> MqttConnection | None:
        """The broker connection (resolved when the configuration is loaded); None without a broker."""
        return self._broker


class PublishMqttConfig(_ReusesSource):
    _SUFFIX = "publish"
    enabled: Bool = False
    topic: Text = "edgevib/{site}/{machine}/{point}/indicators"
    qos: Int = Field(0, ge=0, le=1)
    retain: Bool = False
    message_expiry_s: Float = Field(0.0, ge=0.0, le=4294967295.0)  # MQTT 5 Message Expiry Interval; 0: none
    availability_topic: Text = ""  # retained online/offline and Last Will ({site}); "": none

    @model_validator(mode="after")
    def _publish(self) -> PublishMqttConfig:
        _check_topics(self, topic=("site", "machine", "point"), availability_topic=("site",))
        if self.enabled and self.source is None and self.url is None:
            raise _Problem("url", "publishing needs a url or a source to reuse")
        return self


class PublishOpcUaConfig(_Listens):
    enabled: Bool = False
    listen: Listen = "127.0.0.1:4841"
    namespace: Text = "urn:edgevib:indicators"
    cert_file: Text | None = None  # application certificate for Basic256Sha256 (default: made in state_dir)
    key_file: Text | None = None

    @model_validator(mode="after")
    def _port(self) -> PublishOpcUaConfig:
        if self.port == 0:
            raise _Problem("listen", "the OPC UA server needs a fixed port (1..65535), not 0")
        return self


class PublishConfig(_Table):
    mqtt: PublishMqttConfig = Field(default_factory=PublishMqttConfig)
    opcua: PublishOpcUaConfig = Field(default_factory=PublishOpcUaConfig)


class SpeedTag(_Table):
    source: Text
    topic: Text | None = None  # MQTT and the in-process simulator
    node: Text | None = None   # OPC UA
    unit: Literal["rpm", "hz"] = "rpm"
    max_age_s: Float = Field(60.0, ge=0.1, le=86400.0)

    @property
    def tag(self) -> str:
        return self.topic if self.topic is not None else str(self.node)

    def to_hz(self, value: float) -> float:
        return value / 60.0 if self.unit == "rpm" else value


class MachineConfig(_Table):
    id: Id
    description: Text = ""
    group: Int | None = Field(None, ge=1, le=2)
    support: Literal["rigid", "flexible"] | None = None
    speed_rpm: Float | None = Field(None, gt=0.0, le=120000.0)
    speed_tag: SpeedTag | None = None
    speed_range_rpm: Pair = (300.0, 3600.0)
    run_threshold_rpm: Float = Field(60.0, ge=0.0)

    @model_validator(mode="after")
    def _machine(self) -> MachineConfig:
        if (self.group is None) != (self.support is None):
            raise _Problem("group" if self.group is None else "support",
                           "ISO 20816-3 zones need both group and support")
        if self.speed_rpm is not None and self.speed_tag is not None:
            raise _Problem("speed_tag", "give either speed_rpm (fixed) or speed_tag, not both")
        if self.speed_range_rpm[0] <= 0:
            raise _Problem("speed_range_rpm", f"low edge {self.speed_range_rpm[0]:g} r/min must be > 0")
        return self

    @property
    def speed_mode(self) -> str:
        return "fixed" if self.speed_rpm is not None else "tag" if self.speed_tag is not None else "estimated"

    @property
    def speed_range_hz(self) -> tuple[float, float]:
        """The shaft speeds the analysis plans for, Hz: ``speed_range_rpm``, or 0.5–1.5 × a fixed speed (given
        every frame, it only brackets the estimate)."""
        if self.speed_rpm is not None:
            return (0.5 * self.speed_rpm / 60.0, 1.5 * self.speed_rpm / 60.0)
        return (self.speed_range_rpm[0] / 60.0, self.speed_range_rpm[1] / 60.0)

    @property
    def top_speed_hz(self) -> float:
        """The highest running speed, Hz: the fixed speed, or the top of ``speed_range_rpm``."""
        return (self.speed_rpm if self.speed_rpm is not None else self.speed_range_rpm[1]) / 60.0


class BearingConfig(_Table):
    """Rolling-element bearing geometry; the numerical core checks that it is possible (``validate_geometry``)."""

    elements: Int
    ball_diameter_mm: Float
    pitch_diameter_mm: Float
    contact_angle_deg: Float = 0.0

    def geometry(self) -> BearingGeometry:
        """The numerical core's geometry (not yet validated: the plan does that)."""
        from edgevib.pipelines.types import BearingGeometry

        return BearingGeometry(self.elements, self.ball_diameter_mm, self.pitch_diameter_mm, self.contact_angle_deg)


class _Delays(_Table):
    """A table with alarm delays, each in frames or in seconds (not both)."""

    on_delay_frames: Int | None = Field(None, ge=1, le=10000)
    on_delay_s: Float | None = Field(None, ge=0.0, le=86400.0)
    off_delay_frames: Int | None = Field(None, ge=1, le=10000)
    off_delay_s: Float | None = Field(None, ge=0.0, le=86400.0)

    @model_validator(mode="after")
    def _one_delay(self) -> _Delays:
        for name in ("on_delay", "off_delay"):
            if getattr(self, f"{name}_frames") is not None and getattr(self, f"{name}_s") is not None:
                raise _Problem(f"{name}_s", f"give either {name}_frames or {name}_s, not both")
        return self


class LimitConfigTable(_Delays):
    """One ``[points.limits.INDICATOR]`` table (README "Per-point limits")."""

    alert: Level | None = None
    danger: Level | None = None
    rule: Literal["iso", "iso-baseline"] | None = None
    enabled: Bool = True
    deadband: Float | None = Field(None, ge=0.001, le=0.5)
    latching: Bool | None = None

    @model_validator(mode="after")
    def _limit(self) -> LimitConfigTable:
        if self.rule is not None and (self.alert is not None or self.danger is not None):
            raise _Problem("rule", "give either rule or alert/danger levels, not both")
        if self.enabled and self.rule is None and self.alert is None and self.danger is None:
            raise _Problem("", "a limit needs an alert and/or a danger level (or enabled = false)")
        a, d = self.alert, self.danger
        if a is not None and d is not None and a.kind == d.kind == "absolute" and d.value <= a.value:
            raise _Problem("danger", f"danger {d.value:g} must be above alert {a.value:g}")
        return self

    @property
    def levels(self) -> tuple[LevelRule | None, LevelRule | None]:
        """(alert, danger), with ``rule`` expanded (alert = rule, danger = "iso")."""
        if self.rule is not None:
            return LevelRule(self.rule), LevelRule("iso")
        return self.alert, self.danger


def _not_below(t: Any, low: str, high: str) -> None:
    """A backoff's cap ``high`` (s) is not below its start ``low``."""
    if getattr(t, high) < getattr(t, low):
        raise _Problem(high, f"{getattr(t, high):g} s is below {low} {getattr(t, low):g} s")


class _HealthThresholds(_Table):
    """Sensor-health thresholds; a key left out keeps the numerical core's default (README "[alarms.health]")."""

    flatline_std_g: Float | None = Field(None, gt=0.0)
    repeat_fraction: Float | None = Field(None, gt=0.0)
    clip_fraction: Float | None = Field(None, gt=0.0)
    mean_tolerance_g: Float | None = Field(None, gt=0.0)
    bias_window_v: Pair | None = None
    step_ratio: Float | None = Field(None, gt=0.0)
    step_floor_g: Float | None = Field(None, gt=0.0)
    spike_sigma: Float | None = Field(None, gt=0.0)
    noise_factor: Float | None = Field(None, gt=0.0)


class HealthConfig(_HealthThresholds):
    enabled: Bool = True


class PointHealth(_HealthThresholds):
    full_scale_g: Float | None = Field(None, gt=0.0)
    gravity_g: Float | None = Field(None, ge=-1.0, le=1.0)
    noise_ug_rthz: Float | None = Field(None, gt=0.0)
    noise_band_hz: Pair | None = None


class PointLimits(_Table):
    """A point's ``limits``: one table per indicator, plus ``health``."""

    model_config = ConfigDict(extra="allow", frozen=True)
    __pydantic_extra__: dict[str, LimitConfigTable] = Field(init=False)

    health: PointHealth | None = None

    @classmethod
    def _declared_keys(cls) -> list[str] | None:
        return ["health", *LIMITABLE]

    @classmethod
    def _undeclared(cls, key: str, value: object, known: list[str]) -> _Problem:
        return _Problem(key, _unknown_indicator(key, known, quoted=False))

    @model_validator(mode="before")
    @classmethod
    def _verdict_levels(cls, data: Any) -> Any:
        """A verdict limit (``bearing_<family>_detected``) is ``alert = true`` or ``danger = true``: the level is
        crossed when the family is detected (the indicator reads 1, otherwise 0; the level stands at 0.5)."""
        if not isinstance(data, dict):
            return data
        out = dict(data)
        for name, table in data.items():
            if not (isinstance(name, str) and name.endswith("_detected") and isinstance(table, dict)):
                continue
            if "rule" in table:
                raise _Problem(f"{name}.rule", "a verdict limit takes alert = true or danger = true, no rule")
            fixed = dict(table)
            if "alert" in table and "danger" in table:
                raise _Problem(f"{name}.danger", "a verdict limit takes alert = true or danger = true, not both")
            for level in ("alert", "danger"):
                if level not in table:
                    continue
                if table[level] is not True:
                    raise _Problem(f"{name}.{level}", f"a verdict limit is {level} = true (alarm while the family "
                                   f"is detected), got {table[level]!r}")
                fixed[level] = 0.5
            out[name] = fixed
        return out

    @model_serializer(mode="wrap")
    def _verdicts_as_written(self, handler: SerializerFunctionWrapHandler) -> dict[str, Any]:
        """A verdict limit prints as the file gives it (``alert = true`` / ``danger = true``), not as its internal
        level 0.5, so a printed configuration loads back."""
        out: dict[str, Any] = handler(self)
        for name, table in out.items():
            if name.endswith("_detected") and isinstance(table, dict):
                out[name] = {k: (True if k in ("alert", "danger") and v is not None else v) for k, v in table.items()}
        return out

    @model_validator(mode="after")
    def _indicators(self) -> PointLimits:
        for name, lim in self.indicators.items():
            for level, rule in (("alert", lim.alert), ("danger", lim.danger), ("rule", lim.rule)):
                kind = rule.kind if isinstance(rule, LevelRule) else rule
                if kind in ("iso", "iso-baseline") and name != "velocity_rms_mm_s":
                    raise _Problem(f"{name}.{level}", f"ISO 20816-3 zones apply to velocity_rms_mm_s only, not {name}")
            if lim.danger is not None and lim.danger.kind == "iso-baseline":
                raise _Problem(f"{name}.danger", "\"iso-baseline\" is an alert rule; danger stays at the ISO C/D "
                               "boundary (ISO 20816-3 guidance: trip-like values are never set from the baseline)")
            if name == "velocity_rms_mm_s" and lim.danger is not None and lim.danger.needs_baseline:
                raise _Problem(f"{name}.danger", "a danger level on velocity r.m.s. is never set from the baseline "
                               "(ISO 20816-3 guidance); give a number or \"iso\"")
        return self

    @property
    def indicators(self) -> dict[str, LimitConfigTable]:
        return dict(self.__pydantic_extra__ or {})


class PointConfig(_Table):
    """One measurement point.  After loading, ``sensor``, ``bandwidth_hz``, ``frame_samples`` and ``overlap`` are
    resolved and ``envelope_band_hz`` is the band actually used (``None``: no envelope indicators, the reason in
    :attr:`envelope_note`)."""

    id: Id
    machine: Text
    source: Text
    sensor: Text = ""  # "" until loaded, then the point id
    fs_hz: Float = Field(ge=1.0, le=1e6)
    block_samples: Int = Field(ge=1, le=DEFAULT_MAX_SAMPLES)
    axis: Literal["horizontal", "vertical", "axial", "radial"] = "radial"
    description: Text = ""
    sensor_type: Literal["piezo", "mems"] = "piezo"
    sensitivity_mv_per_g: Float | None = Field(None, gt=0.0)
    bandwidth_hz: Pair | None = None
    velocity_band_hz: Pair = (10.0, 1000.0)
    envelope_band_hz: BandSetting | None = None
    bearing: BearingConfig | None = None
    orders: tuple[Annotated[Float, Field(gt=0.0, le=100.0)], ...] = Field((0.5, 1.0, 2.0, 3.0), min_length=1)
    frame_samples: Int = Field(0, ge=MIN_FRAME_SAMPLES, le=MAX_FRAME_SAMPLES)  # 0 until loaded: [analysis]'s
    overlap: Float = Field(-1.0, ge=0.0, le=0.95)  # -1 until loaded: [analysis]'s
    node: Text | None = None
    unit: Literal["g", "m/s2"] = "g"
    scale: Float | None = Field(None, gt=0.0)  # integer samples (OPC UA Int16/Int32 arrays): value = count × scale
    limits: PointLimits | None = None

    _band_origin: str | None = PrivateAttr(None)  # set when loaded: where envelope_band_hz came from

    @model_serializer(mode="wrap")
    def _band_as_written(self, handler: SerializerFunctionWrapHandler) -> dict[str, Any]:
        """A loaded point prints its band as the file would give it: ``"auto"`` for an automatic one, nothing for
        the default (the rule gives it again), the pair when configured."""
        out: dict[str, Any] = handler(self)
        if isinstance(self.envelope_band_hz, tuple) and self._band_origin == "auto":
            out["envelope_band_hz"] = "auto"
        elif isinstance(self.envelope_band_hz, tuple) and self._band_origin == "default":
            out.pop("envelope_band_hz", None)
        return out

    @property
    def hop_samples(self) -> int:
        return max(1, self.frame_samples - round(self.overlap * self.frame_samples))

    @property
    def band_pair(self) -> tuple[float, float] | None:
        """The demodulation band as a pair (``None`` for none, or for ``"auto"`` before loading)."""
        v = self.envelope_band_hz
        return v if isinstance(v, tuple) else None

    @property
    def envelope_band_origin(self) -> Literal["configured", "auto", "default"] | None:
        """Where the loaded point's band comes from: ``"configured"`` (a pair in the file), ``"auto"`` (``"auto"``
        in the file: selected by the daemon, the default band until then), ``"default"`` (the rule); ``None``
        without a band."""
        if self.envelope_band_hz is None:
            return None
        if self._band_origin is None:  # not loaded: as written
            return "auto" if self.envelope_band_hz == "auto" else "configured"
        return self._band_origin  # type: ignore[return-value]

    @property
    def usable_bandwidth_hz(self) -> tuple[float, float]:
        """``bandwidth_hz``, or the sensor type's default (piezo 0.5–10 000 Hz, MEMS 0–1000 Hz)."""
        return self.bandwidth_hz or ((0.5, 10000.0) if self.sensor_type == "piezo" else (0.0, 1000.0))

    def envelope_band_for(self, machine: MachineConfig) -> tuple[float, float] | None:
        """The demodulation band the point gets on ``machine``: its own, or the default from its sample rate,
        bandwidth and the machine's top speed (:func:`edgevib.common.bands.envelope_band`; None: none)."""
        if self.band_pair is not None:
            return self.band_pair
        return envelope_band(self.fs_hz, self.usable_bandwidth_hz, machine.top_speed_hz)

    def min_frame_samples(self, machine: MachineConfig) -> int:
        """The shortest frame the analysis plan accepts on ``machine`` (:func:`edgevib.common.bands
        .min_frame_samples`: two lines below the velocity band's edge and the lowest speed)."""
        return min_frame_samples(self.fs_hz, self.velocity_band_hz[0], machine.speed_range_hz[0])

    @property
    def envelope_note(self) -> str | None:
        """Why the point has no envelope indicators (None when it has them)."""
        if self.envelope_band_hz is not None or self.bandwidth_hz is None:
            return None
        return (f"{self.sensor_type} sensor with usable bandwidth up to {self.bandwidth_hz[1]:g} Hz at fs "
                f"{self.fs_hz:g} Hz cannot carry an envelope demodulation band: no envelope indicators for this point")


class AlarmsConfig(_Delays):
    """``[alarms]`` (README "[alarms]")."""

    enabled: Bool = True
    default_velocity_rule: Literal["iso", "iso-baseline", "none"] = "iso"
    deadband: Float = Field(0.05, ge=0.001, le=0.5)
    latching: Bool = False
    startup_grace_s: Float = Field(30.0, ge=0.0, le=86400.0)
    run_threshold_velocity_mm_s: Float = Field(0.2, ge=0.0, le=100.0)
    run_hysteresis: Float = Field(0.2, ge=0.0, le=0.9)
    run_dwell_frames: Int = Field(3, ge=1, le=1000)
    run_dwell_s: Float = Field(3.0, ge=0.0, le=3600.0)
    speed_change_per_s: Float = Field(0.02, ge=0.001, le=10.0)
    speed_trend_window_s: Float = Field(3.0, ge=0.1, le=600.0)
    no_data_frames: Int = Field(5, ge=1, le=100000)
    sensor_recover_frames: Int = Field(3, ge=1, le=10000)
    baseline_frames: Int = Field(100, ge=5, le=10_000_000)
    trend_frames: Int = Field(30, ge=3, le=100000)
    max_shelve_h: Float = Field(168.0, ge=0.01, le=24 * 366.0)
    history_days: Float = Field(400.0, ge=1.0, le=36600.0)
    socket: Text = "alarms.sock"  # resolved against state_dir
    socket_mode: Literal["0600", "0660"] = "0600"
    health: HealthConfig = Field(default_factory=HealthConfig)


class WebhookConfig(_WithSecrets):
    _SECRETS = ("token",)
    url: Text
    mode: Literal["structured", "binary"] = "structured"  # CloudEvents HTTP content mode
    timeout_s: Float = Field(10.0, ge=0.1, le=300.0)
    retry_min_s: Float = Field(1.0, ge=0.01, le=3600.0)
    retry_max_s: Float = Field(300.0, ge=0.01, le=86400.0)
    token_file: Text | None = None
    token_env: Text | None = None

    @model_validator(mode="after")
    def _webhook(self) -> WebhookConfig:
        if not self.url.startswith(("http://", "https://")):
            raise _Problem("url", f"{self.url!r} is not an http:// or https:// URL")
        _not_below(self, "retry_min_s", "retry_max_s")
        return self

    @property
    def token(self) -> Secret | None:
        """Sent as ``Authorization: Bearer …``."""
        return self._secret("token")


class FeedConfig(_ReusesSource):
    """``[feed]``: the alarm feed.  Topic templates use ``{site}``, ``{machine}``, ``{point}``; once loaded, the
    command and response topics and the CloudEvents ``source`` are resolved for the site."""

    _SUFFIX = "feed"
    enabled: Bool = True
    topic: Text = "edgevib/{site}/alarms/{machine}/{point}"
    state_topic: Text = "edgevib/{site}/alarm-state/{machine}/{point}"
    command_topic: Text = "edgevib/{site}/alarms/command"
    response_topic: Text = "edgevib/{site}/alarms/response"
    event_source: Text = "edgevib/{site}"
    webhook: WebhookConfig | None = None
    content_mode: Literal["structured", "binary"] = "structured"  # CloudEvents MQTT content mode (binary: MQTT 5)
    dataschema: Text = ""  # URI template ({type}); "": no dataschema attribute
    message_expiry_s: Float = Field(0.0, ge=0.0, le=4294967295.0)  # MQTT 5 Message Expiry Interval; 0: none
    availability_topic: Text = "edgevib/{site}/availability"  # retained online/offline and Last Will; "": none
    source_topic: Text = "edgevib/{site}/sources/{source}"  # source down/up events
    session_expiry_s: Int = Field(86400, ge=0, le=4294967295)  # MQTT 5 Session Expiry of the command session

    def dataschema_for(self, event_type: str) -> str | None:
        """The ``dataschema`` attribute of events of ``event_type`` (``None``: not configured)."""
        return self.dataschema.format(type=event_type) if self.dataschema else None

    @model_validator(mode="after")
    def _feed(self) -> FeedConfig:
        source = _fill("event_source", self.event_source, ("site",), "quarry-lane")
        problem = uri_reference_problem(source)
        if problem:
            raise _Problem("event_source", f"{source!r} {problem} (CloudEvents 'source' is a URI-reference; an "
                           f"absolute URI such as \"urn:fennick:{{site}}:edgevib\" is recommended)")
        if self.dataschema:
            schema = _fill("dataschema", self.dataschema, ("type",), "io.edgevib.alarm.v1.transition")
            problem = uri_reference_problem(schema, absolute=True)
            if problem:
                raise _Problem("dataschema", f"{schema!r} {problem} (CloudEvents 'dataschema' is a URI)")
        if self.content_mode == "binary" and self.url is not None and self.protocol != "5":
            raise _Problem("content_mode", "binary mode carries the attributes as MQTT 5 user properties: it needs "
                           "protocol = \"5\" (MQTT 3.1.1 offers structured mode only)")
        _check_topics(self, topic=("site", "machine", "point"), state_topic=("site", "machine", "point"),
                      command_topic=("site",), response_topic=("site",), availability_topic=("site",),
                      source_topic=("site", "source"))
        if self.enabled and self.source is None and self.url is None and self.webhook is None:
            raise _Problem("url", "the feed needs a broker (url or source) and/or [feed.webhook]")
        return self


class CaptureConfig(_Table):
    enabled: Bool = True
    dir: Text = "captures"  # resolved against state_dir
    max_mb: Float = Field(256.0, ge=0.01, le=1e6)
    max_files: Int = Field(2000, ge=1, le=10_000_000)

    @property
    def max_bytes(self) -> int:
        return int(self.max_mb * 1024 * 1024)


class HistoryConfig(_Table):
    """``[history]``: the durable severity history (README "[history]")."""

    enabled: Bool = True
    file: Text = "history.sqlite"  # resolved against state_dir
    recent_s: Float = Field(900.0, ge=120.0, le=7 * 86400.0)
    minute_days: Float = Field(2.0, ge=0.01, le=366.0)
    hour_days: Float = Field(90.0, ge=1.0, le=3660.0)
    day_days: Float = Field(1100.0, ge=7.0, le=36600.0)
    max_mb: Float = Field(1024.0, ge=1.0, le=1e7)
    flush_s: Float = Field(5.0, ge=0.1, le=600.0)
    high_percentile: Float = Field(95.0, ge=50.0, le=99.9)

    @model_validator(mode="after")
    def _retention(self) -> HistoryConfig:
        if not self.file:
            raise _Problem("file", "must not be empty")
        if not self.minute_days <= self.hour_days <= self.day_days:
            raise _Problem("hour_days", f"retention must grow with the roll-up length: minutes {self.minute_days:g} "
                           f"d, hours {self.hour_days:g} d, days {self.day_days:g} d")
        return self


TREND_INDICATORS: tuple[str, ...] = (
    "velocity_rms_mm_s", "imbalance_1x_mm_s", "misalignment_2x_mm_s", "looseness_mm_s",
    "bearing_bpfo_g", "bearing_bpfi_g", "bearing_bsf_g", "bearing_ftf_g",
)
"""Series trended by default: broadband velocity and the fault-pattern indicators."""


class TrendLimit(_Table):
    """One ``[[trend.limits]]``: a user-given absolute limit of a point's indicator, projected like the others."""

    point: Text
    indicator: Text
    value: Float


class TrendConfig(_Table):
    """``[trend]``: trend, projection and advice (README "[trend]")."""

    enabled: Bool = True
    indicators: tuple[Text, ...] = TREND_INDICATORS
    window_days: Float = Field(90.0, ge=0.01, le=3660.0)
    min_points: Int = Field(12, ge=6, le=100_000)
    min_span_h: Float = Field(24.0, ge=0.0, le=24 * 3660.0)
    coverage: Float = Field(0.8, ge=0.5, le=0.99)
    rise_significance: Float = Field(0.01, ge=1e-6, le=0.2)
    evaluate_s: Float = Field(600.0, ge=1.0, le=86400.0)
    horizon_days: Float = Field(730.0, ge=1.0, le=36600.0)
    horizon_factor: Float = Field(4.0, ge=0.1, le=100.0)
    max_points: Int = Field(500, ge=20, le=20_000)
    plan_days: Float = Field(90.0, ge=0.0, le=3660.0)
    act_days: Float = Field(14.0, ge=0.0, le=3660.0)
    limits: tuple[TrendLimit, ...] = ()

    @model_validator(mode="after")
    def _trend(self) -> TrendConfig:
        for i, name in enumerate(self.indicators):
            if name not in LIMITABLE:
                raise _Problem(f"indicators[{i}]", _unknown_indicator(name, list(LIMITABLE)))
        seen: set[tuple[str, str]] = set()
        for i, lim in enumerate(self.limits):
            if lim.indicator not in LIMITABLE:
                raise _Problem(f"limits[{i}].indicator", _unknown_indicator(lim.indicator, list(LIMITABLE)))
            if (lim.point, lim.indicator) in seen:
                raise _Problem(f"limits[{i}]", f"a second limit for {lim.point} {lim.indicator}")
            seen.add((lim.point, lim.indicator))
        if self.act_days > self.plan_days:
            raise _Problem("act_days", f"{self.act_days:g} days must not exceed plan_days {self.plan_days:g}")
        return self


class Config(_Table):
    """The whole file.  ``points`` are the points this instance owns (all of them unless ``[site] shard`` says
    otherwise); the file's every point is in ``all_points``."""

    site: SiteConfig = Field(default_factory=SiteConfig)
    logging: LoggingConfig = Field(default_factory=LoggingConfig)
    metrics: MetricsConfig = Field(default_factory=MetricsConfig)
    analysis: AnalysisConfig = Field(default_factory=AnalysisConfig)
    view: ViewConfig = Field(default_factory=ViewConfig)
    sources: tuple[SourceConfig, ...] = ()
    machines: tuple[MachineConfig, ...] = ()
    all_points: tuple[PointConfig, ...] = Field((), alias="points", max_length=MAX_POINTS)
    publish: PublishConfig = Field(default_factory=PublishConfig)
    alarms: AlarmsConfig = Field(default_factory=AlarmsConfig)
    feed: FeedConfig | None = None
    capture: CaptureConfig = Field(default_factory=CaptureConfig)
    history: HistoryConfig = Field(default_factory=HistoryConfig)
    trend: TrendConfig = Field(default_factory=TrendConfig)

    _points: tuple[PointConfig, ...] = PrivateAttr(())
    _deferred: tuple[tuple[str, str, str, str], ...] = PrivateAttr(())
    _digest: str = PrivateAttr("")
    _plans: dict[str, AnalysisPlan] = PrivateAttr(default_factory=dict)
    _alarm_settings: AlarmSettings | None = PrivateAttr(None)

    @property
    def points(self) -> tuple[PointConfig, ...]:
        return self._points

    @property
    def skipped_points(self) -> tuple[str, ...]:
        """Configured points that another instance of the shard set owns."""
        owned = {p.id for p in self._points}
        return tuple(p.id for p in self.all_points if p.id not in owned)

    @property
    def skipped_sensors(self) -> tuple[tuple[str, str], ...]:
        """Their ``(source, sensor)`` keys: blocks ignored quietly."""
        owned = {p.id for p in self._points}
        return tuple((p.source, p.sensor) for p in self.all_points if p.id not in owned)

    @property
    def deferred(self) -> tuple[tuple[str, str, str, str], ...]:
        """(key path, problem, why, file) found while loading that :func:`verify_for_run` checks again."""
        return self._deferred

    @property
    def digest(self) -> str:
        """The first 16 hex digits of the file's SHA-256 (empty for a configuration built in memory)."""
        return self._digest

    @property
    def alarm_settings(self) -> AlarmSettings:
        """The alarm layer's settings resolved per point (limits with their ISO boundaries, health specs)."""
        if self._alarm_settings is None:
            from edgevib.daemon.alarms.config import alarm_settings

            self._alarm_settings = alarm_settings(self)
        return self._alarm_settings

    def plan(self, point_id: str) -> AnalysisPlan:
        """The validated analysis plan of a point (checked once when the configuration was loaded)."""
        plan = self._plans.get(point_id)
        if plan is None:
            p = self.point(point_id)
            plan = self._plans[point_id] = plan_for(p, self.machine(p.machine))
        return plan

    def source(self, name: str) -> MqttSourceConfig | OpcUaSourceConfig | SimulatedSourceConfig:
        return {s.name: s for s in self.sources}[name]

    def machine(self, machine_id: str) -> MachineConfig:
        return {m.id: m for m in self.machines}[machine_id]

    def point(self, point_id: str) -> PointConfig:
        """An owned point (KeyError for another instance's or an unknown one)."""
        return {p.id: p for p in self._points}[point_id]


# ------------------------------------------------------------------------------------------------ errors


def _type_name(value: object) -> str:
    return {bool: "boolean", int: "integer", float: "float", str: "string", list: "array", tuple: "array",
            dict: "table"}.get(type(value), type(value).__name__)


def _dotted(loc: tuple[int | str, ...]) -> str:
    out = ""
    for part in loc:
        out += f"[{part}]" if isinstance(part, int) else (f".{part}" if out else str(part))
    return out


def _meant(key: str, known: list[str]) -> str | None:
    """The name of ``known`` that ``key`` probably misspells (same letters in another case, or a close match)."""
    lower = {k.lower(): k for k in known}
    return lower.get(key.lower()) or next(iter(difflib.get_close_matches(key, known, n=1, cutoff=0.75)), None)


def _did_you_mean(key: str, known: list[str]) -> str:
    match = _meant(key, known)
    return f"; did you mean `{match}`?" if match else ""


def _error_details(err: ErrorDetails) -> InitErrorDetails:
    """One entry of ``ValidationError.errors()`` as it is given to ``ValidationError.from_exception_data``."""
    details: InitErrorDetails = {"type": err["type"], "loc": err["loc"], "input": err["input"]}
    if "ctx" in err:
        details["ctx"] = err["ctx"]
    return details


def _unknown_indicator(name: str, known: list[str], quoted: bool = True) -> str:
    """An indicator name that is not one of ``known`` (the key path says where; a key is not repeated)."""
    return f"unknown indicator{f' {name!r}' if quoted else ''}{_did_you_mean(name, known)} (known: {', '.join(known)})"


def _unknown_ref(key: str, what: str, name: str, known: Mapping[str, Any]) -> ConfigError:
    """A reference to a ``what`` (machine, source) that the file does not configure."""
    return ConfigError(key, f"unknown {what} {name!r} (configured: {', '.join(known) or 'none'})"
                            f"{_did_you_mean(name, list(known))}")


def _clean(loc: tuple[int | str, ...]) -> tuple[int | str, ...]:
    """``loc`` without the tag pydantic inserts after a source's index (``sources, 0, "mqtt", "qos"``)."""
    return tuple(p for i, p in enumerate(loc) if not (p in _SOURCE_TYPES and i > 0 and isinstance(loc[i - 1], int)))


def _unknown(loc: tuple[int | str, ...], cause: _Unknown) -> str:
    """"unknown key" (or table, or array of tables) at ``loc`` (the table's), with the key that was probably
    meant."""
    key, value, known = cause.key, cause.value, cause.known
    hint = _did_you_mean(key, known)
    if isinstance(value, dict) or (isinstance(value, list) and value and all(isinstance(x, dict) for x in value)):
        parent = _dotted(tuple(p for p in loc if not isinstance(p, int)))
        left, right = ("[[", "]]") if isinstance(value, list) else ("[", "]")
        name = f"{left}{parent + '.' if parent else ''}{key}{right}"
        if hint:
            meant = hint.split("`")[1]
            hint = f"; did you mean `{left}{parent + '.' if parent else ''}{meant}{right}`?"
        what = "array of tables" if isinstance(value, list) else "table"
        return f"unknown {what} {name}{hint or f' (known here: {chr(44).join(sorted(known)) or chr(45)})'}"
    return f"unknown key{hint}" if hint else f"unknown key (known keys here: {', '.join(sorted(known)) or 'none'})"


_BOUNDS = {"greater_than_equal": (">=", "ge"), "greater_than": (">", "gt"), "less_than_equal": ("<=", "le"),
           "less_than": ("<", "lt")}


def _must_be(what: str) -> Callable[[object, dict[str, Any]], str]:
    def problem(value: object, _ctx: dict[str, Any]) -> str:
        shown = f" {value!r}" if isinstance(value, str | int | float) and len(repr(value)) <= 40 else ""
        return f"must be {what}, got {_type_name(value)}{shown}"
    return problem


def _not_one_of(value: object, ctx: dict[str, Any]) -> str:
    expected = str(ctx["expected"])
    hint = _did_you_mean(value, re.findall(r"'([^']*)'", expected)) if isinstance(value, str) else ""
    return f"{value!r} is not one of {expected}{hint}"


def _out_of_range(kind: str) -> Callable[[object, dict[str, Any]], str]:
    op, bound = _BOUNDS[kind]
    return lambda value, ctx: f"{value:g} is out of range: must be {op} {ctx[bound]:g}"


# pydantic's error type -> our words, from the offending value and the error's context
_PROBLEMS: dict[str, Callable[[object, dict[str, Any]], str]] = {
    "missing": lambda _v, _c: "required key is missing",
    **dict.fromkeys(("int_type", "int_from_float", "int_parsing"), _must_be("an integer")),
    **dict.fromkeys(("float_type", "float_parsing"), _must_be("a number")),
    "finite_number": lambda value, _c: f"must be finite, got {value!r}",
    **dict.fromkeys(("string_type", "str_type"), _must_be("a string")),
    "bool_type": _must_be("true or false"),
    **{kind: _out_of_range(kind) for kind in _BOUNDS},
    "literal_error": _not_one_of,
    **dict.fromkeys(("model_type", "dict_type", "model_attributes_type"), _must_be("a table")),
    **dict.fromkeys(("tuple_type", "list_type"), _must_be("an array")),
    "too_short": lambda _v, ctx: ("must not be empty" if ctx.get("min_length") == 1 else
                                  f"needs at least {ctx['min_length']} entries"),
    "too_long": lambda _v, ctx: f"{ctx.get('actual_length')} entries exceed the limit of {ctx['max_length']} per "
                                "instance",
}


def _translate(exc: ValidationError) -> ConfigError:
    """Every problem of a validation error, in our words, each with its dotted key path."""
    return ConfigError.all_of([_translate_one(err) for err in exc.errors(include_url=False)])


def _translate_one(err: Any) -> ConfigError:
    """One problem of a validation error (one entry of ``ValidationError.errors()``)."""
    loc, kind, value, ctx = _clean(tuple(err["loc"])), err["type"], err.get("input"), err.get("ctx") or {}
    problem: str = err["msg"]
    if kind in _PROBLEMS:
        problem = _PROBLEMS[kind](value, ctx)
    elif kind == "union_tag_invalid":
        loc, problem = (*loc, "type"), f"{ctx['tag']!r} is not one of {ctx['expected_tags']}"
    elif kind == "union_tag_not_found":
        loc, problem = (*loc, "type"), "required key is missing (one of 'mqtt', 'opcua', 'simulated')"
    elif kind == "value_error":
        cause = ctx.get("error")
        if isinstance(cause, _Unknown):
            loc, problem = (*loc, cause.key), _unknown(loc, cause)
        elif isinstance(cause, _Problem):
            loc, problem = (*loc, *[k for k in re.split(r"\.(?![^\[]*\])", cause.key) if k]), cause.problem
        else:
            problem = str(cause) if cause is not None else problem
    return ConfigError(_dotted(loc), problem)


class _Findings:
    """The errors found so far: each check runs under :meth:`check`, which keeps its error and goes on, so a file
    with several mistakes reports them all at once (:meth:`raise_any`)."""

    def __init__(self) -> None:
        self.errors: list[ConfigError] = []

    @contextlib.contextmanager
    def check(self) -> Iterator[None]:
        try:
            yield
        except ConfigError as exc:
            self.errors.append(exc)

    def add(self, path: str, problem: str) -> None:
        self.errors.append(ConfigError(path, problem))

    def raise_any(self) -> None:
        if self.errors:
            raise ConfigError.all_of(self.errors)


# ------------------------------------------------------------------------------------------------ paths


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


def _missing(path: str, problem: str, written: str, resolved: str, deferred: list[tuple[str, str, str, str]]) -> None:
    """A file that does not exist: an error now, unless it is a credential that only the unit provides (then the
    problem goes to ``deferred``: it only matters where the daemon runs, see the module docstring)."""
    _, unset = expand_path_variables(written, path)
    outside_unit = not os.environ.get("CREDENTIALS_DIRECTORY")
    if unset or (resolved.startswith(CREDENTIALS_ROOT) and outside_unit):
        why = (f"${{{unset[0]}}} is not set" if unset else
               f"{CREDENTIALS_ROOT}… exists only inside the systemd unit (LoadCredential=)")
        deferred.append((path, problem, why, resolved))
        return
    raise ConfigError(path, problem)


def _files(m: BaseModel, path: str, base: Path, deferred: list[tuple[str, str, str, str]],
           found: _Findings) -> BaseModel:
    """``m`` with every ``*_file`` key resolved against ``base`` (the file must exist, or be in ``deferred``),
    every ``*_env`` variable checked, and the same for the tables inside it; each missing one goes to ``found``."""
    update: dict[str, Any] = {}
    for name, f in type(m).model_fields.items():
        v = getattr(m, name)
        key = f"{path}.{f.alias or name}" if path else (f.alias or name)
        if name.endswith("_file") and isinstance(v, str):
            with found.check():
                resolved = _resolve_path(v, base, key)
                if not Path(resolved).is_file():
                    what = "secret file" if name.endswith(("password_file", "token_file")) else "file"
                    _missing(key, f"{what} {resolved} does not exist", v, resolved, deferred)
                update[name] = resolved
        elif name.endswith("_env") and isinstance(v, str) and v not in os.environ:
            found.add(key, f"environment variable {v} is not set")
        elif isinstance(v, BaseModel):
            update[name] = _files(v, key, base, deferred, found)
        elif isinstance(v, tuple) and v and all(isinstance(x, BaseModel) for x in v):
            update[name] = tuple(_files(x, f"{key}[{i}]", base, deferred, found) for i, x in enumerate(v))
    return m.model_copy(update=update) if update else m


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


# ------------------------------------------------------------------------------------------------ resolution


def plan_for(point: PointConfig, machine: MachineConfig) -> AnalysisPlan:
    """The analysis plan of a resolved point (``make_plan`` validates it; memoized there per distinct plan)."""
    from edgevib.pipelines.analysis import make_plan

    bearing = None if point.bearing is None else point.bearing.geometry()
    return make_plan(point.fs_hz, point.frame_samples, velocity_band_hz=point.velocity_band_hz,
                     envelope_band_hz=point.band_pair, bearing=bearing, orders=point.orders,
                     speed_range_hz=machine.speed_range_hz)


# a plan field at fault → the point's key that set it
_PLAN_KEYS = {"n_samples": "frame_samples", "velocity_band_hz": "velocity_band_hz",
              "envelope_band_hz": "envelope_band_hz", "orders": "orders", "bearing": "bearing",
              "speed_range_hz": "frame_samples", "fs_hz": "fs_hz"}


def _check_plans(cfg: Config) -> dict[str, AnalysisPlan]:
    """Every point's plan through ``make_plan`` (once per distinct plan); a rejection names the point's key."""
    from edgevib.pipelines.types import GeometryError, PipelineError

    machines = {m.id: m for m in cfg.machines}
    plans: dict[str, AnalysisPlan] = {}
    found = _Findings()
    for i, p in enumerate(cfg.all_points):
        try:
            plans[p.id] = plan_for(p, machines[p.machine])
        except GeometryError as exc:
            found.add(f"points[{i}].bearing", f"impossible bearing geometry: {exc}")
            continue
        except PipelineError as exc:
            key = _PLAN_KEYS.get(exc.field or "")
            found.add(f"points[{i}].{key}" if key else f"points[{i}]", f"analysis plan rejected: {exc}")
            continue
        env, bandwidth = p.band_pair, p.bandwidth_hz or (0.0, math.inf)
        if env is not None and env[1] > bandwidth[1]:
            found.add(f"points[{i}].envelope_band_hz", f"high edge {env[1]:g} Hz is above the sensor's usable "
                      f"bandwidth {bandwidth[1]:g} Hz")
        elif env is not None and env[0] < bandwidth[0]:
            found.add(f"points[{i}].envelope_band_hz", f"low edge {env[0]:g} Hz is below the sensor's usable "
                      f"bandwidth {bandwidth[0]:g} Hz")
    found.raise_any()
    return plans


def _resolve_point(p: PointConfig, i: int, cfg: Config) -> PointConfig:
    key = f"points[{i}]"
    machines, sources = {m.id: m for m in cfg.machines}, {s.name: s for s in cfg.sources}
    if p.machine not in machines:
        raise _unknown_ref(f"{key}.machine", "machine", p.machine, machines)
    if p.source not in sources:
        raise _unknown_ref(f"{key}.source", "source", p.source, sources)
    if sources[p.source].type == "opcua" and p.node is None:
        raise ConfigError(f"{key}.node", f"source {p.source!r} is OPC UA: the point needs the node id of its array")
    r = p.model_copy(update={"sensor": p.sensor or p.id, "bandwidth_hz": p.usable_bandwidth_hz,
                             "frame_samples": p.frame_samples or cfg.analysis.frame_samples,
                             "overlap": cfg.analysis.overlap if p.overlap < 0 else p.overlap})
    out = r.model_copy(update={"envelope_band_hz": r.envelope_band_for(machines[p.machine])})
    out._band_origin = "auto" if p.envelope_band_hz == "auto" else \
        "configured" if p.band_pair is not None else "default"
    return out


def _connection_of(owner: _ReusesSource, key: str, cfg: Config) -> MqttConnection | None:
    """The broker connection of ``[publish.mqtt]`` or ``[feed]``: a source's, or its own url."""
    if owner.source is not None:
        sources = {s.name: s for s in cfg.sources}
        src = sources.get(owner.source)
        if src is None:
            raise _unknown_ref(f"{key}.source", "source", owner.source, sources)
        if not isinstance(src, MqttSourceConfig):
            raise ConfigError(f"{key}.source", f"source {owner.source!r} is {src.type}, not mqtt")
        return src.model_copy(update={"client_id": f"{src.client_id}-{owner._SUFFIX}"})
    return owner if owner.url is not None else None


def _unique(table: str, key: str, what: str, values: list[str], found: _Findings) -> dict[str, int]:
    """Each value's first index in ``table``; each repeat goes to ``found``, naming both places."""
    first: dict[str, int] = {}
    for i, v in enumerate(values):
        if v in first:
            found.add(f"{table}[{i}].{key}", f"duplicate {what} {v!r} (also {table}[{first[v]}])")
        else:
            first[v] = i
    return first


def _resolve_sources(cfg: Config, found: _Findings) -> tuple[SourceConfig, ...]:
    _unique("sources", "name", "source name", [s.name for s in cfg.sources], found)
    return tuple(s.model_copy(update={"client_id": f"edgevib-{cfg.site.name}-{s.name}"})
                 if isinstance(s, MqttSourceConfig) and not s.client_id else s for s in cfg.sources)


def _resolve_machines(cfg: Config, found: _Findings) -> tuple[MachineConfig, ...]:
    sources = {s.name: s for s in cfg.sources}
    _unique("machines", "id", "machine id", [m.id for m in cfg.machines], found)
    for i, m in enumerate(cfg.machines):
        tag = m.speed_tag
        if tag is None:
            continue
        key = f"machines[{i}].speed_tag"
        if tag.source not in sources:
            found.errors.append(_unknown_ref(f"{key}.source", "source", tag.source, sources))
            continue
        kind = sources[tag.source].type
        if kind == "opcua" and (tag.node is None or tag.topic is not None):
            found.add(f"{key}.node", f"source {tag.source!r} is OPC UA: the speed tag needs a node (not a topic)")
        if kind != "opcua" and (tag.topic is None or tag.node is not None):
            found.add(f"{key}.topic", f"source {tag.source!r} is {kind}: the speed tag needs a topic (not a node)")
    return cfg.machines


def _resolve(cfg: Config, base: Path, digest: str) -> Config:
    """References between tables, defaults from other tables and files; every problem found is reported."""
    found = _Findings()
    deferred: list[tuple[str, str, str, str]] = []
    cfg = _files(cfg, "", base, deferred, found)  # type: ignore[assignment]
    if cfg.view.actions and cfg.view.token is None and cfg.metrics.tls_client_ca_file is None:
        found.add("view.actions", "acknowledging and shelving from the page need authentication: set [view] "
                  "token_file (or token_env), or require client certificates with [metrics] tls_client_ca_file")

    def path(value: str, under: Path, key: str) -> str:
        with found.check():
            return _resolve_path(value, under, key)
        return value

    state_dir = path(cfg.site.state_dir, base, "site.state_dir")
    site = cfg.site.model_copy(update={"state_dir": state_dir})
    cfg = cfg.model_copy(update={"site": site})
    cfg = cfg.model_copy(update={"sources": _resolve_sources(cfg, found), "machines": _resolve_machines(cfg, found)})
    points: list[PointConfig] = []
    ids = _unique("points", "id", "point id", [p.id for p in cfg.all_points], found)
    sensors: dict[tuple[str, str], str] = {}
    for i, p in enumerate(cfg.all_points):
        with found.check():
            r = _resolve_point(p, i, cfg)
            sensor_key = (r.source, r.sensor)
            if sensor_key in sensors and ids[p.id] == i:  # a repeated point is reported as such, once
                raise ConfigError(f"points[{i}].sensor", f"sensor {r.sensor!r} on source {r.source!r} is already "
                                  f"point {sensors[sensor_key]!r}")
            sensors.setdefault(sensor_key, r.id)
            points.append(r)
    shard = cfg.site.shard
    if shard is not None and shard.points is not None:
        unknown = sorted(set(shard.points) - set(ids))
        if unknown:
            found.add("site.shard.points", f"unknown point(s) {', '.join(unknown)}")
    publish = cfg.publish.model_copy(update={"mqtt": cfg.publish.mqtt.model_copy(
        update={"client_id": cfg.publish.mqtt.client_id or (f"edgevib-{site.name}-publish"
                                                            if cfg.publish.mqtt.url else None)})})
    with found.check():
        publish.mqtt._broker = _connection_of(publish.mqtt, "publish.mqtt", cfg)
    feed = cfg.feed
    if feed is not None:
        feed = feed.model_copy(update={
            "client_id": feed.client_id or (f"edgevib-{site.name}-feed" if feed.url else None),
            "command_topic": feed.command_topic.format(site=site.name),
            "response_topic": feed.response_topic.format(site=site.name),
            "availability_topic": feed.availability_topic.format(site=site.name),
            "event_source": feed.event_source.format(site=quote(site.name, safe=""))})
        with found.check():
            feed._broker = _connection_of(feed, "feed", cfg)
        if feed.content_mode == "binary" and feed._broker is not None and feed._broker.protocol != "5":
            found.add("feed.content_mode", "binary mode carries the attributes as MQTT 5 user properties: it needs "
                      f"an MQTT 5 connection (source {feed.source!r} uses {feed._broker.protocol})")
    state = Path(state_dir)
    alarms = cfg.alarms.model_copy(update={"socket": path(cfg.alarms.socket, state, "alarms.socket")})
    capture = cfg.capture.model_copy(update={"dir": path(cfg.capture.dir, state, "capture.dir")})
    history = cfg.history.model_copy(update={"file": path(cfg.history.file, state, "history.file")})
    for i, lim in enumerate(cfg.trend.limits):
        if lim.point not in ids:
            found.add(f"trend.limits[{i}].point", f"unknown point {lim.point!r}{_did_you_mean(lim.point, list(ids))}")
    found.raise_any()
    cfg = cfg.model_copy(update={"all_points": tuple(points), "publish": publish, "feed": feed, "alarms": alarms,
                                 "capture": capture, "history": history})
    cfg._points = tuple(p for p in points if shard is None or shard.owns(p.id))
    cfg._digest, cfg._deferred = digest, tuple(deferred)
    return cfg


# ------------------------------------------------------------------------------------------------ entry points


def load_config(path: str | os.PathLike[str], overrides: Mapping[str, Any] | None = None, *,
                plans: bool = True) -> Config:
    """Read and validate a TOML configuration file; ``overrides`` maps dotted keys (``"site.state_dir"``) to
    values that replace the file's before validation (the command line's ``--state-dir``, ``--log-level``);
    ``plans=False`` as for :func:`parse_config`."""
    p = Path(path)
    try:
        data = p.read_bytes()
    except OSError as exc:
        raise ConfigError("", f"cannot read the file: {exc.strerror}") from None
    try:
        doc = tomllib.loads(data.decode("utf-8"))
    except (UnicodeDecodeError, tomllib.TOMLDecodeError) as exc:
        raise ConfigError("", f"not valid TOML: {exc}") from None
    if not doc:
        raise ConfigError("", "the file holds no configuration (it is empty or only comments): a configuration "
                          "needs at least [[sources]], [[machines]] and [[points]]")
    for dotted, value in (overrides or {}).items():
        *tables, key = dotted.split(".")
        t = doc
        for name in tables:
            t = t.setdefault(name, {}) if isinstance(t.get(name, {}), dict) else {}
        t[key] = value
    return parse_config(doc, p.resolve().parent, digest=hashlib.sha256(data).hexdigest()[:16], plans=plans)


def validate_document(doc: Mapping[str, Any]) -> Config:
    """The document checked table by table (types, ranges, each table's own rules), not yet resolved: references
    between tables, defaults from other tables, files and plans are :func:`parse_config`'s.  Raises ConfigError."""
    try:
        return Config.model_validate(doc)
    except ValidationError as exc:
        raise _translate(exc) from None


def parse_config(doc: Mapping[str, Any], base_dir: str | os.PathLike[str] = ".", digest: str = "", *,
                 plans: bool = True) -> Config:
    """Validate a parsed TOML document; relative file paths resolve against ``base_dir``.  ``plans=False`` skips
    the analysis-plan and alarm-limit checks that need the numerical core."""
    cfg = _resolve(validate_document(doc), Path(base_dir), digest)
    if plans:  # every point's plan and limits checked, their errors reported together
        found = _Findings()
        with found.check():
            cfg._plans = _check_plans(cfg)
        with found.check():
            _ = cfg.alarm_settings  # resolve the alarm layer's limits now: their errors are the file's errors
        found.raise_any()
    return cfg


# ------------------------------------------------------------------------------------------------ printing


_FIRST_KEYS = ("id", "name", "type", "enabled")


def _ordered_keys(v: Any) -> Any:
    if isinstance(v, Mapping):
        first = [k for k in _FIRST_KEYS if k in v]
        return {k: _ordered_keys(v[k]) for k in [*first, *[k for k in v if k not in first]]}
    if isinstance(v, list | tuple):
        return [_ordered_keys(x) for x in v]
    return v


def config_to_document(cfg: Config) -> dict[str, Any]:
    """The resolved configuration as a TOML document (defaults filled in, derived values written out, secrets as
    the file or variable that holds them): :func:`parse_config` of it gives the same configuration."""
    doc: dict[str, Any] = _ordered_keys(cfg.model_dump(by_alias=True, exclude_none=True))
    return doc

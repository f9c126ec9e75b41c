"""Operator commands for the alarm layer: validation and the local Unix socket.

Requests and responses are JSON objects, one per line (on the socket) or one per message (on the MQTT command
topic, answered on the response topic).  Only these commands exist::

    {"cmd": "list"}                                  optional "point"
    {"cmd": "ack", "point": P}                       optional "indicator" (default: every alarm of P)
    {"cmd": "shelve", "point": P, "reason": R, "duration_s": S}    optional "indicator"
    {"cmd": "unshelve", "point": P}                  optional "indicator"
    {"cmd": "relearn", "point": P}                   forget P's baselines and learn them again
    {"cmd": "history"}                               optional "point", "since_s" (Unix s), "limit" (1..1000)
    {"cmd": "select_band"}                           optional "point": select the automatic envelope band now
                                                     (points with envelope_band_hz = "auto"; served by the daemon)

Every request may carry ``"id"`` (echoed in the response) and ``"by"`` (who asked; recorded in events).
A response is ``{"ok": true, "result": …}`` or ``{"ok": false, "error": "…"}``.  The socket lives in the state
directory with mode 0600 (or 0660 for a trusted operators' group).
"""

from __future__ import annotations

import asyncio
import contextlib
import json
import math
import os
import socket
import stat
from collections.abc import Callable
from pathlib import Path
from typing import Any

import structlog

from edgevib.daemon.errors import EdgevibError

__all__ = ["COMMANDS", "CommandError", "ControlServer", "handle_payload", "human_duration", "validate_request"]

log = structlog.get_logger("edgevib.alarms.control")

MAX_REQUEST_BYTES = 16 * 1024
_COMMON = {"cmd", "id", "by"}
COMMANDS: dict[str, tuple[set[str], set[str]]] = {  # name -> (required keys, optional keys)
    "list": (set(), {"point"}),
    "ack": ({"point"}, {"indicator"}),
    "shelve": ({"point", "reason", "duration_s"}, {"indicator"}),
    "unshelve": ({"point"}, {"indicator"}),
    "relearn": ({"point"}, set()),
    "history": (set(), {"point", "since_s", "limit"}),
    "select_band": (set(), {"point"}),
}


class CommandError(EdgevibError):
    """A request that is not a valid command (the message says why)."""


def _text(req: dict[str, Any], key: str, max_len: int) -> None:
    v = req.get(key)
    if v is None:
        return
    if not isinstance(v, str) or not v.strip():
        raise CommandError(f"{key!r} must be a non-empty string")
    if len(v) > max_len or any(ord(c) < 32 for c in v):
        raise CommandError(f"{key!r} must be at most {max_len} printable characters")


def validate_request(req: object) -> dict[str, Any]:
    """Check a decoded request against :data:`COMMANDS`; returns it or raises :class:`CommandError`."""
    if not isinstance(req, dict):
        raise CommandError("a request is a JSON object")
    cmd = req.get("cmd")
    if not isinstance(cmd, str) or cmd not in COMMANDS:
        raise CommandError(f"unknown command {cmd!r} (commands: {', '.join(COMMANDS)})")
    required, optional = COMMANDS[cmd]
    missing = sorted(required - set(req))
    if missing:
        raise CommandError(f"{cmd}: missing {', '.join(missing)}")
    unknown = sorted(set(req) - required - optional - _COMMON)
    if unknown:
        raise CommandError(f"{cmd}: unknown key(s) {', '.join(unknown)}")
    for key, n in (("point", 128), ("indicator", 64), ("by", 64), ("reason", 200)):
        _text(req, key, n)
    rid = req.get("id")
    if rid is not None and not (isinstance(rid, str | int) and not isinstance(rid, bool) and len(str(rid)) <= 64):
        raise CommandError("'id' must be a string or integer of at most 64 characters")
    if cmd == "shelve":
        d = req["duration_s"]
        if isinstance(d, bool) or not isinstance(d, int | float) or not math.isfinite(d) or d <= 0:
            raise CommandError(f"shelve: duration_s must be a number of seconds > 0, got {d!r}")
    if cmd == "history":
        since = req.get("since_s")
        if since is not None and (isinstance(since, bool) or not isinstance(since, int | float)
                                  or not math.isfinite(since)):
            raise CommandError(f"history: since_s must be a time in Unix seconds, got {since!r}")
        limit = req.get("limit", 200)
        if isinstance(limit, bool) or not isinstance(limit, int) or not 1 <= limit <= 1000:
            raise CommandError(f"history: limit must be an integer 1..1000, got {limit!r}")
    return req


def human_duration(seconds: float) -> str:
    """A duration as people read it: ``45 s``, ``12 min``, ``8 h``, ``500 h``, ``30 d`` (one unit, at most one
    decimal; hours up to 1000 h since shelves are set in hours)."""
    s = float(seconds)
    if not math.isfinite(s):
        return f"{s} s"
    a = abs(s)
    if a < 120:
        value, unit = s, "s"
    elif a < 2 * 3600:
        value, unit = s / 60.0, "min"
    elif a < 1000 * 3600:
        value, unit = s / 3600.0, "h"
    else:
        value, unit = s / 86400.0, "d"
    text = f"{value:.1f}".rstrip("0").rstrip(".") if abs(value) < 100 else f"{value:.0f}"
    return f"{text} {unit}"


def handle_payload(payload: bytes, handler: Callable[[dict[str, Any]], Any]) -> bytes:
    """Decode, validate and run one request; always returns one JSON response (never raises)."""
    rid: Any = None
    try:
        if len(payload) > MAX_REQUEST_BYTES:
            raise CommandError(f"request of {len(payload)} bytes exceeds {MAX_REQUEST_BYTES}")
        try:
            req = json.loads(payload.decode("utf-8"))
        except (UnicodeDecodeError, json.JSONDecodeError) as exc:
            raise CommandError(f"not JSON: {exc}") from None
        if isinstance(req, dict):
            rid = req.get("id")
        result = handler(validate_request(req))
        out: dict[str, Any] = {"ok": True, "result": result}
    except CommandError as exc:
        out = {"ok": False, "error": str(exc)}
    except Exception as exc:  # a failing command must not kill the server
        log.exception("command failed")
        out = {"ok": False, "error": f"internal error: {type(exc).__name__}"}
    if rid is not None and isinstance(rid, str | int):
        out["id"] = rid
    return json.dumps(out, separators=(",", ":"), allow_nan=False).encode("utf-8")


class ControlServer:
    """The Unix socket ``path`` (mode ``mode``): one JSON request per line, one JSON response line each."""

    def __init__(self, path: str | Path, handler: Callable[[dict[str, Any]], Any], mode: int = 0o600) -> None:
        self.path = Path(path)
        self.handler = handler
        self.mode = mode
        self._server: asyncio.AbstractServer | None = None

    async def start(self) -> None:
        """Listen; a socket that cannot be made is logged and the daemon goes on without it (another edgevib
        listening there is an error)."""
        try:
            await self._listen()
        except OSError as exc:
            log.error("alarm control socket unavailable", path=str(self.path), error=str(exc))

    async def _listen(self) -> None:
        self.path.parent.mkdir(parents=True, exist_ok=True)
        if self.path.exists() or self.path.is_symlink():
            if not stat.S_ISSOCK(self.path.lstat().st_mode):
                raise EdgevibError(f"{self.path} exists and is not a socket")
            probe = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
            try:
                probe.connect(str(self.path))
            except OSError:
                self.path.unlink()  # stale socket of a previous run
            else:
                raise EdgevibError(f"another edgevib is already listening on {self.path}")
            finally:
                probe.close()
        old = os.umask(0o177)  # the socket is never, even briefly, open to others
        try:
            self._server = await asyncio.start_unix_server(self._client, path=str(self.path),
                                                           limit=MAX_REQUEST_BYTES + 2)
        finally:
            os.umask(old)
        os.chmod(self.path, self.mode)
        log.info("alarm control socket listening", path=str(self.path), mode=f"{self.mode:04o}")

    async def _client(self, reader: asyncio.StreamReader, writer: asyncio.StreamWriter) -> None:
        try:
            while True:
                try:
                    line = await reader.readline()
                except (ValueError, asyncio.LimitOverrunError):
                    writer.write(handle_payload(b"x" * (MAX_REQUEST_BYTES + 1), self.handler) + b"\n")
                    break
                if not line:
                    break
                if not line.strip():
                    continue
                response = await asyncio.to_thread(handle_payload, line.strip(), self.handler)
                writer.write(response + b"\n")
                await writer.drain()
        except (ConnectionError, asyncio.IncompleteReadError):
            pass
        finally:
            with contextlib.suppress(Exception):
                writer.close()

    async def stop(self) -> None:
        if self._server is not None:
            self._server.close()
            with contextlib.suppress(Exception):
                await self._server.wait_closed()
            self._server = None
            with contextlib.suppress(FileNotFoundError):
                self.path.unlink()


def request(path: str | Path, req: dict[str, Any], timeout_s: float = 10.0) -> dict[str, Any]:
    """Send one request to a running daemon's socket and return its response (for ``edgevib alarms``)."""
    with socket.socket(socket.AF_UNIX, socket.SOCK_STREAM) as s:
        s.settimeout(timeout_s)
        s.connect(str(path))
        s.sendall(json.dumps(req).encode("utf-8") + b"\n")
        buf = b""
        while not buf.endswith(b"\n"):
            chunk = s.recv(65536)
            if not chunk:
                break
            buf += chunk
    out = json.loads(buf.decode("utf-8"))
    if not isinstance(out, dict):
        raise CommandError("the daemon sent a response that is not an object")
    return out

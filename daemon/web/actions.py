"""Acknowledge, shelve and unshelve alarms from the view — off unless ``[view] actions = true``, and then only for
an authenticated caller, with CSRF protection, each action recorded with who did it.

Who a caller is, in this order:

* a **client certificate** verified by the listener (``[metrics] tls_client_ca_file``): ``cert:COMMON-NAME``;
* ``Authorization: Bearer TOKEN`` with a token of the credential file (``[view] token_file`` or ``token_env``;
  one ``NAME:TOKEN`` per line, or a single bare token for ``operator``): ``token:NAME``;
* the session cookie that ``POST /api/v1/session {"token": …}`` sets for the page (``HttpOnly``,
  ``SameSite=Strict``, ``Secure`` over TLS; eight hours; at most :data:`MAX_SESSIONS`).

CSRF: a browser sends cookies and client certificates by itself, so a change made with either needs the
``X-CSRF-Token`` header from ``GET /api/v1/session`` (an HMAC of the caller's identity under a key made at start),
a JSON body (``Content-Type: application/json``) and, when the browser sends ``Origin``, our own origin.  A bearer
token is never sent by a browser on its own and needs no CSRF token.  Sign-in attempts are limited per client
address.  The alarm layer records ``by`` in every transition it emits (the alarm history and the feed), and each
action is logged with the caller and address.
"""

from __future__ import annotations

import hashlib
import hmac
import json
import secrets
import time
from collections import OrderedDict
from collections.abc import Callable
from typing import Any

from aiohttp import web

from edgevib.daemon.config import ViewConfig
from edgevib.daemon.interfaces import ConfigError
from edgevib.daemon.logs import get_logger
from edgevib.daemon.web.listener import HttpListener, client_identity

__all__ = ["MAX_SESSIONS", "MIN_TOKEN_CHARS", "SESSION_COOKIE", "Actions", "token_warnings"]

SESSION_COOKIE = "edgevib_session"
SESSION_TTL_S = 8 * 3600.0
MAX_SESSIONS = 64
SIGNIN_PER_MIN = 5
MIN_TOKEN_CHARS = 16
log = get_logger("edgevib.view.actions")


def _parse_tokens(text: str) -> tuple[dict[str, str], list[str]]:
    """``{token: name}`` from a credential file's text (``NAME:TOKEN`` lines, or one bare token), and one line per
    entry left out saying which line, whose and why (never the token itself)."""
    out: dict[str, str] = {}
    problems: list[str] = []
    for lineno, raw in enumerate(text.splitlines(), 1):
        ln = raw.strip()
        if not ln or ln.startswith("#"):
            continue
        name, sep, token = ln.partition(":")
        if not sep:
            name, token = "operator", ln
        name, token = name.strip(), token.strip()
        if not name or not all(c.isalnum() or c in "-_." for c in name):
            problems.append(f"line {lineno}: name {name[:64]!r} may hold only letters, digits, '-', '_' and '.'; "
                            "entry left out")
        elif len(token) < MIN_TOKEN_CHARS:
            problems.append(f"line {lineno} ({name}): the token has {len(token)} characters, fewer than "
                            f"{MIN_TOKEN_CHARS}; entry left out (that person cannot sign in)")
        else:
            out[token] = name
    if not out:
        problems.append("no usable token: token sign-in is refused for everyone")
    return out, problems


def token_warnings(config: ViewConfig) -> list[str]:
    """The entries of the view's credential file (or variable) that are left out, as lines naming the key, the
    file, the line and the person — for ``check-config`` and the daemon's log.  Nothing when it cannot be read
    here (``check-config`` reports a missing file already)."""
    if config.token is None:
        return []
    try:
        text = config.token.reveal()
    except ConfigError:
        return []
    return [f"{_token_source(config)}: {problem}" for problem in _parse_tokens(text)[1]]


def _token_source(config: ViewConfig) -> str:
    token = config.token
    return "" if token is None else f"view.token_{token.kind} ({token.ref})"


class Actions:
    """The action routes and their guards (see the module docstring)."""

    def __init__(self, config: ViewConfig, *, client_certificates: bool,
                 clock: Callable[[], float] = time.monotonic) -> None:
        self.config = config
        self.enabled = config.actions
        self.client_certificates = client_certificates
        self.clock = clock
        self._key = secrets.token_bytes(32)
        self._sessions: OrderedDict[str, tuple[str, float]] = OrderedDict()
        self._signins: dict[str, list[float]] = {}
        self.view: Any = None
        self._reported: list[str] = []
        if self.enabled:
            self._tokens()  # log the entries left out now, not at the first sign-in

    def routes(self, http: HttpListener, view: Any) -> None:
        self.view = view
        http.get("/api/v1/session", self._session)
        http.post("/api/v1/session", self._signin)
        http.post("/api/v1/session/end", self._signout)
        for cmd in ("ack", "shelve", "unshelve"):
            http.post(f"/api/v1/points/{{point}}/{cmd}", self._command(cmd))

    # ------------------------------------------------------------------------------------------ identity

    def _tokens(self) -> dict[str, str]:
        if self.config.token is None:
            return {}
        try:
            tokens, problems = _parse_tokens(self.config.token.reveal())
        except ConfigError as exc:
            log.error("view token file unreadable; token sign-in refused", error=str(exc))
            return {}
        if problems != self._reported:  # once per change of the file
            self._reported = problems
            for problem in problems:
                log.warning("view credential entry left out", source=_token_source(self.config), problem=problem)
        return tokens

    def _token_name(self, token: str) -> str | None:
        found = None
        for known, name in self._tokens().items():  # compare with every entry, in constant time each
            if hmac.compare_digest(known.encode(), token.encode()):
                found = name
        return found

    def _bearer(self, request: web.Request) -> str | None:
        auth = request.headers.get("Authorization", "")
        if not auth.lower().startswith("bearer "):
            return None
        name = self._token_name(auth[7:].strip())
        return None if name is None else f"token:{name}"

    def _cookie_identity(self, request: web.Request) -> str | None:
        sid = request.cookies.get(SESSION_COOKIE)
        if not sid:
            return None
        entry = self._sessions.get(sid)
        if entry is None:
            return None
        who, expires = entry
        if self.clock() > expires:
            self._sessions.pop(sid, None)
            return None
        return who

    def identity(self, request: web.Request) -> tuple[str | None, bool]:
        """(who, needs CSRF): a client certificate, a bearer token or a session cookie; ``None`` for nobody."""
        cert = client_identity(request) if self.client_certificates else None
        if cert is not None:
            return cert, True
        bearer = self._bearer(request)
        if bearer is not None:
            return bearer, False
        return self._cookie_identity(request), True

    def csrf_token(self, who: str) -> str:
        return hmac.new(self._key, who.encode(), hashlib.sha256).hexdigest()

    # ------------------------------------------------------------------------------------------ session

    async def _session(self, request: web.Request) -> web.Response:
        from edgevib.daemon.web.api import json_response

        who, _ = self.identity(request) if self.enabled else (None, False)
        return json_response({
            "actions": self.enabled, "who": who, "csrf": self.csrf_token(who) if who else None,
            "sign_in": ("token" if self.config.token is not None else None) if self.enabled else None,
            "client_certificates": self.client_certificates,
        })

    def _signin_allowed(self, remote: str) -> bool:
        now = self.clock()
        recent = [t for t in self._signins.get(remote, []) if now - t < 60.0]
        if len(self._signins) > 1024:
            self._signins.clear()
        self._signins[remote] = recent
        if len(recent) >= SIGNIN_PER_MIN:
            return False
        recent.append(now)
        return True

    async def _signin(self, request: web.Request) -> web.Response:
        from edgevib.daemon.web.api import json_response, problem

        if not self.enabled:
            return problem(403, "actions are off in the configuration ([view] actions = false)")
        if not self._signin_allowed(request.remote or "?"):
            return problem(429, f"at most {SIGNIN_PER_MIN} sign-in attempts per minute")
        refused = self._origin_problem(request)
        if refused is not None:
            return problem(403, refused)
        body = await self._json(request)
        token = body.get("token") if isinstance(body, dict) else None
        name = self._token_name(token) if isinstance(token, str) and len(token) <= 512 else None
        if name is None:
            log.warning("view sign-in refused", remote=request.remote)
            return problem(401, "unknown token")
        who = f"token:{name}"
        sid = secrets.token_urlsafe(32)
        self._sessions[sid] = (who, self.clock() + SESSION_TTL_S)
        while len(self._sessions) > MAX_SESSIONS:
            self._sessions.popitem(last=False)
        log.info("view sign-in", who=who, remote=request.remote)
        resp = json_response({"who": who, "csrf": self.csrf_token(who)})
        resp.set_cookie(SESSION_COOKIE, sid, max_age=int(SESSION_TTL_S), httponly=True, samesite="Strict",
                        secure=request.secure, path="/")
        return resp

    async def _signout(self, request: web.Request) -> web.Response:
        from edgevib.daemon.web.api import json_response

        sid = request.cookies.get(SESSION_COOKIE)
        if sid:
            self._sessions.pop(sid, None)
        resp = json_response({"who": None})
        resp.del_cookie(SESSION_COOKIE, path="/")
        return resp

    # ------------------------------------------------------------------------------------------ commands

    @staticmethod
    def _origin_problem(request: web.Request) -> str | None:
        origin = request.headers.get("Origin")
        if origin is None:
            return None
        own = f"{request.scheme}://{request.host}"
        return None if origin == own else f"cross-origin request from {origin[:100]!r} refused"

    @staticmethod
    async def _json(request: web.Request) -> Any:
        if request.content_type != "application/json":
            raise web.HTTPUnsupportedMediaType(text="send a JSON body (Content-Type: application/json)")
        try:
            return json.loads(await request.read() or b"{}")
        except (ValueError, UnicodeDecodeError):
            raise web.HTTPBadRequest(text="the body is not valid JSON") from None

    def _command(self, cmd: str) -> Callable[[web.Request], Any]:
        async def handler(request: web.Request) -> web.Response:
            from edgevib.daemon.web.api import json_response, problem

            if not self.enabled:
                return problem(403, "actions are off in the configuration ([view] actions = false)")
            who, needs_csrf = self.identity(request)
            if who is None:
                resp = problem(401, "sign in first: a client certificate, a bearer token or a session")
                resp.headers["WWW-Authenticate"] = 'Bearer realm="edgevib"'
                return resp
            if needs_csrf:
                sent = request.headers.get("X-CSRF-Token", "")
                if not hmac.compare_digest(sent.encode(), self.csrf_token(who).encode()):
                    log.warning("view action refused: CSRF token missing or wrong", who=who, remote=request.remote)
                    return problem(403, "missing or wrong X-CSRF-Token (GET /api/v1/session gives it)")
            refused = self._origin_problem(request)
            if refused is not None:
                return problem(403, refused)
            try:
                body = await self._json(request)
            except web.HTTPException as exc:
                return problem(exc.status, exc.text or "bad request")
            if not isinstance(body, dict):
                return problem(400, "the body is a JSON object")
            layer = self.view.alarm_layer if self.view is not None else None
            if layer is None:
                return problem(409, "the alarm layer is off ([alarms] enabled = false)")
            req: dict[str, Any] = {"cmd": cmd, "point": request.match_info["point"], "by": who[:64]}
            allowed = {"indicator"} | ({"reason", "duration_s"} if cmd == "shelve" else set())
            extra = sorted(set(body) - allowed)
            if extra:
                return problem(400, f"{cmd}: unknown key(s) {', '.join(extra)}")
            req.update({k: body[k] for k in allowed if k in body})
            from edgevib.daemon.alarms.control import CommandError, validate_request

            try:
                validate_request(req)
                result = await layer.command(req)
            except CommandError as exc:
                return problem(404 if "unknown point" in str(exc) else 400, str(exc))
            log.info("operator action", cmd=cmd, point=req["point"], indicator=req.get("indicator"), by=who,
                     remote=request.remote, changed=result.get("changed") if isinstance(result, dict) else None)
            return json_response({"ok": True, "by": who, "result": result})
        return handler

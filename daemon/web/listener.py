"""The daemon's one HTTP listener (aiohttp, on the daemon's event loop): health probes, metrics, the JSON API
and the page are routes on it.

Loopback (``127.0.0.1:9851``) by default; optional TLS (≥ 1.2) with client-certificate authentication when a
client CA is given.  Every response carries ``X-Content-Type-Options: nosniff`` and ``Referrer-Policy:
no-referrer``; an exception in a handler is a ``500`` and one log line, never the end of the listener.  Request
bodies are limited to :data:`MAX_BODY_BYTES`.  Routes are added by their owners (``/metrics``, ``/healthz``,
``/readyz`` by the Prometheus sink; ``/``, ``/static/…`` and ``/api/v1/…`` by the view) before :meth:`start`.
"""

from __future__ import annotations

import asyncio
import json
import ssl
from collections.abc import Awaitable, Callable

from aiohttp import web

from edgevib.daemon.logs import RateLimitedLogger, get_logger

__all__ = ["MAX_BODY_BYTES", "Handler", "HttpListener", "client_identity", "tls_context"]

MAX_BODY_BYTES = 16 * 1024
SHUTDOWN_GRACE_S = 2.0
Handler = Callable[[web.Request], Awaitable[web.StreamResponse]]
log = get_logger("edgevib.http")


def tls_context(cert_file: str, key_file: str | None, client_ca_file: str | None) -> ssl.SSLContext:
    """A server TLS context: TLS ≥ 1.2; client certificates required when ``client_ca_file`` is given."""
    ctx = ssl.SSLContext(ssl.PROTOCOL_TLS_SERVER)
    ctx.minimum_version = ssl.TLSVersion.TLSv1_2
    ctx.load_cert_chain(cert_file, key_file)
    if client_ca_file is not None:
        ctx.verify_mode = ssl.CERT_REQUIRED
        ctx.load_verify_locations(client_ca_file)
    return ctx


def client_identity(request: web.Request) -> str | None:
    """The verified client certificate's subject common name (``cert:NAME``), or ``None`` without one."""
    transport = request.transport
    if transport is None:
        return None
    cert = transport.get_extra_info("peercert")
    if not cert:
        return None
    for rdn in cert.get("subject", ()):
        for key, value in rdn:
            if key == "commonName":
                return f"cert:{value}"
    return "cert:(no common name)"


class HttpListener:
    """One aiohttp application on ``host:port`` (port 0 picks a free one; :attr:`port` tells which).

    Parameters
    ----------
    serve : bool
        False builds the routes but never binds a socket (tests that need no HTTP).
    """

    def __init__(self, host: str = "127.0.0.1", port: int = 9851, *, tls_cert_file: str | None = None,
                 tls_key_file: str | None = None, tls_client_ca_file: str | None = None,
                 serve: bool = True) -> None:
        self.host = host
        self.requested_port = port
        self.port = port
        self.tls = tls_cert_file is not None
        self.client_certificates = tls_client_ca_file is not None
        self._tls = (tls_cert_file, tls_key_file, tls_client_ca_file)
        self.serve = serve
        self.rlog = RateLimitedLogger(log, interval_s=10.0)
        self.app = web.Application(middlewares=[self._guard], client_max_size=MAX_BODY_BYTES)
        self.on_stopping: list[Callable[[], None]] = []  # called before connections close (SSE streams end)
        self._runner: web.AppRunner | None = None
        self.hints = ["/metrics", "/healthz", "/readyz"]

    # ------------------------------------------------------------------------------------------ routes

    def get(self, path: str, handler: Handler, name: str | None = None) -> None:
        """Add a GET route (HEAD is answered too)."""
        self.app.router.add_get(path, handler, name=name)

    def post(self, path: str, handler: Handler) -> None:
        self.app.router.add_post(path, handler)

    @web.middleware
    async def _guard(self, request: web.Request, handler: Handler) -> web.StreamResponse:
        try:
            response = await handler(request)
        except web.HTTPException as exc:
            response = self._error(request, exc)
        except asyncio.CancelledError:
            raise
        except Exception as exc:  # a failing part never kills the listener
            self.rlog.error(("request", request.path), "HTTP request failed", path=request.path, error=repr(exc))
            response = web.Response(status=500, text="internal error\n")
        if not response.prepared:
            response.headers.setdefault("X-Content-Type-Options", "nosniff")
            response.headers.setdefault("Referrer-Policy", "no-referrer")
        return response

    def _error(self, request: web.Request, exc: web.HTTPException) -> web.Response:
        """An HTTP error as a response: JSON ``{"error", "status"}`` under ``/api/``, plain text elsewhere."""
        if exc.content_type == "application/json" and exc.text:
            return web.Response(status=exc.status, text=exc.text, content_type="application/json")
        message = exc.text or exc.reason
        if exc.status == 404:
            message = "not found" if request.path.startswith("/api/") else \
                f"not found; try / (the view), {', '.join(self.hints)}"
        if request.path.startswith("/api/"):
            body = json.dumps({"error": message.strip().removeprefix(f"{exc.status}: "), "status": exc.status})
            return web.Response(status=exc.status, text=body, content_type="application/json")
        return web.Response(status=exc.status, text=message.rstrip("\n") + "\n")

    # ------------------------------------------------------------------------------------------ lifecycle

    @property
    def base_url(self) -> str:
        host = f"[{self.host}]" if ":" in self.host else self.host
        return f"{'https' if self.tls else 'http'}://{host}:{self.port}"

    @property
    def running(self) -> bool:
        return self._runner is not None

    async def start(self) -> None:
        """Bind and serve (raises ``OSError`` when the address is taken or not available)."""
        if not self.serve or self._runner is not None:
            return
        cert, key, ca = self._tls
        ctx = tls_context(cert, key, ca) if cert is not None else None
        self.app.on_shutdown.append(self._shutdown)
        runner = web.AppRunner(self.app, access_log=None, handle_signals=False, shutdown_timeout=SHUTDOWN_GRACE_S)
        await runner.setup()
        site = web.TCPSite(runner, self.host, self.requested_port, ssl_context=ctx, reuse_address=True)
        try:
            await site.start()
        except BaseException:
            await runner.cleanup()
            raise
        self._runner = runner
        addresses = runner.addresses
        if addresses:
            self.port = int(addresses[0][1])
        log.info("HTTP listener up", url=self.base_url, tls=self.tls, client_certificates=self.client_certificates)

    async def _shutdown(self, _app: web.Application) -> None:
        for cb in self.on_stopping:
            try:
                cb()
            except Exception as exc:
                log.warning("listener shutdown callback failed", error=repr(exc))

    async def stop(self) -> None:
        runner, self._runner = self._runner, None
        if runner is not None:
            await runner.cleanup()

    def __repr__(self) -> str:  # pragma: no cover - debugging aid
        return f"HttpListener({self.base_url}, serving={self.running})"


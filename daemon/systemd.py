"""The systemd service-manager notification protocol (``sd_notify``), spoken directly over ``$NOTIFY_SOCKET``.

Under a ``Type=notify`` unit systemd passes the address of a datagram socket in ``$NOTIFY_SOCKET``: an absolute
filesystem path, or an abstract socket name written with a leading ``@``.  A message is one datagram of
newline-separated ``KEY=value`` assignments:

* ``READY=1`` once the configuration is loaded and the listener is up (systemd then counts the unit as started);
* ``STATUS=…`` a one-line human summary shown by ``systemctl status``;
* ``WATCHDOG=1`` a keep-alive; with ``WatchdogSec=`` set, systemd passes ``$WATCHDOG_USEC`` (and
  ``$WATCHDOG_PID``) and restarts the service when no ping arrives within that time;
* ``RELOADING=1`` with ``MONOTONIC_USEC=`` (``CLOCK_MONOTONIC`` in µs) when a reload starts, followed by
  ``READY=1`` when it has finished;
* ``STOPPING=1`` when shutdown begins.

Outside systemd (no ``$NOTIFY_SOCKET``) every call is a cheap no-op.  Nothing here ever raises into the caller:
a socket error is logged once and the notifier stays quiet afterwards for that kind of failure.
"""

from __future__ import annotations

import asyncio
import os
import socket
import time
from collections.abc import Mapping

import structlog

__all__ = ["Notifier", "watchdog_interval_s", "watchdog_loop"]

_log = structlog.get_logger(__name__)

# A notification is a handful of short lines; systemd itself reads at most a page-sized buffer per datagram
# (common practice for sd_notify implementations), so keep the STATUS text well below that.
_MAX_STATUS_CHARS = 400


def _address(raw: str) -> str | bytes | None:
    """The ``sendto`` address for a ``$NOTIFY_SOCKET`` value, or ``None`` when it is not a usable address."""
    if raw.startswith("@"):
        # Abstract namespace: the leading '@' stands for a NUL byte (Linux only).
        return b"\0" + raw[1:].encode()
    if raw.startswith("/"):
        return raw
    return None


class Notifier:
    """Sends service-manager notifications; a no-op when ``address`` is empty or ``None``.

    Parameters
    ----------
    address:
        A ``$NOTIFY_SOCKET`` value (absolute path or ``@abstract``); usually from :meth:`from_env`.
    """

    def __init__(self, address: str | None) -> None:
        self.address = address or None
        self._sock: socket.socket | None = None
        self._target: str | bytes | None = None
        self._warned: set[str] = set()
        self.sent = 0  # datagrams delivered to the socket (for tests and the STATUS of the health endpoint)
        if self.address is not None:
            self._target = _address(self.address)
            if self._target is None:
                self._warn_once("address", f"NOTIFY_SOCKET {self.address!r} is neither an absolute path nor "
                                           "an abstract name starting with '@'; notifications are disabled")

    @classmethod
    def from_env(cls, env: Mapping[str, str] | None = None) -> Notifier:
        """A notifier for ``$NOTIFY_SOCKET`` of ``env`` (default: the process environment)."""
        return cls((os.environ if env is None else env).get("NOTIFY_SOCKET"))

    @property
    def enabled(self) -> bool:
        """True when there is a usable notification socket address."""
        return self._target is not None

    def _warn_once(self, kind: str, message: str, **kw: object) -> None:
        if kind not in self._warned:
            self._warned.add(kind)
            _log.warning("systemd notification problem", problem=message, **kw)

    def notify(self, *assignments: str) -> bool:
        """Send ``KEY=value`` assignments as one datagram; returns whether it was sent (never raises)."""
        if self._target is None or not assignments:
            return False
        payload = "\n".join(assignments).encode("utf-8", "replace")
        try:
            if self._sock is None:
                sock = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM | socket.SOCK_CLOEXEC)
                sock.setblocking(False)  # never stall the event loop; a full queue drops the message
                self._sock = sock
            self._sock.sendto(payload, self._target)
        except BlockingIOError:
            self._warn_once("full", "the service manager's notification queue is full; a message was dropped")
            return False
        except OSError as exc:
            self._warn_once(f"os:{exc.errno}", "cannot send to NOTIFY_SOCKET", address=self.address, error=str(exc))
            return False
        self.sent += 1
        return True

    def ready(self, status: str | None = None) -> bool:
        """``READY=1`` (plus an optional ``STATUS=``)."""
        return self.notify("READY=1", *((_status_line(status),) if status is not None else ()))

    def status(self, text: str) -> bool:
        """``STATUS=`` a one-line summary (newlines become spaces, long text is shortened)."""
        return self.notify(_status_line(text))

    def watchdog(self) -> bool:
        """``WATCHDOG=1`` keep-alive."""
        return self.notify("WATCHDOG=1")

    def reloading(self, status: str | None = None) -> bool:
        """``RELOADING=1`` with ``MONOTONIC_USEC``; send :meth:`ready` when the reload is complete."""
        usec = time.clock_gettime_ns(time.CLOCK_MONOTONIC) // 1000
        extra = (_status_line(status),) if status is not None else ()
        return self.notify("RELOADING=1", f"MONOTONIC_USEC={usec}", *extra)

    def stopping(self, status: str | None = None) -> bool:
        """``STOPPING=1`` when shutdown begins."""
        return self.notify("STOPPING=1", *((_status_line(status),) if status is not None else ()))

    def close(self) -> None:
        """Close the socket (the notifier reopens it if used again)."""
        if self._sock is not None:
            self._sock.close()
            self._sock = None


def _status_line(text: str) -> str:
    one_line = " ".join(str(text).split())
    if len(one_line) > _MAX_STATUS_CHARS:
        one_line = one_line[: _MAX_STATUS_CHARS - 1] + "…"
    return f"STATUS={one_line}"


def watchdog_interval_s(env: Mapping[str, str] | None = None, pid: int | None = None) -> float | None:
    """The watchdog timeout systemd expects pings within, in seconds, or ``None`` when none is requested.

    ``$WATCHDOG_USEC`` must be a positive integer; when ``$WATCHDOG_PID`` is set it must be this process's id
    (``pid``, default :func:`os.getpid`), otherwise the watchdog is meant for another process.
    """
    source = os.environ if env is None else env
    raw = source.get("WATCHDOG_USEC")
    if not raw:
        return None
    try:
        usec = int(raw)
    except ValueError:
        _log.warning("ignoring WATCHDOG_USEC that is not an integer", value=raw)
        return None
    if usec <= 0:
        return None
    raw_pid = source.get("WATCHDOG_PID")
    if raw_pid:
        try:
            if int(raw_pid) != (os.getpid() if pid is None else pid):
                return None
        except ValueError:
            _log.warning("ignoring WATCHDOG_PID that is not an integer", value=raw_pid)
            return None
    return usec / 1e6


async def watchdog_loop(notifier: Notifier, interval_s: float | None) -> None:
    """Ping ``WATCHDOG=1`` from the event loop every ``interval_s / 2`` until cancelled.

    Because the pings come from the event loop itself, a loop that is stuck (a blocking call, a deadlock) stops
    pinging and systemd restarts the service.  Returns at once when there is no watchdog or no socket.
    """
    if interval_s is None or interval_s <= 0 or not notifier.enabled:
        return
    period_s = interval_s / 2.0
    while True:
        notifier.watchdog()
        await asyncio.sleep(period_s)

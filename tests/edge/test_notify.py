"""sd_notify over a real datagram socket: filesystem path and abstract name, the watchdog, and the no-op cases.

Protocol facts (newline-separated KEY=value assignments in one AF_UNIX datagram, '@' for the abstract namespace,
WATCHDOG_USEC/WATCHDOG_PID) are from the sd_notify(3) and systemd.service(5) manual pages.
"""

from __future__ import annotations

import asyncio
import os
import socket
import tempfile
import time
import uuid
from collections.abc import Iterator
from pathlib import Path

import pytest
from structlog.testing import capture_logs

from edgevib.daemon.systemd import Notifier, watchdog_interval_s, watchdog_loop


def _receiver(address: str | bytes) -> socket.socket:
    sock = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM)
    sock.bind(address)
    sock.settimeout(5.0)
    return sock


def _messages(sock: socket.socket) -> list[dict[str, str]]:
    """Every datagram waiting on ``sock`` as a dict of its assignments."""
    out: list[dict[str, str]] = []
    sock.setblocking(False)
    try:
        while True:
            data = sock.recv(4096)
            out.append(dict(line.split("=", 1) for line in data.decode().split("\n")))
    except BlockingIOError:
        pass
    finally:
        sock.settimeout(5.0)
    return out


@pytest.fixture
def path_socket() -> Iterator[tuple[str, socket.socket]]:
    # A short directory: AF_UNIX paths are limited to 107 bytes.
    with tempfile.TemporaryDirectory(prefix="evn-", dir="/tmp") as d:
        path = os.path.join(d, "notify")
        sock = _receiver(path)
        try:
            yield path, sock
        finally:
            sock.close()


@pytest.fixture
def abstract_socket() -> Iterator[tuple[str, socket.socket]]:
    name = f"edgevib-test-{uuid.uuid4().hex}"
    sock = _receiver(b"\0" + name.encode())
    try:
        yield "@" + name, sock
    finally:
        sock.close()


@pytest.mark.parametrize("which", ["path_socket", "abstract_socket"])
def test_messages_arrive(which: str, request: pytest.FixtureRequest) -> None:
    address, sock = request.getfixturevalue(which)
    n = Notifier.from_env({"NOTIFY_SOCKET": address})
    assert n.enabled
    assert n.ready(status="4 points, 1 source connected")
    assert sock.recv(4096) == b"READY=1\nSTATUS=4 points, 1 source connected"
    assert n.status("line one\nline two")
    assert sock.recv(4096) == b"STATUS=line one line two"  # one line only
    assert n.watchdog()
    assert sock.recv(4096) == b"WATCHDOG=1"
    before_us = time.clock_gettime_ns(time.CLOCK_MONOTONIC) // 1000
    assert n.reloading()
    after_us = time.clock_gettime_ns(time.CLOCK_MONOTONIC) // 1000
    msg = dict(line.split("=", 1) for line in sock.recv(4096).decode().split("\n"))
    assert msg["RELOADING"] == "1"
    assert before_us <= int(msg["MONOTONIC_USEC"]) <= after_us
    assert n.stopping()
    assert sock.recv(4096) == b"STOPPING=1"
    assert n.sent == 5
    n.close()


def test_long_status_is_shortened(path_socket: tuple[str, socket.socket]) -> None:
    address, sock = path_socket
    n = Notifier(address)
    n.status("x" * 5000)
    data = sock.recv(8192).decode()
    assert data.startswith("STATUS=x")
    assert len(data) < 500


def test_no_op_without_systemd() -> None:
    n = Notifier.from_env({})
    assert not n.enabled
    assert n.ready() is False
    assert n.watchdog() is False
    assert n.sent == 0


def test_relative_address_is_refused_and_logged_once() -> None:
    with capture_logs() as logs:
        n = Notifier("relative/notify")
        assert not n.enabled
        assert n.ready() is False
    assert [e["event"] for e in logs] == ["systemd notification problem"]
    assert "relative/notify" in logs[0]["problem"]


def test_missing_socket_never_raises_and_logs_once(tmp_path: Path) -> None:
    n = Notifier(str(tmp_path / "nobody-listens"))
    with capture_logs() as logs:
        for _ in range(5):
            assert n.watchdog() is False
    assert len(logs) == 1
    assert logs[0]["log_level"] == "warning"
    assert n.sent == 0


def test_full_queue_drops_without_blocking(path_socket: tuple[str, socket.socket]) -> None:
    address, sock = path_socket
    n = Notifier(address)
    with capture_logs() as logs:
        results = [n.status("y" * 300) for _ in range(5000)]  # nobody reads: the receive queue fills up
    assert results[0] is True
    assert results[-1] is False
    assert len([e for e in logs if "full" in e["problem"]]) == 1
    assert len(_messages(sock)) == n.sent


@pytest.mark.parametrize(
    ("env", "expected"),
    [
        ({}, None),
        ({"WATCHDOG_USEC": "30000000"}, 30.0),
        ({"WATCHDOG_USEC": "30000000", "WATCHDOG_PID": "4242"}, 30.0),  # pid 4242 passed below
        ({"WATCHDOG_USEC": "30000000", "WATCHDOG_PID": "4243"}, None),  # meant for another process
        ({"WATCHDOG_USEC": "0"}, None),
        ({"WATCHDOG_USEC": "-5"}, None),
        ({"WATCHDOG_USEC": "soon"}, None),
        ({"WATCHDOG_USEC": "500000", "WATCHDOG_PID": "x"}, None),
    ],
)
def test_watchdog_interval(env: dict[str, str], expected: float | None) -> None:
    assert watchdog_interval_s(env, pid=4242) == expected


def test_watchdog_interval_defaults_to_own_pid(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("WATCHDOG_USEC", "2000000")
    monkeypatch.setenv("WATCHDOG_PID", str(os.getpid()))
    assert watchdog_interval_s() == 2.0


async def test_watchdog_loop_pings_until_cancelled(path_socket: tuple[str, socket.socket]) -> None:
    address, sock = path_socket
    sock.setblocking(False)  # asyncio's sock_recv needs a non-blocking socket
    n = Notifier(address)
    task = asyncio.create_task(watchdog_loop(n, 0.02))  # pings every 10 ms
    loop = asyncio.get_running_loop()
    first = await asyncio.wait_for(loop.sock_recv(sock, 64), 5.0)
    second = await asyncio.wait_for(loop.sock_recv(sock, 64), 5.0)
    task.cancel()
    with pytest.raises(asyncio.CancelledError):
        await task
    assert first == second == b"WATCHDOG=1"


async def test_watchdog_loop_returns_without_watchdog_or_socket(path_socket: tuple[str, socket.socket]) -> None:
    # no watchdog interval, or no notify socket: the loop returns at once (a coroutine that never suspends) and
    # sends nothing — a loop that waited or pinged would not be done after one step
    address, sock = path_socket
    for coro in (watchdog_loop(Notifier(address), None), watchdog_loop(Notifier(None), 10.0)):
        with pytest.raises(StopIteration):
            coro.send(None)
    sock.setblocking(False)
    with pytest.raises(BlockingIOError):
        sock.recv(64)

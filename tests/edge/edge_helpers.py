"""Helpers for the edge-box tests: a real `edgevib run` subprocess with a notify socket, block publishing, scraping.

Everything talks to 127.0.0.1 only and every wait is bounded.
"""

from __future__ import annotations

import contextlib
import json
import os
import signal
import socket
import ssl
import subprocess
import sys
import tempfile
import time
import urllib.error
import urllib.request
from collections.abc import Callable, Iterable
from pathlib import Path
from typing import Any

import numpy as np
import paho.mqtt.client as mqtt
from prometheus_client.parser import text_string_to_metric_families

from edgevib.common.wire import Block, encode_binary

FS_HZ = 3200.0
BLOCK = 1024
FRAME = 4096  # 4 blocks per frame, no overlap: a frame is 1.28 s of signal


def toml_value(v: Any) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, int | float):
        return repr(v)
    if isinstance(v, str):
        return json.dumps(v)
    if isinstance(v, list | tuple):
        return "[" + ", ".join(toml_value(x) for x in v) + "]"
    if isinstance(v, dict):
        return "{ " + ", ".join(f"{k} = {toml_value(x)}" for k, x in v.items()) + " }"
    raise TypeError(type(v))


def toml(doc: dict[str, Any]) -> str:
    """A small TOML writer for test configurations (tables, arrays of tables, inline values)."""
    out: list[str] = []

    def table(prefix: str, t: dict[str, Any]) -> None:
        scalars = {k: v for k, v in t.items() if not isinstance(v, dict) and not _is_table_list(v)}
        for k, v in scalars.items():
            out.append(f"{k} = {toml_value(v)}")
        for k, v in t.items():
            name = f"{prefix}.{k}" if prefix else k
            if isinstance(v, dict):
                out.append(f"\n[{name}]")
                table(name, v)
            elif _is_table_list(v):
                for item in v:
                    out.append(f"\n[[{name}]]")
                    table(name, item)

    table("", doc)
    return "\n".join(out) + "\n"


def _is_table_list(v: Any) -> bool:
    return isinstance(v, list) and bool(v) and all(isinstance(x, dict) for x in v)


def point(pid: str, machine: str, sensor: str, source: str = "station-broker", **kw: Any) -> dict[str, Any]:
    return {"id": pid, "machine": machine, "axis": "horizontal", "source": source, "sensor": sensor,
            "fs_hz": FS_HZ, "block_samples": BLOCK, "sensor_type": "mems", "bandwidth_hz": [0.0, 1000.0], **kw}


def base_config(state_dir: Path, broker_url: str, points: list[dict[str, Any]], **sections: Any) -> dict[str, Any]:
    doc: dict[str, Any] = {
        "site": {"name": "quarry-lane", "state_dir": str(state_dir)},
        "logging": {"level": "info", "format": "json"},
        "analysis": {"frame_samples": FRAME, "overlap": 0.0, "queue_frames": 64},
        "sources": [{"name": "station-broker", "type": "mqtt", "url": broker_url, "qos": 1,
                     "topics": ["fwb/quarry-lane/+/+/block"], "reconnect_min_s": 0.1, "reconnect_max_s": 0.5}],
        "machines": [
            {"id": "P-101", "group": 2, "support": "rigid", "speed_rpm": 1480.0},
            {"id": "M-101", "group": 2, "support": "rigid", "speed_rpm": 1480.0},
        ],
        "points": points,
    }
    doc.update(sections)
    return doc


def sine_blocks(sensor: str, n: int, seq0: int = 0, *, t0_ns: int, velocity_rms_mm_s: float = 2.0,
                f_hz: float = 80.0, seed: int = 0) -> list[Block]:
    """``n`` consecutive blocks of a sine of the given velocity r.m.s. (in g) plus a little noise.

    A sine of velocity r.m.s. v at f has acceleration amplitude sqrt(2)·v·2πf (textbook kinematics).
    """
    rng = np.random.default_rng(seed)
    amp_g = np.sqrt(2.0) * velocity_rms_mm_s * 1e-3 * 2.0 * np.pi * f_hz / 9.80665
    blocks = []
    for k in range(n):
        seq = seq0 + k
        t = (seq * BLOCK + np.arange(BLOCK)) / FS_HZ
        x = amp_g * np.sin(2.0 * np.pi * f_hz * t) + 1e-3 * rng.standard_normal(BLOCK)
        blocks.append(Block(sensor_id=sensor, seq=seq, t0_ns=t0_ns + round(seq * BLOCK * 1e9 / FS_HZ),
                            fs_hz=FS_HZ, unit="g", samples=x.astype(np.float32)))
    return blocks


def topic(machine: str, pid: str) -> str:
    return f"fwb/quarry-lane/{machine}/{pid}/block"


def publish(port: int, messages: Iterable[tuple[str, bytes]], *, tls: dict[str, Any] | None = None,
            timeout_s: float = 10.0) -> None:
    """Publish with QoS 1 and wait for every PUBACK."""
    c = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id=f"edgevib-test-pub-{time.monotonic_ns()}")
    if tls is not None:
        c.tls_set(**tls)
    c.connect("127.0.0.1", port)
    c.loop_start()
    try:
        infos = [c.publish(t, p, qos=1) for t, p in messages]
        for info in infos:
            info.wait_for_publish(timeout_s)
            if not info.is_published():
                raise TimeoutError("a test block was not acknowledged by the broker")
    finally:
        c.disconnect()
        c.loop_stop()


def block_messages(machine: str, pid: str, blocks: list[Block]) -> list[tuple[str, bytes]]:
    return [(topic(machine, pid), encode_binary(b)) for b in blocks]


def wait_until(predicate: Callable[[], Any], timeout_s: float, what: str, interval_s: float = 0.05) -> Any:
    deadline = time.monotonic() + timeout_s
    while True:
        value = predicate()
        if value:
            return value
        if time.monotonic() > deadline:
            raise TimeoutError(f"gave up after {timeout_s} s waiting for {what}")
        time.sleep(interval_s)


Samples = dict[tuple[str, frozenset[tuple[str, str]]], float]


def parse_metrics(text: str) -> Samples:
    out: Samples = {}
    for fam in text_string_to_metric_families(text):
        for s in fam.samples:
            out[(s.name, frozenset(s.labels.items()))] = s.value
    return out


def sample(samples: Samples, name: str, **labels: str) -> float | None:
    """The value of the one sample ``name`` whose labels include ``labels`` (None when absent)."""
    found = [v for (n, lab), v in samples.items() if n == name and set(labels.items()) <= lab]
    assert len(found) <= 1, f"{name}{labels} matches {len(found)} samples"
    return found[0] if found else None


def scrape(url: str, context: ssl.SSLContext | None = None, timeout_s: float = 5.0) -> str:
    with urllib.request.urlopen(url, timeout=timeout_s, context=context) as r:
        return str(r.read().decode())


class NotifyListener:
    """A datagram socket standing in for systemd's notification socket."""

    def __init__(self) -> None:
        self.dir = tempfile.mkdtemp(prefix="evn-", dir="/tmp")  # AF_UNIX paths are limited to 107 bytes
        self.path = os.path.join(self.dir, "notify")
        self.sock = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM)
        self.sock.bind(self.path)
        self.messages: list[dict[str, str]] = []
        self._seen = 0

    def _read(self, timeout_s: float) -> dict[str, str] | None:
        self.sock.settimeout(timeout_s)
        try:
            data = self.sock.recv(65536)
        except TimeoutError:
            return None
        msg = dict(line.split("=", 1) for line in data.decode().split("\n") if "=" in line)
        self.messages.append(msg)
        return msg

    def wait_for(self, key: str, timeout_s: float = 60.0, value: str = "1") -> dict[str, str]:
        """The next message (after those already returned) that sets ``key=value``."""
        deadline = time.monotonic() + timeout_s
        while True:
            while self._seen < len(self.messages):
                msg = self.messages[self._seen]
                self._seen += 1
                if msg.get(key) == value:
                    return msg
            remaining = deadline - time.monotonic()
            if remaining <= 0:
                raise TimeoutError(f"no {key}={value} notification within {timeout_s} s; got {self.messages}")
            self._read(min(remaining, 1.0))

    def drain(self) -> None:
        while self._read(0.01) is not None:
            pass

    def close(self) -> None:
        self.sock.close()
        with contextlib.suppress(OSError):
            os.unlink(self.path)
            os.rmdir(self.dir)


class DaemonProcess:
    """``edgevib run --config FILE`` as a subprocess, its JSON log lines in a file, its notify socket a listener."""

    def __init__(self, config_path: Path, metrics_port: int, *, notify: NotifyListener | None = None,
                 env: dict[str, str] | None = None, args: Iterable[str] = ()) -> None:
        self.config_path = config_path
        self.metrics_port = metrics_port
        self.notify = notify
        self.log_path = config_path.with_suffix(".log")
        self.env = dict(os.environ)
        self.env.pop("NOTIFY_SOCKET", None)
        self.env.pop("WATCHDOG_USEC", None)
        if notify is not None:
            self.env["NOTIFY_SOCKET"] = notify.path
        self.env.update(env or {})
        self.args = list(args)
        self.proc: subprocess.Popen[bytes] | None = None

    @property
    def metrics_url(self) -> str:
        return f"http://127.0.0.1:{self.metrics_port}/metrics"

    def start(self) -> DaemonProcess:
        self._log = self.log_path.open("ab")
        self.proc = subprocess.Popen(
            [sys.executable, "-m", "edgevib.daemon", "run", "--config", str(self.config_path),
             "--metrics-listen", f"127.0.0.1:{self.metrics_port}", *self.args],
            stdout=self._log, stderr=self._log, env=self.env)
        return self

    def signal(self, sig: int) -> None:
        assert self.proc is not None
        self.proc.send_signal(sig)

    def wait(self, timeout_s: float) -> int:
        assert self.proc is not None
        return self.proc.wait(timeout_s)

    def running(self) -> bool:
        return self.proc is not None and self.proc.poll() is None

    def output(self) -> str:
        return self.log_path.read_text(errors="replace")

    def logs(self) -> list[dict[str, Any]]:
        events = []
        for line in self.output().splitlines():
            with contextlib.suppress(ValueError):
                obj = json.loads(line)
                if isinstance(obj, dict):
                    events.append(obj)
        return events

    def metrics(self) -> Samples:
        return parse_metrics(scrape(self.metrics_url))

    def try_metrics(self) -> Samples | None:
        try:
            return self.metrics()
        except (OSError, urllib.error.URLError):
            return None

    def wait_metric(self, name: str, minimum: float, timeout_s: float = 60.0, **labels: str) -> Samples:
        """Scrape until ``name{labels}`` is at least ``minimum``; returns that scrape."""
        def check() -> Samples | None:
            assert self.running(), f"the daemon exited:\n{self.output()[-3000:]}"
            s = self.try_metrics()
            if s is None:
                return None
            v = sample(s, name, **labels)
            return s if v is not None and v >= minimum else None
        result: Samples = wait_until(check, timeout_s, f"{name}{labels} >= {minimum}", interval_s=0.1)
        return result

    def close(self) -> None:
        if self.proc is not None and self.proc.poll() is None:
            self.proc.send_signal(signal.SIGKILL)
            self.proc.wait(10)
        with contextlib.suppress(Exception):
            self._log.close()

"""Real servers for network tests: each started by the test on 127.0.0.1 and a free port, stopped by itself."""

from __future__ import annotations

import contextlib
import shutil
import socket
import subprocess
import tempfile
import time
from pathlib import Path


def free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def wait_port(port: int, timeout_s: float = 10.0, host: str = "127.0.0.1") -> None:
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        with contextlib.suppress(OSError), socket.create_connection((host, port), timeout=0.2):
            return
        time.sleep(0.05)
    raise TimeoutError(f"nothing listens on {host}:{port} after {timeout_s} s")


class Mosquitto:
    """A private mosquitto broker on 127.0.0.1.  ``extra_conf`` lines are appended (TLS listeners etc.)."""

    def __init__(self, port: int | None = None, extra_conf: str = "", listener: bool = True) -> None:
        exe = shutil.which("mosquitto") or "/usr/sbin/mosquitto"
        if not Path(exe).exists():
            raise RuntimeError("mosquitto is not installed (apt-get install mosquitto)")
        self.exe = exe
        self.port = port or free_port()
        self.dir = Path(tempfile.mkdtemp(prefix="edgevib-mosq-"))
        self.conf = self.dir / "mosquitto.conf"
        lines = []
        if listener:
            lines += [f"listener {self.port} 127.0.0.1", "allow_anonymous true"]
        lines += ["persistence false", "log_dest stderr", "log_type error", "max_packet_size 16777216"]
        self.conf.write_text("\n".join(lines) + "\n" + extra_conf + "\n")
        self.proc: subprocess.Popen[bytes] | None = None

    @property
    def url(self) -> str:
        return f"mqtt://127.0.0.1:{self.port}"

    def start(self) -> Mosquitto:
        self.proc = subprocess.Popen([self.exe, "-c", str(self.conf)], stdout=subprocess.DEVNULL,
                                     stderr=subprocess.PIPE)
        wait_port(self.port)
        return self

    def stop(self) -> None:
        if self.proc is not None and self.proc.poll() is None:
            self.proc.terminate()
            try:
                self.proc.wait(5)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait(5)
        self.proc = None

    def restart(self) -> None:
        self.stop()
        self.start()

    def close(self) -> None:
        self.stop()
        shutil.rmtree(self.dir, ignore_errors=True)


class NatsMqtt:
    """A private NATS server with its MQTT gateway (MQTT 3.1.1) on 127.0.0.1: a second, independent broker
    implementation.  The gateway needs JetStream (QoS 1 and retained messages live in streams) and a server name."""

    def __init__(self) -> None:
        exe = shutil.which("nats-server") or "/usr/sbin/nats-server"
        if not Path(exe).exists():
            raise RuntimeError("nats-server is not installed (apt-get install nats-server)")
        self.exe = exe
        self.port = free_port()
        self.nats_port = free_port()
        self.dir = Path(tempfile.mkdtemp(prefix="edgevib-nats-"))
        self.conf = self.dir / "nats.conf"
        self.conf.write_text(f"server_name: edgevib-test-{self.port}\nlisten: 127.0.0.1:{self.nats_port}\n"
                             f'jetstream {{ store_dir: "{self.dir / "js"}" }}\n'
                             f"mqtt {{ listen: 127.0.0.1:{self.port} }}\n")
        self.proc: subprocess.Popen[bytes] | None = None

    @property
    def url(self) -> str:
        return f"mqtt://127.0.0.1:{self.port}"

    def start(self) -> NatsMqtt:
        self.proc = subprocess.Popen([self.exe, "-c", str(self.conf)], stdout=subprocess.DEVNULL,
                                     stderr=subprocess.DEVNULL)
        wait_port(self.port, 30.0)
        return self

    def close(self) -> None:
        if self.proc is not None and self.proc.poll() is None:
            self.proc.terminate()
            try:
                self.proc.wait(10)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait(5)
        self.proc = None
        shutil.rmtree(self.dir, ignore_errors=True)

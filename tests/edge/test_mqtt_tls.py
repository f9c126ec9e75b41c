"""MQTT over TLS against a mosquitto configured by the test: its own CA, a server certificate for 127.0.0.1, and
client certificates required (`require_certificate`, `use_identity_as_username`; mosquitto.conf(5)).

A client that pins the CA and presents a certificate from it connects; one without a certificate, with a
certificate from another CA, or pinning another CA is refused.
"""

from __future__ import annotations

import contextlib
import ssl
import threading
import time
from collections.abc import Iterator
from pathlib import Path

import paho.mqtt.client as mqtt
import pytest
from certs import PKI, broker_pki, issue, make_ca, remove_pki
from servers import Mosquitto, free_port

pytestmark = pytest.mark.network

CLIENT_CN = "edgevib-quarry-lane"


@pytest.fixture
def pki() -> Iterator[PKI]:
    pki = broker_pki(client_cn=CLIENT_CN)  # readable by mosquitto after it drops root (see tests/certs.py)
    try:
        yield pki
    finally:
        remove_pki(pki)


def tls_broker_conf(port: int, pki: PKI, acl_file: Path | None = None) -> str:
    lines = [
        f"listener {port} 127.0.0.1",
        f"cafile {pki.ca_cert}",
        f"certfile {pki.server_cert}",
        f"keyfile {pki.server_key}",
        "require_certificate true",
        "use_identity_as_username true",
        "allow_anonymous false",
    ]
    if acl_file is not None:
        lines.append(f"acl_file {acl_file}")
    return "\n".join(lines) + "\n"


@pytest.fixture
def tls_mosquitto(pki: PKI) -> Iterator[Mosquitto]:
    # The certificate's common name is the MQTT user name; this ACL lets only that user use the plant's topics.
    acl = pki.dir / "acl"
    acl.write_text(f"user {CLIENT_CN}\ntopic readwrite fwb/quarry-lane/#\n")
    acl.chmod(0o644)
    port = free_port()
    broker = Mosquitto(port=port, extra_conf=tls_broker_conf(port, pki, acl), listener=False)
    broker.start()
    # keep the broker's error log (TLS refusals are logged there) readable by the tests
    broker.log_lines = []  # type: ignore[attr-defined]
    assert broker.proc is not None and broker.proc.stderr is not None
    stderr = broker.proc.stderr

    def pump_log() -> None:
        for raw in iter(stderr.readline, b""):
            broker.log_lines.append(raw.decode(errors="replace"))  # type: ignore[attr-defined]

    threading.Thread(target=pump_log, daemon=True).start()
    try:
        yield broker
    finally:
        broker.close()


def broker_refusals(broker: Mosquitto) -> int:
    return sum("peer did not return a certificate" in line for line in broker.log_lines)  # type: ignore[attr-defined]


class Outcome:
    def __init__(self) -> None:
        self.connected = threading.Event()
        self.failed = threading.Event()
        self.detail = ""
        self.messages: list[tuple[str, bytes]] = []
        self.subscribed = threading.Event()


def client(*, ca: Path | None, cert: Path | None = None, key: Path | None = None,
           key_password: str | None = None) -> tuple[mqtt.Client, Outcome]:
    c = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id=f"edgevib-test-{time.monotonic_ns()}")
    c.tls_set(ca_certs=str(ca) if ca else None, certfile=str(cert) if cert else None,
              keyfile=str(key) if key else None, keyfile_password=key_password, cert_reqs=ssl.CERT_REQUIRED,
              tls_version=ssl.PROTOCOL_TLS_CLIENT)
    out = Outcome()

    def on_connect(_c: mqtt.Client, _u: object, _f: object, reason: mqtt.ReasonCode, _p: object) -> None:
        if reason.is_failure:
            out.detail = str(reason)
            out.failed.set()
        else:
            out.connected.set()

    def on_disconnect(_c: mqtt.Client, _u: object, _f: object, reason: mqtt.ReasonCode, _p: object) -> None:
        out.detail = out.detail or f"disconnected: {reason}"
        out.failed.set()

    c.on_connect = on_connect
    c.on_disconnect = on_disconnect
    c.on_subscribe = lambda *_a: out.subscribed.set()
    c.on_message = lambda _c, _u, m: out.messages.append((m.topic, m.payload))
    return c, out


def attempt(c: mqtt.Client, out: Outcome, port: int, timeout_s: float = 5.0) -> bool:
    """Connect and run the network loop until connected, refused or ``timeout_s``; True when connected."""
    try:
        c.connect("127.0.0.1", port, keepalive=10)
    except (ssl.SSLError, OSError) as exc:
        out.detail = f"{type(exc).__name__}: {exc}"
        return False
    deadline = time.monotonic() + timeout_s
    try:
        while time.monotonic() < deadline and not (out.connected.is_set() or out.failed.is_set()):
            rc = c.loop(timeout=0.1)
            if rc != mqtt.MQTT_ERR_SUCCESS:
                out.detail = out.detail or f"loop: {mqtt.error_string(rc)}"
                return False
    except (ssl.SSLError, OSError) as exc:
        # TLS 1.3: the server checks the client certificate after the client has finished its handshake,
        # so the refusal arrives as an alert on the first read.
        out.detail = f"{type(exc).__name__}: {exc}"
        return False
    return out.connected.is_set()


def pump(c: mqtt.Client, until: threading.Event | None = None, timeout_s: float = 5.0) -> None:
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline and not (until is not None and until.is_set()):
        c.loop(timeout=0.05)


@pytest.mark.parametrize("encrypted_key", [False, True])
def test_pinned_ca_and_client_certificate_connects(tls_mosquitto: Mosquitto, pki: PKI, tmp_path: Path,
                                                    encrypted_key: bool) -> None:
    cert, key, password = pki.client_cert, pki.client_key, None
    if encrypted_key:  # a client key protected by a passphrase (key_password_file in the configuration)
        issued = issue(pki.ca, tmp_path / "enc", "client", CLIENT_CN, client=True, key_password=b"quarry-lane-kp")
        cert, key, password = issued.cert_path, issued.key_path, "quarry-lane-kp"
    c, out = client(ca=pki.ca_cert, cert=cert, key=key, key_password=password)
    try:
        assert attempt(c, out, tls_mosquitto.port), out.detail
        c.subscribe("fwb/quarry-lane/#", qos=1)
        pump(c, out.subscribed)
        c.publish("fwb/quarry-lane/P-101/P-101-DE-H/block", b"tls-block", qos=1)
        c.publish("other/site/block", b"not for us", qos=1)  # outside the ACL of this identity: dropped
        c.subscribe("other/#", qos=1)
        pump(c, timeout_s=1.0)
        c.publish("other/site/block", b"still not for us", qos=1)
        pump(c, timeout_s=1.0)
        # the broker knew this client by its certificate's common name: the ACL for that name let the plant topic
        # through and nothing else
        assert out.messages == [("fwb/quarry-lane/P-101/P-101-DE-H/block", b"tls-block")]
    finally:
        with contextlib.suppress(Exception):
            c.disconnect()


def test_client_without_certificate_is_refused(tls_mosquitto: Mosquitto, pki: PKI) -> None:
    c, out = client(ca=pki.ca_cert)
    assert not attempt(c, out, tls_mosquitto.port)
    assert not out.connected.is_set()
    assert out.detail  # the reason is visible (a TLS alert or a lost connection)


def test_client_certificate_from_another_ca_is_refused(tls_mosquitto: Mosquitto, pki: PKI, tmp_path: Path) -> None:
    stranger = issue(make_ca(tmp_path / "other", "Unrelated test CA"), tmp_path / "other", "client", CLIENT_CN,
                     client=True)
    c, out = client(ca=pki.ca_cert, cert=stranger.cert_path, key=stranger.key_path)
    assert not attempt(c, out, tls_mosquitto.port)
    assert not out.connected.is_set()


def test_broker_outside_the_pinned_ca_is_refused(tls_mosquitto: Mosquitto, pki: PKI, tmp_path: Path) -> None:
    other = make_ca(tmp_path / "pin", "Unrelated test CA")
    c, out = client(ca=other.cert_path, cert=pki.client_cert, key=pki.client_key)
    assert not attempt(c, out, tls_mosquitto.port)
    assert "CERTIFICATE_VERIFY_FAILED" in out.detail or "certificate verify failed" in out.detail


# ------------------------------------------------------------------------------------------------------------------
# The daemon's MQTT source against the same broker (in-process daemon, real TLS)


@pytest.mark.parametrize("protocol", ["3.1.1", "5"])
async def test_qos0_messages_over_tls_are_cut_by_the_link(tls_mosquitto: Mosquitto, pki: PKI, protocol: str) -> None:
    # a TLS read ends with a record (at most 2^14 bytes of plaintext, RFC 8446 §5.1), so most blocks cross reads:
    # the link holds the start of each until the rest has come; every message arrives once, whole, in order (MQTT
    # 3.1.1 §4.6), and every one no longer than a read chunk was cut by the link (the others read by paho)
    from mqtt_roundtrip import packet_sizes, qos0_round_trip

    from edgevib.daemon.config import MqttConnection
    from edgevib.daemon.mqtt_client import READ_CHUNK

    conn = MqttConnection.model_validate({
        "url": f"mqtts://127.0.0.1:{tls_mosquitto.port}", "client_id": "edgevib-tls-sub", "protocol": protocol,
        "ca_file": str(pki.ca_cert), "cert_file": str(pki.client_cert), "key_file": str(pki.client_key)})
    sent, got, cut = await qos0_round_trip(conn, "fwb/quarry-lane", timeout_s=20.0)
    assert got == sent
    assert cut == sum(size <= READ_CHUNK for size in packet_sizes(sent, protocol)) < len(sent)


async def _daemon_over_tls(tls_mosquitto: Mosquitto, pki: PKI, tmp_path: Path, source_extra: dict[str, str],
                           expect_connected: bool) -> None:
    import asyncio

    from edge_helpers import base_config, block_messages, point, publish, sine_blocks

    from edgevib.daemon.app import Daemon
    from edgevib.daemon.config import parse_config

    a = point("P-101-DE-H", "P-101", "QL-P101-DE-H")
    doc = base_config(tmp_path / "state", f"mqtts://127.0.0.1:{tls_mosquitto.port}", [a],
                      alarms={"enabled": False})
    doc["sources"][0].update(source_extra)
    d = Daemon(parse_config(doc, tmp_path), metrics_listen=("127.0.0.1", 0))
    await d.start()
    try:
        if not expect_connected:
            # the broker refuses the handshake (its log says why); the source retries with bounded backoff and
            # never counts as connected
            async with asyncio.timeout(20):
                while broker_refusals(tls_mosquitto) < 2:
                    await asyncio.sleep(0.05)
            assert not d.stats.connected.get("station-broker", False)
            assert not d.ready
            return
        async with asyncio.timeout(20):
            while not d.ready:
                await asyncio.sleep(0.05)
        tls = {"ca_certs": str(pki.ca_cert), "certfile": str(pki.client_cert), "keyfile": str(pki.client_key)}
        blocks = sine_blocks(a["sensor"], 4, 0, t0_ns=1_764_633_600_000_000_000)
        await asyncio.to_thread(publish, tls_mosquitto.port, block_messages(a["machine"], a["id"], blocks), tls=tls)
        async with asyncio.timeout(30):
            while d.stats.frames_analysed.get(a["id"], 0) < 1:
                await asyncio.sleep(0.05)
        assert d.stats.blocks_received["station-broker"] == 4
        assert not d.stats.blocks_rejected
        # 2 mm/s r.m.s. sine at 80 Hz (edge_helpers.sine_blocks): recovered within 5 % (the ISO band holds 80 Hz)
        assert d.latest[a["id"]].indicators.velocity_rms_mm_s == pytest.approx(2.0, rel=0.05)
    finally:
        await d.stop(timeout_s=10.0)


async def test_daemon_source_connects_with_pinned_ca_and_client_certificate(
        tls_mosquitto: Mosquitto, pki: PKI, tmp_path: Path) -> None:
    await _daemon_over_tls(tls_mosquitto, pki, tmp_path, {
        "ca_file": str(pki.ca_cert), "cert_file": str(pki.client_cert), "key_file": str(pki.client_key)}, True)


async def test_daemon_source_with_passphrase_protected_key(tls_mosquitto: Mosquitto, pki: PKI,
                                                           tmp_path: Path) -> None:
    issued = issue(pki.ca, tmp_path / "enc", "client", CLIENT_CN, client=True, key_password=b"quarry-lane-kp")
    passphrase = tmp_path / "key-pass"
    passphrase.write_text("quarry-lane-kp\n")  # as a systemd credential file would hold it
    await _daemon_over_tls(tls_mosquitto, pki, tmp_path, {
        "ca_file": str(pki.ca_cert), "cert_file": str(issued.cert_path), "key_file": str(issued.key_path),
        "key_password_file": str(passphrase)}, True)


async def test_daemon_source_without_client_certificate_is_refused(tls_mosquitto: Mosquitto, pki: PKI,
                                                                   tmp_path: Path) -> None:
    await _daemon_over_tls(tls_mosquitto, pki, tmp_path, {"ca_file": str(pki.ca_cert)}, False)


async def test_daemon_logs_why_the_broker_refused(tls_mosquitto: Mosquitto, pki: PKI, tmp_path: Path) -> None:
    import asyncio

    from edge_helpers import base_config, point
    from structlog.testing import capture_logs

    from edgevib.daemon.app import Daemon
    from edgevib.daemon.config import parse_config

    doc = base_config(tmp_path / "state", f"mqtts://127.0.0.1:{tls_mosquitto.port}",
                      [point("P-101-DE-H", "P-101", "QL-P101-DE-H")], alarms={"enabled": False})
    doc["sources"][0]["ca_file"] = str(pki.ca_cert)
    d = Daemon(parse_config(doc, tmp_path), metrics_listen=("127.0.0.1", 0))
    with capture_logs() as logs:
        await d.start()
        try:
            async with asyncio.timeout(20):
                while broker_refusals(tls_mosquitto) < 2:
                    await asyncio.sleep(0.05)
            await asyncio.sleep(0.5)
        finally:
            await d.stop(timeout_s=10.0)
    problems = [e for e in logs if e.get("log_level") in ("warning", "error")]
    assert problems, [e.get("event") for e in logs]
    refused = [e for e in problems if e.get("event", "").startswith("broker refused the connection")]
    assert refused, problems
    # rate-limited: at least two refusals at the broker, one line per 10 s interval here
    assert len(refused) == 1, refused
    assert refused[0]["url"] == f"mqtts://127.0.0.1:{tls_mosquitto.port}"
    # the broker wants a client certificate: the reason names TLS (handshake alert or closed session)
    reason = refused[0]["reason"]
    assert "TLS" in reason or "closed before it was established" in reason, reason


class _Ingest:
    """The source's view of the daemon: only the connection state matters here."""

    def __init__(self) -> None:
        self.states: list[bool] = []

    def payload(self, *_a: object) -> None: ...
    def block(self, *_a: object) -> None: ...
    def speed(self, *_a: object) -> None: ...
    def reject(self, *_a: object) -> None: ...

    def connection(self, _source: str, connected: bool) -> None:
        self.states.append(connected)


async def _refusal_lines(conn_doc: dict[str, object], tmp_path: Path, wait_s: float = 1.5) -> list[dict[str, object]]:
    """Run an MQTT source against ``conn_doc`` for ``wait_s`` and return its warning/error log lines."""
    import asyncio

    from structlog.testing import capture_logs

    from edgevib.daemon.config import MqttConnection
    from edgevib.daemon.sources.mqtt import MqttSource

    conn = MqttConnection.model_validate({"reconnect_min_s": 0.1, "reconnect_max_s": 0.2, "client_id": "edgevib-test",
                                          **conn_doc})
    ingest = _Ingest()
    src = MqttSource(name="station-broker", ingest=ingest, connection=conn, topics=["fwb/quarry-lane/#"])
    with capture_logs() as logs:
        task = asyncio.create_task(src.run())
        await asyncio.sleep(wait_s)
        await src.stop()
        async with asyncio.timeout(10):
            await task
    assert True not in ingest.states  # never counted as connected
    return [e for e in logs if e.get("log_level") in ("warning", "error")]


async def test_refused_tcp_connection_is_logged_once_with_url_and_reason(tmp_path: Path) -> None:
    url = f"mqtt://127.0.0.1:{free_port()}"  # nothing listens there
    problems = await _refusal_lines({"url": url}, tmp_path)
    assert [(e["event"], e["url"], e["reason"]) for e in problems] == [
        ("broker refused the connection; retrying with backoff", url, "connection refused")]


async def test_server_certificate_from_another_ca_is_logged(tls_mosquitto: Mosquitto, tmp_path: Path) -> None:
    other = make_ca(tmp_path / "other", cn="not the plant CA")
    problems = await _refusal_lines({"url": f"mqtts://127.0.0.1:{tls_mosquitto.port}",
                                     "ca_file": str(other.cert_path)}, tmp_path)
    assert len(problems) == 1, problems
    assert problems[0]["url"] == f"mqtts://127.0.0.1:{tls_mosquitto.port}"
    assert "server certificate not accepted" in str(problems[0]["reason"]), problems


async def test_bad_credentials_are_logged_without_the_password(tmp_path: Path) -> None:
    import shutil
    import subprocess

    mosq_passwd = shutil.which("mosquitto_passwd")
    if mosq_passwd is None:
        pytest.skip("mosquitto_passwd is not installed")
    port = free_port()
    broker = Mosquitto(port=port, listener=False)
    passwd = broker.dir / "passwd"
    subprocess.run([mosq_passwd, "-b", "-c", str(passwd), "edgevib", "right-horse-battery"], check=True,
                   timeout=30, capture_output=True)
    broker.dir.chmod(0o755)  # mosquitto reads it after dropping root
    passwd.chmod(0o644)
    broker.conf.write_text(broker.conf.read_text() + f"listener {port} 127.0.0.1\nallow_anonymous false\n"
                           f"password_file {passwd}\n")
    broker.start()
    try:
        secret = tmp_path / "mqtt-password"
        secret.write_text("wrong-staple-q7\n")
        problems = await _refusal_lines({"url": broker.url, "username": "edgevib",
                                         "password_file": str(secret)}, tmp_path)
    finally:
        broker.close()
    assert len(problems) == 1, problems
    assert problems[0]["url"] == broker.url
    # MQTT 3.1.1 CONNACK return code 5 / MQTT 5 reason 0x87 (OASIS MQTT specifications): "Not authorized"
    assert "Not authorized" in str(problems[0]["reason"]), problems
    assert "wrong-staple-q7" not in repr(problems)

"""Security on the edge box: the metrics listener with TLS and client-certificate authentication, and secrets
(passwords from files or the environment) that never appear in logs, metrics, published messages or
`check-config` output.
"""

from __future__ import annotations

import os
import signal
import ssl
import subprocess
import sys
import threading
import urllib.error
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import paho.mqtt.client as mqtt
import pytest
from certs import PKI, make_ca, make_pki
from edge_helpers import (
    DaemonProcess,
    NotifyListener,
    base_config,
    block_messages,
    point,
    publish,
    sample,
    scrape,
    sine_blocks,
    toml,
    wait_until,
)
from servers import Mosquitto, free_port

pytestmark = pytest.mark.network

A = point("P-101-DE-H", "P-101", "QL-P101-DE-H")
T0_NS = 1_764_633_600_000_000_000


# ------------------------------------------------------------------------------------------------ metrics over TLS


@pytest.fixture
def metrics_pki(tmp_path: Path) -> PKI:
    return make_pki(tmp_path / "pki", client_cn="prometheus-quarry-lane")


def _context(pki: PKI, cert: Path | None = None, key: Path | None = None) -> ssl.SSLContext:
    ctx = ssl.create_default_context(cafile=str(pki.ca_cert))
    if cert is not None:
        ctx.load_cert_chain(str(cert), str(key))
    return ctx


async def test_metrics_listener_tls_with_client_certificates(metrics_pki: PKI, tmp_path: Path) -> None:
    import asyncio

    from edgevib.daemon.app import Daemon
    from edgevib.daemon.config import parse_config

    pki = metrics_pki
    doc = base_config(tmp_path / "state", "mqtt://127.0.0.1:1", [A], alarms={"enabled": False},
                      metrics={"listen": "127.0.0.1:0", "tls_cert_file": str(pki.server_cert),
                               "tls_key_file": str(pki.server_key), "tls_client_ca_file": str(pki.ca_cert)})
    d = Daemon(parse_config(doc, tmp_path))
    await d.start()
    try:
        url = d.metrics.url
        assert url is not None and url.startswith("https://"), url
        # a scraper with a certificate from the configured CA reads the exposition
        text = await asyncio.to_thread(scrape, url, _context(pki, pki.client_cert, pki.client_key))
        assert "edgevib_build_info" in text
        # without a client certificate the handshake is refused
        with pytest.raises((ssl.SSLError, urllib.error.URLError, ConnectionError)):
            await asyncio.to_thread(scrape, url, _context(pki))
        # a client certificate from another CA is refused too
        other = make_ca(tmp_path / "other", "Unrelated scraper CA")
        from certs import issue
        stranger = issue(other, tmp_path / "other", "scraper", "prometheus-elsewhere", client=True)
        with pytest.raises((ssl.SSLError, urllib.error.URLError, ConnectionError)):
            await asyncio.to_thread(scrape, url, _context(pki, stranger.cert_path, stranger.key_path))
        # and plain HTTP gets no metrics
        plain = url.replace("https://", "http://")
        with pytest.raises((urllib.error.URLError, ConnectionError, OSError)):
            await asyncio.to_thread(scrape, plain)
    finally:
        await d.stop(timeout_s=10.0)


# ------------------------------------------------------------------------------------------------ secret redaction

# Distinctive values that cannot occur by chance in any output.
FILE_SECRET = "fwb-ql-file-7Yq2Rk"
ENV_SECRET = "fwb-ql-env-Zr9Wx4"
LITERAL_SECRET = "fwb-ql-literal-Pq3Vt8"
SECRETS = (FILE_SECRET, ENV_SECRET, LITERAL_SECRET)


def _no_secret(where: str, text: str) -> None:
    for s in SECRETS:
        assert s not in text, f"a secret appears in {where}"


@pytest.fixture
def secret_config(tmp_path: Path, mosquitto: Mosquitto) -> Iterator[tuple[Path, dict[str, Any]]]:
    secret_file = tmp_path / "mqtt-password"
    secret_file.write_text(FILE_SECRET + "\n")
    secret_file.chmod(0o600)
    doc = base_config(tmp_path / "state", mosquitto.url, [A], alarms={"startup_grace_s": 0.0},
                      feed={"url": mosquitto.url, "username": "edgevib-feed",
                            "password_env": "EDGEVIB_TEST_FEED_PASSWORD"},
                      publish={"mqtt": {"enabled": True, "source": "station-broker"}})
    doc["sources"][0].update(username="edgevib", password_file=str(secret_file))
    doc["logging"]["level"] = "debug"
    path = tmp_path / "edgevib.toml"
    path.write_text(toml(doc))
    yield path, doc


def _check_config(path: Path, env: dict[str, str]) -> subprocess.CompletedProcess[str]:
    return subprocess.run([sys.executable, "-m", "edgevib.daemon", "check-config", str(path)], capture_output=True,
                          text=True, timeout=60, env={**os.environ, **env})


def test_check_config_redacts_secrets(secret_config: tuple[Path, dict[str, Any]]) -> None:
    path, _ = secret_config
    result = _check_config(path, {"EDGEVIB_TEST_FEED_PASSWORD": ENV_SECRET})
    assert result.returncode == 0, result.stderr
    _no_secret("check-config output", result.stdout + result.stderr)
    # the references are shown instead, so that an operator sees where each secret comes from
    assert "mqtt-password" in result.stdout
    assert "EDGEVIB_TEST_FEED_PASSWORD" in result.stdout


@pytest.mark.parametrize("variant", ["literal-password", "url-credentials"])
def test_refused_secrets_are_not_echoed(secret_config: tuple[Path, dict[str, Any]], variant: str) -> None:
    path, doc = secret_config
    src = dict(doc["sources"][0])
    if variant == "literal-password":
        src.pop("password_file")
        src["password"] = LITERAL_SECRET
    else:
        src["url"] = src["url"].replace("mqtt://", f"mqtt://edgevib:{LITERAL_SECRET}@")
    path.write_text(toml({**doc, "sources": [src]}))
    result = _check_config(path, {"EDGEVIB_TEST_FEED_PASSWORD": ENV_SECRET})
    assert result.returncode == 2
    assert "sources[0]" in result.stderr  # the message names the key
    _no_secret("a configuration error", result.stdout + result.stderr)


@pytest.mark.slow
def test_secrets_never_leave_the_daemon(secret_config: tuple[Path, dict[str, Any]], mosquitto: Mosquitto) -> None:
    path, _ = secret_config
    seen: list[tuple[str, bytes]] = []
    subscribed = threading.Event()
    spy = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id="edgevib-test-spy")
    spy.on_subscribe = lambda *_a: subscribed.set()
    spy.on_message = lambda _c, _u, m: seen.append((m.topic, m.payload))
    spy.connect("127.0.0.1", mosquitto.port)
    spy.subscribe("#", qos=1)
    spy.loop_start()
    notify = NotifyListener()
    d = DaemonProcess(path, free_port(), notify=notify, env={"EDGEVIB_TEST_FEED_PASSWORD": ENV_SECRET})
    try:
        assert subscribed.wait(10)
        d.start()
        notify.wait_for("READY")
        d.wait_metric("edgevib_source_connected", 1, source="station-broker")
        # loud enough for a danger transition (ISO 20816-3 group 2 rigid C/D 4.5 mm/s): events on the feed too
        loud = sine_blocks(A["sensor"], 12, 0, t0_ns=T0_NS, velocity_rms_mm_s=10.0)
        publish(mosquitto.port, block_messages(A["machine"], A["id"], loud))
        d.wait_metric("edgevib_feed_published_total", 1)
        wait_until(lambda: any(t.endswith("/indicators") or "indicators" in t for t, _ in seen), 30,
                   "published indicators")
        d.signal(signal.SIGHUP)  # a reload logs and re-reads the secrets
        notify.wait_for("READY")
        text = scrape(d.metrics_url)
        assert (sample(d.metrics(), "edgevib_frames_analysed_total", point=A["id"]) or 0) >= 2
        d.signal(signal.SIGTERM)
        assert d.wait(30) == 0
    finally:
        d.close()
        notify.close()
        spy.disconnect()
        spy.loop_stop()
    logs = d.output()
    assert len(logs.splitlines()) > 5  # there is a log to look at (debug level)
    _no_secret("the log", logs)
    _no_secret("the metrics", text)
    assert len(seen) > 12  # the blocks themselves, indicators, alarm events, states
    for topic, payload in seen:
        _no_secret(f"an MQTT message on {topic}", payload.decode(errors="replace"))
    for f in (path.parent / "state").rglob("*"):
        if f.is_file() and f.stat().st_size < 10_000_000:
            _no_secret(f"state file {f.name}", f.read_bytes().decode(errors="replace"))

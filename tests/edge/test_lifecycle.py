"""A real `edgevib run` under a stand-in for systemd: the notify protocol, SIGHUP reload (state kept, invalid files
refused) and SIGTERM drain with alarm events pending (exit 0, events durable, delivered after the next start).

Protocol facts: sd_notify(3) (READY=1, STATUS=, WATCHDOG=1, RELOADING=1 with MONOTONIC_USEC, STOPPING=1) and
systemd.service(5) (WATCHDOG_USEC).  The bounds below (seconds to wait for a message or an exit) are generous
hang guards, not performance checks.
"""

from __future__ import annotations

import json
import signal
import sqlite3
import threading
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import paho.mqtt.client as mqtt
import pytest
from edge_helpers import (
    FS_HZ,
    DaemonProcess,
    NotifyListener,
    base_config,
    block_messages,
    point,
    publish,
    sample,
    sine_blocks,
    toml,
    wait_until,
)
from servers import Mosquitto, free_port

pytestmark = [pytest.mark.network, pytest.mark.slow]

T0_NS = 1_764_633_600_000_000_000  # 2025-12-02T00:00:00Z, a fixed measurement timeline
EXIT_BOUND_S = 30.0                # the unit's TimeoutStopSec is 45 s; the daemon's own drain bound is shorter


@pytest.fixture
def notify() -> Iterator[NotifyListener]:
    n = NotifyListener()
    try:
        yield n
    finally:
        n.close()


def start(tmp_path: Path, doc: dict[str, Any], notify: NotifyListener | None, **kw: Any) -> DaemonProcess:
    cfg = tmp_path / "edgevib.toml"
    cfg.write_text(toml(doc))
    return DaemonProcess(cfg, free_port(), notify=notify, **kw).start()


A = point("P-101-DE-H", "P-101", "QL-P101-DE-H")


def test_notify_protocol_from_edgevib_run(mosquitto: Mosquitto, tmp_path: Path, notify: NotifyListener) -> None:
    doc = base_config(tmp_path / "state", mosquitto.url, [A])
    d = start(tmp_path, doc, notify, env={"WATCHDOG_USEC": "1000000"})  # 1 s: pings every 0.5 s
    try:
        ready = notify.wait_for("READY")
        assert "STATUS" in ready and "1 points" in ready["STATUS"], ready
        # the metrics listener is up by the time READY=1 is sent
        assert d.try_metrics() is not None
        notify.wait_for("WATCHDOG")
        notify.wait_for("WATCHDOG")
        d.signal(signal.SIGHUP)
        reloading = notify.wait_for("RELOADING")
        assert int(reloading["MONOTONIC_USEC"]) > 0
        notify.wait_for("READY")
        d.signal(signal.SIGTERM)
        notify.wait_for("STOPPING")
        assert d.wait(EXIT_BOUND_S) == 0, d.output()[-3000:]
    finally:
        d.close()
    keys = [k for m in notify.messages for k in m]
    assert keys.count("READY") == 2
    # without WATCHDOG_USEC no pings are sent (the daemon asks systemd's environment, not a constant)
    quiet = NotifyListener()
    try:
        d2 = start(tmp_path, doc, quiet)
        try:
            quiet.wait_for("READY")
            d2.signal(signal.SIGTERM)
            quiet.wait_for("STOPPING")
            assert d2.wait(EXIT_BOUND_S) == 0
        finally:
            d2.close()
        assert not any("WATCHDOG" in m for m in quiet.messages)
    finally:
        quiet.close()


def frames(d: DaemonProcess, pid: str) -> float:
    s = d.try_metrics() or {}
    return sample(s, "edgevib_frames_analysed_total", point=pid) or 0.0


def test_sighup_reload_keeps_state_and_refuses_invalid_files(mosquitto: Mosquitto, tmp_path: Path,
                                                              notify: NotifyListener) -> None:
    b = point("P-101-NDE-V", "P-101", "QL-P101-NDE-V")
    changed = point("M-101-DE-H", "M-101", "QL-M101-DE-H")
    added = point("M-101-NDE-V", "M-101", "QL-M101-NDE-V")
    state = tmp_path / "state"
    d = start(tmp_path, base_config(state, mosquitto.url, [A, b, changed]), notify)
    try:
        notify.wait_for("READY")
        d.wait_metric("edgevib_source_connected", 1, source="station-broker")
        # half a frame (2 of 4 blocks) for each point before the reload
        msgs = []
        for p in (A, b, changed):
            msgs += block_messages(p["machine"], p["id"], sine_blocks(p["sensor"], 2, 0, t0_ns=T0_NS))
        publish(mosquitto.port, msgs)
        d.wait_metric("edgevib_blocks_received_total", 6, source="station-broker")

        # reload: A untouched, B removed, the M-101-DE-H point changed (its velocity band), a point added
        changed_2 = dict(changed, velocity_band_hz=[10.0, 900.0])
        d.config_path.write_text(toml(base_config(state, mosquitto.url, [A, changed_2, added])))
        d.signal(signal.SIGHUP)
        notify.wait_for("RELOADING")
        notify.wait_for("READY")
        reloaded = [e for e in d.logs() if e.get("event") == "configuration reloaded"]
        assert reloaded and reloaded[-1]["points"] == 3 and reloaded[-1]["kept"] == 1, reloaded

        # the second half: the changed point first, then the removed one, then A, then a whole frame for the new one
        msgs = block_messages(changed["machine"], changed["id"], sine_blocks(changed["sensor"], 2, 2, t0_ns=T0_NS))
        msgs += block_messages(b["machine"], b["id"], sine_blocks(b["sensor"], 1, 2, t0_ns=T0_NS))
        msgs += block_messages(A["machine"], A["id"], sine_blocks(A["sensor"], 2, 2, t0_ns=T0_NS))
        msgs += block_messages(added["machine"], added["id"], sine_blocks(added["sensor"], 4, 0, t0_ns=T0_NS))
        publish(mosquitto.port, msgs)
        d.wait_metric("edgevib_frames_analysed_total", 1, point=A["id"])
        s = d.wait_metric("edgevib_frames_analysed_total", 1, point=added["id"])
        # A kept its half-assembled frame across the reload: 2 blocks before + 2 after = one frame
        assert sample(s, "edgevib_frames_analysed_total", point=A["id"]) == 1
        # the changed point restarted assembly: its 2 blocks after the reload are not a frame yet
        assert (sample(s, "edgevib_frames_analysed_total", point=changed["id"]) or 0) == 0
        # the removed point's sensor is no longer known
        assert (sample(s, "edgevib_blocks_rejected_total", source="station-broker", reason="unknown_sensor")
                or 0) >= 1
        assert sample(s, "edgevib_velocity_rms_meters_per_second", point=b["id"]) is None

        # an invalid file (a negative sample rate) and a file that is not TOML: both refused, the running stays
        good = d.config_path.read_text()
        for bad in (good.replace(f"fs_hz = {FS_HZ!r}", "fs_hz = -5.0", 1), good + "\n[[points]\nid = \n"):
            assert bad != good
            d.config_path.write_text(bad)
            d.signal(signal.SIGHUP)
            notify.wait_for("RELOADING")
            notify.wait_for("READY")
        refused = [e for e in d.logs() if e.get("event", "").startswith("configuration reload rejected")]
        assert len(refused) == 2, [e.get("event") for e in d.logs()]
        assert "fs_hz" in refused[0]["error"] and "-5" in refused[0]["error"]
        assert "TOML" in refused[1]["error"]
        # still running the last good configuration, with A's stream continuing where it was
        publish(mosquitto.port, block_messages(A["machine"], A["id"], sine_blocks(A["sensor"], 4, 4, t0_ns=T0_NS)))
        s = d.wait_metric("edgevib_frames_analysed_total", 2, point=A["id"])
        assert sample(s, "edgevib_frames_analysed_total", point=added["id"]) == 1
        d.signal(signal.SIGTERM)
        assert d.wait(EXIT_BOUND_S) == 0
    finally:
        d.close()


class FeedListener:
    def __init__(self, port: int, topic: str) -> None:
        self.events: list[dict[str, Any]] = []
        self.subscribed = threading.Event()
        self.c = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id="edgevib-test-feed-listener")
        self.c.on_subscribe = lambda *_a: self.subscribed.set()
        self.c.on_message = lambda _c, _u, m: self.events.append(json.loads(m.payload))
        self.c.connect("127.0.0.1", port)
        self.c.subscribe(topic, qos=1)
        self.c.loop_start()
        if not self.subscribed.wait(10):
            raise TimeoutError("feed listener not subscribed")

    def close(self) -> None:
        self.c.disconnect()
        self.c.loop_stop()


def pending_in(db: Path) -> int:
    with sqlite3.connect(db) as c:
        return int(c.execute("SELECT COUNT(*) FROM pending").fetchone()[0])


def test_sigterm_drains_with_alarm_events_pending(mosquitto: Mosquitto, tmp_path: Path,
                                                   notify: NotifyListener) -> None:
    feed_port = free_port()  # nothing listens there yet: the feed broker is "down"
    state = tmp_path / "state"
    doc = base_config(state, mosquitto.url, [A],
                      alarms={"startup_grace_s": 0.0},
                      feed={"url": f"mqtt://127.0.0.1:{feed_port}", "reconnect_min_s": 0.1, "reconnect_max_s": 0.5})
    d = start(tmp_path, doc, notify)
    try:
        notify.wait_for("READY")
        d.wait_metric("edgevib_source_connected", 1, source="station-broker")
        # 10 mm/s r.m.s. on a group 2 rigid machine: above the ISO 20816-3 C/D boundary 4.5 mm/s (FIELD_NOTES 1)
        loud = sine_blocks(A["sensor"], 16, 0, t0_ns=T0_NS, velocity_rms_mm_s=10.0)
        publish(mosquitto.port, block_messages(A["machine"], A["id"], loud))
        s = d.wait_metric("edgevib_outbox_pending_events", 1)
        assert (sample(s, "edgevib_velocity_rms_meters_per_second", point=A["id"]) or 0) > 4.5e-3
        d.signal(signal.SIGTERM)
        notify.wait_for("STOPPING")
        assert d.wait(EXIT_BOUND_S) == 0, d.output()[-3000:]
    finally:
        d.close()
    db = state / "alarms.sqlite"
    pending = pending_in(db)
    assert pending >= 1  # undelivered events survived the shutdown in the state directory

    # the feed broker comes back; the next start delivers what was pending
    feed = Mosquitto(port=feed_port).start()
    listener = None
    try:
        listener = FeedListener(feed_port, "edgevib/quarry-lane/alarms/#")
        notify2 = NotifyListener()
        d2 = DaemonProcess(d.config_path, free_port(), notify=notify2).start()
        try:
            notify2.wait_for("READY")
            wait_until(lambda: len(listener.events) >= pending, 60, "the pending events on the feed")
            d2.wait_metric("edgevib_feed_published_total", pending)
            wait_until(lambda: (sample(d2.metrics(), "edgevib_outbox_pending_events") or 0) == 0, 30,
                       "an empty outbox")
            d2.signal(signal.SIGTERM)
            assert d2.wait(EXIT_BOUND_S) == 0
        finally:
            d2.close()
            notify2.close()
        types = {e["type"] for e in listener.events}
        assert any(t.startswith("io.edgevib.alarm.") for t in types), types
        assert all(A["id"] in e["subject"] for e in listener.events if e["type"].startswith("io.edgevib.alarm."))
        assert pending_in(db) == 0
    finally:
        if listener is not None:
            listener.close()
        feed.close()

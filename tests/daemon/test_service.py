"""The command line: check-config (exit codes, redaction), run (health, SIGHUP reload, SIGTERM exit 0) and demo."""

from __future__ import annotations

import os
import re
import signal
import subprocess
import sys
import time
import urllib.error
import urllib.request
from pathlib import Path
from typing import Any

import pytest
from servers import free_port, wait_port

EXAMPLE = Path(__file__).resolve().parents[2] / "config" / "example-plant.toml"


def edgevib(*args: str, **kw: Any) -> subprocess.CompletedProcess[str]:
    return subprocess.run([sys.executable, "-m", "edgevib.daemon", *args], capture_output=True, text=True,
                          timeout=60, **kw)


def get(url: str) -> int:
    try:
        with urllib.request.urlopen(url, timeout=5) as r:
            return int(r.status)
    except urllib.error.HTTPError as e:
        return int(e.code)


def test_check_config_valid_prints_resolved() -> None:
    proc = edgevib("check-config", str(EXAMPLE))
    assert proc.returncode == 0, proc.stderr
    assert 'id = "P-101-DE-H"' in proc.stdout
    assert "queue_frames = 4" in proc.stdout  # a default filled in
    assert "no envelope indicators" in proc.stdout  # the MEMS point's warning


def test_check_config_error_is_one_line_exit_2(tmp_path: Path) -> None:
    bad = tmp_path / "bad.toml"
    bad.write_text(EXAMPLE.read_text().replace("overlap = 0.5 ", "overlap = 1.5 "))
    proc = edgevib("check-config", str(bad))
    assert proc.returncode == 2
    assert proc.stderr.count("\n") == 1 and "analysis.overlap" in proc.stderr and "1.5" in proc.stderr
    assert "Traceback" not in proc.stderr


def test_check_config_never_prints_secrets(tmp_path: Path) -> None:
    import tomllib

    secret = tmp_path / "pw"
    secret.write_text("correct-horse-battery\n")
    doc = tomllib.loads(EXAMPLE.read_text())  # the example, with the MQTT source given credentials
    doc["sources"][0].update(username="edgevib", password_file=str(secret))
    cfg = tmp_path / "plant.toml"
    cfg.write_text(_toml(doc))
    proc = edgevib("check-config", str(cfg), env=dict(os.environ, EDGEVIB_UNUSED="x"))
    assert proc.returncode == 0, proc.stderr
    assert "correct-horse-battery" not in proc.stdout + proc.stderr
    assert f'password_file = "{secret}"' in proc.stdout  # where the secret is, never what it is
    doc["sources"][0].pop("password_file")
    doc["sources"][0]["password"] = "correct-horse"
    literal = tmp_path / "literal.toml"
    literal.write_text(_toml(doc))
    proc = edgevib("check-config", str(literal))
    assert proc.returncode == 2 and "sources[0].password" in proc.stderr and "password_file" in proc.stderr
    assert "correct-horse" not in proc.stdout + proc.stderr


def _unit_only_config(tmp_path: Path) -> Path:
    """A configuration whose secret is a systemd credential and whose state directory is the unit's."""
    import tomllib

    doc = tomllib.loads(EXAMPLE.read_text())
    doc["site"]["state_dir"] = "${STATE_DIRECTORY}"
    doc["sources"][0].update(username="edgevib", password_file="${CREDENTIALS_DIRECTORY}/mqtt-password")
    path = tmp_path / "plant.toml"
    path.write_text(_toml(doc))
    return path


def test_check_config_outside_the_unit_warns_and_run_refuses(tmp_path: Path) -> None:
    path = _unit_only_config(tmp_path)
    env = {k: v for k, v in os.environ.items() if k not in ("CREDENTIALS_DIRECTORY", "STATE_DIRECTORY")}
    proc = edgevib("check-config", str(path), env=env)
    assert proc.returncode == 0, proc.stderr
    warnings = [ln for ln in proc.stdout.splitlines() if ln.startswith("# warning:")]
    assert any("sources[0].password_file" in w and "${CREDENTIALS_DIRECTORY} is not set" in w for w in warnings)
    assert any(w.startswith("# warning: site.state_dir:") for w in warnings)
    assert "alarms_parsed" not in proc.stdout and "Settings(" not in proc.stdout
    # `run` checks again: the state directory first (override it), then the missing secret; one line, exit 2
    proc = edgevib("run", "--config", str(path), env=env)
    assert proc.returncode == 2 and proc.stderr.count("\n") == 1 and "site.state_dir" in proc.stderr, proc.stderr
    proc = edgevib("run", "--config", str(path), "--state-dir", str(tmp_path / "state"), env=env)
    assert proc.returncode == 2 and proc.stderr.count("\n") == 1, proc.stderr
    assert "sources[0].password_file" in proc.stderr and "does not exist" in proc.stderr
    assert not (tmp_path / "state").exists()  # refused before anything was created


def test_check_config_inside_the_unit_expands_the_variables(tmp_path: Path) -> None:
    path = _unit_only_config(tmp_path)
    creds = tmp_path / "credentials"
    creds.mkdir()
    (creds / "mqtt-password").write_text("correct-horse-battery\n")
    env = dict(os.environ, CREDENTIALS_DIRECTORY=str(creds), STATE_DIRECTORY=str(tmp_path / "state"))
    proc = edgevib("check-config", str(path), env=env)
    assert proc.returncode == 0, proc.stderr
    assert "# warning: site.state_dir" not in proc.stdout and "# warning: sources" not in proc.stdout
    assert f'state_dir = "{tmp_path / "state"}"' in proc.stdout
    assert f'password_file = "{creds / "mqtt-password"}"' in proc.stdout
    assert "correct-horse-battery" not in proc.stdout + proc.stderr


def test_run_refuses_a_state_dir_it_cannot_write(tmp_path: Path) -> None:
    blocker = tmp_path / "not-a-dir"
    blocker.write_text("")  # a directory cannot be made under a regular file, not even by root
    import tomllib

    doc = tomllib.loads(EXAMPLE.read_text())
    doc["site"]["state_dir"] = str(blocker / "state")
    path = tmp_path / "plant.toml"
    path.write_text(_toml(doc))
    proc = edgevib("run", "--config", str(path))
    assert proc.returncode == 2, proc.stderr
    assert proc.stderr.count("\n") == 1 and "Traceback" not in proc.stderr
    assert f"state directory {blocker / 'state'} is not writable" in proc.stderr and "--state-dir" in proc.stderr
    proc = edgevib("run", "--config", str(path), "--state-dir", str(blocker / "other"))
    assert proc.returncode == 2 and proc.stderr.count("\n") == 1 and str(blocker / "other") in proc.stderr


def test_run_without_state_dir_checks_the_default(tmp_path: Path, monkeypatch: pytest.MonkeyPatch,
                                                   capsys: pytest.CaptureFixture[str]) -> None:
    """No state_dir in the file and no --state-dir: the default (/var/lib/edgevib outside systemd) is checked;
    here it is pointed under a regular file so that the test never touches /var/lib."""
    import argparse
    import tomllib

    from edgevib.daemon import config as config_module
    from edgevib.daemon.service import run_run

    blocker = tmp_path / "not-a-dir"
    blocker.write_text("")
    monkeypatch.setattr(config_module, "DEFAULT_STATE_DIR", str(blocker / "edgevib"))
    monkeypatch.delenv("STATE_DIRECTORY", raising=False)
    doc = tomllib.loads(EXAMPLE.read_text())
    doc["site"].pop("state_dir")
    path = tmp_path / "plant.toml"
    path.write_text(_toml(doc))
    args = argparse.Namespace(config=path, metrics_listen=None, state_dir=None, log_level=None)
    assert run_run(args) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and f"state directory {blocker / 'edgevib'} is not writable" in err
    assert "give --state-dir DIR" in err


def _toml(doc: dict[str, Any]) -> str:
    from edgevib.daemon.config import dump_toml

    return dump_toml(doc)


@pytest.mark.network
@pytest.mark.slow
def test_run_health_reload_and_sigterm(mosquitto: Any, tmp_path: Path) -> None:
    cfg = tmp_path / "plant.toml"
    text = EXAMPLE.read_text().replace("mqtt://127.0.0.1:1883", mosquitto.url)
    cfg.write_text(text)
    port = free_port()
    proc = subprocess.Popen([sys.executable, "-m", "edgevib.daemon", "run", "--config", str(cfg),
                             "--metrics-listen", f"127.0.0.1:{port}", "--state-dir", str(tmp_path / "state")],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    try:
        wait_port(port, 20)
        assert get(f"http://127.0.0.1:{port}/healthz") == 200
        deadline = time.monotonic() + 15
        while get(f"http://127.0.0.1:{port}/readyz") != 200 and time.monotonic() < deadline:
            time.sleep(0.1)
        assert get(f"http://127.0.0.1:{port}/readyz") == 200
        cfg.write_text(text.replace("overlap = 0.5 ", "overlap = 7 "))  # invalid: rejected, the daemon stays
        proc.send_signal(signal.SIGHUP)
        time.sleep(1.0)
        assert proc.poll() is None and get(f"http://127.0.0.1:{port}/healthz") == 200
        cfg.write_text(text.replace("queue_frames = 4 ", "queue_frames = 8 "))
        proc.send_signal(signal.SIGHUP)
        time.sleep(1.0)
        proc.send_signal(signal.SIGTERM)
        out, err = proc.communicate(timeout=20)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.communicate(timeout=5)
    assert proc.returncode == 0, err
    assert "configuration reload rejected" in out and "analysis.overlap" in out
    assert "configuration reloaded" in out
    assert '"event": "daemon stopped"' in out or '"event":"daemon stopped"' in out  # JSON lines (not a tty)


@pytest.mark.slow
def test_demo_prints_url_and_plain_lines_then_stops() -> None:
    proc = edgevib("demo", "--duration", "4", "--metrics-listen", "127.0.0.1:0", "--rate", "1")
    assert proc.returncode == 0, proc.stderr
    assert re.search(r"metrics at http://127\.0\.0\.1:\d+/metrics", proc.stdout)
    lines = [line for line in proc.stdout.splitlines() if " point=" in line]
    points = {re.search(r"point=(\S+)", line).group(1) for line in lines}  # type: ignore[union-attr]
    assert {"P-101-DE-H", "F-201-NDE-V"} <= points
    assert all("velocity_mm_s=" in line and "kurtosis=" in line for line in lines)
    # the 1 kHz MEMS point has no envelope indicators: shown as n/a, with one start-up warning naming it
    assert all("envelope=n/a" in line for line in lines if "point=F-201-NDE-V" in line)
    assert not any("envelope=n/a" in line for line in lines if "point=F-201-NDE-V" not in line)
    warned = [line for line in proc.stderr.splitlines() if "no envelope indicators" in line]
    assert len(warned) == 1 and "F-201-NDE-V" in warned[0], proc.stderr


def test_demo_mems_point_has_no_envelope_band(tmp_path: Path) -> None:
    from edgevib.daemon.service import demo_config

    cfg = demo_config(state_dir=str(tmp_path))
    mems = [p for p in cfg.points if p.sensor_type == "mems"]
    assert [p.id for p in mems] == ["F-201-NDE-V"]
    # FIELD_NOTES §6: envelope analysis needs kHz bandwidth; a MEMS point limited to ~1 kHz gets none
    assert mems[0].bandwidth_hz[1] <= 1000.0 and mems[0].envelope_band_hz is None and mems[0].envelope_note
    assert all(p.envelope_band_hz is not None for p in cfg.points if p.sensor_type == "piezo")
    assert cfg.site.state_dir == str(tmp_path)


@pytest.mark.slow
def test_demo_stops_cleanly_on_ctrl_c() -> None:
    proc = subprocess.Popen([sys.executable, "-m", "edgevib.daemon", "demo", "--metrics-listen", "127.0.0.1:0"],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    try:
        assert proc.stdout is not None
        deadline = time.monotonic() + 30
        while time.monotonic() < deadline:
            line = proc.stdout.readline()
            if " point=" in line:
                break
        proc.send_signal(signal.SIGINT)
        proc.communicate(timeout=20)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.communicate(timeout=5)
    assert proc.returncode == 0


def test_render_table_tty_and_plain(tmp_path: Path) -> None:
    import numpy as np
    from framekit import frame_indicators

    from edgevib.daemon.config import load_config
    from edgevib.daemon.interfaces import FrameResult
    from edgevib.daemon.service import render_table
    from edgevib.pipelines.machine_state import MachineState
    from edgevib.pipelines.types import FamilyResult

    cfg = load_config(EXAMPLE)
    ind = frame_indicators(acceleration_rms_g=0.5, acceleration_peak_g=1.5, acceleration_peak_to_peak_g=3.0,
                           crest_factor=3.0, kurtosis=4.2, skewness=0.0, mean_g=0.0, velocity_rms_mm_s=3.1,
                           velocity_peak_mm_s=4.4, displacement_pp_um=20.0, shaft_hz=24.65, shaft_estimated=False,
                           envelope_band_hz=(2000.0, 8000.0),
                           envelope={"bpfo": FamilyResult(88.4, 88.5, 0.01, 18.0, 3, detected=True),
                                     "bpfi": FamilyResult(133.4, 133.0, 0.002, 24.0, 0)})  # not detected: not shown
    # A machine started 12 s before the frame, with the configuration's start-up grace (30 s by default) to run.
    starting = MachineState(state="starting", since_s=88.0, started_s=88.0, basis="speed", last_s=100.0)
    latest = {"P-101-DE-H": FrameResult("P-101-DE-H", "P-101", 0, 0, 25600.0, ind, "C", np.zeros(4),
                                        machine_state=starting)}
    table = render_table(cfg, latest, lambda pid: "alert" if pid == "P-101-DE-H" else None, tty=True)
    header, _, row, waiting = table.splitlines()
    assert header.split() == ["point", "sensor", "machine", "speed", "velocity", "mm/s", "zone", "crest",
                              "kurtosis", "envelope", "alarm"]
    grace_left = cfg.alarms.startup_grace_s - 12.0
    assert row.split() == ["P-101-DE-H", "piezo", "starting", f"{grace_left:.0f}", "s", "1479", "rpm", "3.10", "C",
                           "3.00", "4.20", "bpfo", "18", "dB", "alert"]
    assert waiting.split()[:2] == ["F-201-NDE-V", "mems"]
    plain = render_table(cfg, latest, lambda pid: None, tty=False).splitlines()
    assert "point=P-101-DE-H" in plain[0] and "velocity_mm_s=3.10 zone=C" in plain[0]
    assert f"machine=starting_{grace_left:.0f}_s" in plain[0]
    assert "envelope=bpfo18dB" in plain[0]

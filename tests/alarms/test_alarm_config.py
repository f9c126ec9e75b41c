"""Alarm configuration: ``[alarms]``, ``[feed]``, ``[capture]`` and point ``limits``, with errors naming the key path.

ISO 20816-3 boundaries (FIELD_NOTES §1): group 2 rigid B/C 2.8, C/D 4.5; group 2 flexible B/C 4.5, C/D 7.1 mm/s.
"""

from __future__ import annotations

import copy
import tomllib
from pathlib import Path
from typing import Any

import pytest

from edgevib.daemon.alarms.config import LevelRule
from edgevib.daemon.config import parse_config
from edgevib.daemon.interfaces import ConfigError

EXAMPLE = Path(__file__).resolve().parents[2] / "config" / "example-plant.toml"


def doc(tmp_path: Path, **tables: Any) -> dict[str, Any]:
    """The example plant without its alarm tables and point limits (each test adds its own)."""
    d = tomllib.loads(EXAMPLE.read_text())
    d["site"]["state_dir"] = str(tmp_path / "state")
    for k in ("alarms", "feed", "capture"):
        d.pop(k, None)
    for p in d["points"]:
        p.pop("limits", None)
    for k, v in tables.items():
        d[k] = v
    return d


def with_limits(d: dict[str, Any], limits: dict[str, Any], point: int = 0) -> dict[str, Any]:
    d = copy.deepcopy(d)
    d["points"][point]["limits"] = limits
    return d


def test_defaults_give_iso_velocity_limits(tmp_path: Path) -> None:
    cfg = parse_config(doc(tmp_path), tmp_path)
    lims = {lim.point: lim for lim in cfg.alarm_settings.limits}
    assert lims["P-101-DE-H"].iso_mm_s == (1.4, 2.8, 4.5)       # P-101: group 2 rigid
    assert lims["F-201-NDE-V"].iso_mm_s == (2.3, 4.5, 7.1)      # F-201: group 2 flexible
    assert lims["P-101-DE-H"].alert == LevelRule("iso") and lims["P-101-DE-H"].danger == LevelRule("iso")
    assert cfg.alarm_settings.feed.enabled is False and cfg.alarms.socket_mode == "0600"
    assert cfg.alarms.socket == str(tmp_path / "state" / "alarms.sock")


def test_full_tables(tmp_path: Path) -> None:
    d = doc(tmp_path, alarms={"deadband": 0.1, "on_delay_s": 2.0, "socket_mode": "0660",
                              "health": {"spike_sigma": 12.0}},
            feed={"source": "station-broker", "webhook": {"url": "http://127.0.0.1:8080/hook"}},
            capture={"max_mb": 10, "dir": "caps"})
    d = with_limits(d, {"velocity_rms_mm_s": {"rule": "iso-baseline", "latching": True},
                        "kurtosis": {"alert": 5.0, "danger": 8.0, "off_delay_frames": 5},
                        "imbalance_1x_mm_s": {"alert": {"factor": 2.0}, "danger": 4.0},
                        "bearing_bpfo_snr_db": {"alert": {"sigma": 4.0}},
                        "health": {"full_scale_g": 50.0, "noise_ug_rthz": 20.0}})
    a = parse_config(d, tmp_path).alarm_settings
    lims = {lim.indicator: lim for lim in a.limits if lim.point == "P-101-DE-H"}
    assert lims["velocity_rms_mm_s"].alert == LevelRule("iso-baseline") and lims["velocity_rms_mm_s"].latching
    assert lims["kurtosis"].off_delay.frames == 5 and lims["kurtosis"].on_delay.seconds == 2.0
    assert lims["imbalance_1x_mm_s"].alert == LevelRule("factor", 2.0)
    assert a.health["P-101-DE-H"].full_scale_g == 50.0 and a.health["P-101-DE-H"].spike_sigma == 12.0
    assert a.health["F-201-NDE-V"].sensor_type == "mems"
    assert a.feed.connection.client_id.endswith("-feed") and a.feed.webhook is not None
    assert a.feed.command_topic == "edgevib/quarry-lane/alarms/command" and a.table.socket_mode == "0660"
    assert a.capture.max_bytes == 10 * 1024 * 1024 and a.capture.dir == str(tmp_path / "state" / "caps")


@pytest.mark.parametrize(("limits", "path", "problem"), [
    ({"vibration": {"alert": 1.0}}, "points[0].limits.vibration", "unknown indicator"),
    ({"kurtosis": {"alert": "iso"}}, "points[0].limits.kurtosis.alert", "velocity_rms_mm_s only"),
    ({"kurtosis": {"rule": "iso"}}, "points[0].limits.kurtosis.rule", "velocity_rms_mm_s only"),
    ({"kurtosis": {"alert": 6.0, "danger": 5.0}}, "points[0].limits.kurtosis.danger", "must be above alert"),
    ({"kurtosis": {"alert": {"factor": 0.8}}}, "points[0].limits.kurtosis.alert.factor", "above 1"),
    ({"velocity_rms_mm_s": {"alert": 3.0, "danger": {"factor": 3.0}}},
     "points[0].limits.velocity_rms_mm_s.danger", "never set from the baseline"),
    ({"velocity_rms_mm_s": {"danger": "iso-baseline"}}, "points[0].limits.velocity_rms_mm_s.danger",
     "alert rule"),
    ({"kurtosis": {"alert": 5.0, "on_delay_s": 1.0, "on_delay_frames": 2}}, "points[0].limits.kurtosis.on_delay_s",
     "not both"),
    ({"kurtosis": {"alert": 5.0, "delay": 1}}, "points[0].limits.kurtosis.delay", "unknown key"),
    ({"kurtosis": {}}, "points[0].limits.kurtosis", "needs an alert"),
    ({"kurtosis": {"alert": True}}, "points[0].limits.kurtosis.alert", "must be a number"),
    ({"health": {"noise_band_hz": [1000.0, 20000.0]}}, "points[0].limits.health.noise_band_hz", "Nyquist"),
])
def test_limit_errors_name_the_key(tmp_path: Path, limits: dict[str, Any], path: str, problem: str) -> None:
    with pytest.raises(ConfigError, match=problem) as exc:
        parse_config(with_limits(doc(tmp_path), limits), tmp_path)
    assert exc.value.path == path


def test_bearing_limits_need_an_envelope(tmp_path: Path) -> None:
    with pytest.raises(ConfigError, match="no envelope indicators") as exc:
        parse_config(with_limits(doc(tmp_path), {"bearing_bpfo_g": {"alert": 0.1}}, point=1), tmp_path)
    assert exc.value.path == "points[1].limits.bearing_bpfo_g"


@pytest.mark.parametrize(("feed", "path", "problem"), [
    ({"enabled": True}, "feed.url", "needs a broker"),
    ({"source": "nowhere"}, "feed.source", "unknown source"),
    ({"url": "mqtt://127.0.0.1:1883", "topic": "a/{plant}"}, "feed.topic", "may only use"),
    ({"url": "mqtt://127.0.0.1:1883", "topic": "a/#"}, "feed.topic", "wildcards"),
    ({"webhook": {"url": "ftp://x"}}, "feed.webhook.url", "http"),
    ({"webhook": {"url": "http://x", "token": "s3cret"}}, "feed.webhook.token", "not accepted"),
])
def test_feed_errors_name_the_key(tmp_path: Path, feed: dict[str, Any], path: str, problem: str) -> None:
    with pytest.raises(ConfigError, match=problem) as exc:
        parse_config(doc(tmp_path, feed=feed), tmp_path)
    assert exc.value.path == path


def test_alarm_table_errors(tmp_path: Path) -> None:
    with pytest.raises(ConfigError) as exc:
        parse_config(doc(tmp_path, alarms={"deadband": 0.9}), tmp_path)
    assert exc.value.path == "alarms.deadband"
    with pytest.raises(ConfigError) as exc:
        parse_config(doc(tmp_path, alarms={"socket_mode": "0666"}), tmp_path)
    assert exc.value.path == "alarms.socket_mode"
    with pytest.raises(ConfigError) as exc:
        parse_config(doc(tmp_path, capture={"max_mb": -1}), tmp_path)
    assert exc.value.path == "capture.max_mb"


def test_example_shows_the_defaults(tmp_path: Path) -> None:
    """config/example-plant.toml writes out [alarms], [alarms.health] and [capture] with their defaults: parsed,
    they equal the settings of a file without those tables."""
    full = tomllib.loads(EXAMPLE.read_text())
    full["site"]["state_dir"] = str(tmp_path / "state")
    assert {"alarms", "capture"} <= set(full) and "health" in full["alarms"]
    shown = parse_config(full, tmp_path).alarm_settings
    bare = parse_config(doc(tmp_path), tmp_path).alarm_settings
    resolved = {"health", "on_delay_frames", "off_delay_frames"}  # compared as the health specs and limits below
    assert shown.table.model_dump(exclude=resolved) == bare.table.model_dump(exclude=resolved)
    assert shown.capture == bare.capture and shown.feed == bare.feed
    # the MEMS point has no per-point health table in the example: its health spec is the global default
    assert shown.health["F-201-NDE-V"] == bare.health["F-201-NDE-V"]
    assert shown.health["P-101-DE-H"] == bare.health["P-101-DE-H"]  # its health table is all comments
    lims = {(lim.point, lim.indicator): lim for lim in shown.limits}
    default = {(lim.point, lim.indicator): lim for lim in bare.limits}[("F-201-NDE-V", "velocity_rms_mm_s")]
    assert lims[("F-201-NDE-V", "velocity_rms_mm_s")] == default  # [alarms] defaults = the limits' defaults
    assert lims[("P-101-DE-H", "velocity_rms_mm_s")].alert == LevelRule("iso-baseline")
    assert lims[("P-101-DE-H", "bearing_bpfo_g")].latching

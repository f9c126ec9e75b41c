"""``edgevib alarms list`` notes: a shelf made while a point's data has stopped runs on the wall clock (README
"Operator commands"), so its time left is counted against the wall clock, not the point's last frame."""

from __future__ import annotations

import pytest

from edgevib.daemon import alarmctl


def test_shelf_time_left_of_a_stale_point_counts_on_the_wall_clock(monkeypatch: pytest.MonkeyPatch,
                                                                    capsys: pytest.CaptureFixture[str]) -> None:
    now = 1_796_205_000.0
    monkeypatch.setattr(alarmctl.time, "time", lambda: now)
    alarm = {"point": "K-701-DE-H", "indicator": "velocity_rms_mm_s", "state": "shelved", "severity": "danger",
             "value": 5.0, "alert": 2.8, "danger": 4.5, "stale": "source-down", "shelve_reason": "x",
             "shelved_until_s": now + 40.0}  # ISO 20816-3 group 2 rigid set points
    point = {"machine": "K-701", "machine_state": "unknown", "source_state": "down",
             "time": "2026-12-02T09:48:20Z"}  # its last frame, 100 s before now
    alarmctl._print_list({"alarms": [alarm], "points": {"K-701-DE-H": point}, "sensors": {}, "sources": {}})
    row = capsys.readouterr().out.splitlines()[1]
    assert "shelved: x, 40 s left" in row
    del alarm["stale"]  # data flowing: the point's timeline (its latest frame)
    point["time"] = "2026-12-02T09:49:50Z"
    alarmctl._print_list({"alarms": [alarm], "points": {"K-701-DE-H": point}, "sensors": {}, "sources": {}})
    assert "shelved: x, 50 s left" in capsys.readouterr().out.splitlines()[1]

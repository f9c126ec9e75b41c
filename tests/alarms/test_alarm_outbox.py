"""Durable outbox and state store (SQLite WAL): SIGKILL survival, unique ids, schema versions."""

from __future__ import annotations

import json
import math
import os
import signal
import sqlite3
import subprocess
import sys
import textwrap
from dataclasses import replace
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from edgevib.daemon.alarms.outbox import SCHEMA_VERSION, Database, Outbox, OutboxEvent, StateError
from edgevib.daemon.alarms.state import SensorState, StateStore, decode_alarm
from edgevib.pipelines.alarm import AlarmState, LevelTrack

WRITER = textwrap.dedent("""
    import sys, time
    from edgevib.daemon.alarms.outbox import Database, Outbox, OutboxEvent, new_event_id
    ob = Outbox(Database(sys.argv[1]), ["mqtt", "webhook"])
    i = 0
    while True:
        eid = new_event_id()
        ob.add([OutboxEvent(id=eid, type="io.edgevib.alarm.v1.transition", subject="P-101-DE-H",
                            topic="t", body='{"n": %d}' % i, created_ns=time.time_ns())])
        print(eid, flush=True)  # printed only after the commit returned
        i += 1
""")


def test_events_survive_sigkill_of_the_writer(tmp_path: Path) -> None:
    db_path = tmp_path / "alarms.sqlite"
    proc = subprocess.Popen([sys.executable, "-c", WRITER, str(db_path)], stdout=subprocess.PIPE, text=True)
    committed: list[str] = []
    try:
        assert proc.stdout is not None
        while len(committed) < 150:
            line = proc.stdout.readline()
            assert line, "writer died"
            committed.append(line.strip())
    finally:
        os.kill(proc.pid, signal.SIGKILL)
        proc.wait(10)
    assert proc.returncode == -signal.SIGKILL
    ob = Outbox(Database(db_path), ["mqtt", "webhook"])
    c = sqlite3.connect(db_path)  # the file itself, read apart from the outbox's own queries
    ids = [r[0] for r in c.execute("SELECT id FROM outbox ORDER BY seq")]
    c.close()
    assert set(committed) <= set(ids)  # nothing committed is lost
    assert len(ids) == len(set(ids))   # ids unique
    assert ob.depth("mqtt") == ob.depth("webhook") == len(ids)
    first = ob.pending("mqtt", 10)
    ob.mark_delivered("mqtt", [e.seq for e in first])
    assert ob.depth("mqtt") == len(ids) - 10 and ob.depth("webhook") == len(ids)
    assert ob.depth() == len(ids)  # still pending for the webhook
    ob.mark_delivered("webhook", [e.seq for e in first])
    assert ob.depth() == len(ids) - 10 and [e.id for e in first] == ids[:10]  # oldest first


def test_state_written_by_an_older_version_is_read(tmp_path: Path) -> None:
    db = Database(tmp_path / "a.sqlite")
    store = StateStore(db)
    s = AlarmState(alert=LevelTrack(active=True), acked=False, shelved_until_s=99.0, shelve_reason="x")
    with db.transaction() as c:
        store.save(c, alarms={("P-101-DE-H", "velocity_rms_mm_s"): s})
        # An older writer's row: fewer fields; a newer writer's: an extra one.
        c.execute("INSERT INTO alarm_state VALUES (?,?,?,?)", ("P-101-DE-H", "kurtosis",
                                                                json.dumps({"alert": {"active": True}}), 0))
        c.execute("INSERT INTO alarm_state VALUES (?,?,?,?)", ("P-101-DE-H", "crest_factor",
                                                                json.dumps({"acked": False, "future": 1}), 0))
    db.close()
    loaded = StateStore(Database(tmp_path / "a.sqlite")).load_alarms()
    assert loaded[("P-101-DE-H", "velocity_rms_mm_s")] == s
    assert loaded[("P-101-DE-H", "kurtosis")] == AlarmState(alert=LevelTrack(active=True))
    assert loaded[("P-101-DE-H", "crest_factor")] == AlarmState(acked=False)
    with pytest.raises(ValueError):
        decode_alarm("[1]")


def test_state_bodies_are_the_dataclasses_asdict_json() -> None:
    from dataclasses import asdict

    from edgevib.daemon.alarms.state import Baseline, SensorState, _as_dict, encode_alarm

    s = AlarmState(alert=LevelTrack(active=True, run_frames=3, run_start_s=1.5), latched=2, last_value=4.25,
                   suppressed="machine stopped")
    assert json.loads(encode_alarm(s)) == asdict(s) and decode_alarm(encode_alarm(s)) == s
    for rec in (SensorState(fault="flatline", detail="d", since_s=3.0, relapses=1), Baseline(n=4, mean=1.5, m2=0.2)):
        assert _as_dict(rec) == asdict(rec)


def _reference_body(rec: Any, **kw: Any) -> str | type[Exception]:
    """The plain reference: ``json.dumps`` of ``dataclasses.asdict`` (the Python standard library), or the
    exception type it raises."""
    from dataclasses import asdict

    try:
        return json.dumps(asdict(rec), allow_nan=False, **kw)
    except (ValueError, TypeError) as exc:
        return type(exc)


def _fast_body(encode: Any, rec: Any) -> str | type[Exception]:
    try:
        return str(encode(rec))
    except (ValueError, TypeError) as exc:
        return type(exc)


_floats = st.one_of(st.none(), st.floats(allow_nan=True, allow_infinity=True),
                    st.sampled_from([math.nan, math.inf, -math.inf, -0.0, 1e16, 5e-324]))
_texts = st.one_of(st.none(), st.text(max_size=8), st.sampled_from(["machine-stopped", "\u00b0C \"q\" \\ \n",
                                                                     "\U0001f527"]))
_ints = st.integers(-2, 2**70)
_tracks = st.builds(LevelTrack, active=st.booleans(), run_frames=_ints, run_start_s=_floats)
_alarms = st.builds(AlarmState, alert=_tracks, danger=_tracks, acked=st.booleans(), latched=_ints,
                    shelved_until_s=_floats, shelve_reason=_texts, suppressed=_texts, last_value=_floats,
                    since_s=_floats, stale=_texts)
_sensors = st.builds(SensorState, fault=_texts, detail=st.text(max_size=8), since_s=_floats, healthy_run=_ints,
                     last_frame_s=_floats, relapses=_ints, machine_state=_texts, machine_since_s=_floats)
# values of other types than the fields declare: a numpy float (a float subclass), a numpy bool and int (JSON
# cannot hold them), a bool for an int and an int for a bool, a str subclass
_ODD = {"last_value": np.float64(0.1), "acked": np.True_, "latched": np.int64(2), "since_s": True,
        "suppressed": type("Reason", (str,), {})("machine-stopped"), "shelved_until_s": 7}


@settings(max_examples=400, deadline=None)
@given(_alarms)
def test_alarm_body_is_the_json_of_asdict_text_for_text(s: AlarmState) -> None:
    # The written body (fast encoder) against the reference: same text, same key order, same float text
    # (repr), and the same refusal (ValueError) of a NaN or infinity.
    from edgevib.daemon.alarms.state import encode_alarm

    assert _fast_body(encode_alarm, s) == _reference_body(s, separators=(",", ":"))


@settings(max_examples=400, deadline=None)
@given(_sensors)
def test_sensor_body_is_the_json_of_asdict_text_for_text(s: SensorState) -> None:
    from edgevib.daemon.alarms.state import _FAST, encode_sensor

    assert _FAST  # the hand-made encoders cover the records' fields (a field added needs them updated)
    assert _fast_body(encode_sensor, s) == _reference_body(s)


@pytest.mark.parametrize("name", sorted(_ODD))
def test_a_value_of_another_type_is_written_as_the_json_encoder_writes_it(name: str) -> None:
    from edgevib.daemon.alarms.state import encode_alarm

    s = AlarmState(**{name: _ODD[name]})
    t = replace(s, alert=LevelTrack(active=_ODD[name] if name == "acked" else True, run_frames=_ODD["latched"]))
    for rec in (s, t):
        assert _fast_body(encode_alarm, rec) == _reference_body(rec, separators=(",", ":"))
    if name in ("latched", "acked"):
        assert _fast_body(encode_alarm, s) is TypeError  # as json.dumps refuses them


def test_a_group_of_decisions_leaves_the_rows_each_committed_alone_leaves(tmp_path: Path) -> None:
    # Decisions committed together write each key's last state only: the tables (bodies and row order) must be
    # those of the same decisions committed one by one, also where a point's baselines are forgotten between
    # two writes of them (reference: the one-by-one commits, each a plain upsert or delete)
    from concurrent.futures import Future

    from edgevib.daemon.alarms.core import Effects
    from edgevib.daemon.alarms.state import Baseline, SourceState
    from edgevib.daemon.alarms.store import AlarmStore

    def eff(k: int, *, forget: set[str] | None = None, baseline: bool = False, pts: list[str] | None = None,
            ) -> Effects:
        pts = pts or (["P-1", "P-2"] if k % 2 else ["P-2", "P-3"])
        return Effects(alarms={(p, ind): AlarmState(acked=bool(k % 2), latched=k, last_value=0.5 * k)
                               for p in pts for ind in ("kurtosis", "velocity_rms_mm_s")},
                       sensors={p: SensorState(last_frame_s=float(k), healthy_run=k) for p in pts},
                       baselines={(p, "velocity_rms_mm_s"): Baseline(n=k, mean=0.1 * k) for p in pts} if baseline
                       else {},
                       sources={"plant": SourceState(down=k == 3, since_s=float(k))} if k in (2, 3) else {},
                       forget=forget or set())

    effs = [eff(1, baseline=True), eff(2, baseline=True), eff(3, forget={"P-2"}), eff(4, baseline=True),
            eff(5), eff(6, forget={"P-3"}), eff(7, pts=["P-1"])]
    tables = ("alarm_state", "sensor_state", "baselines", "source_state")
    dumps = []
    for name, groups in (("alone", [[e] for e in effs]), ("together", [effs])):
        store = AlarmStore(None, ["mqtt"])  # type: ignore[arg-type]  # its worker's methods, on this thread
        store.db = Database(tmp_path / f"{name}.sqlite")
        store.state, store.outbox = StateStore(store.db), Outbox(store.db, ["mqtt"])
        for g in groups:
            futures: list[Future[Any]] = [Future() for _ in g]
            store._commit(list(zip(g, futures, strict=True)))
            assert all(f.result() == [] for f in futures)
        dumps.append({t: list(store.db.conn.execute(f"SELECT * FROM {t}"))
                      for t in tables})
    alone, together = ({t: [r[:-1] for r in rows] for t, rows in d.items()} for d in dumps)
    assert together == alone  # keys and body text, in the same row order; updated_ns (the last column) left out
    # P-1's from the first, P-2's from the fourth (written after its forget); P-3's forgotten by the last
    assert [r[:2] for r in alone["baselines"]] == [("P-1", "velocity_rms_mm_s"), ("P-2", "velocity_rms_mm_s")]


def test_every_state_table_loads_back_and_leaves_out_an_unreadable_row(tmp_path: Path) -> None:
    # alarm, sensor, baseline and source rows come back as saved; a row that is not JSON (a torn or hand-edited
    # file) is left out, so that limit, point or source starts afresh instead of stopping the start
    from edgevib.daemon.alarms.state import Baseline, SensorState, SourceState

    db = Database(tmp_path / "a.sqlite")
    store = StateStore(db)
    alarms = {("P-101-DE-H", "kurtosis"): AlarmState(latched=1)}
    sensors = {"P-101-DE-H": SensorState(fault="flatline", detail="flat", since_s=2.0)}
    baselines = {("P-101-DE-H", "velocity_rms_mm_s"): Baseline(n=3, mean=1.2, m2=0.1)}
    sources = {"plant": SourceState(down=True, since_s=5.0, reason="connection lost")}
    with db.transaction() as c:
        store.save(c, alarms=alarms, sensors=sensors, baselines=baselines, sources=sources)
        c.execute("INSERT INTO alarm_state VALUES ('P-102', 'kurtosis', 'not json', 0)")
        c.execute("INSERT INTO sensor_state VALUES ('P-102', '{torn', 0)")
        c.execute("INSERT INTO baselines VALUES ('P-102', 'kurtosis', '', 0)")
        c.execute("INSERT INTO source_state VALUES ('other', '{\"down\": ', 0)")
        # JSON, but no object
        c.execute("INSERT INTO sensor_state VALUES ('P-103', '[1]', 0)")
        c.execute("INSERT INTO baselines VALUES ('P-103', 'kurtosis', '3.5', 0)")
        c.execute("INSERT INTO source_state VALUES ('third', 'null', 0)")
    assert store.load_alarms() == alarms and store.load_sensors() == sensors
    assert store.load_baselines() == baselines and store.load_sources() == sources
    db.close()


def test_a_newer_schema_is_refused_not_overwritten(tmp_path: Path) -> None:
    Database(tmp_path / "a.sqlite").close()
    c = sqlite3.connect(tmp_path / "a.sqlite")
    c.execute("UPDATE schema_version SET version = ?", (SCHEMA_VERSION + 1,))
    c.commit()
    c.close()
    with pytest.raises(StateError, match="newer edgevib"):
        Database(tmp_path / "a.sqlite")
    assert sqlite3.connect(tmp_path / "a.sqlite").execute("PRAGMA journal_mode").fetchone()[0] == "wal"


def test_duplicate_ids_are_refused(tmp_path: Path) -> None:
    ob = Outbox(Database(tmp_path / "a.sqlite"), ["mqtt"])
    e = OutboxEvent(id="same", type="t", subject="p", topic="x", body="{}", created_ns=1)
    ob.add([e])
    with pytest.raises(sqlite3.IntegrityError):
        ob.add([e])
    assert ob.depth("mqtt") == 1  # the failed transaction left nothing behind


async def test_the_layer_refuses_a_newer_database_and_leaves_no_worker(tmp_path: Path) -> None:
    # The layer's store opens the file on its own thread: the refusal reaches start(), and that thread ends.
    import threading

    from alarmkit import alarm_layer, small_config

    cfg = small_config(tmp_path / "state")
    Database(tmp_path / "state" / "alarms.sqlite").close()
    c = sqlite3.connect(tmp_path / "state" / "alarms.sqlite")
    c.execute("UPDATE schema_version SET version = ?", (SCHEMA_VERSION + 1,))
    c.commit()
    c.close()
    layer = alarm_layer(cfg)
    with pytest.raises(StateError, match="newer edgevib"):
        await layer.start()
    assert not [t for t in threading.enumerate() if t.name == "edgevib-alarm-store"]

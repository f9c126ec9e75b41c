"""Read-only views of the alarm layer, computed from an :class:`~edgevib.daemon.alarms.core.AlarmSnapshot`.

The decision thread publishes a new snapshot after every decision by swapping one reference; the views here — the
``list`` command's document, the demo table's state text, the retained state messages, the machine view, the
Prometheus collector — read whichever snapshot is current, without a lock, from any thread.
"""

from __future__ import annotations

import json
from collections.abc import Callable, Iterable
from typing import Any

from prometheus_client.core import CounterMetricFamily, GaugeMetricFamily
from prometheus_client.registry import Collector

from edgevib.daemon.alarms.core import SEVERITY, AlarmSnapshot, machine_stale
from edgevib.daemon.alarms.state import SourceState
from edgevib.daemon.indicators import LIMITABLE
from edgevib.daemon.interfaces import AlarmTransition
from edgevib.daemon.timestamps import rfc3339_utc_s
from edgevib.pipelines.alarm import AlarmState, display_severity, isa_state
from edgevib.pipelines.machine_state import MachineState

__all__ = ["AlarmCollector", "list_doc", "machine_view", "point_severity", "state_messages", "state_text",
           "transition_of"]


def _display_rank(indicator: str) -> int:
    """Display order among equally severe alarms: a fault pattern says more than a broadband level."""
    return {"overall": 2, "impacting": 1}.get(LIMITABLE[indicator].fault or "", 0)


def machine_view(snap: AlarmSnapshot, machine: str) -> dict[str, Any]:
    """A machine's state for the views: ``{state, since_s, grace_left_s, last_state, last_since_s}`` (the
    start-up grace still to run, on the frames' timeline, while ``starting``).  While every point of the
    machine is stale the state is ``unknown``; ``last_state`` and ``last_since_s`` keep the last known one
    (both null otherwise)."""
    ms = snap.machine_states.get(machine) or MachineState()
    if machine_stale(snap.machine_points, snap.stale, machine):
        ms = snap.machine_states.get(machine) or snap.last_machine_states.get(machine) or ms  # (before a restart)
        return {"state": "unknown", "since_s": None, "grace_left_s": None, "last_state": ms.state,
                "last_since_s": ms.since_s}
    spec = snap.machine_specs.get(machine)
    until = ms.grace_until_s(spec) if spec is not None else None
    left = None if until is None or ms.last_s is None else max(0.0, until - ms.last_s)
    return {"state": ms.state, "since_s": ms.since_s, "grace_left_s": left, "last_state": None,
            "last_since_s": None}


def alarm_row(snap: AlarmSnapshot, key: tuple[str, str]) -> dict[str, Any]:
    spec = snap.specs[key]
    st = snap.alarms.get(key, AlarmState())
    b = snap.baselines.get(key)
    return {"point": key[0], "indicator": key[1], "state": isa_state(st, spec),
            "severity": SEVERITY[display_severity(st, spec)], "value": snap.values.get(key),
            "alert": spec.alert.set_point if spec.alert else None,
            "danger": spec.danger.set_point if spec.danger else None,
            "shelved_until_s": st.shelved_until_s, "shelve_reason": st.shelve_reason,
            "suppressed": st.suppressed, "stale": st.stale, "since_s": st.since_s,
            "baseline": None if b is None else {"learned": b.learned, "mean": b.mean, "std": b.std, "frames": b.n}}


def _point_row(snap: AlarmSnapshot, pid: str) -> dict[str, Any]:
    p = snap.points[pid]
    mv = machine_view(snap, p.machine)
    src = snap.source_states.get(p.source, SourceState())
    return {"machine": p.machine, "machine_state": mv["state"], "start_up_grace_left_s": mv["grace_left_s"],
            "last_machine_state": mv["last_state"], "suppressed": snap.suppressed.get(pid),
            "stale": snap.stale.get(pid), "source": p.source,
            "source_state": "down" if src.down else "up", "alarm_text": state_text(snap, pid),
            "time": None if pid not in snap.last_frame else rfc3339_utc_s(snap.last_frame[pid])}


def list_doc(snap: AlarmSnapshot, point: str | None = None, outbox_pending: int = 0) -> dict[str, Any]:
    """The ``list`` command's document: limit rows, sensor states, point rows and sources."""
    keys = [k for k in snap.limits if point is None or k[0] == point]
    sensors = {pid: {"fault": s.fault, "detail": s.detail} for pid, s in snap.sensors.items()
               if point is None or pid == point}
    points = {pid: _point_row(snap, pid) for pid in snap.points if point is None or pid == point}
    sources = {n: {"state": "down" if st.down else "up", "since_s": st.since_s, "reason": st.reason or None}
               for n, st in snap.source_states.items()}
    return {"alarms": [alarm_row(snap, k) for k in keys], "sensors": sensors, "points": points,
            "sources": sources, "outbox_pending": outbox_pending}


def point_severity(snap: AlarmSnapshot, point: str) -> int:
    """0 normal, 1 alert, 2 danger, 3 sensor fault (suppressed alarms count as normal)."""
    s = snap.sensors.get(point)
    if s is not None and s.fault is not None:
        return 3
    worst = 0
    for lim in snap.by_point.get(point, ()):
        st = snap.alarms.get(lim.key)
        if st is not None and st.suppressed is None:
            worst = max(worst, display_severity(st, snap.specs[lim.key]))
    return worst


def state_text(snap: AlarmSnapshot, point_id: str) -> str | None:
    """A short alarm state for the demo table: ``normal``, ``ALERT kurtosis``, ``sensor: flatline`` …

    Every active alarm is shown, most severe level first (``DANGER misalignment_2x_mm_s; ALERT
    velocity_rms_mm_s``); within a level, fault patterns first (order lines and bearing families), then
    impacting statistics, then broadband levels.  ``(stale: …)`` marks a point whose data stopped (its alarms
    keep their state)."""
    if point_id not in snap.points:
        return None
    stale = snap.stale.get(point_id)
    tail = f" (stale: {stale})" if stale else ""
    s = snap.sensors.get(point_id)
    if s is not None and s.fault is not None:
        return f"sensor: {s.fault}{tail}"
    levels: dict[int, list[str]] = {}
    shelved = False
    for lim in snap.by_point.get(point_id, ()):
        st = snap.alarms.get(lim.key)
        if st is None:
            continue
        shelved = shelved or st.shelved_until_s is not None
        if st.suppressed is not None:
            continue
        d = display_severity(st, snap.specs[lim.key])
        if d > 0:
            levels.setdefault(d, []).append(lim.indicator)
    if levels:
        parts = [f"{SEVERITY[d].upper()} {', '.join(sorted(levels[d], key=_display_rank))}"
                 for d in sorted(levels, reverse=True)]
        return "; ".join(parts) + tail
    reason = snap.suppressed.get(point_id)
    if reason == "machine-stopped":
        return "stopped" + tail
    if reason == "start-up-grace":
        return "starting" + tail
    return ("shelved" if shelved else "normal") + tail


def state_messages(snap: AlarmSnapshot, trend_state: Callable[[str], dict[str, Any]] | None = None,
                   ) -> dict[str, tuple[str, bytes]]:
    """Retained state message of every point: ``{point: (topic, JSON)}``."""
    out: dict[str, tuple[str, bytes]] = {}
    settings = snap.settings
    for pid, p in snap.points.items():
        sev = point_severity(snap, pid)
        s = snap.sensors.get(pid)
        mv = machine_view(snap, p.machine)
        msg = {"site": settings.site, "machine": p.machine, "point": pid, "axis": p.axis,
               "machine_state": mv["state"], "start_up_grace_left_s": mv["grace_left_s"],
               "last_machine_state": mv["last_state"],
               "last_machine_state_since": None if mv["last_since_s"] is None else rfc3339_utc_s(mv["last_since_s"]),
               "state": ("normal", "alert", "danger", "sensor-fault")[sev],
               "suppressed": snap.suppressed.get(pid), "stale": snap.stale.get(pid),
               "source": {"name": p.source,
                          "state": "down" if snap.source_states.get(p.source, SourceState()).down else "up"},
               "sensor": {"fault": None if s is None else s.fault, "detail": (s.detail if s is not None else "")
                          or None},
               "time": None if pid not in snap.last_frame else rfc3339_utc_s(snap.last_frame[pid]),
               "alarms": {k[1]: {kk: v for kk, v in alarm_row(snap, k).items() if kk != "point"}
                          for k in snap.limits if k[0] == pid}}
        if trend_state is not None:
            msg["trend"] = trend_state(pid)
        topic = settings.feed.state_topic.format(site=settings.site, machine=p.machine, point=pid)
        out[pid] = (topic, json.dumps(msg, separators=(",", ":"), allow_nan=False, default=str).encode("utf-8"))
    return out


def transition_of(time_ns: int, kind: str, point: str, indicator: str, event_id: str, body: str) -> AlarmTransition:
    """A history row as the views read it."""
    try:
        d = json.loads(body)
    except ValueError:
        d = {}
    if not isinstance(d, dict):
        d = {}

    def num(key: str) -> float | None:
        v = d.get(key)
        return float(v) if isinstance(v, int | float) and not isinstance(v, bool) else None

    def text(key: str) -> str | None:
        v = d.get(key)
        return None if v is None else str(v)

    if kind == "alarm":
        from_state, state, limit = text("from_state"), str(d.get("state", "")), num("limit")
    elif kind == "sensor":
        from_state = "normal" if d.get("transition") == "raised" else "sensor-fault"
        state, limit = str(d.get("state", "")), None
    else:
        from_state = "up" if d.get("transition") == "down" else "down"
        state, limit = str(d.get("state", d.get("transition", ""))), None
    return AlarmTransition(
        kind=kind, t_s=time_ns / 1e9, point=point, machine=str(d.get("machine", "")), indicator=indicator,
        unit=text("unit"), transition=str(d.get("transition", "")), from_state=from_state, state=state,
        alarm_state=text("alarm_state"), value=num("value"), limit=limit, by=text("by"), at_s=num("at_s"),
        reason=text("reason") if kind != "sensor" else text("detail"), capture=text("capture"), event_id=event_id,
        machine_state=text("machine_state"), stale=text("stale"))


class AlarmCollector(Collector):
    """Prometheus collector of the alarm layer: fresh families on each scrape from the current snapshot, the
    feeds' counters and the store's outbox and capture figures (plain reads: no lock, never waits for a
    decision or a commit)."""

    def __init__(self, layer: Any) -> None:
        self.layer = layer

    def describe(self) -> list[Any]:
        return []

    def collect(self) -> Iterable[Any]:
        lay = self.layer
        snap: AlarmSnapshot = lay.view
        site = snap.settings.site
        state = GaugeMetricFamily("edgevib_alarm_state", "Alarm state per point and indicator: 0 normal, 1 alert, "
                                  "2 danger, 3 sensor fault", labels=["site", "machine", "point", "axis", "indicator"])
        for pid, p in snap.points.items():
            s = snap.sensors.get(pid)
            fault = s is not None and s.fault is not None
            for lim in snap.by_point.get(pid, ()):
                st = snap.alarms.get(lim.key, AlarmState())
                v = 3 if fault else 0 if st.suppressed is not None else display_severity(st, snap.specs[lim.key])
                state.add_metric([site, p.machine, pid, p.axis, lim.indicator], float(v))
            state.add_metric([site, p.machine, pid, p.axis, "sensor"], 3.0 if fault else 0.0)
        yield state
        events = CounterMetricFamily("edgevib_alarm_events", "Alarm layer events by type", labels=["type"])
        for kind, n in sorted(snap.events_total.items()):
            events.add_metric([kind], float(n))
        yield events
        feeds = [f for f in (lay.mqtt, lay.webhook) if f is not None]
        pub = CounterMetricFamily("edgevib_feed_published", "Events confirmed by a feed sink", labels=["sink"])
        for feed in feeds:
            pub.add_metric([feed.sink], float(feed.published))
        yield pub
        rej = CounterMetricFamily("edgevib_feed_rejected", "Events a feed sink refused for good (a webhook's 4xx "
                                  "answer other than 408/425/429; an MQTT topic or PUBACK refusal; not retried)",
                                  labels=["sink"])
        for feed in feeds:
            rej.add_metric([feed.sink], float(getattr(feed, "rejected", 0)))
        yield rej
        depth, age = lay.outbox_figures()
        yield GaugeMetricFamily("edgevib_outbox_pending_events", "Events waiting in the durable outbox", value=depth)
        yield GaugeMetricFamily("edgevib_outbox_oldest_pending_age_seconds", "Age of the oldest pending event",
                                value=age)
        count, size = lay.capture_figures()
        yield GaugeMetricFamily("edgevib_captures_stored", "Waveform captures on disk", value=count)
        yield GaugeMetricFamily("edgevib_captures_bytes", "Disk used by waveform captures", value=size)

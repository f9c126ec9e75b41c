"""The Prometheus rules and the Grafana dashboard: `promtool check rules` passes, the alerts behave as written
(`promtool test rules`), the dashboard's queries are valid PromQL, and every metric they use is one edgevib
documents.

Semantics relied on: Prometheus alerting rules with `for:` fire only after the condition has held that long, and
histogram_quantile() interpolates linearly inside a bucket (Prometheus documentation, "Alerting rules" and
"Query functions").
"""

from __future__ import annotations

import json
import re
import shutil
import subprocess
from pathlib import Path
from typing import Any

import pytest

REPO = Path(__file__).resolve().parents[2]  # the repository (not "from conftest": tests/simulator has one too)

RULES = REPO / "config" / "prometheus" / "edgevib-rules.yml"
DASHBOARD = REPO / "config" / "grafana" / "edgevib-overview.json"
PROMTOOL = shutil.which("promtool")
needs_promtool = pytest.mark.skipif(PROMTOOL is None, reason="promtool is not installed (apt-get install prometheus)")

# The metric names edgevib documents (README metrics reference; the daemon and alarm layer expose exactly these).
DOCUMENTED = {
    "edgevib_velocity_rms_meters_per_second", "edgevib_velocity_peak_meters_per_second",
    "edgevib_acceleration_rms_meters_per_second_squared", "edgevib_acceleration_peak_meters_per_second_squared",
    "edgevib_crest_factor", "edgevib_kurtosis", "edgevib_order_velocity_rms_meters_per_second",
    "edgevib_envelope_amplitude_meters_per_second_squared", "edgevib_envelope_snr_decibels",
    "edgevib_shaft_speed_hertz", "edgevib_iso_zone", "edgevib_velocity_rms_trend_meters_per_second",
    "edgevib_last_frame_timestamp_seconds", "edgevib_machine_state",
    "edgevib_blocks_received_total", "edgevib_blocks_rejected_total", "edgevib_frames_analysed_total",
    "edgevib_frames_dropped_total", "edgevib_analysis_latency_seconds", "edgevib_source_connected",
    "edgevib_source_reconnects_total", "edgevib_build_info",
    "edgevib_alarm_state", "edgevib_alarm_events_total", "edgevib_feed_published_total",
    "edgevib_outbox_pending_events", "edgevib_outbox_oldest_pending_age_seconds", "edgevib_captures_stored",
    "edgevib_captures_bytes",
}
HISTOGRAMS = {"edgevib_analysis_latency_seconds"}
PROMETHEUS_OWN = {"up"}  # the scrape health series Prometheus itself records for every target


def _rules_text() -> str:
    return RULES.read_text()


def _recorded_names() -> set[str]:
    return set(re.findall(r"^\s*-\s*record:\s*(\S+)", _rules_text(), re.M))


def _rule_exprs() -> list[str]:
    """Every expr of the rules file (single-line and block scalars)."""
    exprs, lines = [], _rules_text().splitlines()
    for i, line in enumerate(lines):
        m = re.match(r"^(\s*)expr:\s*(.*)$", line)
        if not m:
            continue
        if m.group(2).strip() in ("|", ">", "|-", ">-"):
            indent, body = len(m.group(1)), []
            for nxt in lines[i + 1:]:
                if nxt.strip() and len(nxt) - len(nxt.lstrip()) <= indent:
                    break
                body.append(nxt.strip())
            exprs.append(" ".join(body))
        else:
            exprs.append(m.group(2))
    return exprs


def _dashboard() -> dict[str, Any]:
    data: dict[str, Any] = json.loads(DASHBOARD.read_text())
    return data


def _panels(d: dict[str, Any]) -> list[dict[str, Any]]:
    out: list[dict[str, Any]] = []
    for p in d["panels"]:
        out.append(p)
        out.extend(p.get("panels", []))
    return out


def _dashboard_exprs() -> list[str]:
    return [t["expr"] for p in _panels(_dashboard()) for t in p.get("targets", [])]


def _template_queries() -> list[str]:
    """The series selectors of the dashboard's ``label_values(selector, label)`` variables."""
    out = []
    for v in _dashboard()["templating"]["list"]:
        if v["type"] == "query":
            m = re.fullmatch(r"label_values\((.*?)(?:,\s*\w+)?\)", v["query"]["query"])
            assert m, v["query"]["query"]
            out.append(m.group(1))
    return out


def _static_annotation(alert: str, key: str) -> str:
    """An annotation of an alert as YAML reads it: a folded (``>-``) block joined with single spaces."""
    lines = _rules_text().splitlines()
    start = lines.index(f"      - alert: {alert}")
    for i in range(start + 1, len(lines)):
        m = re.match(rf"^(\s*){key}:\s*(.*)$", lines[i])
        if m:
            if m.group(2) != ">-":
                return m.group(2).strip('"')
            indent, body = len(m.group(1)), []
            for nxt in lines[i + 1:]:
                if not nxt.strip() or len(nxt) - len(nxt.lstrip()) <= indent:
                    break
                body.append(nxt.strip())
            return " ".join(body)
    raise AssertionError(f"{alert} has no {key}")


PROMQL_WORDS = {"sum", "by", "rate", "increase", "histogram_quantile", "time", "le", "label_values", "without",
                "avg", "max", "min", "on", "ignoring", "group_left", "bool"}


def metric_names(expr: str) -> set[str]:
    """Identifiers in a PromQL expression that are metric names (not labels, functions, keywords, strings)."""
    stripped = re.sub(r'"[^"]*"', '""', expr)              # label values and strings
    stripped = re.sub(r"\{[^}]*\}", "{}", stripped)        # label matchers
    stripped = re.sub(r"\bby\s*\([^)]*\)", "", stripped)    # grouping labels
    stripped = re.sub(r"\[[^\]]*\]", "", stripped)          # range selectors
    names = set(re.findall(r"[a-zA-Z_:][a-zA-Z0-9_:]*", stripped))
    return {n for n in names if n not in PROMQL_WORDS and not n.startswith("__")}


def base_name(name: str) -> str:
    for suffix in ("_bucket", "_sum", "_count"):
        if name.endswith(suffix) and name[: -len(suffix)] in HISTOGRAMS:
            return name[: -len(suffix)]
    return name


def test_metric_name_extraction() -> None:
    # the helper below finds metric names and ignores labels, functions and durations
    expr = ('histogram_quantile(0.99, sum by (instance, le) (rate(edgevib_analysis_latency_seconds_bucket'
            '{instance=~"$instance"}[5m]))) / up{job="edgevib"}')
    assert metric_names(expr) == {"edgevib_analysis_latency_seconds_bucket", "up"}


def test_every_metric_used_is_documented() -> None:
    allowed = DOCUMENTED | _recorded_names() | PROMETHEUS_OWN
    used = {base_name(n) for e in _rule_exprs() + _dashboard_exprs() + _template_queries() for n in metric_names(e)}
    assert used, "no metric names found: the extraction is broken"
    assert used <= allowed, sorted(used - allowed)


def test_dashboard_covers_the_indicators_and_self_metrics() -> None:
    used = {base_name(n) for e in _dashboard_exprs() for n in metric_names(e)}
    required = {
        "edgevib_velocity_rms_meters_per_second", "edgevib_iso_zone", "edgevib_crest_factor", "edgevib_kurtosis",
        "edgevib_envelope_amplitude_meters_per_second_squared", "edgevib_order_velocity_rms_meters_per_second",
        "edgevib_alarm_state", "edgevib_blocks_received_total", "edgevib_blocks_rejected_total",
        "edgevib_frames_dropped_total", "edgevib_analysis_latency_seconds", "edgevib_source_connected",
        "edgevib_outbox_pending_events", "edgevib_outbox_oldest_pending_age_seconds",
    }
    assert required <= used, sorted(required - used)


def test_dashboard_model_is_consistent() -> None:
    d = _dashboard()
    panels = _panels(d)
    ids = [p["id"] for p in panels]
    assert len(ids) == len(set(ids)), "panel ids must be unique"
    for p in panels:
        g = p["gridPos"]
        assert g["x"] >= 0 and g["x"] + g["w"] <= 24, p["title"]  # Grafana's grid is 24 columns wide
        for t in p.get("targets", []):
            assert t["datasource"] == {"type": "prometheus", "uid": "${datasource}"}, p["title"]
    names = [v["name"] for v in d["templating"]["list"]]
    used_vars = set(re.findall(r"\$(\w+)", json.dumps([p.get("targets") for p in panels])))
    assert used_vars - {"__rate_interval"} <= set(names)
    # ISO 20816-3 group 2 / rigid boundaries in mm/s (FIELD_NOTES section 1, from the standard's table)
    table = next(p for p in panels if p["title"].startswith("Velocity r.m.s. per point"))
    steps = next(prop["value"]["steps"] for o in table["fieldConfig"]["overrides"] for prop in o["properties"]
                 if prop["id"] == "thresholds")
    assert [s["value"] for s in steps] == [None, 1.4, 2.8, 4.5]


def _promtool(*args: str, cwd: Path | None = None) -> subprocess.CompletedProcess[str]:
    assert PROMTOOL is not None
    return subprocess.run([PROMTOOL, *args], capture_output=True, text=True, timeout=60, cwd=cwd)


@needs_promtool
def test_promtool_check_rules() -> None:
    result = _promtool("check", "rules", str(RULES))
    assert result.returncode == 0, result.stdout + result.stderr
    assert "SUCCESS" in result.stdout


@needs_promtool
def test_dashboard_queries_are_valid_promql(tmp_path: Path) -> None:
    """Each dashboard query, with Grafana's variables filled in, is checked by promtool as a recording rule."""
    exprs = _dashboard_exprs()
    lines = ["groups:", "  - name: dashboard-queries", "    rules:"]
    for i, e in enumerate(exprs):
        filled = e.replace("$__rate_interval", "5m")
        filled = re.sub(r"\$\w+", ".*", filled)
        lines += [f"      - record: dashboard:query_{i}", f"        expr: {json.dumps(filled)}"]
    (tmp_path / "q.yml").write_text("\n".join(lines) + "\n")
    result = _promtool("check", "rules", str(tmp_path / "q.yml"))
    assert result.returncode == 0, result.stdout + result.stderr
    # and promtool does reject a broken query (the check is not blind)
    (tmp_path / "bad.yml").write_text("groups:\n  - name: x\n    rules:\n      - record: x:y\n"
                                      "        expr: sum by (point (edgevib_kurtosis)\n")
    assert _promtool("check", "rules", str(tmp_path / "bad.yml")).returncode != 0


LABELS = 'site="quarry-lane", machine="P-101", point="P-101-DE-H", axis="horizontal"'
ALARM_LABELS = LABELS + ', indicator="velocity_rms"'

def _d(alert: str) -> str:
    return json.dumps(_static_annotation(alert, "description"))


UNIT_TESTS = f"""
rule_files:
  - {RULES}
evaluation_interval: 1m
tests:
  # A source down for 3 minutes then up: no alert.  Down from minute 10 on: pending, then firing after 5 minutes.
  - interval: 1m
    input_series:
      - series: 'edgevib_source_connected{{job="edgevib", instance="ql-edge-1:9851", source="station-broker"}}'
        values: '1 0 0 0 1 1 1 1 1 1 0x12'
    alert_rule_test:
      - eval_time: 6m
        alertname: EdgevibSourceDisconnected
        exp_alerts: []
      - eval_time: 14m
        alertname: EdgevibSourceDisconnected
        exp_alerts: []
      - eval_time: 16m
        alertname: EdgevibSourceDisconnected
        exp_alerts:
          - exp_labels:
              severity: warning
              job: edgevib
              instance: ql-edge-1:9851
              source: station-broker
            exp_annotations:
              summary: "edgevib source station-broker on ql-edge-1:9851 disconnected for 5 minutes"
              description: {_d("EdgevibSourceDisconnected")}

  # 100 blocks/min received, 10/min rejected (10 %) for 20 minutes: the ratio is recorded and the alert fires.
  - interval: 1m
    input_series:
      - series: 'edgevib_blocks_received_total{{job="edgevib", instance="e1", source="station-broker"}}'
        values: '0+100x30'
      - series: >-
          edgevib_blocks_rejected_total{{job="edgevib", instance="e1", source="station-broker", reason="length"}}
        values: '0+10x30'
    promql_expr_test:
      - expr: source:edgevib_blocks_rejected:ratio_rate5m
        eval_time: 20m
        exp_samples:
          - labels: >-
              source:edgevib_blocks_rejected:ratio_rate5m{{job="edgevib", instance="e1", source="station-broker"}}
            value: 0.1
    alert_rule_test:
      - eval_time: 20m
        alertname: EdgevibBlocksRejected
        exp_alerts:
          - exp_labels: {{severity: warning, job: edgevib, instance: e1, source: station-broker}}
            exp_annotations:
              summary: "edgevib rejects 10% of blocks from station-broker"
              description: {_d("EdgevibBlocksRejected")}

  # Velocity 3.1 mm/s recorded in mm/s; ISO zone D for 12 minutes fires the zone alert; danger mirrors at once.
  - interval: 1m
    input_series:
      - series: 'edgevib_velocity_rms_meters_per_second{{{LABELS}}}'
        values: '0.0031x15'
      - series: 'edgevib_iso_zone{{{LABELS}}}'
        values: '3 3 4x13'
      - series: 'edgevib_alarm_state{{{ALARM_LABELS}}}'
        values: '0 0 1 1 2x11'
    promql_expr_test:
      - expr: point:edgevib_velocity_rms_millimeters_per_second:scaled
        eval_time: 5m
        exp_samples:
          - labels: 'point:edgevib_velocity_rms_millimeters_per_second:scaled{{{LABELS}}}'
            value: 3.1
    alert_rule_test:
      - eval_time: 10m
        alertname: EdgevibIsoZoneD
        exp_alerts: []
      - eval_time: 13m
        alertname: EdgevibIsoZoneD
        exp_alerts:
          - exp_labels: {{severity: warning, {LABELS.replace('"', '').replace('=', ': ')}}}
            exp_annotations:
              summary: "P-101 P-101-DE-H: velocity r.m.s. in ISO 20816-3 zone D"
              description: {_d("EdgevibIsoZoneD")}
      - eval_time: 3m
        alertname: EdgevibAlarmDanger
        exp_alerts: []
      - eval_time: 4m
        alertname: EdgevibAlarmDanger
        exp_alerts:
          - exp_labels: {{severity: critical, {ALARM_LABELS.replace('"', '').replace('=', ': ')}}}
            exp_annotations:
              summary: "P-101 P-101-DE-H: velocity_rms at danger level"
              description: {_d("EdgevibAlarmDanger")}

  # A sensor fault: the sensor series and every limit series of the point read 3 (the alarm layer's collector
  # marks all of them): one alert, for the sensor, not one per limit.
  - interval: 1m
    input_series:
      - series: 'edgevib_alarm_state{{{LABELS}, indicator="sensor"}}'
        values: '3x10'
      - series: 'edgevib_alarm_state{{{LABELS}, indicator="velocity_rms_mm_s"}}'
        values: '3x10'
      - series: 'edgevib_alarm_state{{{LABELS}, indicator="kurtosis"}}'
        values: '3x10'
      - series: 'edgevib_alarm_state{{{LABELS}, indicator="bearing_bpfo_g"}}'
        values: '3x10'
    alert_rule_test:
      - eval_time: 6m
        alertname: EdgevibSensorFault
        exp_alerts:
          - exp_labels: {{severity: warning, indicator: sensor, {LABELS.replace('"', '').replace('=', ': ')}}}
            exp_annotations:
              summary: "P-101 P-101-DE-H: sensor fault suspected"
              description: {_d("EdgevibSensorFault")}

  # The last frame stops advancing at minute 5 (frames every minute before): silent alert after 5 + 5 minutes.
  - interval: 1m
    input_series:
      - series: 'edgevib_last_frame_timestamp_seconds{{{LABELS}}}'
        values: '0+60x5 300x20'
      - series: 'edgevib_outbox_oldest_pending_age_seconds{{job="edgevib", instance="e1"}}'
        values: '0+120x20'
    alert_rule_test:
      - eval_time: 9m
        alertname: EdgevibPointSilent
        exp_alerts: []
      - eval_time: 16m
        alertname: EdgevibPointSilent
        exp_alerts:
          - exp_labels: {{severity: warning, {LABELS.replace('"', '').replace('=', ': ')}}}
            exp_annotations:
              summary: "no analysed frame from P-101 / P-101-DE-H for over 5 minutes"
              description: {_d("EdgevibPointSilent")}
      - eval_time: 12m
        alertname: EdgevibOutboxBacklog
        exp_alerts: []
      - eval_time: 14m
        alertname: EdgevibOutboxBacklog
        exp_alerts:
          - exp_labels: {{severity: warning, job: edgevib, instance: e1}}
            exp_annotations:
              summary: "edgevib alarm events on e1 undelivered for 28m 0s"
              description: {_d("EdgevibOutboxBacklog")}

  # Latency histogram: per minute 60 observations, all in (0.5, 1] s, none above: p99 interpolates to
  # 0.5 + 0.99 * (1 - 0.5) = 0.995 s (histogram_quantile's linear interpolation); below the 2 s alert.
  - interval: 1m
    input_series:
      - series: 'edgevib_analysis_latency_seconds_bucket{{job="edgevib", instance="e1", le="0.5"}}'
        values: '0x20'
      - series: 'edgevib_analysis_latency_seconds_bucket{{job="edgevib", instance="e1", le="1"}}'
        values: '0+60x20'
      - series: 'edgevib_analysis_latency_seconds_bucket{{job="edgevib", instance="e1", le="+Inf"}}'
        values: '0+60x20'
    promql_expr_test:
      - expr: instance:edgevib_analysis_latency_seconds:p99_rate5m
        eval_time: 10m
        exp_samples:
          - labels: 'instance:edgevib_analysis_latency_seconds:p99_rate5m{{job="edgevib", instance="e1"}}'
            value: 0.995
    alert_rule_test:
      - eval_time: 20m
        alertname: EdgevibAnalysisLatencyHigh
        exp_alerts: []
"""


@needs_promtool
def test_alerts_behave_as_written(tmp_path: Path) -> None:
    tests = tmp_path / "edgevib-rules.test.yml"
    tests.write_text(UNIT_TESTS)
    result = _promtool("test", "rules", str(tests))
    assert result.returncode == 0, result.stdout + result.stderr
    assert "SUCCESS" in result.stdout
    # the harness can fail: the same series with a wrong expectation is reported
    tests.write_text(UNIT_TESTS.replace("value: 3.1", "value: 3.2"))
    assert _promtool("test", "rules", str(tests)).returncode != 0

"""Configuration validation: every error names its key path and the problem; secrets never print."""

from __future__ import annotations

import copy
import functools
import subprocess
import sys
import tomllib
from pathlib import Path
from typing import Any

import pytest

from edgevib.daemon.config import (
    Secret,
    config_to_document,
    deferred_warnings,
    dump_toml,
    load_config,
    parse_config,
    verify_for_run,
)
from edgevib.daemon.interfaces import ConfigError
from edgevib.simulator.scenario import builtin_scenarios


def base() -> dict[str, Any]:
    return {
        "site": {"name": "quarry-lane", "state_dir": "/tmp/edgevib-test"},
        "sources": [{"name": "broker", "type": "mqtt", "url": "mqtt://127.0.0.1:1883",
                     "topics": ["fwb/quarry-lane/+/+/block"]}],
        "machines": [{"id": "P-101", "group": 2, "support": "rigid", "speed_rpm": 1480.0}],
        "points": [{"id": "P-101-DE-H", "machine": "P-101", "source": "broker", "sensor": "QL-P101-DE-H",
                    "fs_hz": 25600.0, "block_samples": 4096,
                    "bearing": {"elements": 9, "ball_diameter_mm": 7.94, "pitch_diameter_mm": 39.04}}],
    }


def error(doc: dict[str, Any], tmp_path: Path | None = None) -> ConfigError:
    with pytest.raises(ConfigError) as info:
        parse_config(doc, tmp_path or ".")
    return info.value


def test_minimal_config_fills_defaults() -> None:
    cfg = parse_config(base())
    p = cfg.points[0]
    assert cfg.analysis.frame_samples == 16384 and cfg.analysis.overlap == 0.5
    assert (cfg.metrics.host, cfg.metrics.port) == ("127.0.0.1", 9851)
    assert p.hop_samples == 8192
    assert p.envelope_band_hz is not None and p.envelope_band_hz[1] <= 10000.0
    assert cfg.source("broker").qos == 1


@pytest.mark.parametrize(("mutate", "path", "words"), [
    (lambda d: d["points"][0].update(colour="red"), "points[0].colour", "unknown key"),
    (lambda d: d.update(extra={}), "extra", "unknown table [extra]"),
    (lambda d: d["points"][0].update(fs_Hz=1.0), "points[0].fs_Hz", "unknown key; did you mean `fs_hz`?"),
    # the misspelling in place of a required key names the key that was meant, not the missing one
    (lambda d: d["points"][0].update(fs_Hz=d["points"][0].pop("fs_hz")), "points[0].fs_Hz",
     "unknown key; did you mean `fs_hz`?"),
    (lambda d: d["sources"][0].update(nme=d["sources"][0].pop("name")), "sources[0].nme",
     "unknown key; did you mean `name`?"),
    (lambda d: d["points"][0].update(frame_sample=4096), "points[0].frame_sample", "did you mean `frame_samples`?"),
    (lambda d: d.update(metric={"listen": "127.0.0.1:9851"}), "metric",
     "unknown table [metric]; did you mean `[metrics]`?"),
    (lambda d: d.update(point=[{"id": "x"}]), "point", "unknown array of tables [[point]]; did you mean `[[points]]`?"),
    (lambda d: d.update(publish={"mqqt": {"enabled": False}}), "publish.mqqt",
     "unknown table [publish.mqqt]; did you mean `[publish.mqtt]`?"),
    # a limit table (one per indicator, under a table of free names) knows its keys too
    (lambda d: d["points"][0].update(limits={"crest_factor": {"alert": 5.0, "danegr": 8.0}}),
     "points[0].limits.crest_factor.danegr", "unknown key; did you mean `danger`?"),
    (lambda d: d["sources"][0].update(type="amqp"), "sources[0].type", "is not one of"),
    (lambda d: d["sources"][0].update(keepalive_s=True), "sources[0].keepalive_s", "must be a number, got boolean"),
    (lambda d: d["sources"][0].update(keepalive_s="30"), "sources[0].keepalive_s", "must be a number, got string"),
    # ids become MQTT topic levels and OPC UA node-id parts (issue 13 §1): wildcards, separators, NATS tokens
    (lambda d: d["points"][0].update(id="P-101+DE"), "points[0].id", "MQTT wildcards"),
    (lambda d: d["machines"][0].update(id="P/101"), "machines[0].id", "separates MQTT topic levels"),
    (lambda d: d["site"].update(name="quarry.lane"), "site.name", "NATS"),
    (lambda d: d["points"][0].update(id="P 101"), "points[0].id", "NATS"),
    (lambda d: d["points"][0].update(id="#"), "points[0].id", "MQTT wildcards"),
    # a source's name is a level of the source events' topic ([feed] source_topic)
    (lambda d: d["sources"][0].update(name="plant+1"), "sources[0].name", "MQTT wildcards"),
    (lambda d: d["sources"][0].update(name="plant.north"), "sources[0].name", "NATS"),
    (lambda d: d["site"].update(name=3), "site.name", "must be a string"),
    (lambda d: d["points"][0].update(fs_hz="fast"), "points[0].fs_hz", "must be a number"),
    (lambda d: d["points"][0].update(block_samples=4096.5), "points[0].block_samples", "must be an integer"),
    (lambda d: d["points"][0].update(block_samples="4096"), "points[0].block_samples",
     "must be an integer, got string '4096'"),
    (lambda d: d["points"][0].update(sensor_type="peizo"), "points[0].sensor_type", "did you mean `piezo`?"),
    (lambda d: d.update(analysis={"overlap": 1.0}), "analysis.overlap", "out of range"),
    (lambda d: d.update(analysis={"workers": 0}), "analysis.workers", "out of range"),
    (lambda d: d["sources"][0].update(qos=2), "sources[0].qos", "out of range"),
    (lambda d: d["points"].append(copy.deepcopy(d["points"][0])), "points[1].id", "duplicate point id"),
    (lambda d: d["points"][0].update(machine="P-999"), "points[0].machine", "unknown machine"),
    (lambda d: d["points"][0].update(source="nowhere"), "points[0].source", "unknown source"),
    (lambda d: d["sources"].append(dict(d["sources"][0])), "sources[1].name", "duplicate source"),
    (lambda d: d["points"][0]["bearing"].update(ball_diameter_mm=40.0), "points[0].bearing",
     "impossible bearing geometry"),
    (lambda d: d["points"][0]["bearing"].update(elements=1), "points[0].bearing", "impossible bearing geometry"),
    (lambda d: d["points"][0].update(envelope_band_hz=[2000.0, 13000.0]), "points[0].envelope_band_hz",
     "Nyquist 12800 Hz (half of fs_hz 25600)"),  # Nyquist = fs / 2 (Shannon–Nyquist sampling theorem)
    (lambda d: d["points"][0].update(envelope_band_hz=[2000.0, 11000.0]), "points[0].envelope_band_hz",
     "usable bandwidth 10000"),
    (lambda d: d["points"][0].update(velocity_band_hz=[10.0, 20000.0]), "points[0].velocity_band_hz", "Nyquist"),
    (lambda d: d["points"][0].update(frame_samples=4096), "points[0].frame_samples", "too short"),
    (lambda d: d["points"][0].update(bandwidth_hz=[100.0, 10.0]), "points[0].bandwidth_hz", "must be below"),
    (lambda d: d["sources"][0].update(url="http://x"), "sources[0].url", "mqtt://"),
    (lambda d: d["sources"][0].update(topics=["a/#/b"]), "sources[0].topics[0]", "invalid topic filter"),
    (lambda d: d["sources"][0].update(sensor_from="topic:x"), "sources[0].sensor_from", "topic:N"),
    (lambda d: d["machines"][0].update(group=3), "machines[0].group", "out of range"),
    (lambda d: d["machines"][0].pop("support"), "machines[0].support", "both group and support"),
    (lambda d: d["machines"][0].update(speed_tag={"source": "broker", "topic": "s"}), "machines[0].speed_tag",
     "not both"),
    (lambda d: d["metrics"] if d.update(metrics={"listen": "localhost"}) else None, "metrics.listen", "HOST:PORT"),
    (lambda d: d["sources"][0].update(password="hunter2"), "sources[0].password", "password_file"),
    (lambda d: d["sources"][0].update(password_env="EDGEVIB_TEST_UNSET_VARIABLE"), "sources[0].password_env",
     "is not set"),
    (lambda d: d["sources"][0].update(password_file="/nonexistent/secret"), "sources[0].password_file",
     "does not exist"),
    (lambda d: d["site"].update(shard={"count": 2, "index": 2}), "site.shard.index", ""),
    (lambda d: d.update(publish={"mqtt": {"enabled": True, "topic": "a/{nope}"}}), "publish.mqtt", ""),
    (lambda d: d["points"][0].pop("fs_hz"), "points[0].fs_hz", "required"),
])
def test_config_errors_name_path_and_problem(mutate: Any, path: str, words: str) -> None:
    doc = base()
    mutate(doc)
    exc = error(doc)
    assert exc.path.startswith(path), (exc.path, str(exc))
    assert words in str(exc), str(exc)


def test_mems_point_without_envelope_band_gets_a_note_not_an_error() -> None:
    doc = base()
    doc["points"][0].update(fs_hz=3200.0, block_samples=3200, sensor_type="mems", bandwidth_hz=[0.0, 1000.0])
    doc["points"][0].pop("bearing")
    p = parse_config(doc).points[0]
    assert p.envelope_band_hz is None
    assert p.envelope_note is not None and "1000 Hz" in p.envelope_note


def test_secret_from_file_and_env_is_redacted(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    secret_file = tmp_path / "mqtt-password"
    secret_file.write_text("s3cret-value\n")
    monkeypatch.setenv("EDGEVIB_TEST_KEYPASS", "other-secret")
    doc = base()
    doc["sources"][0].update(username="edgevib", password_file=str(secret_file))
    cfg = parse_config(doc, tmp_path)
    conn = cfg.sources[0].connection  # type: ignore[union-attr]
    assert isinstance(conn.password, Secret)
    assert conn.password.reveal() == "s3cret-value"
    text = dump_toml(config_to_document(cfg)) + repr(cfg) + str(cfg)
    assert "s3cret-value" not in text
    assert f'password_file = "{secret_file}"' in text  # where the secret is, never what it is
    assert repr(conn.password) == f"<from file {secret_file}>"
    assert Secret("env", "EDGEVIB_TEST_KEYPASS").reveal() == "other-secret"
    assert "other-secret" not in repr(Secret("env", "EDGEVIB_TEST_KEYPASS"))


def test_shard_keeps_only_owned_points() -> None:
    doc = base()
    doc["points"].append(dict(copy.deepcopy(doc["points"][0]), id="P-101-DE-V", sensor="QL-P101-DE-V"))
    doc["site"]["shard"] = {"points": ["P-101-DE-V"]}
    cfg = parse_config(doc)
    assert [p.id for p in cfg.points] == ["P-101-DE-V"]
    assert cfg.skipped_points == ("P-101-DE-H",)


def test_alarm_tables_are_validated() -> None:
    # the alarm tables are part of the one schema: a valid set loads, each kind of mistake is named
    doc = base()
    doc["alarms"] = {"deadband": 0.1}
    doc["feed"] = {"source": "broker", "topic": "fwb/{site}/{point}/alarm"}
    doc["points"][0]["limits"] = {"velocity_rms_mm_s": {"alert": 2.8}}
    cfg = parse_config(doc)
    assert cfg.alarms.deadband == 0.1 and cfg.alarm_settings.feed.topic == "fwb/{site}/{point}/alarm"
    assert {(lim.point, lim.indicator) for lim in cfg.alarm_settings.limits} == {("P-101-DE-H", "velocity_rms_mm_s")}
    for table, value, path in (("alarms", {"anything": 1}, "alarms.anything"), ("feed", {"topic": "x/#"}, "feed.topic"),
                               ("capture", {"max_mb": 0}, "capture.max_mb")):
        bad = copy.deepcopy(doc)
        bad[table] = value
        assert error(bad).path == path
    bad = copy.deepcopy(doc)
    bad["points"][0]["limits"] = {"velocity_rms": {"alert": 2.8}}
    e = error(bad)
    assert e.path == "points[0].limits.velocity_rms" and "did you mean `velocity_rms_mm_s`?" in e.problem


EXAMPLES = sorted((Path(__file__).resolve().parents[2] / "config").glob("*.toml"))


@pytest.mark.parametrize("path", EXAMPLES, ids=[p.name for p in EXAMPLES])
def test_printed_configuration_loads_back_the_same(path: Path, tmp_path: Path) -> None:
    # issue 13 §6: check-config's output is a configuration, and the same one
    cfg = load_config(path)
    text = dump_toml(config_to_document(cfg))
    printed = tmp_path / "printed.toml"
    printed.write_text(text)
    again = load_config(printed)
    assert config_to_document(again) == config_to_document(cfg)
    assert dump_toml(config_to_document(again)) == text
    assert again.points == cfg.points and again.sources == cfg.sources and again.machines == cfg.machines
    assert again.alarm_settings.limits == cfg.alarm_settings.limits
    assert again.alarm_settings.health == cfg.alarm_settings.health
    assert [again.plan(p.id) for p in again.points] == [cfg.plan(p.id) for p in cfg.points]


def _round_trips(path: Path, tmp_path: Path) -> None:
    cfg = load_config(path)
    text = dump_toml(config_to_document(cfg))
    printed = tmp_path / "printed.toml"
    printed.write_text(text)
    assert dump_toml(config_to_document(load_config(printed))) == text


def test_readme_minimal_configuration_loads_back_the_same(tmp_path: Path) -> None:
    readme = (Path(__file__).resolve().parents[2] / "README.md").read_text(encoding="utf-8")
    block = readme.split("```toml\n", 1)[1].split("```", 1)[0]  # "A minimal configuration", the first TOML block
    assert "[[points]]" in block
    path = tmp_path / "minimal.toml"
    path.write_text(block)
    _round_trips(path, tmp_path)


SCENARIOS = sorted(builtin_scenarios())


@pytest.mark.parametrize("scenario", SCENARIOS)
def test_emitted_configuration_loads_back_the_same(scenario: str, tmp_path: Path) -> None:
    # what `edgevib simulate --scenario NAME --emit-config PATH` writes, for each streaming source kind
    from edgevib.simulator.engine import Simulation, load_scenario

    sim = Simulation(load_scenario(scenario), seed=0)
    for source in ({"name": "sim", "type": "simulated", "scenario": scenario},
                   {"name": "sim", "type": "mqtt", "url": "mqtt://127.0.0.1:1883",
                    "topics": [f"{sim.scenario.topic_prefix}/+/+/block"], "sensor_from": "payload"}):
        path = tmp_path / f"{scenario}-{source['type']}.toml"
        path.write_text(sim.daemon_config_toml(source=source))
        _round_trips(path, tmp_path)


def test_verdict_limits_print_as_written_and_load_back(tmp_path: Path) -> None:
    # check-config prints what the file would say: a verdict limit is `alert = true` / `danger = true` (README
    # "Per-point limits"); its internal level 0.5 printed as a number would not load back (issue 13 §6 round trip)
    doc = base()
    doc["points"][0]["limits"] = {"bearing_bpfo_detected": {"alert": True},
                                  "bearing_bsf_detected": {"danger": True, "on_delay_frames": 3}}
    path = _written(doc, tmp_path)
    _round_trips(path, tmp_path)
    printed = tomllib.loads(dump_toml(config_to_document(load_config(path))))
    limits = printed["points"][0]["limits"]
    assert limits["bearing_bpfo_detected"]["alert"] is True and "danger" not in limits["bearing_bpfo_detected"]
    assert limits["bearing_bsf_detected"]["danger"] is True and "alert" not in limits["bearing_bsf_detected"]
    again = parse_config(printed)
    assert again.alarm_settings.limits == load_config(path).alarm_settings.limits


def test_empty_file_is_an_error(tmp_path: Path) -> None:
    for text in ("", "# only a comment\n\n"):
        f = tmp_path / "empty.toml"
        f.write_text(text)
        with pytest.raises(ConfigError, match="holds no configuration"):
            load_config(f)


def _written(doc: dict[str, Any], tmp_path: Path) -> Path:
    f = tmp_path / "edgevib.toml"
    f.write_text(dump_toml(doc))
    return f


def test_load_config_reports_bad_toml(tmp_path: Path) -> None:
    bad = tmp_path / "bad.toml"
    bad.write_text("[site\nname = 1\n")
    with pytest.raises(ConfigError, match="not valid TOML"):
        load_config(bad)
    with pytest.raises(ConfigError, match="cannot read"):
        load_config(tmp_path / "missing.toml")


# ---- ${CREDENTIALS_DIRECTORY} / ${STATE_DIRECTORY} (systemd.exec(5): LoadCredential=, StateDirectory=)


def test_path_variables_expand(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    creds = tmp_path / "creds"
    creds.mkdir()
    (creds / "mqtt-password").write_text("pw\n")
    monkeypatch.setenv("CREDENTIALS_DIRECTORY", str(creds))
    # several StateDirectory= entries arrive colon-separated; the first is the service's own
    monkeypatch.setenv("STATE_DIRECTORY", f"{tmp_path / 'state'}:{tmp_path / 'other'}")
    doc = base()
    doc["site"]["state_dir"] = "${STATE_DIRECTORY}"
    doc["sources"][0].update(username="edgevib", password_file="${CREDENTIALS_DIRECTORY}/mqtt-password")
    cfg = parse_config(doc, tmp_path)
    assert cfg.site.state_dir == str(tmp_path / "state")
    assert cfg.sources[0].connection.password == Secret("file", str(creds / "mqtt-password"))  # type: ignore[union-attr]
    assert cfg.deferred == ()
    verify_for_run(cfg)
    # without state_dir in the file, $STATE_DIRECTORY is the default
    doc["site"].pop("state_dir")
    assert parse_config(doc, tmp_path).site.state_dir == str(tmp_path / "state")
    monkeypatch.delenv("STATE_DIRECTORY")
    assert parse_config(doc, tmp_path).site.state_dir == "/var/lib/edgevib"


def test_credentials_outside_the_unit_are_deferred(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.delenv("CREDENTIALS_DIRECTORY", raising=False)
    monkeypatch.delenv("STATE_DIRECTORY", raising=False)
    doc = base()
    doc["site"]["state_dir"] = "${STATE_DIRECTORY}"
    doc["sources"][0].update(username="edgevib", password_file="${CREDENTIALS_DIRECTORY}/mqtt-password",
                             cert_file=str(tmp_path / "missing.crt"))
    # a plain missing file is an error at once
    assert error(doc, tmp_path).path == "sources[0].cert_file"
    doc["sources"][0]["cert_file"] = "/run/credentials/edgevib.service/client.crt"
    cfg = parse_config(doc, tmp_path)
    assert sorted(d[0] for d in cfg.deferred) == ["sources[0].cert_file", "sources[0].password_file"]
    warnings = deferred_warnings(cfg)
    assert warnings[0].startswith("site.state_dir:") and "--state-dir" in warnings[0]
    by_key = {w.split(":", 1)[0]: w for w in warnings[1:]}
    assert "${CREDENTIALS_DIRECTORY} is not set" in by_key["sources[0].password_file"]
    assert "LoadCredential=" in by_key["sources[0].cert_file"]
    assert all("checked again when the daemon starts" in w for w in warnings[1:])
    with pytest.raises(ConfigError) as info:
        verify_for_run(cfg)
    assert info.value.path == "site.state_dir"
    cfg = load_config(_written(doc, tmp_path), {"site.state_dir": str(tmp_path / "state")})
    with pytest.raises(ConfigError) as info:
        verify_for_run(cfg)
    assert info.value.path in ("sources[0].password_file", "sources[0].cert_file")
    assert "does not exist" in info.value.problem
    # inside the unit (CREDENTIALS_DIRECTORY set) a missing credential is an error at load
    monkeypatch.setenv("CREDENTIALS_DIRECTORY", str(tmp_path))
    assert error(doc, tmp_path).path == "sources[0].cert_file"  # under /run/credentials/: absent in the unit too
    doc["sources"][0].pop("cert_file")
    assert error(doc, tmp_path).path == "sources[0].password_file"


def test_other_variables_are_not_expanded(tmp_path: Path) -> None:
    doc = base()
    doc["sources"][0].update(ca_file="${HOME}/ca.crt")
    e = error(doc, tmp_path)
    assert e.path == "sources[0].ca_file" and "${HOME}" in e.problem and "${CREDENTIALS_DIRECTORY}" in e.problem


def test_resolved_document_shows_levels_as_written() -> None:
    # ISO levels stay "iso" (not a number 0.0), relative ones their table, the socket mode its string
    cfg = load_config(Path(__file__).resolve().parents[2] / "config" / "example-plant.toml")
    text = dump_toml(config_to_document(cfg))
    assert "Config(" not in text and "LevelRule" not in text
    doc = tomllib.loads(text)
    limits = doc["points"][0]["limits"]
    assert limits["velocity_rms_mm_s"]["rule"] == "iso-baseline"
    assert limits["imbalance_1x_mm_s"] == {"enabled": True, "alert": {"sigma": 4.0}, "danger": 4.5}
    assert doc["alarms"]["socket_mode"] == "0600" and doc["capture"]["max_mb"] == 256.0


def test_plans_are_validated_and_kernels_built_once_per_distinct_configuration(monkeypatch: pytest.MonkeyPatch,
                                                                              tmp_path: Path) -> None:
    # issue 14 §4: 12 points of 2 distinct plans → 2 validations and 2 kernels, however often the plan is asked for
    from edgevib.daemon.app import Daemon
    from edgevib.pipelines import analysis

    analysis._check_plan.cache_clear()
    analysis.kernel_for.cache_clear()
    checked: list[object] = []
    built: list[object] = []
    check, init = analysis._check_plan.__wrapped__, analysis.AnalysisKernel.__init__
    monkeypatch.setattr(analysis, "_check_plan", functools.lru_cache(maxsize=256)(
        lambda plan: checked.append(plan) or check(plan)))
    monkeypatch.setattr(analysis.AnalysisKernel, "__init__", lambda self, plan: built.append(plan) or init(self, plan))
    doc = base()
    doc["site"]["state_dir"] = str(tmp_path / "state")
    first = doc["points"][0]
    doc["points"] = [dict(first, id=f"P-101-DE-{i}", sensor=f"QL-{i}", fs_hz=25600.0 if i < 6 else 12800.0)
                     for i in range(12)]
    cfg = parse_config(doc, tmp_path)
    Daemon(cfg, serve_metrics=False)
    assert [cfg.plan(p.id) for p in cfg.points]  # asked for again: memoized
    assert len(checked) == 2 and len(built) == 2


def test_loading_the_models_does_not_load_the_numerical_core() -> None:
    # the simulator builds its emitted configuration with these models and must never import edgevib.pipelines
    code = ("import sys, edgevib.daemon.config as c; c.Config.model_validate({'points': []}); "
            "print(sorted(m for m in sys.modules if m.startswith('edgevib.pipelines')))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=60, check=True)
    assert out.stdout.strip() == "[]"


def test_run_dwell_reaches_the_machine_state_spec() -> None:
    # [alarms] run_dwell_frames / run_dwell_s: 3 frames and 3 s by default (README "[alarms]"), bounds named
    from edgevib.daemon.machine_state import state_spec

    cfg = parse_config(base())
    spec = state_spec(cfg.machines[0], cfg.alarms)
    assert (spec.dwell_frames, spec.dwell_s) == (3, 3.0)
    doc = base()
    doc["alarms"] = {"run_dwell_frames": 5, "run_dwell_s": 10.0}
    cfg = parse_config(doc)
    spec = state_spec(cfg.machines[0], cfg.alarms)
    assert (spec.dwell_frames, spec.dwell_s) == (5, 10.0)
    for key, value in (("run_dwell_frames", 0), ("run_dwell_s", -1.0)):
        bad = base()
        bad["alarms"] = {key: value}
        assert error(bad).path == f"alarms.{key}"


# ---- a file with several mistakes reports every one (each with its key path, value and what is allowed)


def _problems(doc: dict[str, Any], tmp_path: Path) -> ConfigError:
    with pytest.raises(ConfigError) as info:
        load_config(_written(doc, tmp_path))
    return info.value


def test_a_file_with_three_mistakes_in_its_tables_reports_all_three(tmp_path: Path) -> None:
    doc = base()
    doc["analysis"] = {"overlap": 1.5}
    doc["points"][0]["sensor_type"] = "peizo"
    doc["sources"][0]["qos"] = "1"
    exc = _problems(doc, tmp_path)
    assert sorted(path for path, _ in exc.problems) == ["analysis.overlap", "points[0].sensor_type",
                                                        "sources[0].qos"]
    text = str(exc)
    assert text.startswith("3 problems:\n") and len(text.splitlines()) == 4, text
    assert "analysis.overlap: 1.5 is out of range: must be <= 0.95" in text
    assert "points[0].sensor_type: 'peizo' is not one of" in text and "did you mean `piezo`?" in text
    assert "sources[0].qos: must be an integer, got string '1'" in text


def test_an_unknown_key_is_reported_with_the_other_problems_of_its_table(tmp_path: Path) -> None:
    doc = base()
    # the misspelling stands in for the required key: reported as the misspelling, not also as a missing key;
    # ISO 20816-3 sorts machines into groups 1 and 2, so group 3 is out of range beside it
    doc["machines"][0]["suport"] = doc["machines"][0].pop("support")
    doc["machines"][0]["group"] = 3
    doc["points"][0]["colour"] = "red"
    doc["points"][0]["block_samples"] = 0  # a block holds at least one sample
    doc["sources"][0]["password"] = "hunter2"
    doc["sources"][0]["keepalive_s"] = "30"
    exc = _problems(doc, tmp_path)
    assert [path for path, _ in exc.problems] == ["sources[0].password", "sources[0].keepalive_s",
                                                  "machines[0].suport", "machines[0].group",
                                                  "points[0].colour", "points[0].block_samples"], str(exc)
    problems = dict(exc.problems)
    assert problems["sources[0].password"].startswith("secrets are not accepted in the configuration file")
    assert problems["sources[0].keepalive_s"] == "must be a number, got string '30'"
    assert problems["machines[0].suport"] == "unknown key; did you mean `support`?"
    assert problems["machines[0].group"] == "3 is out of range: must be <= 2"
    assert problems["points[0].colour"].startswith("unknown key (known keys here: ")
    assert problems["points[0].block_samples"] == "0 is out of range: must be >= 1"
    assert str(exc).startswith("6 problems:\n")


def test_an_unknown_indicator_is_reported_with_the_other_limits_problems() -> None:
    doc = base()
    doc["points"][0]["limits"] = {"velocity_rms": {"alert": 2.8}, "crest_factor": {"alert": 5.0, "deadband": "x"},
                                  "kurtosis": {"alert": 5.0, "danegr": 8.0}}
    exc = error(doc)
    paths = [path for path, _ in exc.problems]
    assert paths == ["points[0].limits.velocity_rms", "points[0].limits.crest_factor.deadband",
                     "points[0].limits.kurtosis.danegr"], str(exc)
    assert "did you mean `velocity_rms_mm_s`?" in exc.problems[0][1]
    assert exc.problems[1][1] == "must be a number, got string 'x'"
    assert exc.problems[2][1] == "unknown key; did you mean `danger`?"


def test_duplicate_point_ids_are_reported_with_the_points_own_errors(tmp_path: Path) -> None:
    doc = base()
    first = doc["points"][0]
    doc["points"] += [copy.deepcopy(first),
                      {**copy.deepcopy(first), "id": "P-101-NDE-H", "sensor": "QL-P101-NDE-H", "machine": "P-10l"},
                      {**copy.deepcopy(first), "id": "P-101-NDE-V", "sensor": "QL-P101-NDE-V", "source": "brokr"}]
    exc = _problems(doc, tmp_path)
    assert exc.problems == (
        ("points[1].id", "duplicate point id 'P-101-DE-H' (also points[0])"),
        ("points[2].machine", "unknown machine 'P-10l' (configured: P-101); did you mean `P-101`?"),
        ("points[3].source", "unknown source 'brokr' (configured: broker); did you mean `broker`?"),
    )
    assert (exc.path, exc.problem) == exc.problems[0]  # the first problem, as a single error names it


def test_every_points_plan_and_limits_are_checked_before_reporting(tmp_path: Path) -> None:
    doc = base()
    first = doc["points"][0]
    doc["points"] += [{**copy.deepcopy(first), "id": "P-101-NDE-H", "sensor": "QL-P101-NDE-H"},
                      {**copy.deepcopy(first), "id": "P-101-NDE-V", "sensor": "QL-P101-NDE-V"}]
    # Nyquist = fs / 2 (Shannon–Nyquist sampling theorem): 12.8 kHz at fs_hz 25600
    doc["points"][0]["envelope_band_hz"] = [2000.0, 13000.0]
    doc["points"][1]["bearing"]["ball_diameter_mm"] = 40.0  # balls larger than the pitch circle: impossible
    doc["points"][2].pop("bearing")
    doc["points"][2]["limits"] = {"bearing_bpfo_detected": {"alert": True}}
    exc = _problems(doc, tmp_path)
    assert [path for path, _ in exc.problems] == ["points[0].envelope_band_hz", "points[1].bearing",
                                                  "points[2].limits.bearing_bpfo_detected"]
    assert "Nyquist 12800 Hz" in exc.problems[0][1] and "impossible bearing geometry" in exc.problems[1][1]


def test_check_config_prints_every_problem(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    import argparse

    from edgevib.daemon.service import run_check_config

    doc = base()
    doc["points"].append(copy.deepcopy(doc["points"][0]))
    doc["points"][0]["machine"] = "P-999"
    path = _written(doc, tmp_path)
    assert run_check_config(argparse.Namespace(file=path)) == 2
    err = capsys.readouterr().err.splitlines()
    assert err == [f"edgevib check-config: {path}: 2 problems:",
                   "  points[1].id: duplicate point id 'P-101-DE-H' (also points[0])",
                   "  points[0].machine: unknown machine 'P-999' (configured: P-101)"]

"""The /metrics text encoder (`encode_text`) against prometheus_client, the reference implementation of the text
exposition format 0.0.4: the same bytes as its `generate_latest`, and its own parser
(`prometheus_client.parser.text_string_to_metric_families`) reads back every indicator value of the frames."""

from __future__ import annotations

import math
import random
from dataclasses import replace

import pytest
from prometheus_client import CollectorRegistry, Metric
from prometheus_client.core import CounterMetricFamily, GaugeMetricFamily, InfoMetricFamily
from prometheus_client.exposition import generate_latest
from prometheus_client.parser import text_string_to_metric_families
from prometheus_client.utils import floatToGoString
from test_exposition_golden import GOLDEN, _results, _stats

from edgevib.daemon.sinks.prometheus import PROMETHEUS, PrometheusSink, encode_text, go_float

# label values with every character the format escapes (backslash, double quote, newline)
AWKWARD = ('yard "north"', "K\\7", "K\\7-DE\nH", "horizontal")


def _sink() -> tuple[PrometheusSink, CollectorRegistry]:
    registry = CollectorRegistry()
    sink = PrometheusSink(site="quarry-lane", points=[], stats=_stats(), registry=registry, serve=False)
    sink.collector.version = "0.0.0+golden"
    sink.latest.update({labels[2]: (labels, r) for labels, r in _results()})
    registry.register(sink.collector)
    return sink, registry


def _expected(sink: PrometheusSink) -> dict[tuple[str, tuple[tuple[str, str], ...]], float]:
    """{(metric name, sorted labels): value in SI units} of every available indicator of the sink's frames."""
    out: dict[tuple[str, tuple[tuple[str, str], ...]], float] = {}
    for labels, r in sink.latest.values():
        base = dict(zip(["site", "machine", "point", "axis"], labels, strict=True))
        for ind, si in PROMETHEUS:
            for key, v in ind.values(r).items():
                if v is not None and math.isfinite(v):
                    lab = {**base, **({ind.per: key} if ind.per and key else {})}
                    name = f"edgevib_{ind.prometheus}" + (f"_{si.suffix}" if si.suffix else "")
                    out[(name, tuple(sorted(lab.items())))] = v * si.factor
        out[("edgevib_last_frame_timestamp_seconds", tuple(sorted(base.items())))] = r.t_end_ns / 1e9
    return out


def _parsed(text: str) -> dict[tuple[str, tuple[tuple[str, str], ...]], float]:
    out = {}
    for fam in text_string_to_metric_families(text):
        for s in fam.samples:
            if fam.name.startswith("edgevib_") and (fam.type == "gauge" and fam.name not in (
                    "edgevib_machine_state", "edgevib_build_info", "edgevib_source_connected")):
                out[(s.name, tuple(sorted(s.labels.items())))] = s.value
    return out


def test_encoder_writes_the_stored_exposition() -> None:
    _, registry = _sink()
    assert encode_text(registry) == GOLDEN.read_bytes()
    assert encode_text(registry) == GOLDEN.read_bytes()  # again, from the per-point label cache


def test_parser_reads_back_every_value_of_the_frames() -> None:
    sink, registry = _sink()
    labels, r = _results()[0]
    sink.latest[AWKWARD[2]] = (AWKWARD, r)
    text = encode_text(registry)
    assert text == generate_latest(registry)
    expected = _expected(sink)
    assert len(expected) > 40
    assert _parsed(text.decode()) == expected
    # a new frame of a point: new values under the labels already prepared
    r2 = replace(r, t_end_ns=r.t_end_ns + 10**9, indicators=replace(r.indicators, velocity_rms_mm_s=7.125,
                                                                      kurtosis=11.5))
    sink.latest[labels[2]] = (labels, r2)
    text2 = encode_text(registry)
    assert text2 == generate_latest(registry)
    assert _parsed(text2.decode()) == _expected(sink)
    assert _parsed(text2.decode())[("edgevib_kurtosis", tuple(sorted(
        zip(["site", "machine", "point", "axis"], labels, strict=True))))] == 11.5


@pytest.mark.parametrize("seed", [1, 2])
def test_go_float_matches_prometheus_client(seed: int) -> None:
    rng = random.Random(seed)
    values = [0.0, -0.0, 1.0, -1.0, 1e6, 999999.9, 1234567.0, 1e21, 1.5e22, 1e-7, 2.5e-300, 123456789.125,
              math.inf, -math.inf, math.nan, 0.1 + 0.2, -1e6, -123456789.0, 5e-324, 1e-5, 1e16, 1.5e16,
              9999999999999998.0, 999999.9999999999, 1000000.0, -math.nan, 1.7649e9]
    values += [rng.uniform(-1, 1) * 10 ** rng.randint(-12, 15) for _ in range(500)]
    for v in values:
        assert go_float(v) == floatToGoString(v), v


class _Assorted:
    """Families of other collectors (the alarm layer's, the trend layer's): plain ones take the short path, the rest
    are left to prometheus_client."""

    def collect(self) -> list[Metric]:
        g = GaugeMetricFamily("edgevib_test_level", 'help with \\ backslash\nand "quotes"', labels=["point", "kind"])
        g.add_metric(list(AWKWARD[2:]), 0.1 + 0.2)
        g.add_metric(["K-8", 'a"b'], 12345678.0)
        g.add_metric(["K-9", "c"], -0.0)
        c = CounterMetricFamily("edgevib_test_events", "Events.", labels=["point"])
        c.add_metric(["K\\7"], 3)
        created = CounterMetricFamily("edgevib_test_created", "With a creation time.", labels=["p"])
        created.add_metric(["x"], 2, created=1_764_633_600.0)
        stamped = GaugeMetricFamily("edgevib_test_stamped", "With a timestamp.", labels=["p"])
        stamped.add_metric(["x"], 1.5, timestamp=1_764_633_600.25)
        bare = GaugeMetricFamily("edgevib_test_bare", "No labels.")
        bare.add_metric([], 7)
        empty = GaugeMetricFamily("edgevib_test_empty", "No samples.", labels=["p"])
        info = InfoMetricFamily("edgevib_test", "Info.", value={"a": "b"})
        return [g, c, created, stamped, bare, empty, info]


def test_other_families_are_written_as_prometheus_client_writes_them() -> None:
    _, registry = _sink()
    registry.register(_Assorted())
    for _ in range(2):  # the second time from the kept label strings
        text = encode_text(registry)
        assert text == generate_latest(registry)
    values = {(s.name, tuple(sorted(s.labels.items()))): s.value
              for fam in text_string_to_metric_families(text.decode()) for s in fam.samples}
    assert values[("edgevib_test_level", (("kind", AWKWARD[3]), ("point", AWKWARD[2])))] == 0.1 + 0.2
    assert values[("edgevib_test_events_total", (("point", "K\\7"),))] == 3.0

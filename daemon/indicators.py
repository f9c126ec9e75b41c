"""The indicator registry: every indicator edgevib publishes, declared once.

An :class:`Indicator` says what it is (name with its unit, unit, description), how it is read from a frame's
:class:`~edgevib.daemon.interfaces.FrameResult`, how it converts to SI base units, and where it is published:
the Prometheus exposition, the MQTT indicator document, the OPC UA namespace, the alarm limits (with the kind of
fault it points to), the offline ``analyze`` report, the demo table and the trend.  Every one of those is
generated from :data:`REGISTRY`, and so are README's reference tables (``python -m edgevib.daemon.indicators``
prints them; a test fails when README and the registry disagree).  Adding an indicator is one entry here plus
its computation (DEVELOPERS.md has a worked example).

An indicator is *scalar* (one value per frame) or *per order* / *per family* (one value per shaft order
``"0.5x"``, ``"1x"`` … or bearing defect family ``"ftf"``, ``"bpfo"``, ``"bpfi"``, ``"bsf"``); its names then
carry ``{key}``.  A value that is unavailable for a frame is ``None``: absent in Prometheus, ``null`` in JSON,
``BadNoData`` in OPC UA — never a made-up number.

Nothing from the numerical core is imported here at run time (the readers only read attributes), so the
configuration can check limit names without loading it.
"""

from __future__ import annotations

import math
import re
import sys
from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any, Literal

if TYPE_CHECKING:
    from edgevib.daemon.interfaces import FrameResult

__all__ = ["BAND_SOURCES", "FAMILIES", "INDICATORS", "LIMITABLE", "REGISTRY", "UNIT_RANGE", "Demo", "Indicator", "Si",
           "document", "meaning", "readme_blocks", "readme_tables", "update_readme"]

G_M_S2 = 9.80665  # standard gravity, exact (3rd CGPM 1901)
FAMILIES = ("ftf", "bpfo", "bpfi", "bsf")
"""Bearing defect families; ``bsf`` is searched and reported at 2 × BSF (a rolling-element defect hits both races)."""
ZONE_NUMBER = {"A": 1, "B": 2, "C": 3, "D": 4}

Value = float | None
Reader = Callable[["FrameResult"], Value]
EachReader = Callable[["FrameResult"], Mapping[str, Value]]


@dataclass(frozen=True, slots=True)
class Si:
    """The SI base unit an indicator is converted to for Prometheus: metric-name suffix, symbol, factor."""

    suffix: str
    symbol: str
    factor: float = 1.0


MM_S = Si("meters_per_second", "m/s", 1e-3)
G = Si("meters_per_second_squared", "m/s²", G_M_S2)
HZ = Si("hertz", "Hz")
DB = Si("decibels", "dB")
RATIO = Si("", "1")
UNIT_RANGE: dict[str, tuple[float, float]] = {  # display range per unit (common practice for machinery vibration)
    "mm/s": (0.0, 50.0), "g": (0.0, 50.0), "µm": (0.0, 500.0), "Hz": (0.0, 500.0), "dB": (0.0, 60.0), "1": (0.0, 100.0),
}
"""The display range of an indicator that names none (``Indicator.eu_range``), by its unit."""


@dataclass(frozen=True, slots=True)
class Demo:
    """A column of the demo table: heading, the key of its plain-text form, the cell text, and where it stands
    among the indicator columns (ascending)."""

    heading: str
    key: str
    text: Callable[[FrameResult], str]
    position: int = 0


@dataclass(frozen=True, slots=True)
class Indicator:
    """One indicator and where it is published (``None``: not there).

    ``name`` carries the unit (``velocity_rms_mm_s``); ``read`` gives the value of a scalar indicator,
    ``each`` the values of a per-order/per-family one (``per``), keyed ``"1x"`` / ``"bpfo"``.  Names of per
    indicators in the sinks contain ``{key}``; a dotted name (``envelope.{key}.snr_db``) nests in a JSON document.
    ``prometheus`` is the metric name without ``edgevib_`` and the unit suffix; ``mqtt_si`` a second JSON key
    carrying the value in SI units; ``fault`` the kind of fault an alarm limit on it points to (an indicator
    without one cannot carry a limit); ``demo`` gives it a column of the demo table (none by default);
    ``trend`` keeps its exponentially weighted trend.  ``eu_range`` is the display range (OPC UA ``EURange``,
    low, high): ``"unit"`` takes its unit's from :data:`UNIT_RANGE`, ``None`` has none (a discrete variable).
    """

    name: str
    unit: str
    description: str
    read: Reader | None = None
    each: EachReader | None = None
    per: Literal["order", "family", "band_source"] | None = None
    si: Si | None = None
    prometheus: str | None = None
    mqtt: str | None = None
    mqtt_si: str | None = None
    opcua: str | None = None
    report: str | None = None
    fault: str | None = None
    demo: Demo | None = None
    trend: bool = False
    boolean: bool = False  # a verdict: true/false in JSON documents, 1/0 in Prometheus
    eu_range: tuple[float, float] | Literal["unit"] | None = "unit"

    def display_range(self) -> tuple[float, float] | None:
        """The display range (low, high) of the indicator, in its unit; ``None`` for a discrete one."""
        if self.eu_range == "unit":
            return UNIT_RANGE.get(self.unit, (0.0, 100.0))
        return self.eu_range

    def reader(self) -> Reader:
        """How a scalar indicator's value is read from a frame (for callers reading it per frame: checked once)."""
        if self.read is None:
            raise TypeError(f"{self.name} is a per-{self.per} indicator: use values()")
        return self.read

    def value(self, r: FrameResult) -> Value:
        """The value of a scalar indicator for a frame."""
        return self.reader()(r)

    def values(self, r: FrameResult, keys: Iterable[str] = ()) -> dict[str, Value]:
        """``{key: value}`` of a frame (``{"": value}`` for a scalar); ``keys`` are always present (``None``)."""
        if self.each is not None:
            out = dict.fromkeys(keys, None)
            out.update(self.each(r))
            return out
        return {"": self.value(r)}

    def text(self, key: str = "") -> str:
        """The description of one key (``{key}`` filled in; the bsf family is named 2 × BSF)."""
        label = key if self.per != "family" else ("2 × BSF" if key == "bsf" else key.upper())
        return self.description.format(key=label)


# ------------------------------------------------------------------------------------------------ readers


def _orders(r: FrameResult) -> Mapping[str, Value]:
    return r.indicators.orders_mm_s


def _family(attr: str) -> EachReader:
    def read(r: FrameResult) -> Mapping[str, Value]:
        return {name: getattr(fam, attr) for name, fam in r.indicators.envelope.items()}
    return read


def _one_verdict(name: str) -> Reader:
    def read(r: FrameResult) -> Value:
        fam = r.indicators.envelope.get(name)
        return None if fam is None else float(fam.detected)
    return read


BAND_SOURCES = ("configured", "auto", "default")
"""Where a point's demodulation band comes from: its configuration, the automatic selection, or the default rule."""


def _band_edge(i: int) -> Reader:
    def read(r: FrameResult) -> Value:
        band = r.indicators.envelope_band_hz
        return None if band is None else band[i]
    return read


def _band_source(r: FrameResult) -> Mapping[str, Value]:
    if r.indicators.envelope_band_hz is None or r.envelope_band_source is None:
        return {}
    return {s: 1.0 if s == r.envelope_band_source else 0.0 for s in BAND_SOURCES}


def _order(key: str) -> Reader:
    return lambda r: r.indicators.orders_mm_s.get(key)


def _looseness(r: FrameResult) -> Value:
    vals = [v for k, v in r.indicators.orders_mm_s.items() if k not in ("1x", "2x") and v is not None
            and math.isfinite(v)]
    return max(vals) if vals else None


def _one_family(name: str, attr: str) -> Reader:
    def read(r: FrameResult) -> Value:
        fam = r.indicators.envelope.get(name)
        return None if fam is None else getattr(fam, attr)
    return read


def _speed_text(r: FrameResult) -> str:
    f = r.indicators.shaft_hz
    return f"{f * 60:.0f} rpm{'~' if r.indicators.shaft_estimated else ''}" if f else "unknown"


def _number_text(read: Reader, spec: str) -> Callable[[FrameResult], str]:
    def text(r: FrameResult) -> str:
        v = read(r)
        return "n/a" if v is None or not math.isfinite(v) else f"{v:{spec}}"
    return text


def _velocity(r: FrameResult) -> Value:
    return r.indicators.velocity_rms_mm_s


def _crest(r: FrameResult) -> Value:
    return r.indicators.crest_factor


def _kurtosis(r: FrameResult) -> Value:
    return r.indicators.kurtosis


# ------------------------------------------------------------------------------------------------ the registry


def _registry() -> tuple[Indicator, ...]:
    every = {"mqtt": "", "opcua": "", "report": ""}  # "": the indicator's own name

    def ind(name: str, unit: str, description: str, **kw: Any) -> Indicator:
        places = {k: (name if kw.get(k, every.get(k)) == "" else kw.get(k)) for k in ("mqtt", "opcua", "report")}
        return Indicator(name, unit, description, **{**kw, **places})

    limits = [
        ind("imbalance_1x_mm_s", "mm/s", "Velocity r.m.s. at 1× (imbalance)", read=_order("1x"), fault="imbalance",
            mqtt=None, opcua=None, report=None),
        ind("misalignment_2x_mm_s", "mm/s", "Velocity r.m.s. at 2× (misalignment)", read=_order("2x"),
            fault="misalignment", mqtt=None, opcua=None, report=None),
        ind("looseness_mm_s", "mm/s", "Largest order other than 1× and 2× (e.g. 0.5×, 3×): looseness",
            read=_looseness, fault="looseness", mqtt=None, opcua=None, report=None),
    ]
    for fam, what in (("bpfo", "outer race"), ("bpfi", "inner race"), ("bsf", "rolling element"), ("ftf", "cage")):
        label = "2 × BSF" if fam == "bsf" else fam.upper()
        limits += [
            ind(f"bearing_{fam}_g", "g", f"Envelope amplitude of the {label} family",
                read=_one_family(fam, "amplitude_g"), fault=f"bearing {what}", mqtt=None, opcua=None, report=None),
            ind(f"bearing_{fam}_snr_db", "dB", f"{label} family over the envelope floor",
                read=_one_family(fam, "snr_db"), fault=f"bearing {what}", mqtt=None, opcua=None, report=None),
            ind(f"bearing_{fam}_detected", "1", f"{label} family detected (1) or not (0): the envelope verdict at "
                "the point's false-alarm probability; a limit on it is a verdict limit (`alert = true`)",
                read=_one_verdict(fam), fault=f"bearing {what}", mqtt=None, opcua=None, report=None),
        ]
    return (
        ind("velocity_rms_mm_s", "mm/s", "Velocity r.m.s. in the point's velocity band (ISO 20816)", read=_velocity,
            si=MM_S, prometheus="velocity_rms", fault="overall", trend=True,
            demo=Demo("velocity mm/s", "velocity_mm_s", _number_text(_velocity, ".2f"), 1)),
        ind("velocity_peak_mm_s", "mm/s", "Velocity peak in that band", read=lambda r: r.indicators.velocity_peak_mm_s,
            si=MM_S, prometheus="velocity_peak", fault="overall"),
        ind("velocity_rms_trend_mm_s", "mm/s", "Exponentially weighted trend of velocity r.m.s. (half-life "
            "`trend_halflife_s`)", read=lambda r: r.trend.get("velocity_rms_mm_s"), si=MM_S,
            prometheus="velocity_rms_trend", report=None),
        ind("acceleration_rms_g", "g", "Acceleration r.m.s.", read=lambda r: r.indicators.acceleration_rms_g, si=G,
            prometheus="acceleration_rms", mqtt_si="acceleration_rms_m_s2", fault="overall"),
        ind("acceleration_peak_g", "g", "Acceleration peak (absolute)", read=lambda r: r.indicators.acceleration_peak_g,
            si=G, prometheus="acceleration_peak", mqtt_si="acceleration_peak_m_s2", fault="impacting"),
        ind("acceleration_peak_to_peak_g", "g", "Acceleration peak to peak",
            read=lambda r: r.indicators.acceleration_peak_to_peak_g, mqtt=None),
        ind("crest_factor", "1", "Acceleration crest factor (peak / r.m.s.)", read=_crest, si=RATIO,
            prometheus="crest_factor", fault="impacting", eu_range=(1.0, 20.0),
            demo=Demo("crest", "crest", _number_text(_crest, ".2f"), 3)),
        ind("kurtosis", "1", "Acceleration kurtosis (Pearson; 3 for Gaussian noise)", read=_kurtosis, si=RATIO,
            prometheus="kurtosis", fault="impacting", eu_range=(1.0, 40.0),
            demo=Demo("kurtosis", "kurtosis", _number_text(_kurtosis, ".2f"), 4)),
        ind("skewness", "1", "Acceleration skewness", read=lambda r: r.indicators.skewness, eu_range=(-5.0, 5.0)),
        ind("mean_g", "g", "Mean of the acceleration (removed before the other indicators)",
            read=lambda r: r.indicators.mean_g, mqtt=None, opcua=None),
        ind("displacement_pp_um", "µm", "Displacement peak to peak", read=lambda r: r.indicators.displacement_pp_um,
            fault="overall"),
        ind("shaft_hz", "Hz", "Shaft speed used for the frame (fixed, from a tag, or estimated)",
            read=lambda r: r.indicators.shaft_hz, si=HZ, prometheus="shaft_speed", mqtt="shaft_speed_hz",
            demo=Demo("speed", "speed", _speed_text, 0)),
        ind("iso_zone", "1", "ISO 20816-3 zone of velocity r.m.s. as a number, 1..4 = A..D (machines with `group` "
            "and `support`)", read=lambda r: ZONE_NUMBER.get(r.iso_zone or ""), si=RATIO, prometheus="iso_zone",
            mqtt=None, report=None, eu_range=None, demo=Demo("zone", "zone", lambda r: r.iso_zone or "-", 2)),
        ind("order_velocity_rms_mm_s", "mm/s", "Velocity r.m.s. at shaft order {key}", each=_orders, per="order",
            si=MM_S, prometheus="order_velocity_rms", mqtt="orders_velocity_rms_mm_s.{key}",
            opcua="order_{key}_velocity_rms_mm_s", report="orders.{key}"),
        ind("envelope_amplitude_g", "g", "Envelope-spectrum amplitude of the {key} family", each=_family("amplitude_g"),
            per="family", si=G, prometheus="envelope_amplitude", mqtt="envelope.{key}.amplitude_g",
            mqtt_si="envelope.{key}.amplitude_m_s2", opcua="envelope_{key}_amplitude_g",
            report="envelope.{key}.amplitude_g"),
        ind("envelope_snr_db", "dB", "Level of the {key} family over the envelope floor", each=_family("snr_db"),
            per="family", si=DB, prometheus="envelope_snr", mqtt="envelope.{key}.snr_db",
            opcua="envelope_{key}_snr_db", report="envelope.{key}.snr_db"),
        ind("envelope_detected", "1", "Envelope verdict of the {key} family: detected (1, true) when its line's "
            "statistic is over the false-alarm threshold with enough modulation depth and no other family explains "
            "it, else 0 (false)",
            each=_family("detected"), boolean=True, eu_range=None,
            per="family", si=RATIO, prometheus="envelope_detected", mqtt="envelope.{key}.detected",
            opcua="envelope_{key}_detected", report=None),
        ind("envelope_band_low_hz", "Hz", "Low edge of the demodulation band in use", read=_band_edge(0), si=HZ,
            prometheus="envelope_band_low", mqtt=None, opcua=None, report=None),
        ind("envelope_band_high_hz", "Hz", "High edge of the demodulation band in use", read=_band_edge(1), si=HZ,
            prometheus="envelope_band_high", mqtt=None, opcua=None, report=None),
        ind("envelope_band_source", "1", "Where the demodulation band comes from: 1 for the present source "
            "(configured, auto, default), 0 for the others", each=_band_source, per="band_source", si=RATIO,
            prometheus="envelope_band_source", mqtt=None, opcua=None, report=None),
        ind("envelope_frequency_hz", "Hz", "Where the {key} family's line was found", each=_family("frequency_hz"),
            per="family", mqtt="envelope.{key}.frequency_hz", opcua=None, report="envelope.{key}.frequency_hz"),
        ind("envelope_expected_hz", "Hz", "Where the {key} family is expected (geometry and speed)",
            each=_family("expected_hz"), per="family", mqtt="envelope.{key}.expected_hz", opcua=None,
            report="envelope.{key}.expected_hz"),
        ind("envelope_harmonics_found", "1", "Harmonics of the {key} family found (fundamental included)",
            each=_family("harmonics_found"), per="family", mqtt="envelope.{key}.harmonics_found", opcua=None,
            report="envelope.{key}.harmonics_found"),
        *limits,
    )


REGISTRY: tuple[Indicator, ...] = _registry()
INDICATORS: dict[str, Indicator] = {i.name: i for i in REGISTRY}
LIMITABLE: dict[str, Indicator] = {i.name: i for i in REGISTRY if i.fault is not None}
"""The indicators an alarm limit can watch (``[points.limits.NAME]``)."""


# ------------------------------------------------------------------------------------------------ documents


def _finite(v: Value) -> Value:
    return v if v is None or isinstance(v, int) else (float(v) if math.isfinite(v) else None)  # bools stay bools


def _put(doc: dict[str, Any], path: str, key: str, value: Value) -> None:
    """Set ``path`` (dotted, ``{key}`` filled in per level: a key may hold a dot, like ``"0.5x"``)."""
    *parents, leaf = (part.format(key=key) for part in path.split("."))
    for p in parents:
        doc = doc.setdefault(p, {})
    doc[leaf] = value


def document(r: FrameResult, place: Literal["mqtt", "report"], keys: Mapping[str, Iterable[str]] | None = None,
             ) -> dict[str, Any]:
    """The indicators of a frame as a JSON-ready document for ``place`` (non-finite values as ``None``).

    ``keys`` lists per-indicator keys that are always present (``{"order": ("0.5x", "1x", …)}``); an object
    that ends up empty (no envelope families) is ``None``."""
    doc: dict[str, Any] = {}
    for ind in REGISTRY:
        path = ind.mqtt if place == "mqtt" else ind.report
        if path is None:
            continue
        si_path = ind.mqtt_si if place == "mqtt" else None
        for key, v in ind.values(r, (keys or {}).get(ind.per or "", ())).items():
            v = _finite(v)
            _put(doc, path, key, v)
            if si_path is not None and ind.si is not None:
                _put(doc, si_path, key, None if v is None else v * ind.si.factor)
        if ind.per is not None:
            top = path.split(".")[0]
            if not doc.get(top):
                doc[top] = None
    return doc


# ------------------------------------------------------------------------------------------------ README


def _row(*cells: str) -> str:
    """A Markdown table row; a ``|`` inside a cell is escaped (GFM tables: an unescaped one starts a new cell)."""
    return "| " + " | ".join(c.replace("|", "\\|") for c in cells) + " |"


def _range_text(i: Indicator) -> str:
    r = i.display_range()
    return "" if r is None else "–".join(f"{v:g}".replace("-", "−") for v in r)


def _shown(i: Indicator, template: str) -> str:
    """A name template as README shows it (``order_<k>x_velocity_rms_mm_s``)."""
    return template.format(key={"order": "<k>x", "family": "<f>", "band_source": "<s>"}.get(i.per or "", ""))


def meaning(i: Indicator) -> str:
    """The description as one sentence, with ``k`` / ``f`` standing for the order or family (README, HELP)."""
    text = i.description.format(key={"order": "k", "family": "f", "band_source": "s"}.get(i.per or "", ""))
    return text if text.endswith(".") else text + "."


def readme_tables() -> dict[str, str]:
    """README's generated reference tables, by the name in their ``<!-- registry:NAME -->`` markers."""
    labels = {"order": "`order` (`0.5x`, `1x`, … from the point's `orders`)",
              "family": "`family` (`ftf`, `bpfo`, `bpfi`, `bsf` = 2 × BSF)",
              "band_source": "`band_source` (`configured`, `auto`, `default`)"}
    prom = [_row("Metric", "Unit", "Extra label", "Meaning"), _row("---", "---", "---", "---")]
    for i in REGISTRY:
        if i.prometheus is not None and i.si is not None:
            name = f"edgevib_{i.prometheus}" + (f"_{i.si.suffix}" if i.si.suffix else "")
            prom.append(_row(f"`{name}`", i.si.symbol, labels.get(i.per or "", ""), meaning(i)))
    prom.append(_row("`edgevib_last_frame_timestamp_seconds`", "s (Unix time)", "",
                     "End time of the latest analysed frame (measurement time)."))
    opcua = [_row("Variable", "Unit", "Display range", "Meaning"), _row("---", "---", "---", "---")]
    opcua += [_row(f"`{_shown(i, i.opcua)}`", i.unit, _range_text(i), meaning(i)) for i in REGISTRY
              if i.opcua is not None]
    mqtt = [_row("Field", "Type", "Unit", "Meaning"), _row("---", "---", "---", "---"), *DOCUMENT_FIELDS]
    for i in REGISTRY:
        if i.mqtt is not None:
            mqtt.append(_row(f"`{_shown(i, i.mqtt)}`", "bool or null" if i.boolean else "number or null",
                             "" if i.boolean else i.unit, meaning(i)))
            if i.mqtt_si is not None and i.si is not None:
                mqtt.append(_row(f"`{_shown(i, i.mqtt_si)}`", "number or null", i.si.symbol, "The same in SI units."))
    limits = [_row("Indicator", "Unit", "Fault kind (in events)", "Meaning"), _row("---", "---", "---", "---")]
    limits += [_row(f"`{i.name}`", i.unit, i.fault, meaning(i)) for i in REGISTRY if i.fault is not None]
    return {name: "\n".join(rows) for name, rows in
            (("prometheus", prom), ("mqtt", mqtt), ("opcua", opcua), ("limits", limits))}


DOCUMENT_FIELDS = [
    _row("`site`, `machine`, `point`, `axis`", "string", "", "Identity, as in the configuration."),
    _row("`time`", "string", "", "Frame end, RFC 3339 UTC with milliseconds and `Z` (`2026-12-01T22:32:04.123Z`)."),
    _row("`t_end_ns`", "integer", "ns since the Unix epoch", "Frame end, exact."),
    _row("`fs_hz`", "number", "Hz", "Sample rate."),
    _row("`frame_samples`", "integer", "samples", "Frame length."),
    _row("`shaft_speed_estimated`", "bool or null", "", "True when estimated from the spectrum; null when no speed."),
    _row("`iso_zone`", "string or null", "", "`\"A\"`..`\"D\"`; null without machine group/support."),
    _row("`envelope_band_hz`", "[number, number] or null", "Hz", "Demodulation band; null when the point has none."),
    _row("`envelope_band_source`", "string or null", "", "Where the band comes from: `\"configured\"` (the point's "
         "`envelope_band_hz`), `\"auto\"` (the latest automatic selection), `\"default\"` (the rule from the sample "
         "rate and sensor bandwidth; also while an automatic point has no selection yet)."),
    _row("`orders_velocity_rms_mm_s`", "object", "mm/s", "Every configured order key (`\"0.5x\"`, `\"1x\"`, …) → "
         "the value below, or null (all null while the speed is unknown)."),
    _row("`envelope`", "object or null", "", "Family (`ftf`, `bpfo`, `bpfi`, `bsf`) → the fields below; null "
         "without an envelope band or families."),
]
"""The MQTT document's fields that are not indicators (README table, first rows)."""


_BLOCK = re.compile(r"(<!-- registry:(\w+) [^>]*-->\n)(.*?)(\n<!-- end -->)", re.S)


def update_readme(text: str) -> str:
    """``text`` with every ``<!-- registry:NAME … -->`` block replaced by the table generated now."""
    tables = readme_tables()
    return _BLOCK.sub(lambda m: m.group(1) + tables[m.group(2)] + m.group(4), text)


def readme_blocks(text: str) -> dict[str, str]:
    """The generated blocks of a README as they stand, by name."""
    return {m.group(2): m.group(3) for m in _BLOCK.finditer(text)}


def _main(argv: list[str]) -> int:
    """``python -m edgevib.daemon.indicators [README.md]``: print the tables, or rewrite them in that file."""
    if argv:
        path = Path(argv[0])
        path.write_text(update_readme(path.read_text(encoding="utf-8")), encoding="utf-8")
        return 0
    for name, table in readme_tables().items():
        print(f"<!-- registry:{name} (generated: python -m edgevib.daemon.indicators README.md) -->\n{table}\n"
              "<!-- end -->\n")
    return 0


if __name__ == "__main__":  # pragma: no cover
    raise SystemExit(_main(sys.argv[1:]))

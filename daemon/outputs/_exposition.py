"""Our text exposition for the snapshot families: built once, rendered without per-sample checks.

prometheus_client renders each sample by re-validating and re-escaping every label name, sorting
the label dict and formatting through several helpers; at 20 stations × 40 satellites (≈4 200
samples) that is most of a scrape. Our families are known in advance — valid names, bounded label
sets — so :class:`Family` keeps label values as tuples and the writer turns each distinct label
tuple into its ``{…}`` text once (:class:`LabelCache`), reusing it while the station/satellite set
stays the same.

Formats (the Prometheus exposition format spec, text format 0.0.4, and OpenMetrics 1.0 text; the
reference rendering is prometheus_client's ``generate_latest`` in both, which the tests compare
with byte for byte):

* sample line: ``<name>{<label>="<value>",…} <value>\\n``, labels sorted by name, label values
  escaped ``\\`` → ``\\\\``, newline → ``\\n``, ``"`` → ``\\"``; counters' samples end in ``_total``;
* value: Go's float formatting as prometheus_client's ``floatToGoString`` does it — ``NaN``,
  ``+Inf``, ``-Inf``, Python's shortest repr, and exponent form from 1e6 up;
* 0.0.4 headers: ``# HELP``/``# TYPE`` name with ``_total`` for counters, HELP escapes ``\\`` and
  newline; OpenMetrics headers: the family name without ``_total``, HELP also escapes ``"``, and the
  whole exposition ends in ``# EOF``.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Final

from prometheus_client.core import Metric
from prometheus_client.samples import Sample

if TYPE_CHECKING:
    from collections.abc import Iterable

__all__ = ["Family", "LabelCache", "MetricWriter", "go_float", "render", "to_metric"]

#: Distinct label tuples kept per label-name set before the cache starts afresh (stations × the
#: RINEX satellite id space is well below this; alarms and queues are a few per station).
MAX_CACHED_LABELS: Final = 1 << 16
_INF: Final = math.inf
#: Names every escaping scheme leaves as they are (the spec's legacy character sets); a label name
#: may not start with "__" (reserved).
_METRIC_NAME = re.compile(r"[a-zA-Z_:][a-zA-Z0-9_:]*")
_LABEL_NAME = re.compile(r"(?!__)[a-zA-Z_][a-zA-Z0-9_]*")
#: prometheus_client's text 0.0.4 writer moves these samples of a family into a gauge family of
#: their own, written after it (in suffix order); OpenMetrics keeps them in the family.
_SPLIT_SUFFIXES: Final = ("_created", "_gcount", "_gsum")
#: OpenMetrics type → text 0.0.4 type, and the 0.0.4 family name suffix (prometheus_client).
_TYPES_004: Final = {
    "counter": ("counter", "_total"),
    "gauge": ("gauge", ""),
    "histogram": ("histogram", ""),
    "summary": ("summary", ""),
    "unknown": ("untyped", ""),
    "info": ("gauge", "_info"),
    "stateset": ("gauge", ""),
    "gaugehistogram": ("histogram", ""),
}


def go_float(v: float) -> str:
    """``v`` as the exposition writes it (prometheus_client ``utils.floatToGoString``)."""
    v = float(v)
    if v != v:  # noqa: PLR0124 - NaN is the only float unequal to itself
        return "NaN"
    if v == _INF:
        return "+Inf"
    if v == -_INF:
        return "-Inf"
    s = repr(v)
    dot = s.find(".")
    if v > 0 and dot > 6:  # Go switches to exponents sooner than Python (≥ 1e6 here)
        mantissa = f"{s[0]}.{s[1:dot]}{s[dot + 1 :]}".rstrip("0.")
        return f"{mantissa}e+{dot - 1:02d}"
    return s


def escape_label_value(v: str) -> str:
    """Backslash, newline and double quote escaped (exposition format spec, both formats)."""
    return v.replace("\\", r"\\").replace("\n", r"\n").replace('"', r"\"")


def _help_text(doc: str, *, openmetrics: bool) -> str:
    """A HELP line's text: escaped as a label value in OpenMetrics, backslash and newline only in
    text format 0.0.4 (exposition format spec)."""
    return escape_label_value(doc) if openmetrics else doc.replace("\\", r"\\").replace("\n", r"\n")


@dataclass(slots=True)
class Family:
    """One metric family: ``labels[i]`` (values in ``labelnames`` order) has value ``values[i]``.

    ``name`` is the family name without ``_total``; a counter's samples are named ``name_total``.
    Values are Python floats (ints would render as ``12345`` instead of ``12345.0``).
    """

    name: str
    doc: str
    type: str  # "gauge" or "counter"
    labelnames: tuple[str, ...]
    labels: list[tuple[str, ...]] = field(default_factory=list)
    values: list[float] = field(default_factory=list)

    @property
    def sample_name(self) -> str:
        return f"{self.name}_total" if self.type == "counter" else self.name

    def add(self, labels: tuple[str, ...], value: float) -> None:
        self.labels.append(labels)
        self.values.append(float(value))


def to_metric(fam: Family) -> Metric:
    """The family as prometheus_client's :class:`Metric`, samples built directly (no per-sample
    validation: names and label names are ours and fixed)."""
    m = Metric(fam.name, fam.doc, fam.type)
    name, keys = fam.sample_name, fam.labelnames
    m.samples = [
        Sample(name, dict(zip(keys, lv, strict=True)), v)
        for lv, v in zip(fam.labels, fam.values, strict=True)
    ]
    return m


class LabelCache:
    """``{name="value",…}`` text per label-name set and label tuple, built on first use.

    Safe to share between scrape threads: each operation is one dict lookup or store, and a
    concurrent rebuild of the same entry writes the same string.
    """

    def __init__(self) -> None:
        self._by_names: dict[tuple[str, ...], dict[tuple[str, ...], str]] = {}

    def texts(self, labelnames: tuple[str, ...], labels: list[tuple[str, ...]]) -> list[str]:
        """The label text of every tuple in ``labels`` (each tuple in ``labelnames`` order)."""
        if not labelnames:
            return [""] * len(labels)
        cache = self._by_names.get(labelnames)
        if cache is None or len(cache) > MAX_CACHED_LABELS:
            cache = self._by_names[labelnames] = {}
        get = cache.get
        out = [get(lv) for lv in labels]
        if None in out:
            order = sorted(range(len(labelnames)), key=labelnames.__getitem__)
            for i, (lv, text) in enumerate(zip(labels, out, strict=True)):
                if text is None:
                    parts = (f'{labelnames[k]}="{escape_label_value(lv[k])}"' for k in order)
                    out[i] = cache[lv] = "{" + ",".join(parts) + "}"
        return out  # type: ignore[return-value]  # every None was replaced above


def _values(values: list[float]) -> list[str]:
    # repr is the Go form for every finite value in (-1e6, 1e6); the rest take the full rule.
    return [repr(v) if -1e6 < v < 1e6 else go_float(v) for v in values]


def render(families: list[Family], cache: LabelCache, *, openmetrics: bool) -> str:
    """The exposition text of ``families`` (without OpenMetrics' closing ``# EOF``)."""
    out: list[str] = []
    for fam in families:
        doc = _help_text(fam.doc, openmetrics=openmetrics)
        head = fam.name if openmetrics else fam.sample_name
        out.append(f"# HELP {head} {doc}\n# TYPE {head} {fam.type}\n")
        name = fam.sample_name
        out.extend(
            f"{name}{lbl} {val}\n"
            for lbl, val in zip(
                cache.texts(fam.labelnames, fam.labels), _values(fam.values), strict=True
            )
        )
    return "".join(out)


class MetricWriter:
    """Exposition text for prometheus_client :class:`Metric` families (the registry's collectors
    other than ours), with the label text of each distinct label set built once.

    :meth:`render` returns None for anything it does not write exactly as prometheus_client would
    — sample timestamps, exemplars, native histograms, names outside the legacy character sets —
    and the caller then renders the whole exposition with prometheus_client.
    """

    def __init__(self) -> None:
        self._labels: dict[tuple[tuple[str, str], ...], str] = {}
        self._names: set[str] = set()  # metric and sample names seen valid

    def _name_ok(self, name: str) -> bool:
        if name in self._names:
            return True
        if not _METRIC_NAME.fullmatch(name) or len(self._names) > MAX_CACHED_LABELS:
            return False
        self._names.add(name)
        return True

    def _label_text(self, items: tuple[tuple[str, str], ...]) -> str | None:
        text = self._labels.get(items)
        if text is None:
            if not all(_LABEL_NAME.fullmatch(k) for k, _ in items):
                return None
            if len(self._labels) > MAX_CACHED_LABELS:
                self._labels = {}
            parts = (f'{k}="{escape_label_value(v)}"' for k, v in sorted(items))
            text = self._labels[items] = "{" + ",".join(parts) + "}"
        return text

    def render(self, metrics: Iterable[Metric], *, openmetrics: bool) -> str | None:
        """The text of ``metrics`` (without OpenMetrics' closing ``# EOF``), or None."""
        out: list[str] = []
        for metric in metrics:
            name = metric.name
            if metric.type not in _TYPES_004 or not self._name_ok(name):
                return None
            split: dict[str, list[str]] = {}
            doc = _help_text(metric.documentation, openmetrics=openmetrics)
            if openmetrics:
                out.append(f"# HELP {name} {doc}\n# TYPE {name} {metric.type}\n")
                if metric.unit:
                    out.append(f"# UNIT {name} {metric.unit}\n")
            else:
                typ, suffix = _TYPES_004[metric.type]
                out.append(f"# HELP {name}{suffix} {doc}\n# TYPE {name}{suffix} {typ}\n")
                split = {f"{name}{sfx}": [] for sfx in _SPLIT_SUFFIXES}
            for s in metric.samples:
                if s.timestamp is not None or s.exemplar is not None or s.native_histogram:
                    return None
                text = self._label_text(tuple(s.labels.items())) if s.labels else ""
                if text is None or not self._name_ok(s.name):
                    return None
                line = f"{s.name}{text} {go_float(s.value)}\n"
                lines = split.get(s.name)
                if lines is None:
                    out.append(line)
                else:
                    lines.append(line)
            for sample_name, lines in split.items():
                if lines:
                    out.append(f"# HELP {sample_name} {doc}\n# TYPE {sample_name} gauge\n")
                    out.extend(lines)
        return "".join(out)

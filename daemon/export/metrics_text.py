"""Fast text rendering of the per-series metrics, caching each series until it changes.

A scrape of 10,000 series re-renders only the series whose version changed
since the last scrape, plus the three clock-dependent samples of each series;
the rest is joined from cached bytes. The output is the Prometheus text
exposition format, sample for sample what prometheus-client would render from
``export.families`` (a test checks this).
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Iterator

import numpy as np
from prometheus_client.utils import floatToGoString
from sigmad.daemon.engine.snapshot import SeriesBlock, Snapshot
from sigmad.daemon.export.model import (
    METRICS,
    SERIES,
    Sample,
    _fmt_q,
    dynamic_samples,
    family_of,
    sample_name,
    static_samples,
)
from sigmad.estimators import normal_exceedance_rows


def _escape(value: str) -> str:
    return value.replace("\\", r"\\").replace("\n", r"\n").replace('"', r"\"")


def _lines(samples: Iterable[Sample]) -> dict[str, str]:
    """Text lines per family for some samples (labels sorted as prometheus-client does)."""
    out: dict[str, list[str]] = {}
    for family, labels, value in samples:
        if not math.isfinite(value):
            continue
        text = ",".join(f'{k}="{_escape(v)}"' for k, v in sorted(labels.items()))
        out.setdefault(family_of(family), []).append(
            f"{sample_name(family)}{{{text}}} {floatToGoString(value)}\n")
    return {family: "".join(lines) for family, lines in out.items()}


def _header(family: str) -> str:
    kind, doc = METRICS[family]
    name = sample_name(family)
    return f"# HELP {name} {doc}\n# TYPE {name} {kind}\n"


#: Family tuples shared by the series of one shape (bounded: few shapes exist)
_SHAPES: dict[tuple, tuple] = {}


def _cached(view: object, lines: dict[str, str]) -> tuple:
    """(view, its families in order, their texts in UTF-8): a tuple of bytes per series
    and one shared tuple of families rather than a map of one string per family
    (tracemalloc, 10,000 scalar series: 1,310 B a series before, see DEVELOPERS.md)."""
    families = tuple(lines)
    if len(_SHAPES) < 256:
        families = _SHAPES.setdefault(families, families)
    return view, families, tuple(text.encode() for text in lines.values())


class SeriesRenderer:
    """Renders the per-series part of /metrics. Safe to call from several threads:
    the cache is replaced whole at the end of each render. Series in columns (a
    ``SeriesTable``'s blocks) are rendered from their columns at every scrape and
    cached not at all: their text would cost more memory than their state."""

    def __init__(self) -> None:
        self._cache: dict = {}   # series key -> (view, families, texts) (see ``_cached``)

    def render(self, snap: Snapshot, now: float, tail: bytes = b"") -> bytes:
        """Exposition text of every series in ``snap`` as of ``now``, then ``tail`` (the
        rest of the page), as one bytes: ``b"".join(self.chunks(...))``."""
        return b"".join(self.chunks(snap, now, tail))

    def chunks(self, snap: Snapshot, now: float, tail: bytes = b"") -> Iterator[bytes]:
        """The text of ``render`` in pieces, a family at a time, for a response written
        as it is made: the whole page never exists at once (at 100,000 series it is
        about 100 MB, and the process would keep that high-water mark). Series kept as
        objects are re-rendered only when their view changed (the cache); series in
        columns are read out ``_CHUNK`` at a time, family by family.
        O(changed series * samples + series)."""
        old = self._cache
        cache = {}
        per_family: dict[str, list[bytes]] = {name: [] for name in SERIES}
        objects = getattr(snap.series, "objects", snap.series)   # a SeriesTable or a dict
        for key, v in objects.items():
            hit = old.get(key)
            if hit is None or hit[0] is not v:    # views are immutable: a new one = a change
                hit = _cached(v, _lines(static_samples(v)))
            cache[key] = hit
            for family, text in zip(hit[1], hit[2], strict=True):
                per_family[family].append(text)
            for family, lines in _lines(dynamic_samples(v, now)).items():
                per_family[family].append(lines.encode())
        self._cache = cache
        blocks = [_BlockText(b, now) for b in getattr(snap.series, "blocks", ()) if b.n]
        for family, texts in per_family.items():
            head = True
            if texts:
                yield _header(family).encode()
                head = False
                yield b"".join(texts)
            for bt in blocks:
                for text in bt.family(family):
                    if head:
                        yield _header(family).encode()
                        head = False
                    yield text
        yield tail


def _go(values: list[float]) -> list[str | None]:
    """``floatToGoString`` of finite values; None for the others (left out)."""
    return [(repr(v) if v < 1e6 else floatToGoString(v)) if -math.inf < v < math.inf
            else None for v in values]


class _Lines:
    """Line templates of one block's families: the sample name, its labels sorted by
    name as prometheus-client sorts them (the series' own label values as slots)."""

    def __init__(self, b: SeriesBlock) -> None:
        self.b = b
        self.names = b.label_names

    def template(self, family: str, extra: dict[str, str]) -> tuple[str, list[int]]:
        """(a %-template with one slot per series label and one for the value, the
        series' label positions in slot order)."""
        fixed = {"stream": self.b.stream, **extra}
        names = sorted([*fixed, *self.names])
        parts, order = [], []
        for name in names:
            if name in fixed:
                parts.append(f'{name}="{_escape(fixed[name])}"'.replace("%", "%%"))
            else:
                parts.append(f'{name}="%s"')
                order.append(self.names.index(name))
        return f"{sample_name(family)}{{{','.join(parts)}}} %s\n", order


class _BlockText:
    """The text of one block's series, one family at a time (``render``'s order: series
    order within a family, fields and quantiles in view order within a series), read
    out of the columns ``_CHUNK`` series at a time; no view is built."""

    def __init__(self, b: SeriesBlock, now: float) -> None:
        self.b, self.now = b, now
        lines = _Lines(b)
        fields = b.fields
        d = len(fields)
        self.pairs = [(i, j) for i in range(d) for j in range(i + 1, d)]
        specs: dict[str, list] = {}

        def add(family: str, extra: dict, column: str, index: int = 0) -> None:
            specs.setdefault(family_of(family), []).append(
                (lines.template(family, extra), column, index))

        add("sigmad_effective_samples", {}, "effective")
        add("sigmad_observations", {}, "observations")
        for family, column in (("sigmad_mean", "mean"), ("sigmad_stddev", "stddev"),
                               ("sigmad_variance", "variance")):
            for i, f in enumerate(fields):
                add(family, {"field": f}, column, i)
        for family, column in (("sigmad_covariance", "covariance"),
                               ("sigmad_correlation", "correlation")):
            for k, (i, j) in enumerate(self.pairs):
                add(family, {"field": fields[i], "field_b": fields[j]}, column, k)
        for k, (i, q) in enumerate(b.quantile_at):
            add("sigmad_quantile", {"field": fields[i], "q": _fmt_q(q)}, "quantile", k)
        for k, thr in enumerate(b.thresholds):
            add("sigmad_outliers", {"threshold": _fmt_q(thr)}, "outliers", k)
        for j, (i, bounds) in enumerate(b.threshold_at):
            f, k = fields[i], len(bounds)
            for c, bound in enumerate(bounds):
                add("sigmad_value_bucket", {"field": f, "le": floatToGoString(bound)},
                    f"cumulative{j}", c)
            add("sigmad_value_bucket", {"field": f, "le": "+Inf"}, f"cumulative{j}", k)
            add("sigmad_value_count", {"field": f}, f"cumulative{j}", k)
            add("sigmad_value_sum", {"field": f}, f"value_sum{j}")
            for c, bound in enumerate(bounds):
                above = {"field": f, "above": floatToGoString(bound)}
                add("sigmad_exceedance", above, f"model{j}", c)
                add("sigmad_exceedance_observed", above, f"observed{j}", c)
        add("sigmad_weight", {}, "weight")
        add("sigmad_weight_squared", {}, "weight_squared")
        add("sigmad_update_age_seconds", {}, "age")
        for i, f in enumerate(fields):
            add("sigmad_scatter", {"field": f}, "scatter", i)
        self.specs = specs
        self._labels: list | None = None

    def labels(self) -> list[tuple[str, ...]]:
        """Every series' escaped label values (computed once per render)."""
        if self._labels is None:
            self._labels = [tuple(_escape(v) for v in values)
                            for values in self.b.labels[:self.b.n]]
        return self._labels

    def column(self, name: str, rows: np.ndarray) -> np.ndarray:
        """One read-out of ``rows``, (rows, k)."""
        b, now = self.b, self.now
        m = b.moments.take(rows)
        corr = b.correction
        if name == "effective":
            return m.effective_samples()[:, None]
        if name == "observations":
            return b.observations[rows].astype(np.float64)[:, None]
        if name == "mean":
            return m.means()
        if name == "variance":
            return m.variances(corr)
        if name == "stddev":
            return m.stddevs(corr)
        if name == "outliers":
            return b.outliers[rows].astype(np.float64)
        if name == "age":
            return np.maximum(0.0, now - b.last_update[rows])[:, None]
        if name == "quantile":
            return m.quantiles(b.quantiles, corr).reshape(rows.shape[0], -1)
        stem = name.rstrip("0123456789")
        if stem != name:   # counts at thresholds: those of field-with-thresholds j
            j = int(name[len(stem):])
            lv = b.levels[j].take(rows)
            if stem == "cumulative":
                return lv.cumulative
            if stem == "value_sum":
                return lv.value_sum[:, None]
            if stem == "observed":
                return lv.observed_shares()
            i, bounds = b.threshold_at[j]
            return np.array(normal_exceedance_rows(bounds, m.means()[:, i].tolist(),
                                                   m.variances(corr)[:, i].tolist()),
                            dtype=np.float64).reshape(rows.shape[0], len(bounds))
        if name in ("covariance", "correlation"):
            iu, ju = np.triu_indices(m.dim, 1)
            with np.errstate(divide="ignore", invalid="ignore"):
                whole = m.covariances(corr) if name == "covariance" else m.correlations()
            return whole[:, iu, ju]
        # weight, weight_squared, scatter: aged to now, never backwards
        w, w2, scatter = m.sums_at(now)
        return {"weight": w[:, None], "weight_squared": w2[:, None], "scatter": scatter}[name]

    def family(self, family: str) -> Iterator[bytes]:
        """The text of one family for every series of the block, a chunk at a time."""
        parts = self.specs.get(family)
        if parts is None:
            return
        labels = self.labels()
        for rows in self.b.chunks():
            chunk = labels[rows[0]:rows[-1] + 1]
            columns: dict[str, np.ndarray] = {}
            texts = []
            for (tpl, order), name, index in parts:
                col = columns.get(name)
                if col is None:
                    col = columns[name] = self.column(name, rows)
                values = _go(col[:, index].tolist())
                if order == [0]:
                    texts.append([tpl % (lv[0], v) if v is not None else ""
                                  for lv, v in zip(chunk, values, strict=True)])
                else:
                    texts.append([tpl % (*(lv[j] for j in order), v) if v is not None
                                  else "" for lv, v in zip(chunk, values, strict=True)])
            joined = "".join(texts[0]) if len(texts) == 1 else \
                "".join(map("".join, zip(*texts, strict=True)))
            if joined:
                yield joined.encode()

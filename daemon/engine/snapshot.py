"""The immutable read model: what readers (HTTP, checkpoints, publishers) see.

The engine thread builds a new ``Snapshot`` after each flush and swaps it in by
reference; a reader holds whichever one it picked up, so it never sees a
half-applied update and never takes a lock.
"""

from __future__ import annotations

import heapq
import math
from collections.abc import Callable, Iterator, Mapping
from dataclasses import dataclass, field

import numpy as np
from sigmad.estimators import HalfLife, MomentsColumns, normal_exceedance_rows, sums_at


@dataclass(frozen=True, slots=True)
class MixtureView:
    warm: bool
    weights: tuple[float, ...]
    means: tuple[tuple[float, ...], ...]      # (K, d), in the stream's units
    stddevs: tuple[tuple[float, ...], ...]    # (K, d), in the stream's units
    average_loglik: float
    reseeds: int
    log: bool
    # in the fitted space (of log x when ``log``, else equal to means/stddevs): to draw densities
    log_means: tuple[tuple[float, ...], ...] = ()
    log_stddevs: tuple[tuple[float, ...], ...] = ()


@dataclass(frozen=True, slots=True)
class RegressionView:
    ok: bool
    terms: tuple[str, ...]                    # x field names, then "intercept" when fitted
    coefficients: tuple[float, ...]
    stderr: tuple[float, ...]
    residual_stddev: float
    residual_dof: float
    r_squared: float
    y: str = ""                               # the response field
    # the last row folded in: (first x, y), its residual against the fit of the rows
    # before it (the spread) and that residual over its prediction standard error
    latest: tuple[float, ...] = ()
    residual: float = math.nan
    residual_z: float = math.nan


@dataclass(frozen=True, slots=True)
class LevelsView:
    """A series' counts at its stream's thresholds, per field that has them."""

    at: tuple[tuple[int, tuple[float, ...]], ...]   # (field index, bounds), per stream
    buckets: tuple[tuple[float, ...], ...]    # undecayed weighted counts at each bound, total
    value_sums: tuple[float, ...]             # undecayed weighted sums of the values
    exceedance: tuple[tuple[float, ...], ...]           # the model's decayed share above
    exceedance_observed: tuple[tuple[float, ...], ...]  # the data's decayed share above


@dataclass(frozen=True, slots=True)
class SeriesView:
    stream: str
    labels: tuple[tuple[str, str], ...]       # template labels, in template order
    fields: tuple[str, ...]
    version: int                              # bumps on every update of the series
    observations: int
    last_update: float                        # wall-clock seconds of the last accepted row
    clock: float | None                       # the estimators' event-time clock
    half_life: HalfLife | None
    weight_sum: float                         # as of ``clock``; see ``weights_at``
    weight_sq_sum: float
    effective_samples: float
    mean: tuple[float, ...]
    variance: tuple[float, ...]
    covariance: tuple[tuple[int, int, float], ...]   # i < j
    correlation: tuple[tuple[int, int, float], ...]  # i < j
    # compact forms, so that an idle series costs little memory: the (field, q) and
    # threshold tuples are the stream's own, shared by all its series
    quantile_at: tuple[tuple[int, float], ...]       # (field index, q), per stream
    quantile_values: tuple[float, ...]               # the values, in that order
    thresholds: tuple[float, ...]                    # outlier thresholds, per stream
    outlier_counts: tuple[int, ...]                  # counts, in that order
    mixture: MixtureView | None = None
    regression: RegressionView | None = None
    scatter: tuple[float, ...] = ()           # centred Σw(x-μ)² per field, as of ``clock``
    levels: LevelsView | None = None          # with ``thresholds``: one slot (idle memory)
    volatility: tuple[tuple[str, float], ...] = ()   # (return field, per volatility_unit)

    @property
    def key(self) -> tuple[str, tuple[tuple[str, str], ...]]:
        return self.stream, self.labels

    @property
    def stddev(self) -> tuple[float, ...]:
        return tuple(math.sqrt(v) if v >= 0.0 else math.nan for v in self.variance)

    @property
    def quantiles(self) -> tuple[tuple[int, float, float], ...]:
        """(field index, q, value) triples."""
        return tuple((i, q, x) for (i, q), x in zip(self.quantile_at, self.quantile_values,
                                                     strict=True))

    @property
    def outliers(self) -> tuple[tuple[float, int], ...]:
        """(threshold, count) pairs."""
        return tuple(zip(self.thresholds, self.outlier_counts, strict=True))

    @property
    def threshold_at(self) -> tuple:
        return () if self.levels is None else self.levels.at

    @property
    def buckets(self) -> tuple:
        return () if self.levels is None else self.levels.buckets

    @property
    def value_sums(self) -> tuple:
        return () if self.levels is None else self.levels.value_sums

    @property
    def exceedance(self) -> tuple:
        return () if self.levels is None else self.levels.exceedance

    @property
    def exceedance_observed(self) -> tuple:
        return () if self.levels is None else self.levels.exceedance_observed

    def weights_at(self, t: float) -> tuple[float, float]:
        """(W, W2) aged to event time t, never backwards. The mean, the variances and
        the effective sample size do not change under pure decay."""
        w, w2, _ = sums_at(self.half_life, self.clock, t, self.weight_sum, self.weight_sq_sum)
        return w, w2

    def scatter_at(self, t: float) -> tuple[float, ...]:
        """The per-field centred scatter aged to event time t (it decays like W)."""
        return sums_at(self.half_life, self.clock, t, 0.0, 0.0, self.scatter)[2]


@dataclass(frozen=True, slots=True)
class Health:
    """The daemon's own counters, copied at snapshot time."""

    messages: tuple[tuple[str, int], ...] = ()          # per source endpoint
    rejected: tuple[tuple[str, int], ...] = ()          # per reason
    sequence_gaps: tuple[tuple[str, int], ...] = ()     # per producer
    flushes: int = 0


@dataclass(frozen=True, slots=True)
class Snapshot:
    taken_at: float                                     # wall-clock seconds
    # key -> SeriesView (never mutated): a SeriesTable, or a plain dict
    series: Mapping = field(default_factory=dict)
    series_per_stream: tuple[tuple[str, int], ...] = ()
    health: Health = field(default_factory=Health)
    # per stream with sessions: (stream, boundary unix seconds, read-outs at the close)
    closed: tuple[tuple[str, float, tuple[SeriesView, ...]], ...] = ()


def _positional_maker(cls: type) -> Callable[..., object]:
    """A constructor of the frozen, slotted dataclass ``cls`` that takes every field
    positionally and sets the slots through their descriptors: about half the time of
    the generated ``__init__`` (which calls ``object.__setattr__`` per field), paid at
    every flush of every series. The same object: equal to ``cls(*args)``."""
    names = cls.__slots__
    args = ", ".join(f"a{i}" for i in range(len(names)))
    body = "".join(f"    s{i}(o, a{i})\n" for i in range(len(names)))
    scope = {"new": object.__new__, "cls": cls,
             **{f"s{i}": getattr(cls, n).__set__ for i, n in enumerate(names)}}
    exec(f"def make({args}):\n    o = new(cls)\n{body}    return o\n", scope)  # noqa: S102
    return scope["make"]


#: ``SeriesView(*every_field)``, faster (see ``_positional_maker``): all 24 fields, in order
series_view = _positional_maker(SeriesView)


#: rows read out together when a block's views are iterated (bounds the transient lists)
_CHUNK = 4096

Key = tuple[str, tuple[tuple[str, str], ...]]


@dataclass(frozen=True, slots=True, eq=False)
class SeriesBlock:
    """The series of one plain stream (moments and outlier counts only) as of one flush,
    in columns: row i is a series. Views are built when read, not kept.

    ``labels`` and ``index`` are the live store's, shared: the store only appends to
    them (it replaces them when series leave), so rows ``>= n`` are not this block's.
    Every array is a private copy of ``n`` rows.
    """

    stream: str
    label_names: tuple[str, ...]
    fields: tuple[str, ...]
    half_life: HalfLife | None
    correction: str
    quantiles: tuple[float, ...]                 # the stream's q's
    quantile_at: tuple[tuple[int, float], ...]   # (field index, q), as SeriesView's
    thresholds: tuple[float, ...]                # outlier thresholds
    labels: list                                 # label values per row (shared)
    index: dict                                  # label values -> row (shared)
    n: int
    moments: MomentsColumns
    observations: np.ndarray                     # (n,) int64
    version: np.ndarray                          # (n,) int64
    last_update: np.ndarray                      # (n,) float64
    outliers: np.ndarray                         # (n, thresholds) int64
    # (field index, bounds) per field with thresholds, and their counts (n rows each)
    threshold_at: tuple[tuple[int, tuple[float, ...]], ...] = ()
    levels: tuple = ()                           # ThresholdColumns, one per threshold_at

    def row(self, values: tuple[str, ...]) -> int | None:
        i = self.index.get(values)
        return i if i is not None and i < self.n else None

    def key(self, i: int) -> Key:
        return self.stream, tuple(zip(self.label_names, self.labels[i], strict=True))

    def keys(self) -> Iterator[Key]:
        name, names = self.stream, self.label_names
        for values in self.labels[:self.n]:
            yield name, tuple(zip(names, values, strict=True))

    def view(self, i: int) -> SeriesView:
        return self.views(np.array([i]))[0]

    def views(self, rows: np.ndarray | None = None) -> list[SeriesView]:
        """The read-outs of ``rows`` (all: None), equal bit for bit to what ``view_of``
        gives for the same states. O(rows (d**2 + quantiles))."""
        if rows is None:
            rows = np.arange(self.n)
        m = self.moments.take(rows)
        k, d, corr = rows.shape[0], m.dim, self.correction
        means, variances = m.means().tolist(), m.variances(corr).tolist()
        scatters, effective = m.scatters().tolist(), m.effective_samples().tolist()
        w, w2 = (a.tolist() for a in m.weight_sums())
        quantiles = m.quantiles(self.quantiles, corr).reshape(k, -1).tolist() \
            if self.quantiles else [()] * k
        covariance = correlation = [()] * k
        if d > 1:
            iu, ju = np.triu_indices(d, 1)
            pairs = list(zip(iu.tolist(), ju.tolist(), strict=True))
            with np.errstate(divide="ignore", invalid="ignore"):
                cov, cor = m.covariances(corr)[:, iu, ju], m.correlations()[:, iu, ju]
            covariance = [tuple((i, j, v) for (i, j), v in zip(pairs, row, strict=True))
                          for row in cov.tolist()]
            correlation = [tuple((i, j, v) for (i, j), v in zip(pairs, row, strict=True))
                           for row in cor.tolist()]
        clocks = [c if h else None for c, h in zip(m.clock.tolist(), m.has_clock.tolist(),
                                                   strict=True)]
        name, fields, half_life = self.stream, self.fields, self.half_life
        quantile_at, thresholds, names = self.quantile_at, self.thresholds, self.label_names
        labels = self.labels
        outliers = self.outliers[rows].tolist()
        levels = self._levels(rows, means, variances) if self.levels else [None] * k
        return [series_view(
            name, tuple(zip(names, labels[i], strict=True)), fields, version, obs, last,
            clocks[k], half_life, w[k], w2[k], effective[k], tuple(means[k]),
            tuple(variances[k]), covariance[k], correlation[k], quantile_at,
            tuple(quantiles[k]), thresholds, tuple(outliers[k]), None, None,
            tuple(scatters[k]), levels[k], ())
            for k, (i, version, obs, last) in enumerate(zip(
                rows.tolist(), self.version[rows].tolist(), self.observations[rows].tolist(),
                self.last_update[rows].tolist(), strict=True))]

    def _levels(self, rows: np.ndarray, means: list, variances: list) -> list[LevelsView]:
        """The ``LevelsView`` of each of ``rows`` (``engine._levels`` for column series:
        the normal model of the moments, no mixture), bit for bit. O(rows fields k)."""
        at = self.threshold_at
        per_field = []
        for (i, bounds), lv in zip(at, self.levels, strict=True):
            part = lv.take(rows)
            per_field.append((
                [tuple(r) for r in part.cumulative.tolist()], part.value_sum.tolist(),
                normal_exceedance_rows(bounds, [m[i] for m in means],
                                       [v[i] for v in variances]),
                [tuple(r) for r in part.observed_shares().tolist()]))
        return [LevelsView(at, tuple(f[0][k] for f in per_field),
                           tuple(f[1][k] for f in per_field),
                           tuple(f[2][k] for f in per_field),
                           tuple(f[3][k] for f in per_field))
                for k in range(rows.shape[0])]

    def chunks(self) -> Iterator[np.ndarray]:
        """Row numbers in chunks of at most _CHUNK (bounded transient read-outs)."""
        for i in range(0, self.n, _CHUNK):
            yield np.arange(i, min(self.n, i + _CHUNK))


def _last_update(item) -> float:
    return item[1].last_update


class SeriesTable(Mapping):
    """The read-outs of every series: key -> SeriesView, read-only.

    ``objects`` holds the views of series kept as objects (built at their flush);
    ``blocks`` the plain streams in columns, whose views are built when read (an idle
    series costs its columns, not a view). Iterating reads out a block ``_CHUNK``
    rows at a time.
    """

    __slots__ = ("objects", "blocks", "_by_stream")

    def __init__(self, objects: dict | None = None, blocks: tuple[SeriesBlock, ...] = ()):
        self.objects = {} if objects is None else objects
        self.blocks = blocks
        self._by_stream = {b.stream: b for b in blocks}

    def _find(self, key) -> tuple[SeriesBlock, int] | None:
        try:
            b = self._by_stream.get(key[0])
            if b is None or tuple(k for k, _ in key[1]) != b.label_names:
                return None
            i = b.row(tuple(v for _, v in key[1]))
        except (TypeError, ValueError, IndexError):
            return None
        return None if i is None else (b, i)

    def __getitem__(self, key) -> SeriesView:
        v = self.objects.get(key)
        if v is not None:
            return v
        found = self._find(key)
        if found is None:
            raise KeyError(key)
        return found[0].view(found[1])

    def __contains__(self, key) -> bool:
        return key in self.objects or self._find(key) is not None

    def __iter__(self) -> Iterator[Key]:
        yield from self.objects
        for b in self.blocks:
            yield from b.keys()

    def __len__(self) -> int:
        return len(self.objects) + sum(b.n for b in self.blocks)

    def items(self) -> Iterator[tuple[Key, SeriesView]]:   # type: ignore[override]
        yield from self.objects.items()
        for b in self.blocks:
            for rows in b.chunks():
                for v in b.views(rows):
                    yield v.key, v

    def values(self) -> Iterator[SeriesView]:   # type: ignore[override]
        yield from self.objects.values()
        for b in self.blocks:
            for rows in b.chunks():
                yield from b.views(rows)

    def observations(self) -> int:
        """Observations accepted by every series, summed (a block's from its column:
        no view built). O(series)."""
        return sum(v.observations for v in self.objects.values()) + \
            sum(int(b.observations.sum()) for b in self.blocks)

    def latest(self, n: int) -> list[tuple[Key, SeriesView]]:
        """The ``n`` most recently updated series, most recent first. O(series + n log n)."""
        best = heapq.nlargest(n, self.objects.items(), key=_last_update)
        for b in self.blocks:
            rows = np.argpartition(-b.last_update, n - 1)[:n] if b.n > n else np.arange(b.n)
            best.extend((v.key, v) for v in b.views(rows))
        return heapq.nlargest(n, best, key=_last_update)

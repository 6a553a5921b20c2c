"""The immutable read model: what readers (HTTP, checkpoints, publishers) see.

The engine thread builds a new ``Snapshot`` after each flush and swaps it in by
reference; a reader holds whichever one it picked up, so it never sees a
half-applied update and never takes a lock.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass, field

from sigmad.estimators import HalfLife, sums_at


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
    series: dict = field(default_factory=dict)          # key -> SeriesView (never mutated)
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

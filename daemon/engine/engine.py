"""The engine: routes decoded messages to series and folds micro-batches into estimators.

One thread owns an Engine and everything in it; nothing else mutates estimator
state, so the hot path takes no locks. Readers get immutable ``Snapshot``s.
"""

from __future__ import annotations

import logging
import math
from collections import Counter
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from itertools import compress

import numpy as np
from sigmad.daemon.config.schema import Config, StreamConfig
from sigmad.daemon.engine.snapshot import (
    Health,
    LevelsView,
    MixtureView,
    RegressionView,
    SeriesTable,
    SeriesView,
    Snapshot,
    series_view,
)
from sigmad.daemon.engine.store import ColumnStore
from sigmad.daemon.ingest.layouts import Layout, LayoutTable, Readout, learn, runs
from sigmad.daemon.ingest.topics import series_text
from sigmad.daemon.ingest.wire import Reader, Single, WireError
from sigmad.estimators import (
    IncompatibleError,
    Legs,
    Mixture,
    Moments,
    Regression,
    Returns,
    ThresholdColumns,
    Thresholds,
    Volatility,
    limit_batch,
    mixture_exceedance,
    nominal_rate,
    normal_exceedance,
    outlier_counts,
    screen_batch,
)

log = logging.getLogger("sigmad.engine")

# The topic -> route cache keeps the routes of recently seen topics within this many
# bytes (topics are at most max_topic_bytes long; an entry is counted as twice its
# topic's length, the topic and its label strings, plus _ROUTE_ENTRY_BYTES of dict
# slot and tuples).
ROUTE_CACHE_BYTES = 64 << 20
_ROUTE_ENTRY_BYTES = 200
# (topic, length) pairs whose body taught no layout, remembered up to this many
_NOT_LEARNT_LIMIT = 16_384
_UNSEEN = object()
_MAX_PRODUCERS = 100_000            # sequence numbers tracked for at most this many sources
_NO_ROW = np.iinfo(np.int64).min    # a message refused: its stream's max_series is reached
# Byte layouts (ingest_many): drains shorter than LAYOUT_MIN_MESSAGES are decoded
# message by message, and so is a drain that misfits cut into more than MAX_RUNS
# blocks. A drain of n messages learns at most max(LEARN_PER_DRAIN, n // 8) layouts
# (one costs about what 20 messages do decoded one by one), and a (topic, length)
# whose body taught none is not tried again for RETRY_AFTER drains.
LAYOUT_MIN_MESSAGES = 16
# Bodies longer than this teach no layout (a plain single observation is far shorter;
# the table keeps two copies of each body it learns from).
LAYOUT_MAX_BYTES = 1024
MAX_RUNS = 16
LEARN_PER_DRAIN = 64
RETRY_AFTER = 64
# shapes (layouts) remembered per stream and body length, to give to new topics
_SHAPES_PER_LENGTH = 4
_SHAPES_LIMIT = 4096


def _floats(a) -> tuple[float, ...]:
    return tuple(np.asarray(a, dtype=np.float64).ravel().tolist())


def _route_name(route: tuple) -> str:
    """How a (stream, labels) route, and so its series, is named in the rejection log."""
    st, labels = route
    return series_text(st.name, st.cfg.topic.labels, labels)


def _single(st: StreamState, body: bytes) -> bool:
    """Whether the stream's reader takes ``body`` for one plain observation: the only
    bodies a byte layout is learnt from."""
    try:
        return type(st.read(body)) is Single
    except WireError:
        return False


def _same_shape(known: list, body: bytes) -> Layout | None:
    """The first of ``known`` (fixed bytes, mask, layout) that ``body`` fits. O(len(body))."""
    value = int.from_bytes(body, "big")
    for fixed, mask, layout in known:
        if not (value ^ fixed) & mask:
            return layout
    return None


def _where(series: Series) -> str:
    return _route_name((series.stream, series.labels))


def _concat(chunks: list, time_based: bool):
    """Join queued chunks into one batch; rows without an event time get their arrival
    time when any row has one or the stream forgets by time."""
    if len(chunks) == 1:
        x, w, t, arrival = chunks[0]
        if t is None and time_based:
            t = np.full(x.shape[0], arrival)
        return x, w, t
    x = np.concatenate([c[0] for c in chunks])
    w = None
    if any(c[1] is not None for c in chunks):
        w = np.concatenate([np.ones(len(c[0])) if c[1] is None else c[1] for c in chunks])
    t = None
    if time_based or any(c[2] is not None for c in chunks):
        t = np.concatenate([np.full(len(c[0]), c[3]) if c[2] is None else c[2]
                            for c in chunks])
    return x, w, t


class Aux:
    """What a series keeps beside its estimators, when its stream asks for it."""

    __slots__ = ("returns", "volatility", "legs", "spread")

    def __init__(self) -> None:
        self.returns: Returns | None = None       # the stream's transform: previous row
        self.volatility: Volatility | None = None  # of the return fields
        self.legs: Legs | None = None             # a joined stream's latest value per leg
        self.spread: tuple = ()                   # the last row's (x0, y, residual, z)


def _put(s: Series, name: str, value: object) -> None:
    """Set one of a series' ``Aux`` states, making its Aux only for a real value."""
    if s.aux is None:
        if value is None or value == ():
            return
        s.aux = Aux()
    setattr(s.aux, name, value)


@dataclass(slots=True)
class Series:
    """One live series: its estimators, counters and the rows waiting for a flush."""

    stream: StreamState
    labels: tuple[str, ...]
    moments: Moments
    regression: Regression | None
    mixture: Mixture | None
    outliers: list[int]
    observations: int = 0
    version: int = 0
    last_update: float = 0.0
    key: tuple = ()                               # (stream, ((label, value), ...)), shared
    pending: list | tuple = ()                    # (values, weights|None, times|None, arrival)
    rows: list | tuple = ()                       # single observations waiting: floats (d = 1)
    #                                               or tuples of d, all from one arrival
    extras: list | tuple = ()                     # (row index, weight|None, time|None)
    thresholds: list | tuple = ()                 # Thresholds per field of st.threshold_at
    # () until needed: an idle series should cost as little memory as it can
    aux: Aux | None = None                        # transform, volatility, legs, spread

    # one slot for what only some streams keep: a plain series pays 8 bytes, not 32
    returns = property(lambda s: s.aux and s.aux.returns, lambda s, v: _put(s, "returns", v))
    volatility = property(lambda s: s.aux and s.aux.volatility,
                          lambda s, v: _put(s, "volatility", v))
    legs = property(lambda s: s.aux and s.aux.legs, lambda s, v: _put(s, "legs", v))
    spread = property(lambda s: s.aux.spread if s.aux else (),
                      lambda s, v: _put(s, "spread", v))

    def queue(self, chunk: tuple) -> None:
        if self.pending:
            self.pending.append(chunk)
        else:
            self.pending = [chunk]

    def seal_rows(self, arrival: float) -> None:
        """Turn the waiting single observations into one pending chunk; rows without an
        event time take ``arrival``. O(rows)."""
        if not self.rows:
            return
        x = np.array(self.rows, dtype=np.float64).reshape(len(self.rows), -1)
        w = t = None
        if self.extras:
            idx, ws, ts = zip(*self.extras, strict=True)
            if any(v is not None for v in ws):
                w = np.ones(x.shape[0])
                w[list(idx)] = [1.0 if v is None else v for v in ws]
            if any(v is not None for v in ts):
                t = np.full(x.shape[0], arrival)
                t[list(idx)] = [arrival if v is None else v for v in ts]
        self.queue((x, w, t, arrival))
        self.rows, self.extras = (), ()


@dataclass(slots=True)
class LegSeries(Series):
    """One label set of one leg: its rows go to the joined stream's series."""

    leg: LegState | None = None

    def queue(self, chunk: tuple) -> None:
        self.leg.forward(self.labels, chunk)


class LegState:
    """One leg of a stream whose fields come from several topics: routed and decoded as a
    stream of the leg's one field; its rows are queued, tagged with the leg, on the joined
    stream's series of the same labels (created there, up to its max_series)."""

    def __init__(self, joined: StreamState, index: int, field: str, topic, engine,
                 read: Callable) -> None:
        self.joined, self.index, self.engine = joined, index, engine
        self.read = read
        self.cfg = joined.cfg
        self.name = joined.name
        self.topic = topic
        self.fields = (field,)
        self.dim = 1
        self.series: dict[tuple[str, ...], LegSeries] = {}
        self.store = None   # a leg's rows go to the joined stream's series, never columns

    def new_series(self, labels: tuple[str, ...]) -> LegSeries:
        return LegSeries(self, labels, None, None, None, [], leg=self)

    def forward(self, labels: tuple[str, ...], chunk: tuple) -> None:
        st, engine = self.joined, self.engine
        series = st.series.get(labels)
        if series is None:
            if len(st.series) >= st.cfg.max_series:
                engine.reject("series_limit", chunk[0].shape[0],
                              topic=_route_name((st, labels)), now=chunk[3])
                return
            series = st.series[labels] = st.new_series(labels)
        series.queue((*chunk, self.index))
        engine._dirty[id(series)] = series


class StreamState:
    """A configured stream and its live series; ``read`` turns one of its message
    bodies into rows (``Reader.read``; None where the stream takes no messages)."""

    def __init__(self, cfg: StreamConfig, read: Callable | None = None) -> None:
        self.cfg = cfg
        self.read = read
        self.name = cfg.name
        self.topic = None if cfg.legs else cfg.topic   # None: routed through its legs
        self.next_reset: float | None = None           # the next session boundary
        self.fields = tuple(cfg.fields)
        self.dim = len(self.fields)
        self.series: dict[tuple[str, ...], Series] = {}
        self.kinds = _kinds(cfg)
        self.field_list = list(cfg.fields)
        self.quantile_at = tuple((i, q) for q in cfg.quantiles for i in range(len(cfg.fields)))
        # a transform orders rows by event time: every row needs one
        self.time_based = cfg.half_life is not None and not cfg.half_life.by_count \
            or cfg.transform is not None
        self.return_cols = [i for i, k in enumerate(cfg.transforms) if k]
        self.volatility_fields = tuple(self.fields[i] for i in self.return_cols) \
            if cfg.volatility_unit is not None else ()
        reg = cfg.regression
        self.reg_x = None if reg is None else [self.fields.index(f) for f in reg.x]
        self.reg_y = None if reg is None else self.fields.index(reg.y)
        self.reg_xy = None if reg is None else self.reg_x + [self.reg_y]   # [X | y] columns
        self.log_mixture = cfg.mixture is not None and cfg.mixture.log
        # (field index, bounds) of each field with thresholds
        self.threshold_at = tuple((i, b) for i, b in enumerate(cfg.thresholds) if b)
        self.outlier_rates = tuple(nominal_rate(k) for k in cfg.outlier_sigmas)
        legs = [f for f, _ in cfg.legs or ()]
        self.leg_order = [legs.index(f) for f in self.fields] if legs and \
            legs != self.field_list else None
        self.limits = None if cfg.limits is None else \
            (np.array([lo for lo, _ in cfg.limits]), np.array([hi for _, hi in cfg.limits]))
        self.store: ColumnStore | None = None   # plain streams: series live in columns

    def keep_in_columns(self) -> None:
        """Hold this stream's series in a ``ColumnStore`` (``plain`` streams only)."""
        self.store = ColumnStore(self)
        self.series = StoreSeries(self)

    @property
    def plain(self) -> bool:
        """Whether the series keep only moments, outlier counts and counts at thresholds:
        no regression, mixture, transform, legs or sessions (what columns hold)."""
        cfg = self.cfg
        return cfg.regression is None and cfg.mixture is None and cfg.transform is None \
            and not cfg.legs and cfg.session_reset is None

    def new_series(self, labels: tuple[str, ...]) -> Series:
        cfg = self.cfg
        reg = None
        if cfg.regression is not None:
            reg = Regression(len(cfg.regression.x), intercept=cfg.regression.intercept,
                             half_life=cfg.half_life)
        mix = None
        if cfg.mixture is not None:
            m = cfg.mixture
            mix = Mixture(m.components, dim=self.dim, covariance=m.covariance, log=m.log,
                          half_life=cfg.half_life, warmup=m.warmup, seed=m.seed)
        key = (self.name, tuple(zip(cfg.topic.labels, labels, strict=True)))
        s = Series(self, labels, Moments(self.dim, cfg.half_life), reg, mix,
                   [0] * len(cfg.outlier_sigmas), key=key,
                   thresholds=self.new_thresholds())
        if cfg.legs:
            s.legs = Legs(len(cfg.legs), cfg.max_leg_age)
        if cfg.transform is not None:
            s.returns = Returns(cfg.transforms)
            if self.volatility_fields:
                s.volatility = Volatility(len(self.return_cols), cfg.half_life)
        return s

    def new_thresholds(self) -> list[Thresholds] | tuple:
        return [Thresholds(b, self.cfg.half_life) for _, b in self.threshold_at] or ()


class StoreSeries(Mapping):
    """``StreamState.series`` of a stream in columns: label values -> a ``Series``
    built from its row, detached (changing it changes nothing live). O(d**2) a read."""

    def __init__(self, st: StreamState) -> None:
        self.st = st

    def __getitem__(self, labels: tuple[str, ...]) -> Series:
        store = self.st.store
        i = store.index.get(labels)
        if i is None:
            raise KeyError(labels)
        return self._series(i)

    def _series(self, i: int) -> Series:
        st, store = self.st, self.st.store
        labels = store.labels[i]
        m = store.moments.state(i)
        return Series(st, labels, m, None, None,
                      store.outliers[i].tolist(), int(store.observations[i]),
                      int(store.version[i]), float(store.last_update[i]),
                      (st.name, tuple(zip(st.cfg.topic.labels, labels, strict=True))),
                      thresholds=[lv.state(i, m.clock, m.count) for lv in store.levels] or ())

    def __contains__(self, labels) -> bool:
        return labels in self.st.store.index

    def __iter__(self):
        store = self.st.store
        return iter(store.labels[:store.n])

    def __len__(self) -> int:
        return self.st.store.n

    def values(self):   # type: ignore[override]
        return [self._series(i) for i in range(self.st.store.n)]

    def items(self):   # type: ignore[override]
        return [(s.labels, s) for s in self.values()]


def _kinds(cfg: StreamConfig) -> list[str]:
    return ["moments"] + (["regression"] if cfg.regression else []) \
        + (["mixture"] if cfg.mixture else [])


def series_state(s: Series) -> dict:
    """A series' full state as a plain, msgpack-able dict (checkpoints, the merge tier).

    Pending rows are not included: flush first. O(state size).
    """
    cfg = s.stream.cfg
    d = {
        "stream": cfg.name, "labels": list(s.labels), "fields": list(cfg.fields),
        "kinds": s.stream.kinds, "observations": s.observations, "version": s.version,
        "last_update": s.last_update, "outliers": list(s.outliers),
        "thresholds": list(cfg.outlier_sigmas),
        "moments": s.moments.to_dict(),
        "regression": None if s.regression is None else s.regression.to_dict(),
        "mixture": None if s.mixture is None else s.mixture.to_dict(),
        **extra_state(s),
    }
    if s.thresholds:   # absent for streams without thresholds, as before they existed
        d["threshold_counts"] = thresholds_state(s)
    return d


def extra_state(s: Series) -> dict:
    """A series' transform, volatility and last spread (absent keys: none configured)."""
    out = {}
    if s.spread:   # NaN (not defined yet) saved as nil: a state holds finite floats only
        out["spread"] = [v if math.isfinite(v) else None for v in s.spread]
    if s.legs is not None:
        out["legs"] = s.legs.to_dict()
    if s.returns is not None:
        out["returns"] = s.returns.to_dict()
    if s.volatility is not None:
        out["volatility"] = s.volatility.to_dict()
    return out


def restore_extra(s: Series, d: dict) -> None:
    """Put back what ``extra_state`` saved; a checkpoint from before transforms (or
    before this stream had one) leaves the fresh states. Raises IncompatibleError when
    a saved state does not fit the stream."""
    st = s.stream
    spread = d.get("spread")
    if s.regression is not None and spread is not None:
        if not (isinstance(spread, list) and len(spread) == 4
                and all(v is None or type(v) is float for v in spread)):
            raise IncompatibleError("spread", spread, "must be 4 numbers or nil")
        s.spread = tuple(math.nan if v is None else v for v in spread)
    if s.legs is not None and d.get("legs") is not None:
        j = Legs.from_dict(d["legs"])
        if (j.count, j.max_age) != (s.legs.count, s.legs.max_age):
            raise IncompatibleError("legs", j.count, "leg count or max_leg_age differ from "
                                    "the stream's")
        s.legs = j
    if s.returns is not None and d.get("returns") is not None:
        r = Returns.from_dict(d["returns"])
        if r.kinds != s.returns.kinds:
            raise IncompatibleError("returns", list(r.kinds),
                                    f"the stream now transforms {list(s.returns.kinds)}")
        s.returns = r
    if s.volatility is not None and d.get("volatility") is not None:
        v = Volatility.from_dict(d["volatility"])
        if (v.dim, v.half_life) != (len(st.return_cols), st.cfg.half_life):
            raise IncompatibleError("volatility", v.dim, "fields or half-life differ from "
                                    "the stream's")
        s.volatility = v


def restore_series(st: StreamState, d: dict, exact_thresholds: bool = False) -> Series:
    """Rebuild a series of stream ``st`` from ``series_state``.

    Raises IncompatibleError when the stream's definition changed incompatibly
    (fields, estimator kinds, label count, outlier thresholds) or the state is
    malformed; the caller drops that series and keeps the rest. Counts at thresholds
    restart when the bounds changed, unless ``exact_thresholds`` (the merge tier: a
    shard of other bounds is refused, not pooled as zeros).
    """
    cfg = st.cfg
    try:
        labels = tuple(str(v) for v in d["labels"])
        if list(d["fields"]) != st.field_list:
            raise IncompatibleError("fields", d["fields"], f"the stream now has {st.field_list}")
        if list(d["kinds"]) != st.kinds:
            raise IncompatibleError("kinds", d["kinds"], f"the stream now has {st.kinds}")
        if len(labels) != len(cfg.topic.labels):
            raise IncompatibleError("labels", d["labels"],
                                    f"the topic template now has {list(cfg.topic.labels)}")
        s = st.new_series(labels)
        s.moments = Moments.from_dict(d["moments"])
        if s.moments.dim != st.dim or s.moments.half_life != cfg.half_life:
            raise IncompatibleError("moments", s.moments.dim,
                                    "dimension or half-life differs from the stream's")
        if s.regression is not None:
            s.regression = Regression.from_dict(d["regression"])
        if s.mixture is not None:
            s.mixture = Mixture.from_dict(d["mixture"])
        check_estimators(st, s.regression, s.mixture)
        restore_extra(s, d)
        outliers = [int(c) for c in d["outliers"]]
        if len(outliers) != len(d["thresholds"]):
            raise IncompatibleError("outliers", outliers,
                                    f"must hold one count per threshold {d['thresholds']}")
        if list(d["thresholds"]) == list(cfg.outlier_sigmas):
            s.outliers = outliers
        s.thresholds = restore_thresholds(st, d.get("threshold_counts"), exact_thresholds)
        s.observations = int(d["observations"])
        s.version = int(d["version"])
        s.last_update = float(d["last_update"])
    except (KeyError, TypeError, ValueError) as exc:
        if isinstance(exc, IncompatibleError):
            raise
        raise IncompatibleError("series", type(exc).__name__, f"malformed state: {exc}") \
            from None
    return s


def thresholds_state(s: Series) -> list[dict]:
    """A series' Thresholds as saved: one {"field", "state"} map per field that has them."""
    fields = s.stream.fields
    return [{"field": fields[i], "state": th.to_dict()}
            for (i, _), th in zip(s.stream.threshold_at, s.thresholds, strict=True)]


def restore_thresholds(st: StreamState, saved: list | None,
                       exact: bool = False) -> list[Thresholds] | tuple:
    """The series' Thresholds from ``thresholds_state``: a field's counts are kept
    (counters resume) when its bounds and half-life are the stream's now, fresh
    otherwise or when absent (an older checkpoint); with ``exact``, anything but the
    stream's own bounds for every field is an IncompatibleError, and so is a
    malformed state. O(fields k)."""
    if saved is not None and not isinstance(saved, list):
        raise IncompatibleError("threshold_counts", type(saved).__name__, "must be a list")
    old = {}
    for d in saved or ():
        if not (isinstance(d, dict) and isinstance(d.get("field"), str)):
            raise IncompatibleError("threshold_counts", type(d).__name__,
                                    'must hold {"field", "state"} maps')
        old[d["field"]] = Thresholds.from_dict(d.get("state"))
    kept = []
    for (i, bounds), t in zip(st.threshold_at, st.new_thresholds(), strict=True):
        o = old.pop(st.fields[i], None)
        same = _resumes(st, o, bounds)
        if exact and not same:
            raise IncompatibleError(f"threshold_counts.{st.fields[i]}",
                                    None if o is None else o.bounds.tolist(),
                                    f"must hold the stream's bounds {list(bounds)}")
        kept.append(o if same else t)
    if exact and old:
        raise IncompatibleError("threshold_counts", sorted(old),
                                "names fields without thresholds in this stream")
    return kept or ()


def _resumes(st: StreamState, saved: Thresholds | ThresholdColumns | None,
             bounds: tuple[float, ...]) -> bool:
    """Whether saved counts at ``bounds`` resume (counters go on) rather than restart:
    their bounds and half-life are the stream's now. O(k)."""
    return saved is not None and saved.half_life == st.cfg.half_life \
        and tuple(saved.bounds.tolist()) == bounds


def _saved_levels(st: StreamState, saved: list, n: int) -> tuple[list[ThresholdColumns],
                                                                  list[tuple[int, str]]]:
    """Stream ``st``'s counts at thresholds from a block's (field, ThresholdColumns)
    pairs: a field's columns are kept (counters resume) when its bounds and half-life
    are the stream's now, fresh otherwise or when absent (``restore_thresholds``'s
    rule); and (row, reason) for each row whose kept counts are malformed. O(n k)."""
    by_field = dict(saved)
    hl = st.cfg.half_life
    levels, bad = [], {}
    for i, bounds in st.threshold_at:
        field = st.fields[i]
        tc = by_field.get(field)
        if not _resumes(st, tc, bounds):
            levels.append(ThresholdColumns.zeros(n, bounds, hl))
            continue
        for r in np.flatnonzero(tc.bad_rows()).tolist():
            bad.setdefault(r, f"threshold_counts.{field}: malformed counts (not finite, "
                              "negative or not cumulative)")
        levels.append(tc)
    return levels, sorted(bad.items())


def check_estimators(st: StreamState, reg: Regression | None, mix: Mixture | None) -> None:
    """Raise IncompatibleError when a restored regression or mixture does not fit stream
    ``st`` as configured now (other terms, components, log or covariance form, or
    half-life): the first flush would fail on it. O(1)."""
    cfg = st.cfg
    if reg is not None:
        want = (len(cfg.regression.x), cfg.regression.intercept, cfg.half_life)
        if (reg.p, reg.has_intercept, reg.half_life) != want:
            raise IncompatibleError("regression", f"{reg.p} terms", "terms, intercept or "
                                    "half-life differ from the stream's")
    if mix is not None:
        m = cfg.mixture
        want = (m.components, st.dim, m.log, m.covariance, cfg.half_life)
        if (mix.components, mix.dim, mix.log, mix.covariance, mix.half_life) != want:
            raise IncompatibleError("mixture", f"{mix.components} components",
                                    "components, dimension, log, covariance or half-life "
                                    "differ from the stream's")


def view_of(s: Series) -> SeriesView:
    """The immutable read-out of a series (computed once per change, O(d**2 + quantiles))."""
    st = s.stream
    cfg = st.cfg
    m = s.moments
    corr = cfg.correction
    d = st.dim
    covariance = correlation = ()
    if d > 1:
        cov, rho = m.covariance(corr), m.correlation()
        pairs = [(i, j) for i in range(d) for j in range(i + 1, d)]
        covariance = tuple((i, j, float(cov[i, j])) for i, j in pairs)
        correlation = tuple((i, j, float(rho[i, j])) for i, j in pairs)
    if s.mixture is not None and s.mixture.warm:
        quantiles = tuple(float(s.mixture.quantile(q, field=i))
                          for q in cfg.quantiles for i in range(d))
    elif cfg.quantiles:
        quantiles = _floats(m.quantiles(cfg.quantiles, corr))
    else:
        quantiles = ()
    mixture = None
    if s.mixture is not None:
        mx = s.mixture
        mixture = MixtureView(
            warm=bool(mx.warm), weights=_floats(mx.weights) if mx.warm else (),
            means=tuple(_floats(r) for r in mx.original_means) if mx.warm else (),
            stddevs=tuple(_floats(r) for r in mx.original_stddevs) if mx.warm else (),
            average_loglik=float(mx.average_loglik), reseeds=int(mx.reseeds),
            log=bool(cfg.mixture.log),
            log_means=tuple(_floats(r) for r in mx.means) if mx.warm else (),
            log_stddevs=tuple(_floats(r) for r in mx.stddevs) if mx.warm else ())
    regression = None
    if s.regression is not None:
        rg = s.regression
        terms = tuple(cfg.regression.x)
        coef, se = _floats(rg.coefficients), _floats(rg.stderr(corr))
        if cfg.regression.intercept:
            terms += ("intercept",)
            coef += (float(rg.intercept),)
            se += (float(rg.intercept_stderr(corr)),)
        regression = RegressionView(
            ok=bool(rg.ok), terms=terms, coefficients=coef, stderr=se,
            residual_stddev=float(rg.residual_stddev(corr)),
            residual_dof=float(rg.residual_dof(corr)),
            r_squared=float(rg.r_squared), y=cfg.regression.y,
            latest=s.spread[:2], residual=s.spread[2] if s.spread else math.nan,
            residual_z=s.spread[3] if s.spread else math.nan)
    volatility = () if s.volatility is None else tuple(zip(
        st.volatility_fields, _floats(s.volatility.volatility(cfg.volatility_unit)),
        strict=True))
    means, variances = _floats(m.mean), _floats(m.variance(corr))
    # positional, in SeriesView's field order: 22 keywords cost 2 us a view
    return series_view(
        st.name, s.key[1], st.fields, s.version, s.observations, s.last_update, m.clock,
        cfg.half_life, m.weight_sum, m.weight_sq_sum, m.effective_samples, means,
        variances, covariance, correlation, st.quantile_at, quantiles,
        cfg.outlier_sigmas, tuple(s.outliers), mixture, regression, _floats(m.scatter),
        _levels(s, means, variances) if s.thresholds else None, volatility)


def _levels(s: Series, means: tuple, variances: tuple) -> LevelsView:
    """The counts and shares at a series' thresholds: the model's share from the warm
    mixture (its field's marginal), else the normal model of the moments. O(fields k K)."""
    st, mx, ths = s.stream, s.mixture, s.thresholds
    warm = mx is not None and mx.warm
    if warm:
        pi, mu, sd = mx.weights, mx.means, mx.stddevs
    model = []
    for i, b in st.threshold_at:
        if warm:
            p = mixture_exceedance(b, pi, mu[:, i], sd[:, i], mx.log)
        else:
            v = variances[i]
            p = normal_exceedance(b, means[i], math.sqrt(v) if v >= 0.0 else math.nan)
        model.append(tuple(p.tolist()))
    return LevelsView(st.threshold_at, tuple(tuple(th._cumulative.tolist()) for th in ths),
                      tuple(th.value_sum for th in ths), tuple(model),
                      tuple(tuple(th.observed_share.tolist()) for th in ths))


class Engine:
    """Routes, validates and folds observations; builds snapshots.

    Parameters
    ----------
    config : Config
        The validated configuration.
    columns : bool
        Hold plain streams' series in columns (``store.ColumnStore``); False keeps
        every series an object (the reference the column path is tested against).
    """

    def __init__(self, config: Config, columns: bool = True) -> None:
        self.config = config
        d = config.daemon

        def reader(fields: tuple[str, ...]) -> Callable:
            return Reader(fields, max_bytes=d.max_message_bytes, max_rows=d.max_batch_rows).read

        self.streams = [StreamState(s, None if s.legs else reader(s.fields))
                        for s in config.streams]
        for st in self.streams:
            if columns and st.plain:
                st.keep_in_columns()
        self._stores: dict[int, ColumnStore] = {}    # stores with rows waiting, by id
        # what topics route to: plain streams, and each leg of a joined one
        self._routable = [st for st in self.streams if st.topic is not None] + [
            LegState(st, i, f, tpl, self, reader((f,))) for st in self.streams
            for i, (f, tpl) in enumerate(st.cfg.legs or ())]
        # two generations of routes: a hit in the older one moves the route to the
        # newer; when the newer holds half of ROUTE_CACHE_BYTES it becomes the older
        # and the older is dropped (least recently used first, with no work per hit)
        self._routes: dict[bytes, tuple[StreamState, tuple[str, ...]] | None] = {}
        self._older_routes: dict[bytes, tuple[StreamState, tuple[str, ...]] | None] = {}
        self._route_bytes = 0
        self._dirty: dict[int, Series] = {}
        self._sessions = [st for st in self.streams if st.cfg.session_reset is not None]
        self._closed: dict[str, tuple] = {}   # stream -> (boundary, closing views)
        self._views: dict = {}
        self.rejected: Counter[str] = Counter()
        self.messages: Counter[str] = Counter()
        self.gaps: Counter[str] = Counter()
        self._last_seq: dict[str, int] = {}
        self.flushes = 0
        self.pending_rows = 0
        self._log_budget = config.daemon.log_rejected
        self._log_window = 0.0
        self.snapshot = Snapshot(taken_at=0.0)
        self._max_bytes, self._max_rows = d.max_message_bytes, d.max_batch_rows
        self._max_topic = d.max_topic_bytes
        self._max_skew = d.max_clock_skew
        self._max_ahead = d.max_time_ahead
        self._layouts = LayoutTable(max(st.dim for st in self.streams) if self.streams else 1)
        # per layout route id: its series' row in its stream's store (-1: not known yet)
        # and the store's number in self.streams (-1: the route's series is an object)
        self._route_rows = np.zeros(0, np.int64)
        self._route_store = np.zeros(0, np.int64)
        self._route_list: list | None = None
        self._made_later: list[tuple[int, ColumnStore]] = []   # (route id, store)
        self._not_learnt: dict[tuple[bytes, int], int] = {}
        self._shapes: dict[tuple[int, int], list] = {}   # (id(stream), length) -> layouts
        self._drains = 0

    # ------------------------------------------------------------- ingest
    @property
    def routes_seen(self) -> dict:
        """The topic -> route cache (a live dict; None marks a topic no stream takes)."""
        return self._routes

    def route(self, topic: bytes) -> tuple[StreamState, tuple[str, ...]] | None:
        """The stream and label values for a topic (first matching stream wins); None
        for a topic no stream takes or one longer than max_topic_bytes (not cached)."""
        try:
            return self._routes[topic]
        except KeyError:
            pass
        if len(topic) > self._max_topic:
            return None
        found = self._older_routes.pop(topic, _UNSEEN)
        if found is _UNSEEN:
            found = None
            try:
                text = topic.decode("utf-8")
            except UnicodeDecodeError:
                text = None
            if text is not None:
                for st in self._routable:
                    labels = st.topic.match(text)
                    if labels is not None:
                        found = (st, labels)
                        break
        size = 2 * len(topic) + _ROUTE_ENTRY_BYTES
        self._route_bytes += size
        if self._route_bytes > ROUTE_CACHE_BYTES // 2:
            self._older_routes, self._routes = self._routes, {}
            self._route_bytes = size
        self._routes[topic] = found
        return found

    def reject(self, reason: str, count: int = 1, topic: bytes | str = b"", detail: str = "",
               now: float = 0.0) -> None:
        """Count rejected observations by reason; log a bounded sample of them, one
        line each of at most about 500 characters (topic and detail are cut)."""
        self.rejected[reason] += count
        if now - self._log_window >= 60.0:
            self._log_window, self._log_budget = now, self.config.daemon.log_rejected
        if self._log_budget > 0:
            self._log_budget -= 1
            where = topic[:200] if isinstance(topic, str) else \
                topic[:200].decode("utf-8", "replace")
            if len(detail) > 240:
                detail = detail[:240] + "..."
            log.warning("rejected %d observation(s) from %r: %s%s", count, where, reason,
                        f" ({detail})" if detail else "")

    def ingest(self, topic: bytes, body: bytes, now: float, endpoint: str = "") -> int:
        """Decode one message and queue its rows for the next flush. Returns the number
        of rows queued (0 when it was rejected). See :meth:`_decode_each`."""
        return self._decode_each((topic,), (body,), now, endpoint)

    def ingest_many(self, topics: Sequence[bytes], bodies: Sequence[bytes], now: float,
                    endpoint: str = "") -> int:
        """``ingest`` for many messages that arrived together (message i is
        ``[topics[i], bodies[i]]``): the daemon's hot path.

        Bodies that fit a learnt byte layout (:mod:`~sigmad.daemon.ingest.layouts`: the same
        keys, encodings and fixed bytes as an earlier body of their topic and
        length) are read together with numpy, with no msgpack call and no Python
        per message; the rest go through :meth:`_decode_each`. Arrival order is
        kept: each block of messages that fit no layout is fed in its place, and a
        drain cut into more than MAX_RUNS blocks is left to ``_decode_each`` whole.
        The result equals feeding every message to ``ingest`` in order (rows,
        rejections, sequence gaps, series created). Returns the rows queued.
        O(total body length).
        """
        n = len(bodies)
        if n < LAYOUT_MIN_MESSAGES:
            return self._decode_each(topics, bodies, now, endpoint)
        table = self._layouts
        lengths = np.fromiter(map(len, bodies), np.int64, n)
        rows = table.find(topics, lengths)
        missing = rows < 0
        if missing.any() and self._learn_layouts(topics, bodies, lengths, missing):
            rows = table.find(topics, lengths)
            missing = rows < 0
        if missing.all():
            return self._decode_each(topics, bodies, now, endpoint)
        found = self._read_layouts(topics, bodies, lengths, rows)
        queued = start = 0
        misfit = ~found.ok
        if misfit.any():   # blocks of messages that fit no layout go message by message
            edges = np.flatnonzero(np.diff(np.r_[0, misfit.view(np.int8), 0])).tolist()
            if len(edges) > 2 * MAX_RUNS:   # too cut up: one pass, message by message
                return self._decode_each(topics, bodies, now, endpoint)
            for first, stop in zip(edges[::2], edges[1::2], strict=True):
                if first > start:
                    queued += self._queue_fitting(found, start, first, now, endpoint)
                queued += self._decode_each(topics[first:stop], bodies[first:stop], now,
                                            endpoint)
                start = stop
        if start < n:
            queued += self._queue_fitting(found, start, n, now, endpoint)
        return queued

    def _learn_layouts(self, topics: tuple, bodies: tuple, lengths: np.ndarray,
                       missing: np.ndarray) -> bool:
        """Give layouts to the (topic, length) pairs that have none; True if any got one.

        A body of the same shape as one learnt before for its stream (the same fixed
        bytes: keys, encodings, source; ``_same_shape``) takes that layout at the cost
        of a comparison, whatever the budget: thousands of quiet series of one shape
        are known after one drain. Learning a new shape (``layouts.learn``) costs about
        20 messages' decoding, so at most the budget above is tried per drain, and a
        pair whose body taught no layout is not tried again for RETRY_AFTER drains."""
        self._drains += 1
        tried, shapes, added = self._not_learnt, self._shapes, []
        budget = max(LEARN_PER_DRAIN, len(bodies) // 8)
        if len(tried) > _NOT_LEARNT_LIMIT:
            tried.clear()
        if len(shapes) > _SHAPES_LIMIT:
            shapes.clear()
        m = missing.tolist()
        keys = zip(compress(topics, m), compress(lengths.tolist(), m), strict=True)
        for key, body in dict(zip(keys, compress(bodies, m), strict=True)).items():
            if self._drains - tried.get(key, -RETRY_AFTER) < RETRY_AFTER:
                continue
            topic, length = key
            if length > LAYOUT_MAX_BYTES or len(topic) > self._max_topic:
                continue   # not a plain single observation, or a bad topic: nothing kept
            route = self._routes.get(topic, _UNSEEN)
            if route is _UNSEEN:
                if not budget:
                    continue
                route = self.route(topic)   # cached after the first time
            known = None if route is None else shapes.get((id(route[0]), length))
            layout = _same_shape(known, body) if known else None
            if layout is not None:
                added.append((topic, layout, route))
                tried.pop(key, None)
                continue
            if not budget:
                continue
            budget -= 1
            if route is not None and _single(route[0], body):
                layout = learn(body, route[0].fields, self._max_rows)
            if layout is None:
                tried[key] = self._drains
                continue
            added.append((topic, layout, route))
            tried.pop(key, None)
            kinds = shapes.setdefault((id(route[0]), length), [])
            kinds.insert(0, (int.from_bytes(layout.fixed, "big"),
                             int.from_bytes(layout.mask, "big"), layout))
            del kinds[_SHAPES_PER_LENGTH:]
        if added:
            self._layouts.add_many(added)
        return bool(added)

    def _read_layouts(self, topics: tuple, bodies: tuple, lengths: np.ndarray,
                      rows: np.ndarray) -> Readout:
        """Read every body that has a layout, one numpy pass per body length; the
        result is in arrival order (``ok`` False for a body without a fitting one)."""
        n = len(bodies)
        table = self._layouts
        out = Readout(ok=np.zeros(n, bool), values=np.empty((n, table.width)),
                      weight=np.empty(n), has_weight=np.zeros(n, bool),
                      time=np.empty(n), has_time=np.zeros(n, bool),
                      seq=np.zeros(n, np.uint64), has_seq=np.zeros(n, bool),
                      route=np.zeros(n, np.intp), source=np.zeros(n, np.intp))
        known = rows >= 0
        sizes = lengths[known]
        for size in runs(sizes)[1].tolist():
            at = np.flatnonzero(known & (lengths == size))
            whole = at.size == n   # the usual drain: one length, every body known
            part = table.read(size, rows if whole else rows[at],
                              bodies if whole else [bodies[i] for i in at.tolist()])
            for name in Readout.__slots__:
                if whole:
                    setattr(out, name, getattr(part, name))
                else:
                    getattr(out, name)[at] = getattr(part, name)
            for i in at[~part.ok].tolist():   # the layout went stale: learn it anew
                table.forget(topics[i], size)
        return out

    def _queue_fitting(self, r: Readout, start: int, stop: int, now: float,
                       endpoint: str) -> int:
        """Queue messages ``start:stop`` of ``r`` (all fit their layouts), as ``ingest``
        would one by one: count sequence gaps, reject event times too far from now,
        create series in order of first arrival (up to max_series). O(messages)
        in numpy; Python per series touched."""
        part = slice(start, stop)
        self.messages[endpoint] += stop - start
        counted = r.has_seq[part] & (r.source[part] >= 0)
        if counted.any():
            self._count_gaps(r.source[part][counted], r.seq[part][counted])
        route = r.route[part]
        keep = None
        has_time = r.has_time[part]
        if has_time.any():
            future, skewed = self._off_clock(r.time[part], now)
            future &= has_time
            skewed &= has_time
            if future.any() or skewed.any():
                keep = ~(future | skewed)
                for reason, off in (("future_time", future), ("clock_skew", skewed)):
                    if not off.any():
                        continue
                    _, ids, _, counts = runs(route[off])
                    for rid, count in zip(ids.tolist(), counts.tolist(), strict=True):
                        self.reject(reason, int(count),
                                    topic=_route_name(self._layouts.routes[rid]), now=now)
        at = np.arange(start, stop) if keep is None else np.flatnonzero(keep) + start
        if not at.size:
            return 0
        queued = 0
        store_of = self._sync_routes()[r.route[at]]
        in_columns = store_of >= 0
        if in_columns.any():
            queued = self._queue_columns(r, at[in_columns], store_of[in_columns], now)
            at = at[~in_columns]
            if not at.size:
                self.pending_rows += queued
                return queued
        order, ids, starts, counts = runs(r.route[at])
        rows = at[order]   # grouped by series, arrival order kept within each
        # gathered once for the whole run; each series takes slices (views), so a
        # series costs a few Python operations, not numpy calls of its own
        values = r.values[rows]
        has_w, has_t = r.has_weight[rows], r.has_time[rows]
        weighted = np.add.reduceat(has_w, starts).tolist() if has_w.any() else None
        timed = np.add.reduceat(has_t, starts).tolist() if has_t.any() else None
        weights = np.where(has_w, r.weight[rows], 1.0) if weighted else None
        times = np.where(has_t, r.time[rows], now) if timed else None
        routes, dirty = self._layouts.routes, self._dirty
        for k, (rid, begin, count) in enumerate(zip(ids.tolist(), starts.tolist(),
                                                    counts.tolist(), strict=True)):
            st, labels = routes[rid]   # series in order of first arrival
            series = st.series.get(labels)
            if series is None:
                if len(st.series) >= st.cfg.max_series:
                    self.reject("series_limit", count, topic=_route_name(routes[rid]),
                                now=now)
                    continue
                series = st.series[labels] = st.new_series(labels)
            end = begin + count
            series.seal_rows(now)   # keep arrival order
            series.queue((values[begin:end, :st.dim],
                          weights[begin:end] if weighted and weighted[k] else None,
                          times[begin:end] if timed and timed[k] else None, now))
            dirty[id(series)] = series
            queued += count
        self.pending_rows += queued
        return queued

    def _sync_routes(self) -> np.ndarray:
        """Per layout route id, the number of its stream in self.streams when that
        stream holds its series in columns, else -1 (kept in step with the table, whose
        ids start afresh when it fills). Amortised O(new routes)."""
        routes = self._layouts.routes
        if routes is not self._route_list:
            self._route_list = routes
            self._route_rows = np.zeros(0, np.int64)
            self._route_store = np.zeros(0, np.int64)
        have = self._route_store.shape[0]
        if len(routes) > have:
            number = {id(st): i for i, st in enumerate(self.streams) if st.store is not None}
            new = [number.get(id(route[0]), -1) for route in routes[have:]]
            self._route_store = np.r_[self._route_store, np.array(new, np.int64)]
            self._route_rows = np.r_[self._route_rows, np.full(len(new), -1, np.int64)]
        return self._route_store

    def _learn_rows(self) -> None:
        """Cache the rows of series the flush just made, by their layout route ids, so
        the next drain finds them without Python (once per new series)."""
        made, self._made_later = self._made_later, []
        routes = self._layouts.routes
        if routes is not self._route_list:   # the table started afresh: ids changed
            return
        for rid, store in made:
            row = store.index.get(routes[rid][1])
            if row is not None:
                self._route_rows[rid] = row

    def _queue_columns(self, r: Readout, at: np.ndarray, store_of: np.ndarray,
                       now: float) -> int:
        """``_queue_fitting`` for the messages ``at`` whose streams keep columns: one
        chunk per stream, the series' rows found through ``_route_rows``; Python only
        for a route seen for the first time. Returns the rows queued. O(messages)."""
        queued = 0
        routes = self._layouts.routes
        for number in np.unique(store_of).tolist():
            sel = at if store_of[0] == store_of[-1] and (store_of == number).all() \
                else at[store_of == number]
            st = self.streams[number]
            store = st.store
            rids = r.route[sel]
            rid0 = int(rids[0])
            if rids[-1] == rid0 and self._route_rows[rid0] >= 0 and (rids == rid0).all():
                rows = int(self._route_rows[rid0])   # one known series: its row, once
                unknown = None
            else:
                rows = self._route_rows[rids]
                unknown = rows < 0
            # new routes, or series not created yet (provisional rows)
            if unknown is not None and unknown.any():
                ids, first = np.unique(rids[unknown], return_index=True)
                found = np.empty(ids.shape[0], np.int64)
                full = []
                for k in np.argsort(first).tolist():   # series in order of first arrival
                    rid = int(ids[k])
                    row = store.row_for(routes[rid][1])
                    if row is None:
                        full.append(k)
                        row = _NO_ROW
                    elif row >= 0:
                        self._route_rows[rid] = row
                    else:   # its series is made at the flush: learn its row then
                        self._made_later.append((rid, store))
                    found[k] = row
                rows = rows.copy()
                rows[unknown] = found[np.searchsorted(ids, rids[unknown])]
                if full:
                    over = rows == _NO_ROW
                    for k in full:
                        rid = int(ids[k])
                        self.reject("series_limit", int(np.count_nonzero(rids == rid)),
                                    topic=_route_name(routes[rid]), now=now)
                    sel, rows = sel[~over], rows[~over]
                    if not sel.size:
                        continue
            w = t = given = None
            has_w = r.has_weight[sel]
            if has_w.any():
                w = np.where(has_w, r.weight[sel], 1.0)
            has_t = r.has_time[sel]
            if has_t.any():
                t, given = np.where(has_t, r.time[sel], math.nan), has_t
            store.queue(rows, r.values[sel, :st.dim], w, t, given, now)
            self._stores[id(store)] = store
            queued += sel.shape[0]
        return queued

    def _count_gaps(self, source: np.ndarray, seq: np.ndarray) -> None:
        """``_count_gap`` for many (source id, seq) pairs in arrival order, vectorised
        (in int64, so exactly and one by one when a seq reaches 2**53)."""
        names = self._layouts.sources
        last_seq = self._last_seq
        order, ids, starts, counts = runs(source)
        who = [names[i] for i in ids.tolist()]
        last = list(map(last_seq.get, who))
        new = last.count(None)
        if (new and len(last_seq) + new > _MAX_PRODUCERS) or int(seq.max()) >= 2**53 \
                or any(v is not None and v >= 2**53 for v in last):
            for i, q in zip(source.tolist(), seq.tolist(), strict=True):  # rare: exact, slow
                self._count_gap(names[i], q)
            return
        q = seq[order].astype(np.int64)
        prev = np.empty_like(q)
        prev[1:] = q[:-1]
        known = np.ones(q.size, bool)
        prev[starts] = [-1 if v is None else v for v in last]
        known[starts] = [v is not None for v in last]
        step = np.where(known & (q > prev + 1), q - prev - 1, 0)
        lost = np.add.reduceat(step, starts)
        gaps = self.gaps
        for k in np.flatnonzero(lost).tolist():
            gaps[who[k]] += int(lost[k])
        last_seq.update(zip(who, q[starts + counts - 1].tolist(), strict=True))

    def _decode_each(self, topics: Sequence[bytes], bodies: Sequence[bytes], now: float,
                     endpoint: str = "") -> int:
        """Decode messages one by one and queue their rows for the next flush: the
        path of every message that fits no byte layout.

        Each body becomes rows through its stream's :class:`~sigmad.daemon.ingest.wire.Reader`.
        Never raises on bad input: every rejection is counted by reason (``no_stream``,
        the wire format's reasons, ``future_time``, ``clock_skew``, ``series_limit``); rows of a bad
        value, weight or time are judged at the flush. A series is created only for
        rows that passed every check here, so rejected input adds no series. A single
        observation waits as a plain row in its series until the flush; arrival order
        is kept within each series. Returns the rows queued. O(total body length).
        """
        routes, route_of, reject = self._routes, self.route, self.reject
        max_skew, max_ahead, count_gap = self._max_skew, self._max_ahead, self._count_gap
        isfinite = math.isfinite
        touched: dict[int, Series] = {}
        stores: dict[int, ColumnStore] = {}
        queued = 0
        for topic, body in zip(topics, bodies, strict=True):
            route = routes.get(topic, _UNSEEN)
            if route is _UNSEEN:
                route = route_of(topic)
            if route is None:
                reject("no_stream" if len(topic) <= self._max_topic else "bad_topic",
                       topic=topic, now=now)
                continue
            st, labels = route
            try:
                dec = st.read(body)
            except WireError as exc:
                reject(exc.reason, topic=topic, detail=exc.detail, now=now)
                continue
            row, weight, when, source, seq = dec
            if seq is not None and source is not None:
                count_gap(source, seq)
            single = type(dec) is Single
            if single:
                if when is not None and isfinite(when):
                    if when - now > max_ahead:
                        reject("future_time", topic=topic, now=now)
                        continue
                    if abs(when - now) > max_skew:
                        reject("clock_skew", topic=topic, now=now)
                        continue
                n = 1
            else:
                dec = self._drop_skewed(dec, now, topic)
                n = dec.values.shape[0]
                if n == 0:
                    continue
            store = st.store
            if store is not None:
                at = store.row_for(labels)
                if at is None:
                    reject("series_limit", n, topic=topic, now=now)
                    continue
                if single:
                    store.add_single(at, row[0] if st.dim == 1 else row, weight, when)
                else:
                    store.queue(at, dec.values, dec.weights, dec.times, None, now)
                stores[id(store)] = store
                queued += n
                continue
            series = st.series.get(labels)
            if series is None:
                if len(st.series) >= st.cfg.max_series:
                    reject("series_limit", n, topic=topic, now=now)
                    continue
                series = st.series[labels] = st.new_series(labels)
            if single:
                rows = series.rows
                if not rows:
                    rows = series.rows = []
                rows.append(row[0] if st.dim == 1 else row)
                if weight is not None or when is not None:
                    if not series.extras:
                        series.extras = []
                    series.extras.append((len(rows) - 1, weight, when))
            else:
                series.seal_rows(now)   # keep arrival order: single rows queued so far go first
                series.queue((dec.values, dec.weights, dec.times, now))
            touched[id(series)] = series
            queued += n
        for series in touched.values():
            series.seal_rows(now)
        for store in stores.values():
            store.seal(now)
        self._dirty.update(touched)
        self._stores.update(stores)
        self.messages[endpoint] += len(bodies)
        self.pending_rows += queued
        return queued

    def _count_gap(self, source: str, seq: int) -> None:
        """Count the messages of ``source`` missed before ``seq`` (Python ints: exact)."""
        last = self._last_seq.get(source)
        if last is not None and seq > last + 1:
            self.gaps[source] += seq - last - 1
        if last is not None or len(self._last_seq) < _MAX_PRODUCERS:
            self._last_seq[source] = seq

    def _off_clock(self, times: np.ndarray, now: float) -> tuple[np.ndarray, np.ndarray]:
        """Masks of the event times ahead of ``now`` by more than max_time_ahead
        (``future_time``) and of the others further than max_clock_skew from it
        (``clock_skew``). Non-finite times are in neither: screen_batch counts them
        as ``bad_time``. O(n)."""
        with np.errstate(invalid="ignore"):
            finite = np.isfinite(times)
            ahead = times - now
            future = finite & (ahead > self._max_ahead)
            return future, finite & ~future & (np.abs(ahead) > self._max_skew)

    def _drop_skewed(self, dec, now: float, topic: bytes):
        """The decoded batch without rows whose event time is too far from ``now``."""
        times = dec.times
        if times is None:
            return dec
        future, skew = self._off_clock(times, now)
        if not (future.any() or skew.any()):
            return dec
        for reason, off in (("future_time", future), ("clock_skew", skew)):
            if off.any():
                self.reject(reason, int(off.sum()), topic=topic, now=now)
        keep = ~(future | skew)
        return dec._replace(values=dec.values[keep], times=times[keep],
                            weights=None if dec.weights is None else dec.weights[keep])

    # -------------------------------------------------------------- flush
    def flush(self, now: float) -> Snapshot:
        """Fold every pending micro-batch into its series and publish a new snapshot."""
        if self._sessions:
            self._reset_sessions(now)
        dirty, self._dirty = self._dirty, {}
        stores, self._stores = self._stores, {}
        self.pending_rows = 0
        views = self._views
        changed = False
        for series in dirty.values():
            if series.moments is None:   # a leg: its rows went to the joined series
                continue
            if self._fold(series, now):
                views = views if changed else dict(views)
                changed = True
                views[series.key] = view_of(series)
            elif series.observations == 0 and not series.pending and (
                    series.returns is None or series.returns.clock is None) and (
                    series.legs is None or not series.legs.seen):
                # every row of a new series was dropped: the rejected input leaves no trace
                # (a series whose first price is kept for its first return stays)
                st = series.stream
                if st.series.get(series.labels) is series:
                    del st.series[series.labels]
        max_abs = self.config.daemon.max_abs_value
        for store in stores.values():
            st = store.st

            def reject(reason: str, count: int, labels: tuple, st=st) -> None:
                self.reject(reason, count, topic=series_text(st.name, st.cfg.topic.labels,
                                                             labels), now=now)
            if store.flush(now, max_abs, reject):
                store.freeze()
        if self._made_later:
            self._learn_rows()
        if changed or self.snapshot.taken_at == 0.0:
            self._views = views
        self.flushes += 1
        self.snapshot = self._make_snapshot(now)
        return self.snapshot

    def _reset_sessions(self, now: float) -> None:
        """At a stream's session boundary: keep its series' read-outs as the closing values
        and start every series afresh. Rows still waiting, the previous price of a
        transform and the legs' latest values carry over (they are the feed, not an
        estimate). The first boundary counts from the oldest restored update, so a
        checkpoint from an earlier session closes at once. O(series of the stream)."""
        for st in self._sessions:
            reset = st.cfg.session_reset
            if st.next_reset is None:
                seen = [s.last_update for s in st.series.values() if s.last_update > 0.0]
                st.next_reset = reset.next_after(min(seen) if seen else now)
            if now < st.next_reset:
                continue
            views = self._views
            self._closed[st.name] = (st.next_reset, tuple(
                views[s.key] for s in st.series.values() if s.key in views))
            fresh = {}
            for labels, s in st.series.items():
                keep = (s.returns is not None and s.returns.clock is not None) or \
                    (s.legs is not None and s.legs.seen)
                if not (s.pending or s.rows or keep):
                    continue
                n = st.new_series(labels)
                n.returns, n.legs = s.returns, s.legs
                n.pending, n.rows, n.extras = s.pending, s.rows, s.extras
                fresh[labels] = n
                if self._dirty.pop(id(s), None) is not None:
                    self._dirty[id(n)] = n
            st.series = fresh
            self._views = {k: v for k, v in views.items() if k[0] != st.name}
            st.next_reset = reset.next_after(now)

    def _fold(self, series: Series, now: float) -> bool:
        chunks, series.pending = series.pending, ()
        st = series.stream
        if series.legs is not None:
            x, w, t = self._join(series, chunks, now)
            series.last_update = now   # a tick kept as a leg's latest value is news too
        else:
            x, w, t = _concat(chunks, st.time_based)
        batch, dropped = screen_batch(x, st.dim, w, t, self.config.daemon.max_abs_value)
        for reason, count in dropped.items():
            self.reject(reason, count, topic=_where(series), now=now)
        if st.limits is not None:
            batch, outside = limit_batch(batch, *st.limits)
            if outside:
                self.reject("out_of_range", outside, topic=_where(series), now=now)
        x, w, t = batch
        if series.returns is not None and x.shape[0]:
            x, w, t = self._transform(series, x, w, t, now)
            series.last_update = now   # a price kept for the next return is news too
        if st.log_mixture and x.shape[0] and not (x > 0.0).all():
            positive = (x > 0.0).all(axis=1)
            self.reject("not_positive", int((~positive).sum()), topic=_where(series), now=now)
            x = x[positive]
            w = None if w is None else w[positive]
            t = None if t is None else t[positive]
        n = x.shape[0]
        if n == 0:
            return False
        m = series.moments
        if st.cfg.outlier_sigmas and m.count >= st.cfg.outlier_warmup:
            mx = series.mixture
            if series.regression is None and mx is not None and mx.warm:
                # the fitted model's tail probability (model_tail): the nominal rate
                for i, c in enumerate(outlier_counts(mx, x, st.outlier_rates)):
                    series.outliers[i] += c
            else:
                dist = self._distance(series, x)
                for i, threshold in enumerate(st.cfg.outlier_sigmas):
                    series.outliers[i] += int(np.count_nonzero(dist > threshold))
        # rows are checked: the estimators' unchecked fold paths
        sums = m._fold(x, w, t)
        if series.regression is not None:
            self._fold_regression(series, x[:, st.reg_xy], w, t)
        if series.mixture is not None:
            series.mixture._fold(x, w, t)
        for (i, _), th in zip(st.threshold_at, series.thresholds, strict=True):
            th._fold(x[:, i], w, t, None, None if sums is None else sums.field(i))
        series.observations += n
        series.version += 1
        series.last_update = now
        return True

    @staticmethod
    def _fold_regression(series: Series, xy: np.ndarray, w, t) -> None:
        """Fold rows [X | y] in, the last one on its own: its residual against the fit of
        every row before it (the spread) and that residual standardised by its prediction
        standard error are kept for export. O(n k**2)."""
        rg = series.regression
        if xy.shape[0] > 1:
            rg._fold(xy[:-1], None if w is None else w[:-1], None if t is None else t[:-1])
        last_x, last_y = xy[-1:, :-1], xy[-1:, -1]
        if rg.ok:
            residual = float(last_y[0] - rg.predict(last_x)[0])
            z = float(rg.standardized_residual(last_x, last_y,
                                               series.stream.cfg.correction)[0])
        else:
            residual = z = math.nan
        series.spread = (float(last_x[0, 0]), float(last_y[0]), residual, z)
        rg._fold(xy[-1:], None if w is None else w[-1:], None if t is None else t[-1:])

    def _join(self, series: Series, chunks: list, now: float) -> tuple:
        """The rows of a joined stream from its legs' ticks (``Legs.join``): ticks screened
        one by one first, late and stale ones counted. O(n log n)."""
        x = np.concatenate([np.column_stack((c[0][:, 0], np.full(c[0].shape[0], c[4])))
                            for c in chunks])
        w = None
        if any(c[1] is not None for c in chunks):
            w = np.concatenate([np.ones(len(c[0])) if c[1] is None else c[1] for c in chunks])
        t = np.concatenate([np.full(len(c[0]), c[3]) if c[2] is None else c[2]
                            for c in chunks])
        (x, w, t), dropped = screen_batch(x, 2, w, t, self.config.daemon.max_abs_value)
        where = _where(series)
        for reason, count in dropped.items():
            self.reject(reason, count, topic=where, now=now)
        st = series.stream
        out = series.legs.join(x[:, 0], x[:, 1].astype(np.intp), t, w)
        if out.late:
            self.reject("late", out.late, topic=where, now=now,
                        detail=f"event time before the latest tick, {series.legs.clock}")
        if out.stale:
            self.reject("stale_leg", out.stale, topic=where, now=now,
                        detail=f"another leg had no value within {st.cfg.max_leg_age} s")
        # joined rows in field order (legs are in the order the legs table gives)
        order = series.stream.leg_order
        return out.values[:, order] if order is not None else out.values, out.weights, \
            out.times

    def _transform(self, series: Series, x: np.ndarray, w, t, now: float) -> tuple:
        """Rows turned into returns (``Returns.apply``), late and non-positive ones counted;
        the volatility takes the return fields. O(n log n)."""
        step = series.returns.apply(x, t, w)
        st = series.stream
        if step.late:
            self.reject("late", step.late, topic=_where(series), now=now,
                        detail=f"event time before the series' latest, {series.returns.clock}")
        if step.not_positive:
            logs = [f for f, k in zip(st.fields, st.cfg.transforms, strict=True)
                    if k == "log_return"]
            self.reject("not_positive", step.not_positive, topic=_where(series), now=now,
                        detail=f"log_return of {', '.join(logs)} needs a price > 0")
        if series.volatility is not None and step.values.shape[0]:
            series.volatility._fold(step.values[:, series.stream.return_cols], step.spans,
                                    step.weights, step.times)
        return step.values, step.weights, step.times

    def _distance(self, series: Series, x: np.ndarray) -> np.ndarray:
        """Outlier distance under the state before the update (NaN never exceeds)."""
        st = series.stream
        if series.regression is not None and series.regression.ok:
            r = series.regression.standardized_residual(x[:, st.reg_x], x[:, st.reg_y],
                                                        st.cfg.correction)
            return np.abs(r)
        return series.moments.mahalanobis(x, st.cfg.correction)

    # ------------------------------------------------------------ read side
    def _make_snapshot(self, now: float) -> Snapshot:
        health = Health(messages=tuple(sorted(self.messages.items())),
                        rejected=tuple(sorted(self.rejected.items())),
                        sequence_gaps=tuple(sorted(self.gaps.items())),
                        flushes=self.flushes)
        blocks = tuple(st.store.block for st in self.streams
                       if st.store is not None and st.store.block is not None)
        return Snapshot(taken_at=now, series=SeriesTable(self._views, blocks),
                        series_per_stream=tuple((st.name, len(st.series))
                                                for st in self.streams),
                        health=health, closed=tuple(
                            (name, *c) for name, c in sorted(self._closed.items())))

    def expire_idle(self, now: float) -> int:
        """Drop series idle for longer than their stream's idle_expiry; returns how many."""
        gone = set()
        dropped = 0
        for number, st in enumerate(self.streams):
            limit = st.cfg.idle_expiry
            if limit is None:
                continue
            store = st.store
            if store is not None:
                n = store.n
                stale = now - store.last_update[:n] > limit
                if store.waiting and stale.any():
                    stale[store.waiting_rows()] = False
                if stale.any():
                    dropped += int(stale.sum())
                    store.keep_only(~stale)
                    self._route_rows[self._sync_routes() == number] = -1
                    store.freeze()
                continue
            stale = [k for k, s in st.series.items()
                     if now - s.last_update > limit and not s.pending]
            for labels in stale:
                gone.add(st.series.pop(labels).key)
        if gone:
            self._views = {k: v for k, v in self._views.items() if k not in gone}
        if gone or dropped:
            self.snapshot = self._make_snapshot(now)
        return len(gone) + dropped

    def series_count(self) -> int:
        """Live series in every stream. O(streams)."""
        return sum(len(st.series) for st in self.streams)

    def all_series(self):
        for st in self.streams:
            yield from st.series.values()

    def stream(self, name: str) -> StreamState | None:
        for st in self.streams:
            if st.name == name:
                return st
        return None

    def export_state(self) -> list[dict]:
        """Every series' state (``series_state``), pending rows excluded. O(total state)."""
        return [series_state(s) for s in self.all_series()]

    def restore_state(self, states: list[dict], now: float) -> list[tuple[str, str]]:
        """Restore series saved by ``export_state``; returns (series, reason) for each one
        dropped because its stream is gone or changed incompatibly. The rest are live."""
        dropped, restored = [], []
        for d in states:
            name = d.get("stream") if isinstance(d, dict) else None
            st = self.stream(name) if isinstance(name, str) else None
            where = f"{name}{d.get('labels') if isinstance(d, dict) else ''}"
            if st is None:
                dropped.append((where, "its stream is no longer configured"))
                continue
            try:
                restored.append(restore_series(st, d))
            except IncompatibleError as exc:
                dropped.append((where, str(exc)))
        refused = self.adopt(restored, [view_of(s) for s in restored], now)
        return dropped + [(f"{s.stream.name}{list(s.labels)}", "the stream's max_series is "
                           "reached") for s in refused]

    def adopt_columns(self, st: StreamState, c, now: float) -> tuple[list[int], list]:
        """Make the restored columns ``c`` (``storage.columns.StreamColumns``) of column
        stream ``st`` live, each replacing a live series of the same labels. Returns
        the rows refused because max_series is reached, and (row, reason) for each
        row dropped because its counts at thresholds are malformed
        (``restore_thresholds``). ``c`` has passed ``columns.check_stream`` for ``st``.
        Outlier counts restart when the outlier thresholds changed, counts at
        thresholds when their bounds did. O(rows d**2), plus O(k) Python a row with
        thresholds."""
        width = len(st.cfg.outlier_sigmas)
        outliers = c.outliers if c.thresholds == list(st.cfg.outlier_sigmas) else \
            np.zeros((c.n, width), np.int64)
        labels, moments = list(map(tuple, c.labels)), c.moments
        observations, version, last_update = c.observations, c.version, c.last_update
        kept, bad, levels = np.arange(c.n), [], []
        if st.threshold_at:
            if c.threshold_columns is not None:
                levels, bad = _saved_levels(st, c.threshold_columns, c.n)
            else:   # one map per series (a stream kept as objects wrote it)
                per = []
                for i, saved in enumerate(c.threshold_counts or [None] * c.n):
                    try:
                        per.append(restore_thresholds(st, saved))
                    except IncompatibleError as exc:
                        bad.append((i, str(exc)))
                        per.append(st.new_thresholds())   # a place holder, dropped below
                hl = st.cfg.half_life
                levels = [ThresholdColumns.of([p[j] for p in per], b, hl)
                          for j, (_, b) in enumerate(st.threshold_at)]
            if bad:
                kept = np.delete(kept, [i for i, _ in bad])
                labels = [labels[i] for i in kept.tolist()]
                moments, outliers = moments.take(kept), outliers[kept]
                observations, version = observations[kept], version[kept]
                last_update = last_update[kept]
                levels = [lv.take(kept) for lv in levels]
        refused = st.store.adopt_columns(labels, moments, observations, version,
                                         last_update, outliers, levels)
        st.store.freeze()
        self.snapshot = self._make_snapshot(now)
        return kept[refused].tolist(), bad

    def adopt(self, series: list[Series], views: list[SeriesView], now: float) -> list[Series]:
        """Make restored series live with their read-outs (``views[i]`` is ``series[i]``'s);
        a series replaces a live one of the same labels. Returns the series refused
        because their stream's max_series is reached. O(len(series) + live series)."""
        refused = []
        fresh = {}
        stores: dict[int, list[Series]] = {}
        for s, v in zip(series, views, strict=True):
            st = s.stream
            if st.store is not None:
                stores.setdefault(id(st), []).append(s)
                continue
            if s.labels not in st.series and len(st.series) >= st.cfg.max_series:
                refused.append(s)
                continue
            st.series[s.labels] = s
            fresh[s.key] = v
        for group in stores.values():
            store = group[0].stream.store
            refused += store.adopt(group)
            store.freeze()
        self._views = {**self._views, **fresh}
        self.snapshot = self._make_snapshot(now)
        return refused

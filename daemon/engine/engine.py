"""The engine: routes decoded messages to series and folds micro-batches into estimators.

One thread owns an Engine and everything in it; nothing else mutates estimator
state, so the hot path takes no locks. Readers get immutable ``Snapshot``s.
"""

from __future__ import annotations

import functools
import logging
import math
from collections import Counter
from collections.abc import Sequence
from dataclasses import dataclass
from itertools import compress

import msgpack
import numpy as np
from sigmad.daemon.config.load import Config, StreamConfig
from sigmad.daemon.engine.snapshot import Health, MixtureView, RegressionView, SeriesView, Snapshot
from sigmad.daemon.ingest.layouts import BatchLayout, LayoutTable, Readout, learn, learn_batch, runs
from sigmad.daemon.ingest.topics import series_text
from sigmad.daemon.ingest.wire import MAX_SOURCE, WireError, interpret, origin, single, unpack
from sigmad.estimators import IncompatibleError, Mixture, Moments, Regression
from sigmad.estimators.validation import screen_batch

log = logging.getLogger("sigmad.engine")

_ROUTE_CACHE_LIMIT = 65_536
_UNSEEN = object()
_F8 = np.dtype("<f8")
_PLAIN = frozenset((float, int))   # value types a single observation may use
_MAX_PRODUCERS = 100_000            # sequence numbers tracked for at most this many sources
# Byte layouts (ingest_many): drains shorter than LAYOUT_MIN_MESSAGES go message
# by message, and so does a drain that misfits cut into more than MAX_RUNS blocks.
# A drain of n messages learns at most max(LEARN_PER_DRAIN, n // 8) layouts (one
# costs about what 20 messages do message by message), and a (topic, length) whose
# body taught none is not tried again for RETRY_AFTER drains.
LAYOUT_MIN_MESSAGES = 16
MAX_RUNS = 16
LEARN_PER_DRAIN = 64
RETRY_AFTER = 64
# One-field binary batches of at least this many bytes are read by a learnt
# BatchLayout (no unpacking) once their (topic, length) has been seen twice.
BATCH_LAYOUT_BYTES = 256


def _floats(a) -> tuple[float, ...]:
    return tuple(np.asarray(a, dtype=np.float64).ravel().tolist())


def _route_name(route: tuple) -> str:
    """How a (stream, labels) route, and so its series, is named in the rejection log."""
    st, labels = route
    return series_text(st.name, st.cfg.topic.labels, labels)


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
    # () until needed: an idle series should cost as little memory as it can

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


class StreamState:
    """A configured stream and its live series."""

    def __init__(self, cfg: StreamConfig) -> None:
        self.cfg = cfg
        self.name = cfg.name
        self.fields = tuple(cfg.fields)
        self.dim = len(self.fields)
        self.series: dict[tuple[str, ...], Series] = {}
        self.kinds = _kinds(cfg)
        self.field_list = list(cfg.fields)
        self.quantile_at = tuple((i, q) for q in cfg.quantiles for i in range(len(cfg.fields)))
        self.time_based = cfg.half_life is not None and not cfg.half_life.by_count
        reg = cfg.regression
        self.reg_x = None if reg is None else [self.fields.index(f) for f in reg.x]
        self.reg_y = None if reg is None else self.fields.index(reg.y)
        self.reg_xy = None if reg is None else self.reg_x + [self.reg_y]   # [X | y] columns
        self.log_mixture = cfg.mixture is not None and cfg.mixture.log

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
        return Series(self, labels, Moments(self.dim, cfg.half_life), reg, mix,
                      [0] * len(cfg.outlier_sigmas), key=key)


def _kinds(cfg: StreamConfig) -> list[str]:
    return ["moments"] + (["regression"] if cfg.regression else []) \
        + (["mixture"] if cfg.mixture else [])


def series_state(s: Series) -> dict:
    """A series' full state as a plain, msgpack-able dict (checkpoints, the merge tier).

    Pending rows are not included: flush first. O(state size).
    """
    cfg = s.stream.cfg
    return {
        "stream": cfg.name, "labels": list(s.labels), "fields": list(cfg.fields),
        "kinds": s.stream.kinds, "observations": s.observations, "version": s.version,
        "last_update": s.last_update, "outliers": list(s.outliers),
        "thresholds": list(cfg.outlier_sigmas),
        "moments": s.moments.to_dict(),
        "regression": None if s.regression is None else s.regression.to_dict(),
        "mixture": None if s.mixture is None else s.mixture.to_dict(),
    }


def restore_series(st: StreamState, d: dict) -> Series:
    """Rebuild a series of stream ``st`` from ``series_state``.

    Raises IncompatibleError when the stream's definition changed incompatibly
    (fields, estimator kinds, label count, outlier thresholds) or the state is
    malformed; the caller drops that series and keeps the rest.
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
        outliers = [int(c) for c in d["outliers"]]
        if len(outliers) != len(d["thresholds"]):
            raise IncompatibleError("outliers", outliers,
                                    f"must hold one count per threshold {d['thresholds']}")
        if list(d["thresholds"]) == list(cfg.outlier_sigmas):
            s.outliers = outliers
        s.observations = int(d["observations"])
        s.version = int(d["version"])
        s.last_update = float(d["last_update"])
    except (KeyError, TypeError, ValueError) as exc:
        if isinstance(exc, IncompatibleError):
            raise
        raise IncompatibleError("series", type(exc).__name__, f"malformed state: {exc}") \
            from None
    return s


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
            r_squared=float(rg.r_squared), y=cfg.regression.y)
    # positional, in SeriesView's field order: 22 keywords cost 2 us a view
    return SeriesView(
        st.name, s.key[1], st.fields, s.version, s.observations, s.last_update, m.clock,
        cfg.half_life, m.weight_sum, m.weight_sq_sum, m.effective_samples, _floats(m.mean),
        _floats(m.variance(corr)), covariance, correlation, st.quantile_at, quantiles,
        cfg.outlier_sigmas, tuple(s.outliers), mixture, regression, _floats(m.scatter))


class Engine:
    """Routes, validates and folds observations; builds snapshots.

    Parameters
    ----------
    config : Config
        The validated configuration.
    """

    def __init__(self, config: Config) -> None:
        self.config = config
        self.streams = [StreamState(s) for s in config.streams]
        self._routes: dict[bytes, tuple[StreamState, tuple[str, ...]] | None] = {}
        self._dirty: dict[int, Series] = {}
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
        d = config.daemon
        self._max_bytes, self._max_rows = d.max_message_bytes, d.max_batch_rows
        self._max_skew = d.max_clock_skew
        self._layouts = LayoutTable(max(st.dim for st in self.streams) if self.streams else 1)
        self._not_learnt: dict[tuple[bytes, int], int] = {}
        self._batch_layouts: dict[tuple[bytes, int], BatchLayout] = {}
        self._batch_lengths_seen: dict[tuple[bytes, int], bool] = {}
        self._drains = 0
        # the hot path unpacks with fixed limits (the general path's are tighter)
        self._unpack_one = functools.partial(
            msgpack.unpackb, use_list=False, max_str_len=d.max_message_bytes,
            max_bin_len=d.max_message_bytes, max_ext_len=0, max_array_len=d.max_batch_rows,
            max_map_len=d.max_message_bytes // 2)

    # ------------------------------------------------------------- ingest
    @property
    def routes_seen(self) -> dict:
        """The topic -> route cache (a live dict; None marks a topic no stream takes)."""
        return self._routes

    def route(self, topic: bytes) -> tuple[StreamState, tuple[str, ...]] | None:
        """The stream and label values for a topic (first matching stream wins)."""
        try:
            return self._routes[topic]
        except KeyError:
            pass
        found = None
        try:
            text = topic.decode("utf-8")
        except UnicodeDecodeError:
            text = None
        if text is not None:
            for st in self.streams:
                labels = st.cfg.topic.match(text)
                if labels is not None:
                    found = (st, labels)
                    break
        if len(self._routes) >= _ROUTE_CACHE_LIMIT:
            self._routes.clear()
        self._routes[topic] = found
        return found

    def reject(self, reason: str, count: int = 1, topic: bytes | str = b"", detail: str = "",
               now: float = 0.0) -> None:
        """Count rejected observations by reason; log a bounded sample of them."""
        self.rejected[reason] += count
        if now - self._log_window >= 60.0:
            self._log_window, self._log_budget = now, self.config.daemon.log_rejected
        if self._log_budget > 0:
            self._log_budget -= 1
            where = topic if isinstance(topic, str) else topic[:200].decode("utf-8", "replace")
            log.warning("rejected %d observation(s) from %s: %s%s", count, where, reason,
                        f" ({detail})" if detail else "")

    def ingest(self, topic: bytes, body: bytes, now: float, endpoint: str = "",
               unpacked: dict | None = None) -> int:
        """Decode one message and queue its rows for the next flush.

        Returns the number of rows queued (0 when the message was rejected). Never
        raises on bad input: every rejection is counted by reason. A single
        observation of plain numbers takes a short path that builds no arrays;
        its row waits in a list until the flush. ``unpacked`` is the body already
        unpacked without error by the caller (unpacking twice is what it saves).
        O(len(body)).
        """
        self.messages[endpoint] += 1
        route = self._routes.get(topic, _UNSEEN)
        if route is _UNSEEN:
            route = self.route(topic)
        if route is None:
            self.reject("no_stream", topic=topic, now=now)
            return 0
        st, labels = route
        try:
            msg = unpacked if type(unpacked) is dict else \
                unpack(body, max_bytes=self._max_bytes, max_rows=self._max_rows)
            one = single(msg, st.fields)
            dec = interpret(msg, st.fields, max_rows=self._max_rows) if one is None else None
            source, seq = origin(msg)
        except WireError as exc:
            self.reject(exc.reason, topic=topic, detail=exc.detail, now=now)
            return 0
        if seq is not None and source is not None:
            self._count_gap(source, seq)
        if dec is None:
            row, weight, when = one
            if when is not None and abs(when - now) > self._max_skew and math.isfinite(when):
                self.reject("clock_skew", topic=topic, now=now)
                return 0
            n = 1
        else:
            dec = self._drop_skewed(dec, now, topic)
            n = dec.values.shape[0]
            if n == 0:
                return 0
        # created only for rows that passed every check here: rejected input adds no series
        series = st.series.get(labels)
        if series is None:
            if len(st.series) >= st.cfg.max_series:
                self.reject("series_limit", n, topic=topic, now=now)
                return 0
            series = st.series[labels] = st.new_series(labels)
        if dec is None:
            series.rows = [*series.rows, row[0] if st.dim == 1 else row]
            if weight is not None or when is not None:
                series.extras = [*series.extras, (len(series.rows) - 1, weight, when)]
            series.seal_rows(now)
        else:
            series.seal_rows(now)   # keep arrival order: single rows queued so far go first
            series.queue((dec.values, dec.weights, dec.times, now))
        self.pending_rows += n
        self._dirty[id(series)] = series
        return n

    def ingest_many(self, topics: Sequence[bytes], bodies: Sequence[bytes], now: float,
                    endpoint: str = "") -> int:
        """``ingest`` for many messages that arrived together (message i is
        ``[topics[i], bodies[i]]``): the daemon's hot path.

        Bodies that fit a learnt byte layout (:mod:`daemon.layouts`: the same
        keys, encodings and fixed bytes as an earlier body of their topic and
        length) are read together with numpy, with no msgpack call and no Python
        per message; the rest go through :meth:`_ingest_each`. Arrival order is
        kept: each block of messages that fit no layout is fed in its place, and a
        drain cut into more than MAX_RUNS blocks is left to ``_ingest_each`` whole.
        The result equals feeding every message to ``ingest`` in order (rows,
        rejections, sequence gaps, series created). Returns the rows queued.
        O(total body length).
        """
        n = len(bodies)
        if n < LAYOUT_MIN_MESSAGES:
            return self._ingest_each(topics, bodies, now, endpoint)
        table = self._layouts
        lengths = np.fromiter(map(len, bodies), np.int64, n)
        rows = table.find(topics, lengths)
        missing = rows < 0
        if missing.any() and self._learn_layouts(topics, bodies, lengths, missing):
            rows = table.find(topics, lengths)
            missing = rows < 0
        if missing.all():
            return self._ingest_each(topics, bodies, now, endpoint)
        found = self._read_layouts(topics, bodies, lengths, rows)
        queued = start = 0
        misfit = ~found.ok
        if misfit.any():   # blocks of messages that fit no layout go message by message
            edges = np.flatnonzero(np.diff(np.r_[0, misfit.view(np.int8), 0])).tolist()
            if len(edges) > 2 * MAX_RUNS:   # too cut up: one pass, message by message
                return self._ingest_each(topics, bodies, now, endpoint)
            for first, stop in zip(edges[::2], edges[1::2], strict=True):
                if first > start:
                    queued += self._queue_fitting(found, start, first, now, endpoint)
                queued += self._ingest_each(topics[first:stop], bodies[first:stop], now,
                                            endpoint)
                start = stop
        if start < n:
            queued += self._queue_fitting(found, start, n, now, endpoint)
        return queued

    def _learn_layouts(self, topics: tuple, bodies: tuple, lengths: np.ndarray,
                       missing: np.ndarray) -> bool:
        """Learn the layouts of (topic, length) pairs that have none, up to the budget
        above; True if any was learnt. A pair whose body taught no layout is not
        tried again for RETRY_AFTER drains."""
        self._drains += 1
        tried, learnt = self._not_learnt, False
        budget = max(LEARN_PER_DRAIN, len(bodies) // 8)
        if len(tried) > _ROUTE_CACHE_LIMIT:
            tried.clear()
        m = missing.tolist()
        keys = zip(compress(topics, m), compress(lengths.tolist(), m), strict=True)
        for key, body in dict(zip(keys, compress(bodies, m), strict=True)).items():
            if self._drains - tried.get(key, -RETRY_AFTER) < RETRY_AFTER:
                continue
            topic, length = key
            route = self.route(topic)   # cached after the first time
            layout = None
            if route is not None and length <= self._max_bytes:
                layout = learn(body, route[0].fields, self._max_rows)
            if layout is None:
                tried[key] = self._drains
            else:
                self._layouts.add(topic, layout, route)
                tried.pop(key, None)
                learnt = True
            budget -= 1
            if not budget:
                break
        return learnt

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
        if r.has_time[part].any():
            t = r.time[part]
            with np.errstate(invalid="ignore"):
                skewed = r.has_time[part] & np.isfinite(t) & (np.abs(t - now) > self._max_skew)
            if skewed.any():
                keep = ~skewed
                _, ids, _, counts = runs(route[skewed])
                for rid, count in zip(ids.tolist(), counts.tolist(), strict=True):
                    self.reject("clock_skew", int(count),
                                topic=_route_name(self._layouts.routes[rid]), now=now)
        at = np.arange(start, stop) if keep is None else np.flatnonzero(keep) + start
        if not at.size:
            return 0
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
        queued = 0
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

    def _count_gaps(self, source: np.ndarray, seq: np.ndarray) -> None:
        """``_count_gap`` for many (source id, seq) pairs in arrival order, vectorised."""
        names = self._layouts.sources
        last_seq = self._last_seq
        order, ids, starts, counts = runs(source)
        who = [names[i] for i in ids.tolist()]
        last = list(map(last_seq.get, who))
        new = last.count(None)
        if (new and len(last_seq) + new > _MAX_PRODUCERS) or int(seq.max()) >= 2**53:
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

    def _ingest_each(self, topics: Sequence[bytes], bodies: Sequence[bytes], now: float,
                     endpoint: str = "") -> int:
        """``ingest`` for many messages, one message at a time.

        A plain single observation (numbers only, scalar or absent weight and time,
        a valid or absent source/seq, for a series that exists) is queued here with
        no function call of its own; anything else goes through ``ingest``, which
        gives the same result for these and judges everything else. Returns the
        rows queued. O(total body length).
        """
        routes, unpackb = self._routes, self._unpack_one
        batch_layouts = self._batch_layouts
        max_bytes, max_skew = self._max_bytes, self._max_skew
        last_seq, gaps, slow = self._last_seq, self.gaps, self.ingest
        touched: dict[int, Series] = {}
        fast = queued = batches = batch_rows = 0
        max_bin = self._max_rows * 8
        for topic, body in zip(topics, bodies, strict=True):
            route = routes.get(topic)
            if route is None or len(body) > max_bytes:
                queued += slow(topic, body, now, endpoint)
                continue
            st, labels = route
            series = st.series.get(labels)
            msg = found = None
            if len(body) >= BATCH_LAYOUT_BYTES and series is not None and batch_layouts:
                layout = batch_layouts.get((topic, len(body)))
                found = None if layout is None else layout.read(body)
            if found is not None:   # a binary batch read by its layout: no unpacking
                row, weight, source, seq = found
                when, binned = None, True
            else:
                try:
                    msg = unpackb(body)
                    values = msg["values"]
                    if type(values) is dict:
                        row = values[st.fields[0]] if st.dim == 1 else \
                            tuple(map(values.__getitem__, st.fields))
                    else:
                        row = values if st.dim == 1 else None
                    weight, when = msg.get("weight"), msg.get("time")
                    source, seq = msg.get("source"), msg.get("seq")
                except Exception:   # anything unusual: the general path judges and counts it
                    row = series = None
                # a one-field batch of little-endian float64 (bin), weights likewise, no times
                binned = (type(row) is bytes and st.dim == 1 and when is None
                          and 0 < len(row) <= max_bin and len(row) % 8 == 0
                          and (weight is None or type(weight) is bytes
                               and len(weight) == len(row)))
            if (series is None or row is None
                    or not binned and (
                        not ((type(row) is float or type(row) is int) if st.dim == 1
                             else _PLAIN.issuperset(map(type, row)))
                        or (weight is not None and type(weight) is not float
                            and type(weight) is not int)
                        or (when is not None and (type(when) is not float
                                                  and type(when) is not int
                                                  or abs(when - now) > max_skew)))):
                queued += slow(topic, body, now, endpoint, msg)
                continue
            if source is not None or seq is not None:
                if type(source) is not str or type(seq) is not int:
                    queued += slow(topic, body, now, endpoint)
                    continue
                last = last_seq.get(source)
                if last is None:    # a producer not seen before: validate it once
                    if not (0 < len(source) <= MAX_SOURCE and source.isprintable()
                            and 0 <= seq < 2**64):
                        queued += slow(topic, body, now, endpoint)
                        continue
                    if len(last_seq) < _MAX_PRODUCERS:
                        last_seq[source] = seq
                elif 0 <= seq < 2**64:
                    if seq > last + 1:
                        gaps[source] += seq - last - 1
                    last_seq[source] = seq
                else:
                    queued += slow(topic, body, now, endpoint)
                    continue
            if binned:
                series.seal_rows(now)   # keep arrival order
                if found is None:
                    row = np.frombuffer(row, _F8)
                    weight = None if weight is None else np.frombuffer(weight, _F8)
                    if len(body) >= BATCH_LAYOUT_BYTES:
                        self._learn_batch_layout(topic, body, st.fields[0])
                x = row.reshape(-1, 1)
                series.queue((x, weight, None, now))
                touched[id(series)] = series
                fast += 1
                batches += 1
                batch_rows += x.shape[0]
                continue
            rows = series.rows
            if not rows:
                rows = series.rows = []
            rows.append(row)
            if weight is not None or when is not None:
                if not series.extras:
                    series.extras = []
                series.extras.append((len(rows) - 1, weight, when))
            touched[id(series)] = series
            fast += 1
        for series in touched.values():
            series.seal_rows(now)
        self._dirty.update(touched)
        self.messages[endpoint] += fast
        singles = fast - batches
        self.pending_rows += singles + batch_rows
        return queued + singles + batch_rows

    def _learn_batch_layout(self, topic: bytes, body: bytes, field: str) -> None:
        """Learn the layout of a binary batch the second time its (topic, length) is
        seen (batches of varying length teach nothing and cost one look-up each)."""
        key = (topic, len(body))
        if key in self._batch_layouts:
            return
        seen = self._batch_lengths_seen
        if len(seen) >= _ROUTE_CACHE_LIMIT:
            seen.clear()
        if seen.pop(key, None) is None:
            seen[key] = True
            return
        layout = learn_batch(body, field, self._max_rows)
        if layout is not None:
            if len(self._batch_layouts) >= _ROUTE_CACHE_LIMIT:
                self._batch_layouts.clear()
            self._batch_layouts[key] = layout

    def _drop_skewed(self, dec, now: float, topic: bytes):
        """The decoded batch without rows whose event time is too far from ``now``."""
        times = dec.times
        if times is None:
            return dec
        # non-finite times are left for screen_batch to count as bad_time
        with np.errstate(invalid="ignore"):
            skew = np.isfinite(times) & (np.abs(times - now) > self._max_skew)
        if not skew.any():
            return dec
        self.reject("clock_skew", int(skew.sum()), topic=topic, now=now)
        keep = ~skew
        return dec._replace(values=dec.values[keep], times=times[keep],
                            weights=None if dec.weights is None else dec.weights[keep])

    def _count_gap(self, source: str, seq: int) -> None:
        last = self._last_seq.get(source)
        if last is not None and seq > last + 1:
            self.gaps[source] += seq - last - 1
        if last is not None or len(self._last_seq) < _MAX_PRODUCERS:
            self._last_seq[source] = seq

    # -------------------------------------------------------------- flush
    def flush(self, now: float) -> Snapshot:
        """Fold every pending micro-batch into its series and publish a new snapshot."""
        dirty, self._dirty = self._dirty, {}
        self.pending_rows = 0
        views = self._views
        changed = False
        for series in dirty.values():
            if self._fold(series, now):
                views = views if changed else dict(views)
                changed = True
                views[series.key] = view_of(series)
            elif series.observations == 0 and not series.pending:
                # every row of a new series was dropped: the rejected input leaves no trace
                st = series.stream
                if st.series.get(series.labels) is series:
                    del st.series[series.labels]
        if changed or self.snapshot.taken_at == 0.0:
            self._views = views
        self.flushes += 1
        self.snapshot = self._make_snapshot(now)
        return self.snapshot

    def _fold(self, series: Series, now: float) -> bool:
        chunks, series.pending = series.pending, ()
        st = series.stream
        x, w, t = _concat(chunks, st.time_based)
        batch, dropped = screen_batch(x, st.dim, w, t, self.config.daemon.max_abs_value)
        for reason, count in dropped.items():
            self.reject(reason, count, topic=_where(series), now=now)
        x, w, t = batch
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
            dist = self._distance(series, x)
            for i, threshold in enumerate(st.cfg.outlier_sigmas):
                series.outliers[i] += int(np.count_nonzero(dist > threshold))
        # rows are checked: the estimators' unchecked fold paths
        m._fold(x, w, t)
        if series.regression is not None:
            series.regression._fold(x[:, st.reg_xy], w, t)
        if series.mixture is not None:
            series.mixture._fold(x, w, t)
        series.observations += n
        series.version += 1
        series.last_update = now
        return True

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
        return Snapshot(taken_at=now, series=self._views,
                        series_per_stream=tuple((st.name, len(st.series))
                                                for st in self.streams),
                        health=health)

    def expire_idle(self, now: float) -> int:
        """Drop series idle for longer than their stream's idle_expiry; returns how many."""
        gone = set()
        for st in self.streams:
            limit = st.cfg.idle_expiry
            if limit is None:
                continue
            stale = [k for k, s in st.series.items()
                     if now - s.last_update > limit and not s.pending]
            for labels in stale:
                gone.add(st.series.pop(labels).key)
        if gone:
            self._views = {k: v for k, v in self._views.items() if k not in gone}
            self.snapshot = self._make_snapshot(now)
        return len(gone)

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

    def adopt(self, series: list[Series], views: list[SeriesView], now: float) -> list[Series]:
        """Make restored series live with their read-outs (``views[i]`` is ``series[i]``'s);
        a series replaces a live one of the same labels. Returns the series refused
        because their stream's max_series is reached. O(len(series) + live series)."""
        refused = []
        fresh = {}
        for s, v in zip(series, views, strict=True):
            st = s.stream
            if s.labels not in st.series and len(st.series) >= st.cfg.max_series:
                refused.append(s)
                continue
            st.series[s.labels] = s
            fresh[s.key] = v
        self._views = {**self._views, **fresh}
        self.snapshot = self._make_snapshot(now)
        return refused

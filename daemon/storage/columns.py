"""A stream's series as columns: the unit of state in a checkpoint (format 2).

The engine thread collects each stream's series into arrays (``collect``);
the checkpoint writer packs them into one msgpack map per stream whose
columns are little-endian binary blobs (``pack``). A restore checks a map's
columns once (``unpack``), then copies them into a stream kept in columns
(``Engine.adopt_columns``) or builds its series (``restore``). Regression and
mixture states, rarer and larger, stay one ``to_dict`` map per series inside
their stream's map.
"""

from __future__ import annotations

from itertools import chain
from operator import attrgetter, itemgetter
from typing import NamedTuple

import numpy as np
from sigmad.daemon.engine.engine import (
    Series,
    StreamState,
    check_estimators,
    extra_state,
    restore_extra,
    restore_thresholds,
    thresholds_state,
)
from sigmad.daemon.ingest.topics import series_text
from sigmad.estimators import (
    IncompatibleError,
    Mixture,
    MomentsColumns,
    Regression,
    ThresholdColumns,
    blob,
    from_blob,
)

_LE_F8 = np.dtype("<f8")
_LE_I8 = np.dtype("<i8")


class StreamColumns(NamedTuple):
    """The state of every series of one stream; row i is series i."""

    stream: str
    fields: list[str]
    kinds: list[str]
    thresholds: list[float]
    labels: list[tuple[str, ...]]         # each series' label values, template order
    observations: np.ndarray              # (n,) int64
    version: np.ndarray                   # (n,) int64
    last_update: np.ndarray               # (n,) float64
    outliers: np.ndarray                  # (n, len(thresholds)) int64
    moments: MomentsColumns
    regression: list | None               # Regression.to_dict per series, when configured
    mixture: list | None                  # Mixture.to_dict per series, when configured
    # per series, engine.thresholds_state (a map per field with thresholds); None in
    # checkpoints written before thresholds existed
    threshold_counts: list | None = None
    extras: list | None = None            # engine.extra_state per series (transform or
    #                                       regression streams)
    # a stream in columns: (field, ThresholdColumns) per field with thresholds, in place
    # of threshold_counts (blobs, not a map per series)
    threshold_columns: list | None = None

    @property
    def n(self) -> int:
        return len(self.labels)

    def where(self, i: int, names: tuple[str, ...] | None = None) -> str:
        """How series i is named when it is dropped (``topics.series_text``)."""
        return series_text(self.stream, names, tuple(self.labels[i]))


def _get(name: str, series: list) -> list:
    return list(map(attrgetter(name), series))


def collect(st: StreamState) -> StreamColumns:
    """Copy the state of every series of ``st`` into columns (the engine thread's share
    of a checkpoint: nothing here is shared with live state afterwards). O(n d**2)."""
    cfg = st.cfg
    store = st.store
    if store is not None:   # already columns: copies of the live rows
        n = store.n
        return StreamColumns(
            st.name, list(st.fields), list(st.kinds), list(cfg.outlier_sigmas),
            list(store.labels[:n]), store.observations[:n].copy(), store.version[:n].copy(),
            store.last_update[:n].copy(), store.outliers[:n].copy(), store.moments.copy(n),
            None, None, None, None,
            [(st.fields[i], lv.copy(n)) for (i, _), lv in zip(st.threshold_at, store.levels,
                                                              strict=True)] or None)
    series = list(st.series.values())
    n = len(series)
    width = len(cfg.outlier_sigmas)
    return StreamColumns(
        st.name, list(st.fields), list(st.kinds), list(cfg.outlier_sigmas),
        _get("labels", series),
        np.array(_get("observations", series), dtype=np.int64).reshape(n),
        np.array(_get("version", series), dtype=np.int64).reshape(n),
        np.array(_get("last_update", series), dtype=np.float64).reshape(n),
        np.fromiter(chain.from_iterable(_get("outliers", series)), np.int64,
                    n * width).reshape(n, width),   # copied: the counts change in place
        MomentsColumns.of(_get("moments", series), st.dim, cfg.half_life),
        None if cfg.regression is None else [s.regression.to_dict() for s in series],
        None if cfg.mixture is None else [s.mixture.to_dict() for s in series],
        [thresholds_state(s) for s in series] if st.threshold_at else None,
        None if cfg.transform is None and cfg.regression is None and not cfg.legs else
        [extra_state(s) for s in series])


def pack(c: StreamColumns) -> dict:
    """The msgpack-able map of a stream's columns (the checkpoint writer's share). O(n)."""
    width = len(c.labels[0]) if c.labels else 0
    return {
        "stream": c.stream, "fields": c.fields, "kinds": c.kinds, "thresholds": c.thresholds,
        "n": c.n, "label_count": width,
        "labels": [list(map(itemgetter(k), c.labels)) for k in range(width)],
        "observations": blob(c.observations, _LE_I8), "version": blob(c.version, _LE_I8),
        "last_update": blob(c.last_update, _LE_F8), "outliers": blob(c.outliers, _LE_I8),
        "moments": c.moments.to_dict(),
        "regression": c.regression, "mixture": c.mixture,
        "threshold_counts": c.threshold_counts,
        **({} if c.extras is None else {"extras": c.extras}),
        **({} if c.threshold_columns is None else {"threshold_columns": [
            {"field": f, **tc.to_dict()} for f, tc in c.threshold_columns]}),
    }


def _strings(d: dict, key: str) -> list[str]:
    v = d.get(key)
    if not isinstance(v, list) or not all(isinstance(s, str) for s in v):
        raise IncompatibleError(key, v, "must be a list of strings")
    return v


def unpack(d: object) -> StreamColumns:
    """Check a stream's map from ``pack`` and return its columns.

    Raises IncompatibleError naming the field at fault: a missing or mistyped
    key, a blob of the wrong length, a label column of the wrong length, a
    moments block of another size. Estimator maps of regression and mixture
    are checked per series by ``restore``. O(n d**2).
    """
    if not isinstance(d, dict):
        raise IncompatibleError("stream block", type(d).__name__, "must be a map")
    name, n, width = d.get("stream"), d.get("n"), d.get("label_count")
    if not isinstance(name, str):
        raise IncompatibleError("stream", name, "must be a string")
    if type(n) is not int or n < 0:
        raise IncompatibleError("n", n, "must be an integer >= 0")
    if type(width) is not int or width < 0:
        raise IncompatibleError("label_count", width, "must be an integer >= 0")
    thresholds = d.get("thresholds")
    if not isinstance(thresholds, list) or \
            not all(type(t) in (int, float) for t in thresholds):
        raise IncompatibleError("thresholds", thresholds, "must be a list of numbers")
    # the moments first: their blobs bound n by the payload's size before n sizes anything
    moments = MomentsColumns.from_dict(d.get("moments"))
    if moments.n != n:
        raise IncompatibleError("moments.n", moments.n, f"must equal the series count {n}")
    cols = d.get("labels")
    if not isinstance(cols, list) or len(cols) != width or not all(
            isinstance(col, list) and len(col) == n and all(type(v) is str for v in col)
            for col in cols):
        raise IncompatibleError("labels", f"{name}", f"must be {width} lists of {n} strings")
    labels = list(zip(*cols, strict=True)) if width else [()] * n
    per_series = []
    for key in ("regression", "mixture", "threshold_counts", "extras"):
        v = d.get(key)
        if v is not None and not (isinstance(v, list) and len(v) == n
                                  and (key != "extras" or all(isinstance(e, dict)
                                                                   for e in v))):
            raise IncompatibleError(key, type(v).__name__, f"must be absent or a list of {n}")
        per_series.append(v)
    return StreamColumns(
        name, _strings(d, "fields"), _strings(d, "kinds"), thresholds, labels,
        from_blob(d, "observations", _LE_I8, (n,)), from_blob(d, "version", _LE_I8, (n,)),
        from_blob(d, "last_update", _LE_F8, (n,)),
        from_blob(d, "outliers", _LE_I8, (n, len(thresholds))), moments, *per_series,
        _threshold_columns(d.get("threshold_columns"), n))


def _threshold_columns(v: object, n: int) -> list | None:
    """The (field, ThresholdColumns) pairs of a block (``pack``), checked for shape; their
    rows' values are checked per series when restored (``ThresholdColumns.bad_rows``)."""
    if v is None:
        return None
    if not isinstance(v, list) or not all(isinstance(e, dict) and isinstance(
            e.get("field"), str) for e in v):
        raise IncompatibleError("threshold_columns", type(v).__name__,
                                'must be a list of maps, each with a "field"')
    out = []
    for e in v:
        tc = ThresholdColumns.from_dict(e)
        if tc.n != n:
            raise IncompatibleError(f"threshold_columns.{e['field']}.n", tc.n,
                                    f"must equal the series count {n}")
        out.append((e["field"], tc))
    return out


def threshold_counts(c: StreamColumns) -> list:
    """Per series, its counts at thresholds as ``engine.thresholds_state`` saves them
    (one map per field), from either form of the block; [None] * n when it has none
    (a checkpoint from before thresholds existed). O(n k) Python."""
    if c.threshold_columns is None:
        return c.threshold_counts or [None] * c.n
    m = c.moments
    clocks = [t if h else None for t, h in zip(m.clock.tolist(), m.has_clock.tolist(),
                                               strict=True)]
    counts = m.count.tolist()
    return [[{"field": f, "state": tc.state(i, clocks[i], counts[i]).to_dict()}
             for f, tc in c.threshold_columns] for i in range(c.n)]


def check_stream(st: StreamState, c: StreamColumns) -> None:
    """The stream-wide checks ``restore_series`` makes per series, made once."""
    cfg = st.cfg
    if c.fields != st.field_list:
        raise IncompatibleError("fields", c.fields, f"the stream now has {st.field_list}")
    if c.kinds != st.kinds:
        raise IncompatibleError("kinds", c.kinds, f"the stream now has {st.kinds}")
    width = len(c.labels[0]) if c.labels else len(cfg.topic.labels)
    if width != len(cfg.topic.labels):
        raise IncompatibleError("labels", list(c.labels[0]),
                                f"the topic template now has {list(cfg.topic.labels)}")
    if c.moments.dim != st.dim or c.moments.half_life != cfg.half_life:
        raise IncompatibleError("moments", c.moments.dim,
                                "dimension or half-life differs from the stream's")
    for kind, states in (("regression", c.regression), ("mixture", c.mixture)):
        if (states is None) != (kind not in st.kinds):
            raise IncompatibleError(kind, type(states).__name__,
                                    f"does not match the stream's kinds {st.kinds}")


def restore(st: StreamState, c: StreamColumns) -> tuple[list[Series], list[tuple[str, str]]]:
    """Rebuild the series of ``c`` for stream ``st``.

    Returns the series and (series, reason) for each one dropped: all of them
    when the stream's definition changed incompatibly (fields, estimator kinds,
    label count, dimension, half-life), one when its regression or mixture
    state is malformed or does not fit the stream (``check_estimators``).
    Outlier counts are kept only when the thresholds are unchanged, as
    ``restore_series`` does. O(n d**2).
    """
    try:
        check_stream(st, c)
    except IncompatibleError as exc:
        return [], [(c.where(i, st.cfg.topic.labels), str(exc)) for i in range(c.n)]
    cfg = st.cfg
    name, label_names = st.name, cfg.topic.labels
    keep_outliers = c.thresholds == list(cfg.outlier_sigmas)
    width = len(cfg.outlier_sigmas)
    outliers = c.outliers.tolist() if keep_outliers else None
    regs = c.regression or [None] * c.n
    mixes = c.mixture or [None] * c.n
    counts = threshold_counts(c)
    # a checkpoint from before the stream had a transform: fresh transform states
    extra = c.extras or [{}] * c.n
    levels = bool(st.threshold_at)
    out, dropped = [], []
    rows = zip(c.labels, c.moments.states(), c.observations.tolist(), c.version.tolist(),
               c.last_update.tolist(), regs, mixes, counts, extra, strict=True)
    for i, (labels, m, obs, version, last, reg, mix, tc, ext) in enumerate(rows):
        try:
            reg = None if reg is None else Regression.from_dict(reg)
            mix = None if mix is None else Mixture.from_dict(mix)
            check_estimators(st, reg, mix)
            ths = restore_thresholds(st, tc) if levels else ()
            s = Series(st, labels, m, reg, mix,   # positional: keywords cost here
                       outliers[i] if keep_outliers else [0] * width, obs, version, last,
                       (name, tuple(zip(label_names, labels, strict=True))))
            if ths:
                s.thresholds = ths
            if cfg.transform is not None or cfg.legs:
                fresh = st.new_series(labels)
                s.returns, s.volatility, s.legs = fresh.returns, fresh.volatility, fresh.legs
            restore_extra(s, ext)
        except IncompatibleError as exc:
            dropped.append((c.where(i, st.cfg.topic.labels), str(exc)))
            continue
        out.append(s)
    return out, dropped


def states(c: StreamColumns) -> list[dict]:
    """The series of ``c`` as ``series_state`` dicts (for ``sigmad inspect`` and tests).
    O(n d**2)."""
    out = []
    moments = c.moments.states()
    counts = threshold_counts(c) if c.threshold_columns is not None else c.threshold_counts
    for i in range(c.n):
        out.append(d := {
            "stream": c.stream, "labels": list(c.labels[i]), "fields": c.fields,
            "kinds": c.kinds, "observations": int(c.observations[i]),
            "version": int(c.version[i]), "last_update": float(c.last_update[i]),
            "outliers": c.outliers[i].tolist(), "thresholds": c.thresholds,
            "moments": moments[i].to_dict(),
            "regression": None if c.regression is None else c.regression[i],
            "mixture": None if c.mixture is None else c.mixture[i],
            **({} if c.extras is None else c.extras[i])})
        if counts is not None:
            d["threshold_counts"] = counts[i]
    return out

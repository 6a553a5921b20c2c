"""The live form of a plain stream: every series one row of column arrays.

A stream that keeps only moments, outlier counts and counts at thresholds (no
regression, mixture, transform, legs or sessions) holds its series here rather
than as one object each: a series costs its row of a few arrays, its label values
and one dict slot, and a drain of many quiet series is queued and folded in a few
numpy operations per stream (``moments_columns.fold_rows``, and
``threshold_columns.fold_counts`` for the thresholds), with no Python per series.
Readers get a frozen copy (``snapshot.SeriesBlock``) whose views are built when
read.

Rows wait in ``chunks`` until the flush. A series is created only at the flush,
for rows that passed every check: until then a new label set has a provisional
row (negative), so rejected input leaves no series behind. At the flush, series
with one row fold together by ``fold_rows`` (bit for bit what a ``Moments`` would
do), series with a few rows by ``fold_groups`` (the same formulas and outlier
semantics, equal to rounding); a flush of one busy series, a series with more
than ``group_rows(d)`` rows, and a state outside those two's common case fold as a
``Moments`` of its own, exactly as an object series would.
"""

from __future__ import annotations

import math
from collections.abc import Callable

import numpy as np
from sigmad.daemon.engine.snapshot import SeriesBlock
from sigmad.estimators import (
    MomentsColumns,
    ThresholdColumns,
    batch_aging,
    fold_counts,
    fold_groups,
    fold_rows,
    mahalanobis_rows,
    screen_rows,
)

#: A series of one field with more rows than this in one flush folds as a ``Moments``
#: of its own (``group_rows``): its matrix products beat segment sums per row, and its
#: Python per series (60 - 110 us here, more with thresholds) is amortised. Measured
#: on 1,000 series: the same cost near 800 rows each without thresholds, 1,500 with
#: three (segment sums 80 - 120 ns a row, a series of its own 40 - 60 ns a row plus
#: its Python)
GROUP_ROWS = 1024


def group_rows(d: int) -> int:
    """The most rows a series of d fields folds by segment sums in one flush: those keep
    a d x d product per row, so the cut-off falls as 1,024 / d, and not below 32.
    Measured on 500 weighted series, the two paths cost the same near 700 rows at
    d = 2, 350 at d = 4 and 110 at d = 8. O(1)."""
    return max(32, GROUP_ROWS // d)


#: A flush whose rows are all of one series, more than this, folds it as a ``Moments``
#: of its own with no gathers (a stream of one busy series)
ONE_SERIES_ROWS = 32


def _groups(R: np.ndarray, at: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Positions ``at`` ordered series by series (arrival order within each), and each
    series' start and count in that order. Runs of one series (a batch's rows) are
    sorted as runs, not row by row. O(n + runs log runs)."""
    r = R[at]
    edges = np.flatnonzero(np.r_[True, r[1:] != r[:-1]])
    if edges.shape[0] == 1:   # one series
        return at, np.zeros(1, np.int64), np.array([r.shape[0]])
    ids, lengths = r[edges], np.diff(np.r_[edges, r.shape[0]])
    o = np.argsort(ids, kind="stable")
    ids, first, lengths = ids[o], edges[o], lengths[o]
    ends = np.cumsum(lengths)
    order = at[np.repeat(first - (ends - lengths), lengths) + np.arange(r.shape[0])]
    new = np.r_[True, ids[1:] != ids[:-1]]
    starts = (ends - lengths)[new]
    return order, starts, np.diff(np.r_[starts, r.shape[0]])


def _grown(a: np.ndarray, n: int) -> np.ndarray:
    out = np.zeros((n, *a.shape[1:]), a.dtype)
    out[:a.shape[0]] = a
    return out


class ColumnStore:
    """The series of one plain stream ``st`` (an engine ``StreamState``) as columns.

    Attributes
    ----------
    index : dict
        Label values -> row. Only appended to; replaced whole when series leave.
    labels : list
        Label values per row (the same discipline).
    n : int
        Live series (rows ``0 .. n-1``); arrays hold ``capacity`` rows.
    """

    def __init__(self, st) -> None:
        cfg = st.cfg
        self.st = st
        self.dim = st.dim
        self.index: dict[tuple[str, ...], int] = {}
        self.labels: list[tuple[str, ...]] = []
        self.n = 0
        self.capacity = 0
        self.moments = MomentsColumns.zeros(0, st.dim, cfg.half_life)
        self.observations = np.zeros(0, np.int64)
        self.version = np.zeros(0, np.int64)
        self.last_update = np.zeros(0)
        self.outliers = np.zeros((0, len(cfg.outlier_sigmas)), np.int64)
        # per field with thresholds (st.threshold_at): its counts, row for row
        self.levels = [ThresholdColumns.zeros(0, b, cfg.half_life) for _, b in st.threshold_at]
        self.fresh: dict[tuple[str, ...], int] = {}   # provisional rows: -1, -2, ...
        self.fresh_labels: list[tuple[str, ...]] = []
        # (rows, x (m, d), weights | None, times | None, given | None, arrival); times
        # count only where ``given`` (None: all given)
        self.chunks: list[tuple] = []
        self.singles: list = []      # rows of single observations waiting to be sealed
        self.values: list = []
        self.extras: list = []       # (position, weight | None, time | None)
        self.block: SeriesBlock | None = None

    # ------------------------------------------------------------------ rows
    def row_for(self, labels: tuple[str, ...]) -> int | None:
        """The row of ``labels``: live (>= 0), provisional (< 0, created at the flush
        if a row survives), or None when the stream's max_series is reached. O(1)."""
        r = self.index.get(labels)
        if r is not None:
            return r
        r = self.fresh.get(labels)
        if r is not None:
            return r
        if self.n + len(self.fresh) >= self.st.cfg.max_series:
            return None
        r = self.fresh[labels] = -len(self.fresh_labels) - 1
        self.fresh_labels.append(labels)
        return r

    def _rows_of(self, labels: list[tuple[str, ...]]) -> np.ndarray:
        """The rows of ``labels``, new ones appended (a label set restored while its
        rows waited is live already). O(k)."""
        index = self.index
        if not any(values in index for values in labels):
            return self._append(labels)
        new = [values for values in dict.fromkeys(labels) if values not in index]
        self._append(new)
        return np.array([index[values] for values in labels], np.int64)

    def adopt(self, series: list) -> list:
        """Make restored series (engine ``Series`` of this stream) live, each replacing
        a live one of the same labels; returns those refused because max_series is
        reached (``adopt_columns``). O(len(series) d**2)."""
        if not series:
            return []
        hl = self.st.cfg.half_life
        refused = self.adopt_columns(
            [s.labels for s in series],
            MomentsColumns.of([s.moments for s in series], self.dim, hl),
            np.array([s.observations for s in series], np.int64),
            np.array([s.version for s in series], np.int64),
            np.array([s.last_update for s in series], np.float64),
            np.array([s.outliers for s in series], np.int64).reshape(len(series), -1),
            [ThresholdColumns.of([s.thresholds[j] for s in series], b, hl)
             for j, (_, b) in enumerate(self.st.threshold_at)])
        return [series[i] for i in refused]

    def adopt_columns(self, labels: list[tuple[str, ...]], moments: MomentsColumns,
                      observations: np.ndarray, version: np.ndarray,
                      last_update: np.ndarray, outliers: np.ndarray,
                      levels: list[ThresholdColumns]) -> list[int]:
        """``adopt`` for restored columns (row i is series ``labels[i]``; ``levels``: one
        per field with thresholds, as ``self.levels``): written in a few array
        operations. Returns the rows of ``labels`` refused because max_series is
        reached. O(len(labels) (d**2 + k))."""
        index, limit = self.index, self.st.cfg.max_series
        at, fresh, refused = [], [], []
        room = limit - self.n
        for i, values in enumerate(labels):
            r = index.get(values)
            if r is None:
                if len(fresh) >= room:
                    refused.append(i)
                    continue
                fresh.append(values)
                r = -len(fresh)          # filled in once the new rows exist
            at.append((i, r))
        new = self._append(fresh) if fresh else np.zeros(0, np.int64)
        src = np.array([i for i, _ in at], np.int64)
        dst = np.array([r if r >= 0 else int(new[-r - 1]) for _, r in at], np.int64)
        self.moments.put(dst, moments.take(src))
        self.observations[dst], self.version[dst] = observations[src], version[src]
        self.last_update[dst], self.outliers[dst] = last_update[src], outliers[src]
        for lv, saved in zip(self.levels, levels, strict=True):
            lv.put(dst, saved.take(src))
        return refused

    def _append(self, labels: list[tuple[str, ...]]) -> np.ndarray:
        """New empty rows for ``labels`` (in order); their row numbers. Amortised O(k)."""
        first, need = self.n, self.n + len(labels)
        if need > self.capacity:
            cap = max(need, 2 * self.capacity, 64)
            self.moments = self.moments.resized(cap)
            self.observations = _grown(self.observations, cap)
            self.version = _grown(self.version, cap)
            self.last_update = _grown(self.last_update, cap)
            self.outliers = _grown(self.outliers, cap)
            self.levels = [lv.resized(cap) for lv in self.levels]
            self.capacity = cap
        index = self.index
        for i, values in enumerate(labels, first):
            index[values] = i
        self.labels.extend(labels)
        self.n = need
        return np.arange(first, need)

    # ----------------------------------------------------------------- queue
    def add_single(self, row: int, value, weight: float | None, when: float | None) -> None:
        """Queue one observation (``value``: a float, or d floats)."""
        if weight is not None or when is not None:
            self.extras.append((len(self.singles), weight, when))
        self.singles.append(row)
        self.values.append(value)

    def seal(self, arrival: float) -> None:
        """Turn the waiting single observations into one chunk (arrival order kept)."""
        if not self.singles:
            return
        rows = np.array(self.singles, np.int64)
        x = np.array(self.values, dtype=np.float64).reshape(rows.shape[0], self.dim)
        w = t = given = None
        if self.extras:
            at, ws, ts = zip(*self.extras, strict=True)
            at = list(at)
            if any(v is not None for v in ws):
                w = np.ones(rows.shape[0])
                w[at] = [1.0 if v is None else v for v in ws]
            if any(v is not None for v in ts):
                t = np.full(rows.shape[0], math.nan)
                given = np.zeros(rows.shape[0], bool)
                t[at] = [math.nan if v is None else v for v in ts]
                given[at] = [v is not None for v in ts]
        self.chunks.append((rows, x, w, t, given, arrival))
        self.singles, self.values, self.extras = [], [], []

    def queue(self, rows: np.ndarray | int, x: np.ndarray, w, t, given,
              arrival: float) -> None:
        """Queue rows ``x`` of the series ``rows`` (one row number per row, or one for
        all: a batch of one series)."""
        self.seal(arrival)
        self.chunks.append((rows, x, w, t, given, arrival))

    @property
    def waiting(self) -> bool:
        return bool(self.chunks or self.singles)

    def waiting_rows(self) -> np.ndarray:
        """The live rows with observations waiting for the flush."""
        parts = [np.atleast_1d(c[0]) for c in self.chunks] + [np.array(self.singles, np.int64)]
        rows = np.concatenate(parts)
        return np.unique(rows[rows >= 0])

    # ----------------------------------------------------------------- flush
    def flush(self, now: float, max_abs: float,
              reject: Callable[[str, int, tuple[str, ...]], None]) -> bool:
        """Screen and fold every waiting row; True if any series changed. Rejections
        are reported per series as ``reject(reason, count, labels)``. O(rows d**2),
        plus O(d**2) Python per series with more than one row (see the module notes)."""
        self.seal(now)
        chunks, self.chunks = self.chunks, []
        fresh = self.fresh_labels
        self.fresh, self.fresh_labels = {}, []
        if not chunks:
            return False
        st = self.st
        sizes = [c[1].shape[0] for c in chunks]
        heads = {c[0] for c in chunks if type(c[0]) is int}
        # one series' batches (a busy stream): its row, and no array of rows
        one = heads.pop() if len(heads) == 1 and all(type(c[0]) is int for c in chunks) \
            else None
        R = None if one is not None else np.concatenate(
            [np.full(k, c[0], np.int64) if type(c[0]) is int else c[0]
             for c, k in zip(chunks, sizes, strict=True)])
        X = np.concatenate([c[1] for c in chunks]).astype(np.float64, copy=False)
        W = None
        if any(c[2] is not None for c in chunks):
            W = np.concatenate([np.ones(k) if c[2] is None else c[2]
                                for c, k in zip(chunks, sizes, strict=True)])
        T = G = A = S = None
        if st.time_based or any(c[3] is not None for c in chunks):
            T = np.concatenate([np.full(k, math.nan) if c[3] is None else c[3]
                                for c, k in zip(chunks, sizes, strict=True)])
            G = np.concatenate([np.zeros(k, bool) if c[3] is None else
                                np.ones(k, bool) if c[4] is None else c[4]
                                for c, k in zip(chunks, sizes, strict=True)])
            A = np.concatenate([np.full(k, c[5]) for c, k in zip(chunks, sizes, strict=True)])
            if st.time_based:
                T = np.where(G, T, A)
            elif R is None:   # does the row's series have a time (before screening)?
                S = np.full(X.shape[0], G.any())
            else:
                key = R - R.min()
                S = (np.bincount(key, weights=G) > 0)[key]
        keep, why = screen_rows(X, W, T, G, max_abs)
        if st.limits is not None:
            with np.errstate(invalid="ignore"):
                outside = keep & ~((st.limits[0] <= X) & (st.limits[1] >= X)).all(axis=1)
            if outside.any():
                why.append(("out_of_range", outside))
                keep &= ~outside
        for reason, mask in why:
            if R is None:
                reject(reason, int(np.count_nonzero(mask)), self.labels[one]
                       if one >= 0 else fresh[-one - 1])
            else:
                self._report(reason, R[mask], reject, fresh)
        if not keep.all():
            X = X[keep]
            R = None if R is None else R[keep]
            W = None if W is None else W[keep]
            if T is not None:
                T, G, A = T[keep], G[keep], A[keep]
                S = None if S is None else S[keep]
        if not X.shape[0]:
            return False
        if R is None:
            if one < 0:   # a new series: created now that a row of it survived
                one = int(self._rows_of([fresh[-one - 1]])[0])
            if X.shape[0] > 1:
                self._fold_one(one, slice(None), X, W, T, G, A, S, now)
                return True
            R = np.array([one], np.int64)
        new = R < 0
        if new.any():   # series whose rows survived: created in order of first arrival
            ids, first = np.unique(R[new], return_index=True)
            ids = ids[np.argsort(first)]
            made = np.full(len(fresh), -1, np.int64)
            made[-ids - 1] = self._rows_of([fresh[-i - 1] for i in ids.tolist()])
            R = R.copy()
            R[new] = made[-R[new] - 1]
        self._fold(R, X, W, T, G, A, S, now)
        return True

    def _report(self, reason: str, rows: np.ndarray, reject, fresh: list) -> None:
        ids, counts = np.unique(rows, return_counts=True)
        for r, c in zip(ids.tolist(), counts.tolist(), strict=True):
            reject(reason, c, self.labels[r] if r >= 0 else fresh[-r - 1])

    def _fold(self, R, X, W, T, G, A, S, now: float) -> None:
        """Fold rows (R: their series' rows) in: series with one row by ``fold_rows``,
        series with several by ``fold_groups`` (each scored as an outlier against its
        state before the flush, as the object path scores a batch), the rare state
        outside their common case one by one (``_fold_one``). O(rows d**2)."""
        cfg = self.st.cfg
        hl = cfg.half_life
        # the rows' times as the object path sees them: no time (NaN) where the series
        # sent none; its arrival for a row without one where another of its rows had one
        if T is None or (hl is not None and hl.by_count):
            T1 = None
        elif hl is None:
            T1 = np.where(G, T, np.where(S, A, math.nan))
        else:
            T1 = T
        if R.shape[0] > ONE_SERIES_ROWS and R[0] == R[-1] and (R[0] == R).all():
            # one busy series (a batch stream): as the object path, with no gathers
            self._fold_one(int(R[0]), slice(None), X, W, T, G, A, S, now)
            return
        once = np.bincount(R, minlength=self.n)[R] == 1
        by_one: list[tuple[int, np.ndarray]] = []
        if once.any():
            at = np.flatnonzero(once)
            idx = R[at]
            x = X[at]
            before = self.moments.take(idx)
            w = None if W is None else W[at]
            res = fold_rows(before, x, w, None if T1 is None else T1[at], cfg.correction)
            levels, ok = self._counts(idx, x, w, res, None)
            by_one += [(r, np.array([i])) for r, i in zip(idx[~ok].tolist(),
                                                           at[~ok].tolist(), strict=True)]
            dist = None
            if cfg.outlier_sigmas:
                dist = res.distance if self.dim == 1 else \
                    mahalanobis_rows(before, x, cfg.correction)
            self._write(idx, ok, res.columns, levels, before.count, dist,
                        np.arange(idx.shape[0]), np.ones(idx.shape[0], np.int64), now)
        if not once.all():
            order, starts, counts = _groups(R, np.flatnonzero(~once))
            big = counts > group_rows(self.dim)   # Moments' BLAS products beat sums
            for k in np.flatnonzero(big).tolist():
                by_one.append((int(R[order[starts[k]]]), order[starts[k]:starts[k] + counts[k]]))
            if not big.all():
                if big.any():
                    order = order[np.repeat(~big, counts)]
                    counts = counts[~big]
                    starts = np.cumsum(counts) - counts
                self._fold_groups(R, X, W, T1, order, starts, counts, by_one, now)
        for r, p in by_one:
            self._fold_one(r, p, X, W, T, G, A, S, now)

    def _fold_groups(self, R, X, W, T1, order: np.ndarray, starts: np.ndarray,
                     counts: np.ndarray, by_one: list, now: float) -> None:
        """Fold rows ``order`` (series by series: ``starts``, ``counts``) by
        ``fold_groups``; a series whose state it leaves goes to ``by_one``."""
        cfg = self.st.cfg
        ids = R[order[starts]]
        before = self.moments.take(ids)
        x = X[order]
        w = None if W is None else W[order]
        res = fold_groups(before, x, w, None if T1 is None else T1[order], counts)
        levels, ok = self._counts(ids, x, w, res, starts)
        dist = None
        if cfg.outlier_sigmas:
            group = np.repeat(np.arange(ids.shape[0]), counts)
            dist = mahalanobis_rows(before.take(group), x, cfg.correction)
        self._write(ids, ok, res.columns, levels, before.count, dist, starts, counts, now)
        for k in np.flatnonzero(~ok).tolist():
            by_one.append((int(ids[k]), order[starts[k]:starts[k] + counts[k]]))

    def _counts(self, ids: np.ndarray, x: np.ndarray, w: np.ndarray | None, res,
                starts: np.ndarray | None) -> tuple[list[ThresholdColumns], np.ndarray]:
        """The counts at thresholds of series ``ids`` folded with rows ``x`` (``starts``:
        each series' first row; None: one row each) under the forgetting the moments'
        fold ``res`` applied; and which series both folded (the rest take objects)."""
        ok = res.ok
        decayed = None if res.decayed is w else res.decayed
        levels = []
        for (i, _), lv in zip(self.st.threshold_at, self.levels, strict=True):
            new, fine = fold_counts(lv.take(ids), x[:, i], w, decayed, res.aging, starts,
                                    res.factor)
            levels.append(new)
            ok = ok & fine
        return levels, ok

    def _write(self, ids: np.ndarray, ok: np.ndarray, new: MomentsColumns,
               levels: list[ThresholdColumns], count_before: np.ndarray,
               dist: np.ndarray | None, starts: np.ndarray, counts: np.ndarray,
               now: float) -> None:
        """Write the folded states of series ``ids`` where ``ok``, with their outlier
        counts: rows ``starts[k] .. + counts[k]`` of ``dist`` are series k's."""
        cfg = self.st.cfg
        good = ids[ok]
        if dist is not None:
            warm = ok & (count_before >= cfg.outlier_warmup)
            if warm.any():
                with np.errstate(invalid="ignore"):
                    for j, k in enumerate(cfg.outlier_sigmas):
                        hits = np.add.reduceat(dist > k, starts) if dist.shape[0] else dist
                        self.outliers[ids[warm], j] += hits[warm]
        if not ok.all():   # else (the common case) the folded states go in as they are
            at = np.flatnonzero(ok)
            new, levels = new.take(at), [folded.take(at) for folded in levels]
        self.moments.put(good, new)
        for lv, folded in zip(self.levels, levels, strict=True):
            lv.put(good, folded)
        self.observations[good] += counts[ok]
        self.version[good] += 1
        self.last_update[good] = now

    def _fold_one(self, r: int, p: np.ndarray | slice, X, W, T, G, A, S, now: float) -> None:
        """Fold rows ``p`` (positions in arrival order, or a slice) into series ``r`` as a
        ``Moments`` of its own: the object path's fold, to the same bits."""
        st = self.st
        cfg = st.cfg
        m = self.moments.state(r)
        x = X[p]
        w = None if W is None else W[p]
        t = None
        if T is not None:
            if st.time_based:
                t = T[p]
            elif S[p][0]:   # a row of it had a time: the others take their arrival
                t = np.where(G[p], T[p], A[p])
        if cfg.outlier_sigmas and m.count >= cfg.outlier_warmup:
            dist = m.mahalanobis(x, cfg.correction)
            for j, k in enumerate(cfg.outlier_sigmas):
                self.outliers[r, j] += int(np.count_nonzero(dist > k))
        aging, ths = None, []
        if self.levels:   # the series' estimators share its clock: age the rows once
            aging = batch_aging(m.half_life, m.clock, x.shape[0], t, w)
            ths = [lv.state(r, m.clock, m.count) for lv in self.levels]
        sums = m._fold(x, w, t, aging)   # the batch's sums, for the thresholds to share
        self.moments.set_state(r, m)
        for (i, _), lv, th in zip(st.threshold_at, self.levels, ths, strict=True):
            th._fold(x[:, i], w, t, aging, None if sums is None else sums.field(i))
            lv.set_state(r, th)
        self.observations[r] += x.shape[0]
        self.version[r] += 1
        self.last_update[r] = now

    # ------------------------------------------------------------- read side
    def freeze(self) -> SeriesBlock:
        """The frozen read-out of every series now (copies of n rows). O(n d**2)."""
        st, n = self.st, self.n
        cfg = st.cfg
        self.block = SeriesBlock(
            st.name, tuple(cfg.topic.labels), st.fields, cfg.half_life, cfg.correction,
            tuple(cfg.quantiles), st.quantile_at, tuple(cfg.outlier_sigmas), self.labels,
            self.index, n, self.moments.copy(n), self.observations[:n].copy(),
            self.version[:n].copy(), self.last_update[:n].copy(), self.outliers[:n].copy(),
            st.threshold_at, tuple(lv.copy(n) for lv in self.levels))
        return self.block

    # ------------------------------------------------------------- removal
    def keep_only(self, keep: np.ndarray) -> None:
        """Drop the rows where ``keep`` (n,) is False: new arrays, labels and index
        (blocks already handed out keep theirs); waiting rows are renumbered (none of
        them may be in a dropped row). O(n d**2)."""
        new_row = np.cumsum(keep) - 1
        self.chunks = [((int(new_row[c[0]]) if c[0] >= 0 else c[0]) if type(c[0]) is int
                        else np.where(c[0] >= 0, new_row[np.maximum(c[0], 0)], c[0]), *c[1:])
                       for c in self.chunks]
        self.singles = [int(new_row[r]) if r >= 0 else r for r in self.singles]
        at = np.flatnonzero(keep)
        n = at.shape[0]
        cap = max(n, 64)
        self.moments = self.moments.take(at).resized(cap)
        self.observations = _grown(self.observations[at], cap)
        self.version = _grown(self.version[at], cap)
        self.last_update = _grown(self.last_update[at], cap)
        self.outliers = _grown(self.outliers[at], cap)
        self.levels = [lv.take(at).resized(cap) for lv in self.levels]
        self.labels = [self.labels[i] for i in at.tolist()]
        self.index = {values: i for i, values in enumerate(self.labels)}
        self.n, self.capacity = n, cap

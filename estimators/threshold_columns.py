"""Many ``Thresholds`` states of one field and one set of bounds as arrays: row i is
state i.

A service-level stream keeps, per series, an exact cumulative histogram at a few
fixed bounds and the decayed share above each. Held as one ``Thresholds`` object
per series, every quiet series costs a Python call per flush; held as rows of a
few arrays, a flush of many series folds them in a handful of numpy operations
(``fold_counts``), beside the moments of the same rows (``fold_rows``,
``fold_groups``), whose clocks and forgetting they share.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import NamedTuple

import numpy as np

from .errors import IncompatibleError
from .forgetting import HalfLife
from .moments_columns import aging, blob, from_blob, put_rows, take_rows
from .thresholds import Thresholds, _check_bounds, _saved_order, _upper

__all__ = ["ThresholdColumns", "fold_counts", "normal_exceedance_rows"]

_ARRAYS = ("cumulative", "value_sum", "W", "above", "E")
_LE_F8 = np.dtype("<f8")
_LE_I8 = np.dtype("<i8")


class ThresholdColumns(NamedTuple):
    """n ``Thresholds`` of the same bounds and half-life. The clock and row count are
    the moments' of the same series (the same rows, the same forgetting), so they are
    not kept here: ``state`` takes them."""

    bounds: np.ndarray        # (k,) increasing
    half_life: HalfLife | None
    cumulative: np.ndarray    # (n, k + 1): weighted counts at or below each bound, total
    value_sum: np.ndarray     # (n,): weighted sum of the values
    W: np.ndarray             # (n,): decayed weight sum, in units of 2**E
    above: np.ndarray         # (n, k): decayed weight above each bound, in the same units
    E: np.ndarray             # (n,) int64: scale exponent of the decayed sums

    @property
    def n(self) -> int:
        return self.W.shape[0]

    @classmethod
    def zeros(cls, n: int, bounds: object, half_life: HalfLife | None) -> ThresholdColumns:
        """n empty states (as ``Thresholds(bounds, half_life)``). O(n k)."""
        b = _check_bounds(bounds)
        k = b.size
        return cls(b, half_life, np.zeros((n, k + 1)), np.zeros(n), np.zeros(n),
                   np.zeros((n, k)), np.zeros(n, np.int64))

    @classmethod
    def of(cls, states: Sequence[Thresholds], bounds: object,
           half_life: HalfLife | None) -> ThresholdColumns:
        """Stack ``states`` (each of these bounds and half-life: the caller checked). O(n k)."""
        out = cls.zeros(len(states), bounds, half_life)
        for i, t in enumerate(states):
            out.set_state(i, t)
        return out

    # take and copy build the tuple by position: the fields after the bounds and
    # half-life are the arrays (_ARRAYS), in order
    def take(self, idx: np.ndarray | slice) -> ThresholdColumns:
        """The rows ``idx`` (an index array: copies; a slice: views). O(len(idx) k)."""
        return ThresholdColumns(self.bounds, self.half_life,
                                *[take_rows(a, idx) for a in self[2:]])

    def put(self, idx: np.ndarray | slice, other: ThresholdColumns) -> None:
        """Overwrite rows ``idx`` with the rows of ``other`` (in place). O(len(idx) k)."""
        for name in _ARRAYS:
            put_rows(getattr(self, name), idx, getattr(other, name))

    def copy(self, n: int | None = None) -> ThresholdColumns:
        """A copy of the first ``n`` rows (all: None), sharing no memory. O(n k)."""
        part = slice(None) if n is None else slice(0, n)
        return ThresholdColumns(self.bounds, self.half_life,
                                *[a[part].copy() for a in self[2:]])

    def resized(self, n: int) -> ThresholdColumns:
        """The first min(n, self.n) rows in new arrays of n rows, the rest empty. O(n k)."""
        out = ThresholdColumns.zeros(n, self.bounds, self.half_life)
        k = min(n, self.n)
        out.put(slice(0, k), self.take(slice(0, k)))
        return out

    def state(self, i: int, clock: float | None, count: int) -> Thresholds:
        """Row i as a ``Thresholds`` of its own at the moments' ``clock`` and ``count``
        (no memory shared), bit for bit. O(k)."""
        t = Thresholds.__new__(Thresholds)
        t.bounds, t.half_life, t.clock, t.count = self.bounds, self.half_life, clock, count
        t._cumulative, t._above = self.cumulative[i].copy(), self.above[i].copy()
        t.value_sum, t.W, t.E = float(self.value_sum[i]), float(self.W[i]), int(self.E[i])
        return t

    def set_state(self, i: int, t: Thresholds) -> None:
        """Write ``t`` (of these bounds) into row i, bit for bit. O(k)."""
        self.cumulative[i], self.value_sum[i] = t._cumulative, t.value_sum
        self.W[i], self.above[i], self.E[i] = t.W, t._above, t.E

    def to_dict(self) -> dict:
        """Plain, msgpack-able form: the bounds, the half-life and one little-endian blob
        per array (a checkpoint of many series). ``from_dict(to_dict())`` is exact. O(n k)."""
        return {"bounds": self.bounds.tolist(),
                "half_life": None if self.half_life is None else self.half_life.to_dict(),
                "n": self.n, "cumulative": blob(self.cumulative, _LE_F8),
                "value_sum": blob(self.value_sum, _LE_F8), "W": blob(self.W, _LE_F8),
                "above": blob(self.above, _LE_F8), "scale_exponent": blob(self.E, _LE_I8)}

    @classmethod
    def from_dict(cls, d: object) -> ThresholdColumns:
        """Rebuild from ``to_dict``; IncompatibleError naming the field at fault (bounds,
        half-life, n, a blob of the wrong size). Row values are checked by ``bad_rows``,
        so that one bad series costs only itself. O(n k)."""
        if not isinstance(d, dict):
            raise IncompatibleError("threshold columns", type(d).__name__, "must be a map")
        n = d.get("n")
        if type(n) is not int or n < 0:
            raise IncompatibleError("n", n, "must be an integer >= 0")
        bounds = _check_bounds(d.get("bounds"))
        try:
            half_life = HalfLife.from_dict(d.get("half_life"))
        except (KeyError, TypeError, ValueError) as exc:
            raise IncompatibleError("half_life", d.get("half_life"), f"malformed: {exc}") \
                from None
        k = bounds.size
        cum = from_blob(d, "cumulative", _LE_F8, (n, k + 1))
        fixed, ok = _saved_order(cum)   # out of order in the last bits: put in order
        return cls(bounds, half_life, np.where(ok[:, None], fixed, cum),
                   from_blob(d, "value_sum", _LE_F8, (n,)), from_blob(d, "W", _LE_F8, (n,)),
                   from_blob(d, "above", _LE_F8, (n, k)),
                   from_blob(d, "scale_exponent", _LE_I8, (n,)))

    def bad_rows(self) -> np.ndarray:
        """Rows ``Thresholds.from_dict`` would refuse (n,): a count, sum or decayed sum
        not finite, a count below 0 or below the one at a lower bound by more than
        rounding (``_saved_order``), a scale exponent beyond +-2**40. O(n k)."""
        cum = self.cumulative
        ok = np.isfinite(cum).all(axis=1) & np.isfinite(self.above).all(axis=1) \
            & np.isfinite(self.W) & np.isfinite(self.value_sum) & (cum >= 0.0).all(axis=1) \
            & _saved_order(cum)[1] & (self.E >= -(1 << 40)) \
            & (self.E <= 1 << 40)
        return ~ok

    def observed_shares(self) -> np.ndarray:
        """``Thresholds.observed_share`` of every row (n, k): NaN where empty. O(n k)."""
        with np.errstate(divide="ignore", invalid="ignore"):
            share = np.minimum(np.maximum(self.above / self.W[:, None], 0.0), 1.0)
        share[~(self.W > 0.0)] = np.nan
        return share


def fold_counts(cols: ThresholdColumns, x: np.ndarray, weights: np.ndarray | None,
                decayed: np.ndarray | None, g: np.ndarray | None,
                starts: np.ndarray | None = None,
                factor: np.ndarray | None = None) -> tuple[ThresholdColumns, np.ndarray]:
    """Fold checked values into each of n states at once, as ``Thresholds._fold`` does.

    Parameters
    ----------
    cols : ThresholdColumns
        The n states before the fold (left unchanged).
    x : ndarray (m,)
        The field's values, state by state (``starts``), arrival order within each.
    weights : ndarray (m,) or None
        Row weights, undecayed (None: all 1): what the counters add.
    decayed : ndarray (m,) or None
        Each row's weight times its own decay (None: ``weights``): what the decayed
        sums add, as the moments' fold of the same rows computed it.
    g : ndarray (n,) or None
        Each state's aging, 2**g, before the rows join (None: no aging).
    starts : ndarray (n,) or None
        Where each state's rows begin in ``x`` (None: one row per state, m = n).
    factor : ndarray (n,) or None
        2**g as the moments' fold computed it (``Folded.factor``; None: computed here).

    Returns
    -------
    (ThresholdColumns, ok)
        The new states, and which were folded here: a state with a scale exponent, or
        whose aging would move it (``forgetting.scale_step``), is left to the object.

    Notes
    -----
    Per state: the counters add sum_i w_i [x_i <= b_j], sum_i w_i and sum_i w_i x_i;
    the decayed sums age by 2**g, then add sum_i v_i and sum_i v_i [x_i > b_j].
    With one row per state the same IEEE operations as the object's, so the bits
    agree; with several, segment sums (another order of additions). The comparisons
    and products run bound by bound over all rows (k rows of m): numpy's loops over
    a short last axis of k cost several times more per element. O(m k).
    """
    le = np.greater_equal.outer(cols.bounds, x)   # (k, m): x_i <= b_j
    w = np.ones(x.shape[0]) if weights is None else weights
    v = w if decayed is None else decayed
    counted = le * w
    below = counted if decayed is None else le * v
    total, vx = w, w * x
    if starts is not None:
        counted, total, vx = (np.add.reduceat(a, starts, axis=-1) for a in (counted, w, vx))
        below = counted if decayed is None else np.add.reduceat(below, starts, axis=1)
        v = total if decayed is None else np.add.reduceat(v, starts)
    ok = cols.E == 0
    W, above = cols.W, cols.above
    if g is not None:
        f, ok = aging(W, g, ok, factor)
        W, above = W * f, above * f[:, None]
    cumulative = cols.cumulative.copy()
    cumulative[:, :-1] += counted.T
    cumulative[:, -1] += total
    out = cols._replace(cumulative=cumulative, value_sum=cols.value_sum + vx, W=W + v,
                        above=above + (v - below).T)
    return out, ok


def normal_exceedance_rows(bounds: Sequence[float], means: Sequence[float],
                           variances: Sequence[float]) -> list[tuple[float, ...]]:
    """``thresholds.normal_exceedance`` for many normal models (one per mean and
    variance; a negative variance is NaN), as tuples, to the same bits. O(n k)."""
    return [tuple(_upper(bounds, (1.0,), (m,), (math.sqrt(var) if var >= 0.0 else math.nan,)))
            for m, var in zip(means, variances, strict=True)]

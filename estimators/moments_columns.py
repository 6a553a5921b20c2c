"""Many Moments states of one shape as arrays: row i is state i.

A daemon holds thousands of small ``Moments`` of the same dimension and
half-life. Stacking their states into arrays lets them be saved as a few
binary blobs instead of one map each, rebuilt without re-validating each
one, and read out with one numpy operation per read-out instead of one per
state. Every read-out here gives the same float64 bits as the method of the
same name on each ``Moments``: the same IEEE operations in the same order.
"""

from __future__ import annotations

import math
import operator
from collections.abc import Sequence
from itertools import repeat
from operator import attrgetter
from typing import NamedTuple

import numpy as np

from .errors import IncompatibleError
from .forgetting import LOG2_RANGE, HalfLife
from .moments import Moments, _normal_scores
from .validation import check_saved

_LE_F8 = np.dtype("<f8")
_LE_I8 = np.dtype("<i8")
# the array fields of MomentsColumns, in order
_ARRAYS = ("has_clock", "clock", "count", "W", "W2", "mean", "scatter", "E", "lo")


def _get(name: str, states: Sequence[Moments]) -> list:
    return list(map(attrgetter(name), states))


def _stack(arrays: list[np.ndarray], shape: tuple[int, ...]) -> np.ndarray:
    """The float64 arrays of n states (each of shape ``shape[1:]``) joined into one.

    numpy.concatenate, not ``b"".join`` of their buffers: twice as fast here, but
    numpy keeps a buffer description on every array whose buffer was taken,
    about 64 bytes per state that would stay until the state next changes.
    """
    if not arrays:
        return np.zeros(shape)
    return np.concatenate(arrays).astype(np.float64, copy=False).reshape(shape)


def take_rows(a: np.ndarray, idx: np.ndarray | slice) -> np.ndarray:
    """``a[idx]`` for the rows ``idx`` of ``a`` (an index array: a copy; a slice: a
    view). ``ndarray.take`` for an index array: numpy's fancy indexing of rows of a
    few elements costs about ten times as much (21 against 2.3 us for 1,000 rows of
    2 x 2 here). O(len(idx) row)."""
    if isinstance(idx, slice) or a.ndim == 1 or idx.dtype == bool:
        return a[idx]
    return a.take(idx, axis=0)


def put_rows(a: np.ndarray, idx: np.ndarray | slice, values: np.ndarray) -> None:
    """``a[idx] = values`` for the rows ``idx`` of ``a``, in place, the same bytes where
    numpy's row assignment puts them. Rows of more than one element of a C-contiguous
    array are written each as one opaque item of their bytes: numpy's own row
    assignment costs more there (36 against 22 us for 1,000 rows of four floats
    here; for rows of one element it is the faster, and is kept). O(len(idx) row)."""
    if isinstance(idx, slice) or a.ndim == 1 or a.strides[0] <= a.itemsize \
            or idx.dtype == bool or not idx.shape[0] or not a.flags.c_contiguous \
            or values.shape != (idx.shape[0], *a.shape[1:]):
        a[idx] = values
        return
    item = np.dtype((np.void, a.strides[0]))
    rows = np.ascontiguousarray(values, dtype=a.dtype).reshape(idx.shape[0], -1)
    a.reshape(a.shape[0], -1).view(item)[:, 0][idx] = rows.view(item)[:, 0]


def blob(a: np.ndarray, dtype: np.dtype) -> bytes:
    """The bytes of ``a`` as ``dtype`` (little-endian for saved forms), C order."""
    return np.ascontiguousarray(a, dtype=dtype).tobytes()


def from_blob(d: dict, key: str, dtype: np.dtype, shape: tuple[int, ...]) -> np.ndarray:
    """``d[key]``, a blob of ``dtype`` values, as a writable native array of ``shape``;
    IncompatibleError naming ``key`` when it is not bytes of exactly that size."""
    raw = d.get(key)
    want = math.prod(shape) * dtype.itemsize      # Python ints: a huge claim cannot wrap
    if not isinstance(raw, bytes) or len(raw) != want:
        got = f"{len(raw)} bytes" if isinstance(raw, bytes) else type(raw).__name__
        raise IncompatibleError(key, got, f"must be a binary blob of {want} bytes "
                                          f"(shape {shape})")
    return np.frombuffer(raw, dtype=dtype).astype(dtype.newbyteorder("=")).reshape(shape)


class MomentsColumns(NamedTuple):
    """The states of n ``Moments`` of one dimension and half-life, as arrays.

    Parameters
    ----------
    dim : int
        Fields per observation, shared by every state.
    half_life : HalfLife or None
        Forgetting, shared by every state.
    has_clock : ndarray of bool, shape (n,)
        False where the state's clock is None (it has seen no time yet).
    clock : ndarray, shape (n,)
        The states' clocks (0.0 where ``has_clock`` is False).
    count : ndarray of int64, shape (n,)
        Observations accepted, undecayed.
    W, W2 : ndarray, shape (n,)
        Decayed weight sums and sums of squared weights.
    mean : ndarray, shape (n, dim)
        The stored means (whatever they hold while W is 0).
    scatter : ndarray, shape (n, dim, dim)
        Centred scatter matrices sum(w (x - mu)(x - mu)^T).
    E : ndarray of int64, shape (n,)
        Scale exponents: W and scatter are stored in units of 2**E and W2 in
        units of 2**(2 E), as in ``Moments`` (0 unless a state's weights left
        2**+-100). Saved only when some row has one.
    lo : ndarray, shape (n, dim)
        The low-order parts of the means (``Moments`` keeps mean + lo exactly).
        Saved only when some row has one.

    Notes
    -----
    ``of`` and ``states`` convert from and to ``Moments`` exactly (bit for
    bit). The read-outs follow ``Moments``' own formulas element-wise: the
    divisor of the scatter is W ("none"), W - 1 ("frequency") or W - W2/W
    ("reliability"), NaN where it is not > 0; the Kish effective sample size
    is W**2/W2; the normal-model quantile is mu + sigma Phi^-1(q). Every
    operation costs O(n d**2) in a handful of numpy calls.

    References
    ----------
    Kish, L. (1965). Survey Sampling. Wiley.

    Examples
    --------
    >>> a, b = Moments(), Moments()
    >>> a.update([1.0, 2.0, 3.0]); b.update([10.0, 20.0])
    >>> cols = MomentsColumns.of([a, b], dim=1, half_life=None)
    >>> cols.means()[:, 0].tolist(), cols.variances("none")[:, 0].tolist()
    ([2.0, 15.0], [0.6666666666666666, 25.0])
    >>> [float(m.mean[0]) for m in MomentsColumns.from_dict(cols.to_dict()).states()]
    [2.0, 15.0]
    """

    dim: int
    half_life: HalfLife | None
    has_clock: np.ndarray
    clock: np.ndarray
    count: np.ndarray
    W: np.ndarray
    W2: np.ndarray
    mean: np.ndarray
    scatter: np.ndarray
    E: np.ndarray
    lo: np.ndarray

    kind = "moments_columns"
    version = 1

    @property
    def n(self) -> int:
        return self.W.shape[0]

    # ------------------------------------------------------------- building
    @classmethod
    def of(cls, states: Sequence[Moments], dim: int,
           half_life: HalfLife | None) -> MomentsColumns:
        """Stack ``states`` (each of dimension ``dim`` and ``half_life``). O(n d**2).

        Raises IncompatibleError naming the first state of another shape.
        """
        n = len(states)
        # attribute reads by C-level map and equality by list.count (identity first): the
        # states of one stream share their half-life object, so this is cheap per state
        dims, half_lives = _get("dim", states), _get("half_life", states)
        if dims.count(dim) != n or half_lives.count(half_life) != n:
            i = next(i for i, m in enumerate(states)
                     if m.dim != dim or m.half_life != half_life)
            raise IncompatibleError(f"states[{i}]", states[i].dim,
                                    f"must have dimension {dim} and half-life {half_life}")
        clocks = _get("clock", states)
        has_clock = np.fromiter(map(operator.is_not, clocks, repeat(None)), bool, n)
        clock = np.array(clocks, dtype=np.float64).reshape(n)   # None becomes NaN
        clock[~has_clock] = 0.0
        count = np.fromiter(map(attrgetter("count"), states), np.int64, n)
        W = np.fromiter(map(attrgetter("W"), states), np.float64, n)
        W2 = np.fromiter(map(attrgetter("W2"), states), np.float64, n)
        mean = _stack(_get("_mean", states), (n, dim))
        scatter = _stack(_get("_scatter", states), (n, dim, dim))
        E = np.fromiter(map(attrgetter("E"), states), np.int64, n)
        lo = _stack(_get("_lo", states), (n, dim))
        return cls(dim, half_life, has_clock, clock, count, W, W2, mean, scatter, E, lo)

    @classmethod
    def zeros(cls, n: int, dim: int, half_life: HalfLife | None) -> MomentsColumns:
        """n empty states (as ``Moments(dim, half_life)``). O(n d**2)."""
        return cls(dim, half_life, np.zeros(n, bool), np.zeros(n), np.zeros(n, np.int64),
                   np.zeros(n), np.zeros(n), np.zeros((n, dim)), np.zeros((n, dim, dim)),
                   np.zeros(n, np.int64), np.zeros((n, dim)))

    # take and copy build the tuple by position: the fields after dim and half-life are
    # the arrays (_ARRAYS), in order (cheaper than _replace's keywords every flush)
    def take(self, idx: np.ndarray | slice) -> MomentsColumns:
        """The rows ``idx`` (an index array: copies; a slice: views). O(len(idx) d**2)."""
        return MomentsColumns(self.dim, self.half_life,
                              *[take_rows(a, idx) for a in self[2:]])

    def put(self, idx: np.ndarray | slice, other: MomentsColumns) -> None:
        """Overwrite rows ``idx`` with the rows of ``other`` (in place). O(len(idx) d**2)."""
        for name in _ARRAYS:
            put_rows(getattr(self, name), idx, getattr(other, name))

    def copy(self, n: int | None = None) -> MomentsColumns:
        """A copy of the first ``n`` rows (all: None), sharing no memory. O(n d**2)."""
        part = slice(None) if n is None else slice(0, n)
        return MomentsColumns(self.dim, self.half_life, *[a[part].copy() for a in self[2:]])

    def resized(self, n: int) -> MomentsColumns:
        """The first min(n, self.n) rows in new arrays of n rows, the rest empty states
        (the live form's capacity). O(n d**2)."""
        out = MomentsColumns.zeros(n, self.dim, self.half_life)
        k = min(n, self.n)
        out.put(slice(0, k), self.take(slice(0, k)))
        return out

    def state(self, i: int) -> Moments:
        """Row i as a ``Moments`` of its own (no memory shared), bit for bit. O(d**2)."""
        m = Moments.__new__(Moments)
        m.dim, m.half_life = self.dim, self.half_life
        m.clock = float(self.clock[i]) if self.has_clock[i] else None
        m.count, m.W, m.W2, m.E = int(self.count[i]), float(self.W[i]), float(self.W2[i]), \
            int(self.E[i])
        m._mean, m._lo, m._scatter = self.mean[i].copy(), self.lo[i].copy(), \
            self.scatter[i].copy()
        return m

    def set_state(self, i: int, m: Moments) -> None:
        """Write ``m`` (of this dimension and half-life) into row i, bit for bit. O(d**2)."""
        self.has_clock[i] = m.clock is not None
        self.clock[i] = 0.0 if m.clock is None else m.clock
        self.count[i], self.W[i], self.W2[i], self.E[i] = m.count, m.W, m.W2, m.E
        self.mean[i], self.lo[i], self.scatter[i] = m._mean, m._lo, m._scatter

    def states(self) -> list[Moments]:
        """One ``Moments`` per row, equal bit for bit to the stacked ones. O(n d**2).

        The rows were checked for shape when the columns were built; values
        are taken as they are, as ``Moments.from_dict`` takes them.
        """
        dim, half_life = self.dim, self.half_life
        new = Moments.__new__
        out = []
        append = out.append
        # each state gets its own rows of one private copy: views, no per-state allocation
        mean = np.array(self.mean, dtype=np.float64)
        scatter = np.array(self.scatter, dtype=np.float64)
        clocks = [c if h else None for c, h in zip(self.clock.tolist(), self.has_clock.tolist(),
                                                   strict=True)]
        lo = np.array(self.lo, dtype=np.float64)
        for i, (clock, count, w, w2, e) in enumerate(zip(clocks, self.count.tolist(),
                                                         self.W.tolist(), self.W2.tolist(),
                                                         self.E.tolist(), strict=True)):
            m = new(Moments)
            m.dim, m.half_life, m.clock, m.count, m.W, m.W2 = dim, half_life, clock, count, w, w2
            m.E, m._mean, m._lo, m._scatter = e, mean[i], lo[i], scatter[i]
            append(m)
        return out

    # ------------------------------------------------------------ read-outs
    def _exponents(self) -> np.ndarray:
        """E clipped to what ldexp takes (beyond +-2,200 every float64 has under- or
        overflowed anyway)."""
        return np.clip(self.E, -2200, 2200)

    def weight_sums(self) -> tuple[np.ndarray, np.ndarray]:
        """(W, W2) of every row in plain units, as ``Moments.weight_sum`` and
        ``weight_sq_sum`` (inf where they overflow float64, 0 where they underflow)."""
        if not self.E.any():
            return self.W.copy(), self.W2.copy()
        e = np.clip(self.E, -4400, 4400)
        with np.errstate(over="ignore", under="ignore"):
            return np.ldexp(self.W, e), np.ldexp(self.W2, 2 * e)

    def sums_at(self, t: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """(W, W2, per-field scatter) of every row aged to event time t, never backwards,
        in plain units: ``forgetting.sums_at`` row by row, to the same bits (count-based
        forgetting and none do not move with time). O(n d)."""
        w, w2 = self.weight_sums()
        scatter = self.scatters()
        hl = self.half_life
        if hl is None or hl.by_count:
            return w, w2, scatter
        with np.errstate(invalid="ignore"):
            g = np.where(self.has_clock & (t > self.clock), -(t - self.clock) / hl.length,
                         0.0)
        f = _powers_of_two(g)
        return w * f, w2 * f * f, scatter * f[:, None]

    def means(self) -> np.ndarray:
        """Weighted means (n, d); NaN rows where W is 0, as ``Moments.mean``."""
        return np.where((self.W > 0.0)[:, None], self.mean, np.nan)

    def divisors(self, correction: str = "reliability") -> np.ndarray:
        """``Moments.scatter_divisor`` of every row (n,) in its stored units 2**E (those
        of ``W`` and ``scatter``); NaN where it is not > 0."""
        W, W2 = self.W, self.W2
        if correction == "none":
            div = W.copy()
        elif correction == "frequency":
            with np.errstate(over="ignore"):      # 1 in units of 2**E: inf for tiny W
                div = W - np.ldexp(1.0, -self._exponents()) if self.E.any() else W - 1.0
        elif correction == "reliability":
            with np.errstate(divide="ignore", invalid="ignore"):
                div = np.where(W > 0.0, W - W2 / W, 0.0)
        else:
            raise IncompatibleError("correction", correction,
                                    'must be "none", "frequency" or "reliability"')
        div[~(div > 0.0)] = np.nan
        return div

    def scatters(self) -> np.ndarray:
        """The diagonals of the scatter matrices (n, d), as ``Moments.scatter``."""
        diag = np.diagonal(self.scatter, axis1=1, axis2=2)
        return np.ldexp(diag, self._exponents()[:, None]) if self.E.any() else diag.copy()

    def variances(self, correction: str = "reliability") -> np.ndarray:
        """Per-field variances (n, d) under a correction, as ``Moments.variance``."""
        return np.diagonal(self.scatter, axis1=1, axis2=2) / self.divisors(correction)[:, None]

    def stddevs(self, correction: str = "reliability") -> np.ndarray:
        """Per-field standard deviations (n, d), NaN where the variance is not >= 0,
        as ``SeriesView.stddev``."""
        v = self.variances(correction)
        with np.errstate(invalid="ignore"):
            return np.where(v >= 0.0, np.sqrt(np.abs(v)), np.nan)

    def covariances(self, correction: str = "reliability") -> np.ndarray:
        """Covariance matrices (n, d, d), as ``Moments.covariance``."""
        return self.scatter / self.divisors(correction)[:, None, None]

    def correlations(self) -> np.ndarray:
        """Pearson correlation matrices (n, d, d), as ``Moments.correlation``."""
        s = np.sqrt(np.diagonal(self.scatter, axis1=1, axis2=2))
        with np.errstate(divide="ignore", invalid="ignore"):
            r = self.scatter / (s[:, :, None] * s[:, None, :])
        return np.clip(r, -1.0, 1.0)

    def effective_samples(self) -> np.ndarray:
        """Kish effective sample sizes W**2/W2 (n,); 0 where W2 is 0."""
        with np.errstate(divide="ignore", invalid="ignore"):
            return np.where(self.W2 > 0.0, self.W * self.W / self.W2, 0.0)

    def quantiles(self, qs: Sequence[float], correction: str = "reliability") -> np.ndarray:
        """Normal-model quantiles (n, len(qs), d), as ``Moments.quantiles`` row by row."""
        z = _normal_scores(tuple(qs))
        sd = np.sqrt(self.variances(correction))
        return self.means()[:, None, :] + z[None, :, None] * sd[:, None, :]

    # --------------------------------------------------------- persistence
    def to_dict(self) -> dict:
        """Plain, versioned, msgpack-able form: each column one little-endian binary blob.
        ``from_dict(to_dict())`` is exact. O(n d**2)."""
        return {
            "kind": self.kind, "version": self.version, "dim": self.dim, "n": self.n,
            "half_life": None if self.half_life is None else self.half_life.to_dict(),
            "has_clock": blob(self.has_clock, np.dtype("u1")),
            "clock": blob(self.clock, _LE_F8), "count": blob(self.count, _LE_I8),
            "W": blob(self.W, _LE_F8), "W2": blob(self.W2, _LE_F8),
            "mean": blob(self.mean, _LE_F8), "scatter": blob(self.scatter, _LE_F8),
        } | ({"scale_exponent": blob(self.E, _LE_I8)} if self.E.any() else {}) \
            | ({"mean_lo": blob(self.lo, _LE_F8)} if self.lo.any() else {})

    @classmethod
    def from_dict(cls, d: object) -> MomentsColumns:
        """Rebuild columns from ``to_dict``; raises IncompatibleError naming the field at
        fault (wrong kind or version, a blob of the wrong length). O(n d**2)."""
        check_saved(d, cls.kind, cls.version)
        dim, n = d.get("dim"), d.get("n")
        if type(dim) is not int or dim < 1:
            raise IncompatibleError("dim", dim, "must be an integer >= 1")
        if type(n) is not int or n < 0:
            raise IncompatibleError("n", n, "must be an integer >= 0")
        try:
            half_life = HalfLife.from_dict(d.get("half_life"))
        except (KeyError, TypeError, ValueError) as exc:
            raise IncompatibleError("half_life", d.get("half_life"), f"malformed: {exc}") \
                from None
        has_clock = from_blob(d, "has_clock", np.dtype("u1"), (n,))
        if (has_clock > 1).any():
            raise IncompatibleError("has_clock", int(has_clock.max()), "must be 0 or 1")
        return cls(dim, half_life, has_clock.astype(bool), from_blob(d, "clock", _LE_F8, (n,)),
                   from_blob(d, "count", _LE_I8, (n,)), from_blob(d, "W", _LE_F8, (n,)),
                   from_blob(d, "W2", _LE_F8, (n,)), from_blob(d, "mean", _LE_F8, (n, dim)),
                   from_blob(d, "scatter", _LE_F8, (n, dim, dim)),
                   from_blob(d, "scale_exponent", _LE_I8, (n,)) if "scale_exponent" in d
                   else np.zeros(n, np.int64),
                   from_blob(d, "mean_lo", _LE_F8, (n, dim)) if "mean_lo" in d
                   else np.zeros((n, dim)))


class Folded(NamedTuple):
    """What ``fold_rows`` and ``fold_groups`` give: the new columns, which states they
    folded (the others must take ``Moments`` one by one: their states are not in
    ``columns`` as folded), the outlier distance of each row under its state before
    the fold (``fold_rows``; None from ``fold_groups``), and the forgetting they
    applied, for estimators that share it (``threshold_columns.fold_counts``): each
    state's aging 2**g (None: none) and each row's weight times its own decay (None:
    the weights as given), and the factor 2**g itself (None: no aging)."""

    columns: MomentsColumns
    ok: np.ndarray
    distance: np.ndarray | None
    aging: np.ndarray | None = None
    decayed: np.ndarray | None = None
    factor: np.ndarray | None = None


def _powers_of_two(g: np.ndarray) -> np.ndarray:
    """2**g elementwise as Python's float power computes it (numpy's ``power`` differs in
    the last bit for about one g in twenty here; the states must match ``Moments``)."""
    return np.array([2.0 ** v for v in g.tolist()]) if g.size else np.ones(0)


def aging(W: np.ndarray, g: np.ndarray, ok: np.ndarray,
          factor: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray]:
    """The factor 2**g by which each state's stored sums age (``forgetting.scale_step``
    with the scale kept), and ``ok`` False where the aging would move the scale (the
    aged weight sum ``W`` would fall below 2**-100): those are left to the objects.
    Shared by every estimator folded in columns; ``factor``, when given, is the
    factor another estimator of the same states already computed from the same g
    (``Folded.factor``: one Python float power per state, not one per estimator).
    O(n)."""
    aged = g != 0.0
    ok = ok & (~aged | (np.frexp(W)[1] + g > -LOG2_RANGE))
    if factor is not None:
        return factor, ok
    f = np.ones(g.shape[0])
    f[aged] = _powers_of_two(g[aged])
    return f, ok


def _aged(W: np.ndarray, W2: np.ndarray, scatter: np.ndarray, g: np.ndarray,
          ok: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """W, W2 and the scatter of each state aged by 2**g (``Moments._age``), ``ok`` as
    ``aging`` gives it, and the factor. O(n d**2)."""
    f, ok = aging(W, g, ok)
    return W * f, W2 * (f * f), scatter * f[:, None, None], ok, f


def fold_rows(cols: MomentsColumns, x: np.ndarray, weights: np.ndarray | None,
              times: np.ndarray | None, correction: str = "reliability") -> Folded:
    """Fold one checked row into each of n states at once, as ``Moments._fold`` does for
    a batch of one row per state, to the same float64 bits.

    Parameters
    ----------
    cols : MomentsColumns
        The n states before the fold (left unchanged).
    x : ndarray, shape (n, dim)
        One row per state, already checked (finite, within bounds).
    weights : ndarray, shape (n,), or None
        Row weights (None: all 1).
    times : ndarray, shape (n,), or None
        Event times; NaN where a row has none (None: no row has one).
    correction : str
        The covariance correction of the outlier distance.

    Notes
    -----
    Per state, the pairwise (West / Chan) update of ``Moments``: age W, W2 and C by
    f = 2**g (g from the half-life and the clocks, ``forgetting.advance``), then with
    the row's weight w, delta = x - mu, total = W + w: the mean moves by
    delta w / total from the heavier side (kept as mean + lo), C gains
    delta delta^T W w / total, W becomes total and W2 gains w**2. The same IEEE
    operations in the same order per element, so the bits agree. A state outside
    the common case (a scale exponent E other than 0, a weight or a new weight sum
    outside [2**-100, 2**100], an aging that would move the scale, a row weight that
    decayed to 0) is marked not ok and left to ``Moments``. ``distance`` is
    ``Moments.mahalanobis`` of each row under its state before the fold (d = 1;
    NaN for d > 1, which the caller computes itself). O(n d**2), a few numpy calls
    and one Python float power per aged state.

    References
    ----------
    West, D. H. D. (1979). Updating mean and variance estimates: an improved
    method. Communications of the ACM 22(9), 532-535.
    Chan, T. F., Golub, G. H., LeVeque, R. J. (1983). Algorithms for computing
    the sample variance: analysis and recommendations. The American
    Statistician 37(3), 242-247.

    Examples
    --------
    >>> a, b = Moments(), Moments()
    >>> a.update([1.0, 2.0, 3.0]); b.update([10.0, 20.0])
    >>> out = fold_rows(MomentsColumns.of([a, b], 1, None), np.array([[4.0], [30.0]]),
    ...                 None, None)
    >>> out.ok.tolist(), out.columns.means()[:, 0].tolist()
    ([True, True], [2.5, 20.0])
    """
    n, dim = x.shape
    hl = cols.half_life
    W, W2, scatter = cols.W, cols.W2, cols.scatter
    ok = cols.E == 0
    # the outlier distance under the state before the fold (Moments.mahalanobis, d = 1)
    if dim == 1:
        with np.errstate(divide="ignore", invalid="ignore"):
            cov = cols.covariances(correction)[:, 0, 0]
            dist = np.where((W > 0.0) & (cov > 0.0),
                            np.abs(x[:, 0] - cols.mean[:, 0]) / np.sqrt(cov), np.nan)
    else:
        dist = np.full(n, np.nan)
    clock, has_clock = cols.clock, cols.has_clock
    g = factor = None
    v = weights
    if hl is None:
        if times is not None:
            timed = ~np.isnan(times)
            clock = np.where(timed, np.where(has_clock, np.maximum(clock, times), times),
                             clock)
            has_clock = has_clock | timed
    elif hl.by_count:
        clock = np.where(has_clock, clock, 0.0) + 1
        has_clock = np.ones(n, bool)
        g = np.full(n, -1 / hl.length)
    else:
        new_clock = np.where(has_clock, np.maximum(clock, times), times)
        g = np.where(has_clock, -(new_clock - clock) / hl.length, 0.0)
        rf = np.exp2(-(new_clock - times) / hl.length)
        v = rf if weights is None else weights * rf
        clock, has_clock = new_clock, np.ones(n, bool)
    if g is not None:
        W, W2, scatter, ok, factor = _aged(W, W2, scatter, g, ok)
    wb = np.ones(n) if v is None else v
    ok &= (wb >= 2.0 ** -100) & (wb <= 2.0 ** 100)
    total = W + wb
    fresh = W == 0.0
    mean, lo = cols.mean, cols.lo
    delta = (x - mean) - lo
    light = (wb <= W)[:, None]
    with np.errstate(divide="ignore", invalid="ignore"):
        part = np.where(light, lo + delta * (wb / total)[:, None],
                        -(delta * (W / total)[:, None]))
        base = np.where(light, mean, x)
        new = base + part
        new_lo = part - (new - base)
        spread = (delta[:, :, None] * delta[:, None, :]) * (W * wb / total)[:, None, None]
    mean = np.where(fresh[:, None], x, new)
    lo = np.where(fresh[:, None], 0.0, new_lo)
    scatter = np.where(fresh[:, None, None], 0.0, scatter + spread)
    W2 = W2 + wb * wb
    ok &= (total >= 2.0 ** -100) & (total <= 2.0 ** 100)
    out = MomentsColumns(dim, hl, has_clock, clock, cols.count + 1, total, W2, mean, scatter,
                         cols.E, lo)
    return Folded(out, ok, dist, g, v, factor)


def fold_groups(cols: MomentsColumns, x: np.ndarray, weights: np.ndarray | None,
                times: np.ndarray | None, counts: np.ndarray) -> Folded:
    """Fold a batch of rows into each of n states at once, as ``Moments._fold`` does for
    a batch of two or more rows per state, equal to it up to rounding.

    Parameters
    ----------
    cols : MomentsColumns
        The n states before the fold (left unchanged).
    x : ndarray, shape (m, dim)
        The rows, state by state: state k's ``counts[k]`` rows (>= 2 each) follow
        state k-1's, in arrival order; already checked.
    weights : ndarray, shape (m,), or None
        Row weights (None: all 1).
    times : ndarray, shape (m,), or None
        Event times; NaN where a row has none (as ``fold_rows``; with time-based
        forgetting every row has one, the caller stamps the rest).
    counts : ndarray of int, shape (n,)

    Returns
    -------
    Folded
        The new states, and which states were folded here (``ok``): a state outside
        the common case (scale exponent E other than 0, an aging or a weight sum that
        would move the scale, row weights beyond 2**+-100) is left to ``Moments``;
        no distances; the aging and the decayed row weights applied.

    Notes
    -----
    Per state, ``take_batch`` (the clock moves to the latest row, the state ages by
    2**g, each row weighs its weight times its own decay), then the batch's weighted
    mean and centred scatter about its first row (Chan, Golub & LeVeque's shift)
    combined with the state's by the pairwise update (West), the mean kept as
    mean + lo. Segment sums (``np.add.reduceat``) stand in for each batch's own
    sums: the same formulas, another order of additions. O(m dim**2).

    References
    ----------
    Chan, T. F., Golub, G. H., LeVeque, R. J. (1983). Algorithms for computing the
    sample variance: analysis and recommendations. The American Statistician
    37(3), 242-247.

    Examples
    --------
    >>> a, b = Moments(), Moments()
    >>> a.update([1.0, 2.0]); b.update([10.0])
    >>> out, ok, *_ = fold_groups(MomentsColumns.of([a, b], 1, None),
    ...                       np.array([[3.0], [4.0], [20.0], [30.0]]), None, None,
    ...                       np.array([2, 2]))
    >>> ok.tolist(), out.means()[:, 0].tolist(), out.variances("none")[:, 0].tolist()
    ([True, True], [2.5, 20.0], [1.25, 66.66666666666667])
    """
    n, dim = cols.n, cols.dim
    m = x.shape[0]
    starts = np.cumsum(counts) - counts
    group = np.repeat(np.arange(n), counts)
    hl = cols.half_life
    W, W2, scatter = cols.W, cols.W2, cols.scatter
    clock, has_clock = cols.clock, cols.has_clock
    ok = cols.E == 0
    v = weights
    g = factor = None
    if hl is None:
        if times is not None:
            with np.errstate(invalid="ignore"):
                latest = np.fmax.reduceat(times, starts)      # NaN only where none has one
            timed = ~np.isnan(latest)
            clock = np.where(timed, np.where(has_clock, np.maximum(clock, latest), latest),
                             clock)
            has_clock = has_clock | timed
    elif hl.by_count:
        start = np.where(has_clock, clock, 0.0)
        clock, has_clock = start + counts, np.ones(n, bool)
        g = -counts / hl.length
        age = (starts + counts - 1)[group] - np.arange(m)    # rows after this one
        rf = np.exp2(-age.astype(np.float64) / hl.length)
        v = rf if weights is None else weights * rf
    else:
        latest = np.maximum.reduceat(times, starts)
        new_clock = np.where(has_clock, np.maximum(clock, latest), latest)
        g = np.where(has_clock, -(new_clock - clock) / hl.length, 0.0)
        rf = np.exp2(-(new_clock[group] - times) / hl.length)
        v = rf if weights is None else weights * rf
        clock, has_clock = new_clock, np.ones(n, bool)
    if g is not None:
        W, W2, scatter, ok, factor = _aged(W, W2, scatter, g, ok)
    base = x[starts]
    xc = x - base[group]
    if v is None:
        wb = counts.astype(np.float64)
        w2b = wb
        shift = np.add.reduceat(xc, starts) / wb[:, None]
        xc -= shift[group]
        cb = np.add.reduceat(xc[:, :, None] * xc[:, None, :], starts)
    else:
        top = np.maximum.reduceat(v, starts)
        ok &= (top >= 2.0 ** -100) & (top <= 2.0 ** 100)
        wb = np.add.reduceat(v, starts)
        w2b = np.add.reduceat(v * v, starts)
        with np.errstate(divide="ignore", invalid="ignore"):
            shift = np.add.reduceat(v[:, None] * xc, starts) / wb[:, None]
        xc -= shift[group]
        cb = np.add.reduceat((v[:, None, None] * xc[:, :, None]) * xc[:, None, :], starts)
    some = wb > 0.0                       # a batch that decayed to nothing only ages
    total = W + wb
    fresh = W == 0.0
    mean, lo = cols.mean, cols.lo
    delta = (base - mean) + (shift - lo)
    light = (wb <= W)[:, None]
    with np.errstate(divide="ignore", invalid="ignore"):
        part = np.where(light, lo + delta * (wb / total)[:, None],
                        shift - delta * (W / total)[:, None])
        start = np.where(light, mean, base)
        new = start + part
        new_lo = part - (new - start)
        spread = (delta[:, :, None] * delta[:, None, :]) * (W * wb / total)[:, None, None]
    first_mean = base + shift
    new_mean = np.where(fresh[:, None], first_mean, new)
    new_lo = np.where(fresh[:, None], shift - (first_mean - base), new_lo)
    new_scatter = np.where(fresh[:, None, None], cb, scatter + spread + cb)
    keep = ~some
    out = MomentsColumns(
        dim, hl, has_clock, clock, cols.count + counts, np.where(keep, W, total),
        np.where(keep, W2, W2 + w2b), np.where(keep[:, None], mean, new_mean),
        np.where(keep[:, None, None], scatter, new_scatter), cols.E,
        np.where(keep[:, None], lo, new_lo))
    ok &= keep | ((total >= 2.0 ** -100) & (total <= 2.0 ** 100))
    return Folded(out, ok, None, g, v, factor)


def mahalanobis_rows(cols: MomentsColumns, x: np.ndarray,
                     correction: str = "reliability") -> np.ndarray:
    """``Moments.mahalanobis`` of row k of ``x`` (n, d) under state k of ``cols``, for
    every k at once, to the same bits: NaN where W is 0 or the covariance is undefined
    or singular. O(n d**3) in a few batched numpy calls.

    Examples
    --------
    >>> a = Moments(2)
    >>> a.update([[0.0, 0.0], [2.0, 0.0], [0.0, 2.0], [2.0, 2.0]])
    >>> cols = MomentsColumns.of([a], 2, None)
    >>> bool(mahalanobis_rows(cols, np.array([[3.0, 1.0]]), "none")[0]
    ...      == a.mahalanobis([[3.0, 1.0]], "none")[0])
    True
    """
    n, dim = x.shape
    out = np.full(n, np.nan)
    live = cols.W > 0.0
    if not live.any():
        return out
    at = np.flatnonzero(live)
    part = cols.take(at)
    diff = x[at] - part.mean
    with np.errstate(divide="ignore", invalid="ignore"):
        cov = part.covariances(correction)
    if dim == 1:
        c = cov[:, 0, 0]
        with np.errstate(divide="ignore", invalid="ignore"):
            out[at] = np.where(c > 0, np.abs(diff[:, 0]) / np.sqrt(c), np.nan)
        return out
    good = np.isfinite(cov).all(axis=(1, 2))
    try:
        chol = np.linalg.cholesky(np.where(good[:, None, None], cov, np.eye(dim)))
    except np.linalg.LinAlgError:   # some covariance is singular: those rows one by one
        chol = None
    if chol is None:
        for i in at.tolist():
            out[i] = cols.state(i).mahalanobis(x[i:i + 1], correction)[0]
        return out
    z = np.linalg.solve(chol, diff[:, :, None])[:, :, 0]
    out[at] = np.where(good, np.sqrt((z * z).sum(axis=1)), np.nan)
    return out

"""Online weighted mean vector and covariance matrix with exponential forgetting."""

from __future__ import annotations

import functools
import math
from statistics import NormalDist
from typing import Literal

import numpy as np

from .errors import IncompatibleError
from .forgetting import (
    BatchAging,
    BatchSums,
    HalfLife,
    age_to,
    batch_exponent,
    ldexp,
    merge_clocks,
    rescale_exponent,
    scale_step,
    take_batch,
    true_sum,
    unit,
)
from .validation import as_rows, check_batch, check_saved, saved_exponent

Correction = Literal["none", "frequency", "reliability"]
CORRECTIONS: tuple[str, ...] = ("none", "frequency", "reliability")
_STD_NORMAL = NormalDist()


@functools.lru_cache(maxsize=256)
def _normal_scores(qs: tuple[float, ...]) -> np.ndarray:
    """Phi^-1(q) for each q (a stream's quantile list is fixed: cached)."""
    for q in qs:
        if not 0.0 < q < 1.0:
            raise IncompatibleError("q", q, "must lie strictly between 0 and 1")
    z = np.array([_STD_NORMAL.inv_cdf(q) for q in qs])
    z.flags.writeable = False
    return z


class Moments:
    """Weighted, exponentially forgotten mean and covariance of d-dimensional rows.

    Parameters
    ----------
    dim : int
        Number of fields per observation (d >= 1).
    half_life : HalfLife or None
        Forgetting; None keeps every observation at full weight.

    Notes
    -----
    The state is the weight sum W = sum(w), the sum of squared weights
    W2 = sum(w**2), the mean mu and the centred scatter matrix
    C = sum(w (x - mu)(x - mu)^T), all over decayed weights. A batch is reduced
    to its own (W_b, mu_b, C_b) in two centred passes and folded in with the
    pairwise update

        delta = mu_b - mu
        mu   <- mu + delta * W_b / (W + W_b)
        C    <- C + C_b + delta delta^T * W W_b / (W + W_b)

    which for a batch of one is West's weighted form of Welford's update.
    Forgetting multiplies W and C by f = 2**(-dt/h) and W2 by f**2, so the
    Kish effective sample size W**2/W2 and the corrections stay right.

    Precision over months: a batch is centred on its first row before any sum
    (Chan, Golub & LeVeque's shifted data), and the mean is kept as an
    unevaluated sum mean + lo of two floats, so that each step keeps every
    digit and the spread of data at an offset of 1e10 keeps the digits of a
    two-pass computation (``mean`` reads the first float of the pair). W, W2
    and C are stored in units of a power of two 2**E that moves when W would
    leave [2**-100, 2**100]: weights of any size in [1e-300, 1e300] and
    silences of any length (10,000 half-lives: a factor 2**-10000) change no
    estimate, where a plain float would underflow to an empty state.
    ``weight_sum`` and ``scatter`` report the true sums (0 or inf where those
    leave float64). E and lo are saved only when not 0, so an older saved form
    reads as before.

    Covariance corrections divide C by:

    - "none": W (maximum likelihood),
    - "frequency": W - 1 (weights are repeat counts),
    - "reliability": W - W2/W (weights express trust; n - 1 for unit weights).

    Update, merge and every read-out cost O(n d**2) for a batch of n, O(d**2)
    otherwise.

    References
    ----------
    Welford, B. P. (1962). Note on a method for calculating corrected sums of
    squares and products. Technometrics 4(3), 419-420.
    West, D. H. D. (1979). Updating mean and variance estimates: an improved
    method. Communications of the ACM 22(9), 532-535.
    Chan, T. F., Golub, G. H., LeVeque, R. J. (1983). Algorithms for computing
    the sample variance: analysis and recommendations. The American
    Statistician 37(3), 242-247.
    Kish, L. (1965). Survey Sampling. Wiley.
    Dekker, T. J. (1971). A floating-point technique for extending the
    available precision. Numerische Mathematik 18, 224-242 (Fast2Sum).

    Examples
    --------
    >>> m = Moments()
    >>> m.update([2.0, 4.0, 4.0, 4.0, 5.0, 5.0, 7.0, 9.0])
    >>> float(m.mean[0]), float(m.stddev("none")[0])
    (5.0, 2.0)
    >>> m.effective_samples
    8.0
    """

    __slots__ = ("dim", "half_life", "clock", "count", "W", "W2", "E", "_mean", "_lo",
                 "_scatter")
    kind = "moments"
    version = 1

    def __init__(self, dim: int = 1, half_life: HalfLife | None = None) -> None:
        if not isinstance(dim, int) or dim < 1:
            raise IncompatibleError("dim", dim, "must be an integer >= 1")
        self.dim = dim
        self.half_life = half_life
        self.clock: float | None = None   # event time (or observation count) of the state
        self.count = 0                     # observations accepted, undecayed
        self.W = 0.0                       # stored in units of 2**E (see Notes)
        self.W2 = 0.0                      # in units of 2**(2 E)
        self.E = 0
        self._mean = np.zeros(dim)
        self._lo = np.zeros(dim)           # the mean's low-order part: mean + _lo is exact
        self._scatter = np.zeros((dim, dim))   # in units of 2**E

    # ------------------------------------------------------------------ updates
    def update(self, x: object, weights: object = None, times: object = None) -> None:
        """Fold in a batch of n rows (n, or n x d); a single observation is a batch of one.

        Raises a subclass of EstimatorError naming the value for a wrong shape,
        NaN/inf, a weight that is not finite and > 0, or a non-finite time; a
        rejected batch changes nothing. O(n d**2).
        """
        b = check_batch(x, self.dim, weights, times)
        self._fold(b.x, b.weights, b.times)

    def _fold(self, x: np.ndarray, w: np.ndarray | None, t: np.ndarray | None,
              aging: BatchAging | None = None) -> BatchSums | None:
        """Fold in rows already checked (the daemon's path; ``aging``: as
        ``forgetting.take_batch`` takes it). Returns the batch's sums when they are of
        the rows' own weights (no decay within the batch, no rescaling) and it had
        more than one row: what the series' thresholds count (``Thresholds._fold``'s
        ``sums``); else None."""
        n = x.shape[0]
        if n == 0:
            return None
        v = take_batch(self, n, t, w, aging)
        if n == 1:                # one row is its own mean, with no scatter
            wv = 1.0 if v is None else float(v[0])
            if wv > 0.0:
                eb = 0 if 2.0 ** -100 <= wv <= 2.0 ** 100 else rescale_exponent(wv)
                wv = math.ldexp(wv, -eb) if eb else wv
                self._combine(wv, wv * wv, x[0], None, None, eb)
            return None
        # shifted by the first row (Chan, Golub & LeVeque): constant data is exactly
        # constant, and an offset costs no digits of the batch mean
        xc = x - x[0]
        eb = 0
        if v is None:
            wb, w2b = float(n), float(n)
            about = xc.sum(axis=0)
            shift = about / n     # the bits of xc.mean(axis=0): its sum over n
            xc -= shift
            cb = xc.T @ xc
        else:
            eb = batch_exponent(v)
            if eb:                # weights beyond 2**+-100: summed in units of 2**eb
                v = np.ldexp(v, -eb)
            wb = float(v.sum())
            if not wb > 0.0:      # every row has decayed to nothing
                return None
            w2b = float(v @ v)
            about = v @ xc
            shift = about / wb
            xc -= shift
            cb = (xc.T * v) @ xc
        self._combine(wb, w2b, x[0], shift, cb, eb)
        return BatchSums(wb, x[0], about) if v is w and not eb else None

    def _combine(self, wb: float, w2b: float, base: np.ndarray, shift: np.ndarray | None,
                 cb: np.ndarray | None, eb: int) -> None:
        """Fold in a part of weight wb (units 2**eb), mean base + shift and scatter cb
        (a single row: shift and cb None)."""
        wa = self.W
        if eb != self.E:
            if wa > 0.0:          # the lighter side is expressed in the heavier's units
                top = max(self.E, eb)
                self._rescale(self.E - top)
                wa = self.W
                wb, w2b = math.ldexp(wb, eb - top), math.ldexp(w2b, 2 * (eb - top))
                cb = None if cb is None else ldexp(cb, eb - top)
            else:
                self.E = eb
        total = wa + wb
        if wa == 0.0:
            if shift is None:
                self._mean, self._lo = np.array(base, dtype=np.float64), np.zeros(self.dim)
            else:
                mean = base + shift
                self._lo = shift - (mean - base)     # exact while |shift| <= |base|
                self._mean = mean
            self._scatter = np.zeros((self.dim, self.dim)) if cb is None else \
                np.array(cb, dtype=np.float64)
        else:
            mean, lo = self._mean, self._lo
            delta = base - mean - lo if shift is None else (base - mean) + (shift - lo)
            # the mean as an unevaluated sum mean + lo (Dekker's Fast2Sum, exact while
            # |mean| >= |lo + step|, the case of an offset): the pair keeps every digit
            # of each step, so an offset of 1e10 costs none of the spread's. Step from
            # the heavier side: wb/total rounds to 1 when wb dwarfs wa by 2**53, and
            # the lighter side's share must then be added to the heavier's mean
            if wb <= wa:
                part = lo + delta * (wb / total)
            else:
                mean, back = base, delta * (wa / total)
                part = -back if shift is None else shift - back
            new = mean + part
            self._lo = part - (new - mean)
            self._mean = new
            scatter = self._scatter + np.outer(delta, delta) * (wa * wb / total)
            self._scatter = scatter if cb is None else scatter + cb
        self.W = total
        self.W2 = self.W2 + w2b
        if not 2.0 ** -100 <= total <= 2.0 ** 100:
            self._rescale(-rescale_exponent(total))

    def _rescale(self, k: int) -> None:
        """Multiply the stored sums by 2**k and move the scale the other way (exact)."""
        if k:
            self.W = math.ldexp(self.W, k)
            self.W2 = math.ldexp(self.W2, 2 * k)
            self._scatter = ldexp(self._scatter, k)
            self.E -= k

    def _age(self, g: float) -> None:
        k, f = scale_step(self.W, g)
        self.E += k
        self.W *= f
        self.W2 *= f * f
        self._scatter = self._scatter * f

    def decay_to(self, t: float) -> Moments:
        """Age the state to event time t (never backwards); returns self.

        With count-based forgetting or none, time alone changes nothing. O(d**2).
        """
        age_to(self, t)
        return self

    def merge(self, other: Moments) -> Moments:
        """Fold another state in, exactly as if this one had seen both streams; returns self.

        Both states are first aged to the later clock. With count-based
        forgetting each is taken as of its own latest observation and the
        clocks add. O(d**2).
        """
        if not isinstance(other, Moments) or other.dim != self.dim \
                or other.half_life != self.half_life:
            raise IncompatibleError("other", getattr(other, "dim", other),
                                    "must be Moments of the same dimension and half-life")
        o = merge_clocks(self, other)
        if o.W > 0.0:
            self._combine(o.W, o.W2, o._mean, o._lo, o._scatter, o.E)
        return self

    def copy(self) -> Moments:
        new = Moments.__new__(Moments)
        for name in self.__slots__:
            setattr(new, name, getattr(self, name))
        new._mean = self._mean.copy()
        new._lo = self._lo.copy()
        new._scatter = self._scatter.copy()
        return new

    # ---------------------------------------------------------------- read-outs
    @property
    def weight_sum(self) -> float:
        """Decayed sum of weights W (the pooling weight); 0 or inf where it leaves
        float64's range (the estimates do not: see Notes)."""
        return self.W if self.E == 0 else true_sum(self.W, self.E)

    @property
    def weight_sq_sum(self) -> float:
        """Decayed sum of squared weights W2."""
        return self.W2 if self.E == 0 else true_sum(self.W2, 2 * self.E)

    @property
    def effective_samples(self) -> float:
        """Kish effective sample size W**2 / W2 (0 for an empty state)."""
        return self.W * self.W / self.W2 if self.W2 > 0.0 else 0.0

    @property
    def scatter(self) -> np.ndarray:
        """Per-field centred scatter sum(w (x - mu)**2) (d,), the diagonal of C."""
        diag = self._scatter.diagonal()
        return diag.copy() if self.E == 0 else ldexp(diag, self.E)

    @property
    def mean(self) -> np.ndarray:
        """Weighted mean vector (d,); NaN while empty."""
        return self._mean.copy() if self.W > 0.0 else np.full(self.dim, np.nan)

    def scatter_divisor(self, correction: Correction = "reliability") -> float:
        """What the centred scatter is divided by under a correction (NaN when undefined)."""
        div = self._divisor(correction)
        return div if self.E == 0 else true_sum(div, self.E)

    def _divisor(self, correction: Correction) -> float:
        """``scatter_divisor`` in the stored units 2**E (those of W and the scatter)."""
        if correction == "none":
            div = self.W
        elif correction == "frequency":
            div = self.W - (1.0 if self.E == 0 else unit(self.E))
        elif correction == "reliability":
            div = self.W - self.W2 / self.W if self.W > 0.0 else 0.0
        else:
            raise IncompatibleError("correction", correction,
                                    'must be "none", "frequency" or "reliability"')
        return div if div > 0.0 else math.nan

    def covariance(self, correction: Correction = "reliability") -> np.ndarray:
        """Covariance matrix (d, d) under a correction; NaN while it is undefined."""
        return self._scatter / self._divisor(correction)

    def variance(self, correction: Correction = "reliability") -> np.ndarray:
        """Per-field variances (d,): the diagonal of ``covariance``."""
        return self._scatter.diagonal() / self._divisor(correction)

    def stddev(self, correction: Correction = "reliability") -> np.ndarray:
        """Per-field standard deviations (d,)."""
        return np.sqrt(self.variance(correction))

    def correlation(self) -> np.ndarray:
        """Pearson correlation matrix (d, d); the correction cancels. NaN where a
        field has no spread."""
        s = np.sqrt(np.diagonal(self._scatter))
        with np.errstate(divide="ignore", invalid="ignore"):
            r = self._scatter / np.outer(s, s)
        return np.clip(r, -1.0, 1.0)

    def standard_error(self, correction: Correction = "reliability") -> np.ndarray:
        """Standard error of the mean per field.

        sqrt(variance / W) under "frequency" (the weights count observations), and
        sqrt(variance / n_eff) with Kish's effective sample size otherwise.
        """
        n = self.weight_sum if correction == "frequency" else self.effective_samples
        return np.sqrt(self.variance(correction) / n) if n > 0 else np.full(self.dim, np.nan)

    def quantile(self, q: float, correction: Correction = "reliability") -> np.ndarray:
        """Per-field q-quantile under the normal model: mean + stddev * Phi^-1(q)."""
        if not 0.0 < q < 1.0:
            raise IncompatibleError("q", q, "must lie strictly between 0 and 1")
        return self.mean + self.stddev(correction) * _STD_NORMAL.inv_cdf(q)

    def quantiles(self, qs: tuple[float, ...] | list[float],
                  correction: Correction = "reliability") -> np.ndarray:
        """``quantile`` for several q at once: an array (len(qs), d). O(len(qs) d)."""
        z = _normal_scores(tuple(qs))
        return self.mean + np.outer(z, self.stddev(correction))

    def mahalanobis(self, x: object, correction: Correction = "reliability") -> np.ndarray:
        """Distance of rows x (n, d) from the mean in units of the covariance: |z| for
        d = 1. NaN while the covariance is undefined or singular. O(n d**2 + d**3)."""
        a = as_rows(x, self.dim)
        if not self.W > 0.0:
            return np.full(a.shape[0], np.nan)
        cov = self.covariance(correction)
        diff = a - self._mean
        if self.dim == 1:
            with np.errstate(divide="ignore", invalid="ignore"):
                return np.abs(diff[:, 0]) / math.sqrt(cov[0, 0]) if cov[0, 0] > 0 \
                    else np.full(a.shape[0], np.nan)
        try:
            chol = np.linalg.cholesky(cov)
        except np.linalg.LinAlgError:
            return np.full(a.shape[0], np.nan)
        z = np.linalg.solve(chol, diff.T)
        return np.sqrt((z * z).sum(axis=0))

    # ------------------------------------------------------------- persistence
    def to_dict(self) -> dict:
        """Plain, versioned, msgpack-able form; ``from_dict(to_dict())`` is exact."""
        return {
            "kind": self.kind, "version": self.version, "dim": self.dim,
            "half_life": None if self.half_life is None else self.half_life.to_dict(),
            "clock": self.clock, "count": self.count, "W": self.W, "W2": self.W2,
            "mean": self._mean.tolist(), "scatter": self._scatter.tolist(),
        } | ({"scale_exponent": self.E} if self.E else {}) \
            | ({"mean_lo": self._lo.tolist()} if self._lo.any() else {})

    @classmethod
    def from_dict(cls, d: dict) -> Moments:
        """Rebuild a state from ``to_dict``; raises IncompatibleError on a foreign form."""
        check_saved(d, cls.kind, cls.version)
        try:
            m = cls(int(d["dim"]), HalfLife.from_dict(d["half_life"]))
            m.clock = None if d["clock"] is None else float(d["clock"])
            m.count = int(d["count"])
            m.W, m.W2 = float(d["W"]), float(d["W2"])
            m.E = saved_exponent(d)
            m._mean = np.asarray(d["mean"], dtype=np.float64).reshape(m.dim)
            m._scatter = np.asarray(d["scatter"], dtype=np.float64).reshape(m.dim, m.dim)
            if "mean_lo" in d:
                m._lo = np.asarray(d["mean_lo"], dtype=np.float64).reshape(m.dim)
        except (KeyError, TypeError, ValueError) as exc:
            raise IncompatibleError("moments", type(exc).__name__, f"malformed state: {exc}") \
                from None
        return m

    def __repr__(self) -> str:
        return (f"Moments(dim={self.dim}, W={self.W:.6g}, n_eff={self.effective_samples:.6g}, "
                f"mean={np.array2string(self.mean, precision=6)})")

"""Online weighted least squares with exponential forgetting, by updating a QR factor."""

from __future__ import annotations

import functools
import math

import numpy as np

from .errors import IncompatibleError, ShapeError
from .forgetting import (
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
from .moments import Correction
from .validation import as_rows, check_saved, check_xy, saved_exponent

# Past this (column-equilibrated) condition number the solution carries fewer
# than about four correct digits (Householder QR error grows as cond * eps), so
# the design is treated as rank-deficient and every read-out answers NaN.
MAX_CONDITION = 1e12


@functools.cache
def _upper_mask(k1: int) -> np.ndarray:
    mask = np.triu(np.ones((k1, k1)))
    mask.setflags(write=False)
    return mask


class Regression:
    """Least-squares line y = b + w.x + noise over a weighted, forgotten stream.

    Parameters
    ----------
    p : int
        Number of explanatory fields x (p >= 1).
    intercept : bool
        Fit the intercept b (default); False fits a line through the origin.
    half_life : HalfLife or None
        Forgetting, as for Moments; None keeps every observation at full weight.

    Notes
    -----
    With k = p + 1 terms (k = p without the intercept) the state is the
    (k+1) x (k+1) upper-triangular factor R of the weighted design
    sqrt(v) * [1 | X | y], where v = w * 2**(-age/h) are the decayed weights,
    together with W = sum(v), W2 = sum(v**2), the count and the clock. A batch
    is folded in by Householder QR of R stacked on its scaled rows; forgetting
    multiplies R by sqrt(f) (and W by f, W2 by f**2). X'VX is never formed:
    its condition number is the square of the design's, so the normal
    equations lose half the digits (see the Longley test).

    From R = [[R_d, z], [0, rho]]:

        coefficients  beta = R_d^-1 z            (intercept first, then slopes)
        RSS           sum v r**2 = rho**2
        (X'VX)^-1     = R_d^-1 R_d^-T
        TSS           sum v (y - ybar)**2 = |z[1:]|**2 + rho**2   (|z|**2 + rho**2
                      about zero without the intercept, as statsmodels does)
        R**2          1 - RSS / TSS

    Residual variance s**2 = RSS / D and coefficient covariance
    s**2 * g * (X'VX)^-1, with, for each correction,

    - "none":        D = W,              g = 1        (maximum likelihood)
    - "frequency":   D = W - k,          g = 1        (weights are repeat counts)
    - "reliability": D = W - k * W2 / W, g = W2 / W   (weights express trust, or age)

    The reliability degrees of freedom are n_eff - k with the Kish effective
    sample size n_eff = W**2 / W2, so s**2 g = RSS / (n_eff - k): statsmodels'
    WLS scale with the raw count n replaced by n_eff. For unit weights without
    forgetting all of "frequency" and "reliability" reduce to RSS / (n - k) and
    s**2 (X'X)^-1, ordinary least squares. For k = 1 the reliability form is
    exact (it is Moments' W - W2/W); for k > 1 it takes the weights as
    independent of x.

    The standardised prediction residual of a new point (x, y) is
    (y - x.beta) / (s * sqrt(1 + g x'(X'VX)^-1 x)), the residual over its
    standard error if the point is not part of the fit, which is how the
    daemon scores outliers before folding the point in.

    A state that is rank-deficient (fewer than k observations, collinear
    fields, or an equilibrated condition number over 1e12) answers NaN for
    every read-out and ``ok`` is False; one with no residual degrees of freedom
    left gives coefficients but NaN for every uncertainty. No read-out raises.

    W, W2 and R are stored in units of 2**E, 2**(2 E) and 2**(E/2) (E even),
    moved when W would leave [2**-100, 2**100], as in ``Moments``: weights in
    [1e-300, 1e300] and silences of any length leave every estimate that does
    not depend on the weights' unit unchanged (the "none" and "frequency"
    standard errors scale as W**-1/2 by definition).

    Update costs O(n k**2) for a batch of n; merge and read-outs O(k**3).

    References
    ----------
    Golub, G. H. (1965). Numerical methods for solving linear least squares
    problems. Numerische Mathematik 7, 206-216.
    Bjorck, A. (1996). Numerical Methods for Least Squares Problems. SIAM
    (updating the QR factor by appending rows; the normal equations' squared
    condition number).
    Golub, G. H., Van Loan, C. F. (2013). Matrix Computations, 4th ed. Johns
    Hopkins University Press.
    Longley, J. W. (1967). An appraisal of least squares programs for the
    electronic computer from the point of view of the user. JASA 62, 819-841.
    Kish, L. (1965). Survey Sampling. Wiley.

    Examples
    --------
    >>> r = Regression(1)
    >>> r.update([0.0, 1.0, 2.0, 3.0], [1.0, 3.1, 4.9, 7.0])
    >>> round(r.intercept, 6), round(float(r.coefficients[0]), 6)
    (1.03, 1.98)
    >>> r.residual_dof(), round(r.residual_stddev(), 6), round(r.r_squared, 6)
    (2.0, 0.094868, 0.999083)
    """

    __slots__ = ("p", "has_intercept", "half_life", "clock", "count", "W", "W2", "E", "_R",
                 "_fit")
    kind = "regression"
    version = 1

    def __init__(self, p: int, intercept: bool = True,
                 half_life: HalfLife | None = None) -> None:
        if not isinstance(p, int) or isinstance(p, bool) or p < 1:
            raise IncompatibleError("p", p, "must be an integer >= 1")
        if not isinstance(intercept, bool):
            raise IncompatibleError("intercept", intercept, "must be True or False")
        self.p = p
        self.has_intercept = intercept
        self.half_life = half_life
        self.clock: float | None = None   # event time (or observation count) of the state
        self.count = 0                     # observations accepted, undecayed
        self.W = 0.0                       # stored in units of 2**E (E even), as Moments
        self.W2 = 0.0                      # in units of 2**(2 E)
        self.E = 0
        self._R = np.zeros((self.terms + 1, self.terms + 1))   # in units of 2**(E/2)
        self._fit: tuple | None = None     # solved read-outs, dropped on every change

    @property
    def terms(self) -> int:
        """Number of fitted terms k: p slopes plus the intercept when it is on."""
        return self.p + self.has_intercept

    # ------------------------------------------------------------------ updates
    def update(self, X: object, y: object, weights: object = None, times: object = None) -> None:
        """Fold in a batch: rows X (n, p) (a vector of n when p == 1), responses y (n,).

        Raises ShapeError, NonFiniteError (naming "X" or "y"), WeightError or
        TimeError on the first bad value; a rejected batch changes nothing.
        O(n k**2).
        """
        b = check_xy(X, y, self.p, weights, times)
        self._fold(b.x, b.weights, b.times)

    def _fold(self, xy: np.ndarray, w: np.ndarray | None, t: np.ndarray | None) -> None:
        """Fold in checked rows [X | y] (n, p + 1) (the daemon's path)."""
        n = xy.shape[0]
        if n == 0:
            return
        v = take_batch(self, n, t, w)
        self._fit = None
        if self.has_intercept:
            rows = np.empty((n, self.p + 2))
            rows[:, 0] = 1.0
            rows[:, 1:] = xy
        else:
            rows = np.array(xy, dtype=np.float64)
        eb = 0
        if v is None:
            wb = w2b = float(n)
        else:
            eb = batch_exponent(v, even=True)
            if eb:                # weights beyond 2**+-100: summed in units of 2**eb
                v = np.ldexp(v, -eb)
            wb = float(v.sum())
            if not wb > 0.0:      # every row has decayed to nothing
                return
            w2b = float(v @ v)
            rows *= np.sqrt(v)[:, None]
        self._add(rows, wb, w2b, eb)

    def _add(self, rows: np.ndarray, wb: float, w2b: float, eb: int) -> None:
        """Stack scaled rows (or another R) of weight wb, in units of 2**eb, onto R."""
        if eb != self.E:
            if self.W > 0.0:      # the lighter side is expressed in the heavier's units
                top = max(self.E, eb)
                self._rescale(self.E - top)
                wb, w2b = math.ldexp(wb, eb - top), math.ldexp(w2b, 2 * (eb - top))
                rows = ldexp(rows, (eb - top) // 2)
            else:
                self.E = eb
        self._absorb(rows)
        self.W += wb
        self.W2 += w2b
        if not 2.0 ** -100 <= self.W <= 2.0 ** 100:
            self._rescale(-rescale_exponent(self.W, even=True))

    def _rescale(self, k: int) -> None:
        """Multiply the stored sums by 2**k (k even) and move the scale the other way."""
        if k:
            self.W = math.ldexp(self.W, k)
            self.W2 = math.ldexp(self.W2, 2 * k)
            self._R = ldexp(self._R, k // 2)
            self.E -= k

    def _absorb(self, rows: np.ndarray) -> None:
        """Re-triangularise R stacked on scaled rows (Householder QR, R only)."""
        k1 = self._R.shape[0]
        # "raw" skips numpy's own triu copy: R is the upper triangle of h.T, and a
        # cached mask extracts it in a third of the time (this is the per-call cost)
        h, _ = np.linalg.qr(np.vstack((self._R, rows)), mode="raw")
        self._R = h.T[:k1] * _upper_mask(k1)

    def _age(self, g: float) -> None:
        k, f = scale_step(self.W, g, even=True)
        self.E += k
        self.W *= f
        self.W2 *= f * f
        self._R = self._R * math.sqrt(f)
        self._fit = None

    def decay_to(self, t: float) -> Regression:
        """Age the state to event time t (never backwards); returns self.

        With count-based forgetting or none, time alone changes nothing. O(k**2).
        """
        age_to(self, t)
        return self

    def merge(self, other: Regression) -> Regression:
        """Fold another state in, exactly as if this one had seen both streams; returns self.

        Both states are first aged to the later clock, then their R factors are
        stacked and re-triangularised. With count-based forgetting each is taken
        as of its own latest observation and the clocks add. O(k**3).
        """
        if not isinstance(other, Regression) or other.p != self.p \
                or other.has_intercept != self.has_intercept \
                or other.half_life != self.half_life:
            raise IncompatibleError("other", getattr(other, "p", other),
                                    "must be a Regression of the same p, intercept and half-life")
        o = merge_clocks(self, other)
        self._fit = None
        if o.W > 0.0:
            self._add(o._R, o.W, o.W2, o.E)
        return self

    def copy(self) -> Regression:
        new = Regression.__new__(Regression)
        for name in self.__slots__:
            setattr(new, name, getattr(self, name))
        new._R = self._R.copy()
        return new

    # ---------------------------------------------------------------- solving
    def _solved(self) -> tuple[float, np.ndarray | None, np.ndarray | None]:
        """(condition, beta, R_d^-1), with beta and R_d^-1 None when rank-deficient.

        Cached until the state changes: the daemon scores every micro-batch.
        """
        if self._fit is None:
            k = self.terms
            rd = self._R[:k, :k]
            norms = np.sqrt((rd * rd).sum(axis=0))
            if self.W > 0.0 and self.count >= k and (norms > 0.0).all():
                s = np.linalg.svd(rd / norms, compute_uv=False)
                cond = float(s[0] / s[-1]) if s[-1] > 0.0 else math.inf
            else:
                cond = math.inf
            if cond < MAX_CONDITION:
                sol = np.linalg.solve(rd, np.column_stack((self._R[:k, k], np.eye(k))))
                self._fit = (cond, sol[:, 0], sol[:, 1:])
            else:
                self._fit = (cond, None, None)
        return self._fit

    def _divisor(self, correction: Correction) -> tuple[float, float]:
        """(D, g) of the Notes: RSS / D is the residual variance, g scales (X'VX)^-1."""
        k = self.terms
        # in the stored units: RSS and D are both 2**E times their true values, and
        # (X'VX)^-1 is 2**-E times, so g carries 2**-E (it is 1 while E is 0)
        one = 1.0 if self.E == 0 else unit(self.E)
        if correction == "none":
            return self.W, one
        if correction == "frequency":
            return self.W - k * one, one
        if correction == "reliability":
            if not self.W > 0.0:
                return math.nan, math.nan
            return self.W - k * self.W2 / self.W, self.W2 / self.W
        raise IncompatibleError("correction", correction,
                                'must be "none", "frequency" or "reliability"')

    def _variance(self, correction: Correction) -> tuple[float, float]:
        """(s**2, g), s**2 NaN while rank-deficient or without degrees of freedom."""
        d, g = self._divisor(correction)
        if self._solved()[1] is None or not d > 0.0:
            return math.nan, g
        rho = self._R[-1, -1]
        return float(rho * rho) / d, g

    # ---------------------------------------------------------------- read-outs
    @property
    def ok(self) -> bool:
        """True when every read-out is a number: full rank and n_eff > k."""
        return self._solved()[1] is not None and self.residual_dof() > 0.0

    @property
    def condition(self) -> float:
        """2-norm condition number of the design with its columns scaled to unit
        length (the figure Householder QR's error grows with); inf when singular."""
        return self._solved()[0]

    @property
    def weight_sum(self) -> float:
        """Decayed sum of weights W; 0 or inf where it leaves float64's range (the
        estimates do not)."""
        return self.W if self.E == 0 else true_sum(self.W, self.E)

    @property
    def effective_samples(self) -> float:
        """Kish effective sample size W**2 / W2 (0 for an empty state)."""
        return self.W * self.W / self.W2 if self.W2 > 0.0 else 0.0

    def _beta(self) -> np.ndarray:
        beta = self._solved()[1]
        return np.full(self.terms, np.nan) if beta is None else beta

    @property
    def coefficients(self) -> np.ndarray:
        """Slopes w (p,), in the order of the x fields; NaN while rank-deficient."""
        return self._beta()[int(self.has_intercept):].copy()

    @property
    def intercept(self) -> float:
        """Intercept b; NaN when it is off or the state is rank-deficient."""
        return float(self._beta()[0]) if self.has_intercept else math.nan

    def _term_stderr(self, correction: Correction) -> np.ndarray:
        s2, g = self._variance(correction)
        rinv = self._solved()[2]
        if rinv is None or math.isnan(s2):
            return np.full(self.terms, np.nan)
        return np.sqrt(s2 * g * (rinv * rinv).sum(axis=1))

    def stderr(self, correction: Correction = "reliability") -> np.ndarray:
        """Standard errors of the slopes (p,) under a correction; NaN when undefined."""
        return self._term_stderr(correction)[int(self.has_intercept):]

    def intercept_stderr(self, correction: Correction = "reliability") -> float:
        """Standard error of the intercept; NaN when it is off or undefined."""
        return float(self._term_stderr(correction)[0]) if self.has_intercept else math.nan

    def residual_dof(self, correction: Correction = "reliability") -> float:
        """Residual degrees of freedom: W ("none"), W - k ("frequency") or
        n_eff - k ("reliability"; n - k for unit weights). May be <= 0."""
        if correction == "reliability":
            return self.effective_samples - self.terms
        div = self._divisor(correction)[0]
        return div if self.E == 0 else true_sum(div, self.E)

    def residual_stddev(self, correction: Correction = "reliability") -> float:
        """Noise standard deviation s = sqrt(RSS / D); NaN when undefined."""
        return math.sqrt(self._variance(correction)[0])

    @property
    def r_squared(self) -> float:
        """1 - RSS/TSS, TSS centred with the intercept and about zero without it."""
        if self._solved()[1] is None:
            return math.nan
        col = self._R[int(self.has_intercept):, -1]
        tss = float(col @ col)
        rho = self._R[-1, -1]
        return 1.0 - float(rho * rho) / tss if tss > 0.0 else math.nan

    def _design(self, X: object) -> np.ndarray:
        a = as_rows(X, self.p, "X")
        return np.column_stack((np.ones(a.shape[0]), a)) if self.has_intercept else a

    def predict(self, X: object) -> np.ndarray:
        """Fitted values b + w.x for rows X (n,); NaN while rank-deficient. O(n k)."""
        return self._design(X) @ self._beta()

    def standardized_residual(self, X: object, y: object,
                              correction: Correction = "reliability") -> np.ndarray:
        """(y - prediction) / its standard error s * sqrt(1 + g x'(X'VX)^-1 x), per row (n,).

        NaN while the residual variance is undefined; never raises on the
        state (only on a bad X or y). O(n k**2).
        """
        a = self._design(X)
        b = np.asarray(y, dtype=np.float64).reshape(-1)
        if b.shape != (a.shape[0],):
            raise ShapeError("y", f"shape {b.shape}",
                             f"must hold one response per row ({a.shape[0]})")
        s2, g = self._variance(correction)
        rinv = self._solved()[2]
        if rinv is None or math.isnan(s2):
            return np.full(a.shape[0], np.nan)
        z = a @ rinv
        se = np.sqrt(s2 * (1.0 + g * (z * z).sum(axis=1)))
        with np.errstate(divide="ignore", invalid="ignore"):
            return (b - a @ self._fit[1]) / se

    # ------------------------------------------------------------- persistence
    def to_dict(self) -> dict:
        """Plain, versioned, msgpack-able form; ``from_dict(to_dict())`` is exact."""
        return {
            "kind": self.kind, "version": self.version, "p": self.p,
            "intercept": self.has_intercept,
            "half_life": None if self.half_life is None else self.half_life.to_dict(),
            "clock": self.clock, "count": self.count, "W": self.W, "W2": self.W2,
            "R": self._R.tolist(),
        } | ({"scale_exponent": self.E} if self.E else {})

    @classmethod
    def from_dict(cls, d: dict) -> Regression:
        """Rebuild a state from ``to_dict``; raises IncompatibleError on a foreign form."""
        check_saved(d, cls.kind, cls.version)
        try:
            r = cls(int(d["p"]), bool(d["intercept"]), HalfLife.from_dict(d["half_life"]))
            r.clock = None if d["clock"] is None else float(d["clock"])
            r.count = int(d["count"])
            r.W, r.W2 = float(d["W"]), float(d["W2"])
            r.E = saved_exponent(d, even=True)
            k1 = r.terms + 1
            r._R = np.asarray(d["R"], dtype=np.float64).reshape(k1, k1)
        except (KeyError, TypeError, ValueError) as exc:
            raise IncompatibleError("regression", type(exc).__name__,
                                    f"malformed state: {exc}") from None
        return r

    def __repr__(self) -> str:
        return (f"Regression(p={self.p}, intercept={self.has_intercept}, W={self.W:.6g}, "
                f"n_eff={self.effective_samples:.6g}, ok={self.ok})")


__all__ = ["MAX_CONDITION", "Regression"]

"""Volatility of returns over irregular time steps, with exponential forgetting."""

from __future__ import annotations

import math

import numpy as np

from .errors import IncompatibleError
from .forgetting import HalfLife, age_to, copy_state, scale_step, take_batch
from .validation import saved_exponent


class Volatility:
    """Exponentially weighted volatility per unit of time, zero-mean convention.

    Parameters
    ----------
    dim : int
        Number of return fields (d >= 1), estimated side by side.
    half_life : HalfLife or None
        Forgetting; None weighs every return equally.

    Notes
    -----
    Each return r_i observed over a time step dt_i > 0 contributes
    v_i = r_i**2 / dt_i, an estimate of the variance per unit of time. The state
    is the decayed weighted mean of v over decayed weights w_i (times the row's
    own weight) and their sum W:

        rate = sum(w_i v_i) / sum(w_i),    volatility = sqrt(rate * unit)

    where ``unit`` is the reporting unit in the time's units (86400 for a
    volatility per day of a series stamped in seconds). The mean return is taken
    as zero, the convention of the exponentially weighted volatility of
    RiskMetrics (J.P. Morgan/Reuters 1996); there a daily decay factor
    lambda = 0.94 weighs the return k days back by lambda**k, a half-life of
    ln 0.5 / ln 0.94 = 11.2 observations (``HalfLife(11.2, "observations")``).
    Dividing by dt makes irregular spacing harmless: for a Brownian motion with
    variance sigma**2 per unit time, r**2 / dt is sigma**2 times a chi-squared
    variable with one degree of freedom whatever dt is, so every row has the same
    expectation and the weighted mean is unbiased for sigma**2.

    Bias. The rate is unbiased for sigma**2 when the returns have mean zero; its
    square root, the volatility, is biased low by Jensen's inequality, by about
    1 / (4 n) in relative terms for normal returns (n the Kish effective sample
    size W**2 / sum(w**2); RiskMetrics' lambda = 0.94 has n = (1 + lambda) /
    (1 - lambda) = 32, so about -0.8 %).

    When the mean cannot be ignored. A drift mu per unit time adds mu**2 * dt to
    each v_i: negligible for ticks (dt small against sigma**2 / mu**2) but not
    for sparse or long steps of a trending series, nor for ``difference`` of a
    level that moves steadily (a ramp has no variance but a large r**2). There
    the centred variance of the returns (``Moments`` on the return field) is the
    estimate to read. Bid-ask bounce and other noise at very short steps inflate
    r**2 / dt too; it is a property of the data, not of the estimator.

    Rows with dt <= 0 (two ticks at the same event time) carry no information
    about a rate and are skipped. O(n d) per batch.

    References
    ----------
    J.P. Morgan/Reuters, RiskMetrics -- Technical Document, 4th ed., 1996,
    section 5.2 (exponentially weighted volatility).

    Examples
    --------
    >>> v = Volatility(1)
    >>> v.update([[0.5], [-1.0]], spans=[1.0, 4.0])
    >>> v.rate.tolist(), v.volatility(unit=4.0).tolist()   # mean of 0.25 and 0.25
    ([0.25], [1.0])
    """

    __slots__ = ("dim", "half_life", "clock", "count", "W", "rate", "E")
    kind = "volatility"
    version = 1

    def __init__(self, dim: int = 1, half_life: HalfLife | None = None) -> None:
        if not isinstance(dim, int) or isinstance(dim, bool) or dim < 1:
            raise IncompatibleError("dim", dim, "must be an integer >= 1")
        self.dim = dim
        self.half_life = half_life
        self.clock: float | None = None
        self.count = 0
        self.W = 0.0      # decayed weight sum, in units of 2**E
        self.E = 0        # scale exponent: a silence of any length never underflows W
        self.rate = np.zeros(dim)     # decayed weighted mean of r**2 / dt

    def update(self, r: object, spans: object, weights: object = None,
               times: object = None) -> None:
        """Fold in returns r (n, d) over time steps ``spans`` (n,); see the class notes."""
        r = np.asarray(r, dtype=np.float64).reshape(-1, self.dim)
        dt = np.asarray(spans, dtype=np.float64).reshape(-1)
        w = None if weights is None else np.asarray(weights, dtype=np.float64).reshape(-1)
        t = None if times is None else np.asarray(times, dtype=np.float64).reshape(-1)
        for name, a in (("spans", dt), ("weights", w), ("times", t)):
            if a is not None and a.shape != (r.shape[0],):
                raise IncompatibleError(name, f"shape {a.shape}",
                                        f"must hold one value per row ({r.shape[0]})")
        if not (np.isfinite(r).all() and np.isfinite(dt).all()):
            raise IncompatibleError("r", "non-finite", "returns and spans must be finite")
        self._fold(r, dt, w, t)

    def _fold(self, r: np.ndarray, dt: np.ndarray, w: np.ndarray | None,
              t: np.ndarray | None) -> None:
        """Fold in checked rows (the daemon's path)."""
        step = dt > 0.0
        if not step.all():
            r, dt = r[step], dt[step]
            w = None if w is None else w[step]
            t = None if t is None else t[step]
        n = r.shape[0]
        if n == 0:
            return
        v = take_batch(self, n, t, w)
        self._rebase(0)   # new rows weigh about 1: the old weight joins them in plain units
        rates = r * r / dt[:, None]
        if v is None:
            wb, batch = float(n), rates.mean(axis=0)
        else:
            wb = float(v.sum())
            if not wb > 0.0:
                return
            batch = (v @ rates) / wb
        total = self.W + wb
        self.rate = self.rate + (batch - self.rate) * (wb / total)
        self.W = total

    def _age(self, g: float) -> None:
        """Multiply the weight sum by 2**g (``forgetting.take_batch``'s protocol); the
        scale exponent takes what would underflow it, so the rate is kept. O(1)."""
        k, f = scale_step(self.W, g)
        self.E += k
        self.W *= f

    def _rebase(self, e: int) -> None:
        """Express W in units of 2**e (below float64 there it was outweighed). O(1)."""
        if e != self.E:
            self.W = math.ldexp(self.W, max(-2200, min(2200, self.E - e)))
            self.E = e

    def copy(self) -> Volatility:
        return copy_state(self)

    def decay_to(self, t: float) -> Volatility:
        """Age the state to event time t (never backwards); returns self. O(d)."""
        age_to(self, t)
        return self

    def merge(self, other: Volatility) -> Volatility:
        """Fold another state in, as if this one had seen both streams; returns self.

        Both are aged to the later clock first. O(d).
        """
        if other.dim != self.dim or other.half_life != self.half_life:
            raise IncompatibleError("other", other.dim, "dimension or half-life differs")
        o = other.copy()
        if self.half_life is not None and not self.half_life.by_count:
            later = max((c for c in (self.clock, o.clock) if c is not None), default=None)
            if later is not None:
                self.decay_to(later)
                o.decay_to(later)
        elif self.clock is not None or o.clock is not None:
            self.clock = max(c for c in (self.clock, o.clock) if c is not None)
        e = max(self.E if self.W > 0.0 else o.E, o.E if o.W > 0.0 else self.E)
        self._rebase(e)
        o._rebase(e)
        w_other = o.W
        total = self.W + w_other
        if total > 0.0:
            self.rate = self.rate + (other.rate - self.rate) * (w_other / total)
        self.W = total
        self.count += other.count
        return self

    @property
    def weight_sum(self) -> float:
        """Decayed W (0.0 once it is below float64, though the state keeps its rate)."""
        return math.ldexp(self.W, max(-2200, min(2200, self.E)))

    def volatility(self, unit: float = 1.0) -> np.ndarray:
        """sqrt(rate * unit) per field, (d,); NaN before the first return."""
        if not self.W > 0.0:
            return np.full(self.dim, math.nan)
        return np.sqrt(self.rate * unit)

    # ------------------------------------------------------------- persistence
    def to_dict(self) -> dict:
        return {"kind": self.kind, "version": self.version, "dim": self.dim,
                "half_life": None if self.half_life is None else self.half_life.to_dict(),
                "clock": self.clock, "count": self.count, "W": self.W,
                "rate": self.rate.tolist()} | ({"scale_exponent": self.E} if self.E else {})

    @classmethod
    def from_dict(cls, d: dict) -> Volatility:
        """Rebuild from ``to_dict``; raises IncompatibleError on a malformed map."""
        if not isinstance(d, dict) or d.get("kind") != cls.kind:
            raise IncompatibleError("volatility", type(d).__name__, "is not a volatility state")
        if d.get("version") != cls.version:
            raise IncompatibleError("volatility.version", d.get("version"),
                                    f"this build reads version {cls.version}")
        try:
            v = cls(int(d["dim"]), HalfLife.from_dict(d["half_life"]))
            v.clock = None if d["clock"] is None else float(d["clock"])
            v.count = int(d["count"])
            v.W = float(d["W"])
            v.E = saved_exponent(d)
            v.rate = np.asarray(d["rate"], dtype=np.float64).reshape(v.dim)
            if not (math.isfinite(v.W) and v.W >= 0.0 and np.isfinite(v.rate).all()
                    and (v.rate >= 0.0).all()):
                raise IncompatibleError("volatility", v.W, "weights and rates must be "
                                        "finite and >= 0")
        except (KeyError, TypeError, ValueError) as exc:
            if isinstance(exc, IncompatibleError):
                raise
            raise IncompatibleError("volatility", type(exc).__name__,
                                    f"malformed state: {exc}") from None
        return v

    def __repr__(self) -> str:
        return f"Volatility(dim={self.dim}, W={self.W:g}, rate={self.rate.tolist()})"

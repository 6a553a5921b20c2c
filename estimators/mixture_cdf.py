"""CDF and quantile of a one-dimensional mixture of normal distributions.

The quantile is found by a safeguarded Newton iteration on the mixture CDF,
which is monotone, inside a bracket that always holds the answer: the
mixture's q-quantile lies between the smallest and the largest of its
components' q-quantiles. Upper quantiles are solved on the survival function
so that p99.9 keeps its digits. numpy and the standard library only.
"""

from __future__ import annotations

import math
import struct
from statistics import NormalDist

import numpy as np

_STD_NORMAL = NormalDist()
_SQRT2 = math.sqrt(2.0)
_INV_SQRT_2PI = 1.0 / math.sqrt(2.0 * math.pi)
_F64 = struct.Struct("<d")
_I64 = struct.Struct("<q")
_erfc = np.frompyfunc(math.erfc, 1, 1)   # math.erfc is exact to ~1 ulp; numpy has none


def normal_mixture_cdf(x: object, weights: np.ndarray, means: np.ndarray,
                       sds: np.ndarray, upper: bool = False) -> np.ndarray:
    """P(X <= x) (or P(X > x) when ``upper``) of sum_k w_k N(mean_k, sd_k**2).

    Parameters
    ----------
    x : array_like
        Points (any shape).
    weights, means, sds : ndarray (K,)
        Component weights (summing to 1), means and standard deviations
        (sd 0 is a point mass).
    upper : bool
        Return the survival function, computed from the upper tails so that
        it keeps its relative accuracy far out.

    Returns
    -------
    ndarray
        Same shape as x. O(n K) calls of ``math.erfc``.

    Examples
    --------
    >>> float(normal_mixture_cdf(0.0, np.array([0.5, 0.5]), np.array([-1.0, 1.0]),
    ...                          np.array([1.0, 1.0])))
    0.5
    """
    xa = np.asarray(x, dtype=np.float64)
    flat = xa.reshape(-1, 1)
    sd = np.asarray(sds, dtype=np.float64)
    with np.errstate(divide="ignore", invalid="ignore"):
        z = (flat - means) / (sd * _SQRT2)
    # a point mass at m: P(X <= x) is 1 from x = m on, so z = +inf there (-inf below)
    z = np.where(sd > 0.0, z, np.where(flat >= means, np.inf, -np.inf))
    z = z if upper else -z
    tail = _erfc(z).astype(np.float64) * 0.5
    return (tail @ weights).reshape(xa.shape)


def _ordinal(x: float) -> int:
    """The position of x among the float64 values, as an integer: consecutive floats
    have consecutive ordinals, so halving an ordinal gap halves the floats between."""
    bits = _I64.unpack(_F64.pack(x))[0]
    return bits if bits >= 0 else -(bits & 0x7FFFFFFFFFFFFFFF)


def _from_ordinal(k: int) -> float:
    return _F64.unpack(_I64.pack(k))[0] if k >= 0 else -_F64.unpack(_I64.pack(-k))[0]


def normal_mixture_quantile(q: float, weights: np.ndarray, means: np.ndarray,
                            sds: np.ndarray, max_iter: int = 200) -> float:
    """The q-quantile of sum_k w_k N(mean_k, sd_k**2): the smallest x with CDF(x) >= q.

    Parameters
    ----------
    q : float
        Strictly between 0 and 1.
    weights, means, sds : ndarray (K,)
        As for ``normal_mixture_cdf``; the weights are normalised to sum 1.
    max_iter : int
        Bound on iterations (each O(K)). Convergence is normally quadratic and
        takes 4 to 10; the safeguard below ends any bracket within 130.

    Returns
    -------
    float
        x with |CDF(x) - q| at the level of float64 rounding (far below 1e-9),
        or, where the CDF crosses q between two adjacent floats (point masses,
        components of very different scales), the upper of the two. NaN when
        the components do not describe a distribution (a weight, mean or sd
        that is not finite, a negative weight or sd, or weights summing to 0).

    Notes
    -----
    With a_k = mean_k + sd_k Phi^-1(q), every component has F_k(min a) <= q
    and F_k(max a) >= q, so the mixture CDF, a weighted average of the F_k,
    crosses q in [min a, max a]. Newton steps x <- x - (F(x) - q) / f(x) are
    taken when they stay inside the current bracket and the last step halved
    the bracket or |F(x) - q|; otherwise (and always after 64 iterations) the
    bracket is bisected in the
    order of float64 values (at the midpoint of the floats' ordinals, not of
    their values), which halves the number of floats in it. A bracket holds
    at most 2**64 floats, so it closes to two neighbours after at most 64
    bisections wherever its ends lie (1e-300 and 1e300 alike). For q > 1/2
    the equation is written as (1 - q) - S(x) = 0 with S the survival
    function.

    References
    ----------
    Press, W. H., Teukolsky, S. A., Vetterling, W. T., Flannery, B. P. (2007).
    Numerical Recipes, 3rd ed., section 9.4 (Newton-Raphson safeguarded by
    bisection).

    Examples
    --------
    >>> w, m, s = np.array([1.0]), np.array([0.0]), np.array([1.0])
    >>> round(normal_mixture_quantile(0.975, w, m, s), 6)
    1.959964
    """
    z = _STD_NORMAL.inv_cdf(q)
    # scalar work on K numbers: plain floats and math, about 50x cheaper than numpy here
    w, m, sd = (np.asarray(a, dtype=np.float64).tolist() for a in (weights, means, sds))
    total_w = math.fsum(w)
    if not (all(map(math.isfinite, w + m + sd)) and min(w) >= 0.0 and min(sd) >= 0.0
            and total_w > 0.0):
        return math.nan
    if total_w != 1.0:
        w = [wk / total_w for wk in w]
    comp = [mk + sk * z for mk, sk in zip(m, sd, strict=True)]
    lo, hi = min(comp), max(comp)
    if lo == hi:
        return lo
    upper = q > 0.5
    target = 1.0 - q if upper else q
    sign = 1.0 if upper else -1.0         # erfc(+z)/2 is the upper tail, erfc(-z)/2 the lower
    parts = list(zip(w, m, sd, strict=True))

    def excess(x: float) -> float:
        """Increasing in x; zero at the quantile."""
        total = 0.0
        for wk, mk, sk in parts:
            if sk > 0.0:
                total += wk * math.erfc(sign * (x - mk) / (sk * _SQRT2))
            elif (x < mk) if upper else (x >= mk):   # a point mass: all or nothing
                total += 2.0 * wk
        p = 0.5 * total
        return target - p if upper else p - target

    def density(x: float) -> float:
        total = 0.0
        for wk, mk, sk in parts:
            if sk > 0.0:
                zk = (x - mk) / sk
                total += wk * math.exp(-0.5 * zk * zk) / sk
        return total * _INV_SQRT_2PI

    x = min(max(math.fsum(wk * ck for wk, ck in zip(w, comp, strict=True)), lo), hi)
    lo_k, hi_k = _ordinal(lo), _ordinal(hi)
    width, last_g = hi_k - lo_k, math.inf
    for i in range(max_iter):
        g = excess(x)
        if g == 0.0:
            return x
        if g < 0.0:
            lo, lo_k = x, _ordinal(x)
        else:
            hi, hi_k = x, _ordinal(x)
        if hi_k - lo_k <= 1:
            return hi
        if abs(g) <= 1e-15 * target:
            return x
        # Newton only while it makes progress (the bracket or |g| at least halves) and
        # for 64 steps at most: then at most 64 bisections remain
        progress = 2 * (hi_k - lo_k) <= width or 2.0 * abs(g) <= last_g
        width, last_g = hi_k - lo_k, abs(g)
        dens = density(x)
        step = x - g / dens if dens > 0.0 else math.nan
        # otherwise bisect the floats of the bracket
        x = step if progress and i < 64 and lo < step < hi else \
            _from_ordinal((lo_k + hi_k) // 2)
    return math.nan

"""How far out a row lies under a fitted mixture: its tail probability.

An outlier rule "beyond k sigma" has, for a normal stream, the nominal rate
alpha = 2 Phi(-k) (0.27 % at k = 3). For a mixture the z-score of the pooled
mean and variance is the wrong yardstick (a two-mode stream has far more than
alpha of its rows beyond 3 pooled sigmas), so a row is scored by a tail
probability p under the model instead and is an outlier when p < alpha:

- one field: the two-sided tail p = 2 min(F(x), 1 - F(x)) of the mixture's
  CDF F. Under the model F(X) is uniform, so P(p < alpha) = alpha exactly.
- d > 1 fields (our choice): p = sum_k r_k(x) Q_d(D_k(x)**2), the chi-square
  tail of the row's Mahalanobis distance to each component, weighted by the
  component's responsibility r_k(x) for the row. With one component this is
  exactly the normal model's rule (rate alpha); with well-separated
  components each row is judged by its own component, rate about alpha.
"""

from __future__ import annotations

import math

import numpy as np

from .mixture import Mixture
from .mixture_cdf import normal_mixture_cdf

__all__ = ["chi2_survival", "erfc", "nominal_rate", "outlier_counts", "tail_probability"]

_ONE, _ZERO = np.ones(1), np.zeros(1)
_SQRT2 = math.sqrt(2.0)


def nominal_rate(k: float) -> float:
    """alpha = 2 Phi(-k): the share of a normal stream beyond k standard deviations.

    Examples
    --------
    >>> round(nominal_rate(3.0), 6)
    0.0027
    """
    return math.erfc(k / math.sqrt(2.0))


def erfc(z: np.ndarray) -> np.ndarray:
    """The complementary error function of z >= 0, vectorised, to a relative error
    below 1.2e-7 (numpy has none; ``math.erfc`` one value at a time costs ~30x more
    on a batch).

    Notes
    -----
    The Chebyshev fit of Press, Teukolsky, Vetterling & Flannery, Numerical Recipes
    (2nd ed., 1992, section 6.2, ``erfcc``): with t = 1 / (1 + z/2),
    erfc(z) = t exp(-z**2 + P(t)) for a polynomial P of degree 9. O(n).

    Examples
    --------
    >>> float(erfc(np.array(3.0) / np.sqrt(2.0)).round(7))   # 2 Phi(-3)
    0.0026998
    """
    shape = np.shape(z)
    z = np.atleast_1d(np.asarray(z, dtype=np.float64))
    t = 0.5 * z
    t += 1.0
    np.reciprocal(t, out=t)
    poly = t * 0.17087277
    for c in (-0.82215223, 1.48851587, -1.13520398, 0.27886807, -0.18628806, 0.09678418,
              0.37409196, 1.00002368):
        poly += c
        poly *= t
    poly -= 1.26551223
    poly -= z * z
    np.exp(poly, out=poly)
    poly *= t
    return poly.reshape(shape)


def chi2_survival(y: object, d: int) -> np.ndarray:
    """P(chi-square with d degrees of freedom > y), for an integer d >= 1.

    Notes
    -----
    The closed forms of the regularised upper incomplete gamma Q(d/2, y/2):
    for even d, exp(-y/2) sum_{j < d/2} (y/2)**j / j!; for odd d,
    erfc(sqrt(y/2)) + exp(-y/2) sum_{j=1}^{(d-1)/2} (y/2)**(j-1/2) / Gamma(j+1/2).
    O(n d).

    Examples
    --------
    >>> float(chi2_survival(9.0, 1).round(6))    # 2 Phi(-3)
    0.0027
    >>> float(chi2_survival(9.0, 2).round(6))    # exp(-4.5)
    0.011109
    """
    ya = np.maximum(np.asarray(y, dtype=np.float64), 0.0)
    half = 0.5 * ya
    e = np.exp(-half)
    if d % 2 == 0:
        term = e.copy()
        total = e.copy()
        for j in range(1, d // 2):
            term = term * half / j
            total = total + term
        return total
    # erfc(sqrt(y/2)) = 2 P(Z > sqrt(y))
    total = 2.0 * normal_mixture_cdf(np.sqrt(ya), _ONE, _ZERO, _ONE, upper=True)
    if d > 1:
        term = e * np.sqrt(half) / math.gamma(1.5)
        total = total + term
        for j in range(2, (d + 1) // 2):
            term = term * half / (j - 0.5)
            total = total + term
    return total


def outlier_counts(mixture: Mixture, x: np.ndarray, rates: tuple[float, ...]) -> list[int]:
    """How many rows of x have a tail probability below each rate, under a warm mixture.

    For one field this is the count outside [Q(rate/2), Q(1 - rate/2)], Q the mixture's
    quantile function (F is continuous and increasing, so p < rate exactly there):
    two quantile inversions per rate, then comparisons, O(n + rates K) instead of n K
    tail evaluations. For d > 1, ``tail_probability`` < rate. An unwarmed mixture
    counts nothing.

    Examples
    --------
    >>> m = Mixture(1, warmup=200, seed=1)
    >>> m.update(np.random.default_rng(0).normal(size=400))
    >>> outlier_counts(m, np.array([[0.0], [4.0], [-9.0]]), (nominal_rate(3.0),))
    [2]
    """
    if not mixture.warm or not rates:
        return [0] * len(rates)
    if x.shape[1] > 1:
        p = tail_probability(mixture, x)
        return [int(np.count_nonzero(p < r)) for r in rates]
    v = x[:, 0]
    out = []
    for r in rates:
        lo, hi = (float(q) for q in mixture.quantile([0.5 * r, 1.0 - 0.5 * r]))
        out.append(int(np.count_nonzero((v < lo) | (v > hi))))
    return out


def tail_probability(mixture: Mixture, x: np.ndarray) -> np.ndarray:
    """Each row's tail probability under a warm mixture (see the module notes).

    Parameters
    ----------
    mixture : Mixture
        Warm (NaN otherwise).
    x : ndarray (n, d)
        Rows in the stream's units; with a log mixture a row with a value
        <= 0 lies outside the model (p = 0).

    Returns
    -------
    ndarray (n,)
        O(n K) vectorised for d = 1 (``erfc``: relative error below 1.2e-7), O(n K d**2)
        otherwise.

    Examples
    --------
    >>> m = Mixture(1, warmup=200, seed=1)
    >>> m.update(np.random.default_rng(0).normal(size=400))
    >>> p = tail_probability(m, np.array([[m.means[0, 0]], [50.0]]))
    >>> bool(p[0] > 0.99), bool(p[1] < 1e-12)
    (True, True)
    """
    n, d = x.shape
    if not mixture.warm:
        return np.full(n, np.nan)
    if d == 1:
        v = x[:, 0]
        bad = v <= 0.0 if mixture.log else np.zeros(n, bool)
        y = np.log(np.where(bad, 1.0, v)) if mixture.log else v
        w, mu, sd = mixture.weights, mixture.means[:, 0], mixture.stddevs[:, 0]
        with np.errstate(divide="ignore", invalid="ignore"):
            z = (y[:, None] - mu) * (1.0 / (sd * _SQRT2))
        # a component's near tail is erfc(|z|)/2 and its far side 1 minus that, so
        # F = sum_{z>=0} w + sum s w erfc(|z|)/2 with s = +1 below the mean, -1 above,
        # and S likewise: a small F or S is a sum of small terms and keeps its digits
        neg = z < 0.0
        half = erfc(np.abs(z))
        half *= 0.5
        signed = np.where(neg, half, -half) @ w
        lower = (~neg) @ w + signed
        upper = neg @ w - signed
        p = np.minimum(lower, upper)
        p *= 2.0
        p[bad] = 0.0
        return p
    bad = (x <= 0.0).any(axis=1) if mixture.log else np.zeros(n, bool)
    y = np.log(np.where(bad[:, None], 1.0, x)) if mixture.log else x
    r = mixture.responsibilities(x)
    mu, cov = mixture.means, mixture.covariances
    p = np.zeros(n)
    for k in range(mixture.components):
        delta = y - mu[k]
        sol = np.linalg.solve(cov[k], delta.T).T
        p += np.nan_to_num(r[:, k]) * chi2_survival(np.einsum("ij,ij->i", delta, sol), d)
    return np.where(bad, 0.0, p)

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

__all__ = ["chi2_survival", "nominal_rate", "tail_probability"]

_ONE, _ZERO = np.ones(1), np.zeros(1)


def nominal_rate(k: float) -> float:
    """alpha = 2 Phi(-k): the share of a normal stream beyond k standard deviations.

    Examples
    --------
    >>> round(nominal_rate(3.0), 6)
    0.0027
    """
    return math.erfc(k / math.sqrt(2.0))


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
        O(n K) ``erfc`` calls for d = 1, O(n K d**2) otherwise.

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
        f = np.asarray(mixture.cdf(x[:, 0]), dtype=np.float64)
        p = 2.0 * np.minimum(f, 1.0 - f)
        return np.where(x[:, 0] > 0.0, p, 0.0) if mixture.log else p
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

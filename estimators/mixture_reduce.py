"""Reducing a Gaussian mixture to fewer components, preserving its mean and covariance.

Runnalls' greedy method: repeatedly merge the pair of components whose
moment-preserving merge costs least by an upper bound on the Kullback-Leibler
discrimination of the reduced mixture from the original.
"""

from __future__ import annotations

import numpy as np


def merge_pair(wi: float, mi: np.ndarray, ci: np.ndarray, wj: float, mj: np.ndarray,
               cj: np.ndarray, diag: bool) -> tuple[float, np.ndarray, np.ndarray]:
    """Moment-preserving merge of two weighted Gaussians (weight, mean, covariance). O(d**2)."""
    w = wi + wj
    if not w > 0.0:   # two empty components: nothing to preserve, average them
        return 0.0, 0.5 * (mi + mj), 0.5 * (ci + cj)
    a, b = wi / w, wj / w
    delta = mi - mj
    between = np.diag(delta * delta) if diag else np.outer(delta, delta)
    return w, a * mi + b * mj, a * ci + b * cj + (a * b) * between


def runnalls_reduce(weights: np.ndarray, means: np.ndarray, covs: np.ndarray,
                    extra: np.ndarray, target: int,
                    diag: bool = False) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Merge components of a Gaussian mixture greedily until ``target`` remain.

    Parameters
    ----------
    weights : ndarray (K,)
        Component weights (any positive scale; zeros allowed).
    means : ndarray (K, d)
    covs : ndarray (K, d, d)
        The covariances that are merged (moment-preserving).
    extra : ndarray (d, d)
        Added to every covariance when the merge cost is evaluated (the
        estimator's covariance floor, shared by all components).
    target : int
        Number of components to keep (>= 1).
    diag : bool
        Keep only the diagonal of merged covariances (diagonal mixtures).

    Returns
    -------
    weights, means, covs
        The reduced mixture. A merged pair takes the lower index of the two;
        the other components keep their relative order.

    Notes
    -----
    Merging i and j gives w = w_i + w_j, mu = (w_i mu_i + w_j mu_j) / w and
    P = (w_i P_i + w_j P_j) / w + (w_i w_j / w**2) (mu_i - mu_j)(mu_i - mu_j)^T,
    which keeps the mixture's overall mean and covariance exactly. The pair
    chosen minimises Runnalls' bound

        B(i, j) = ((w_i + w_j) log det P - w_i log det P_i - w_j log det P_j) / 2.

    Each merge evaluates all pairs: O(K**3 d**3) for the whole reduction, for
    the small K of a mixture estimator.

    References
    ----------
    Runnalls, A. R. (2007). Kullback-Leibler approach to Gaussian mixture
    reduction. IEEE Transactions on Aerospace and Electronic Systems 43(3),
    989-999.

    Examples
    --------
    >>> w = np.array([0.5, 0.25, 0.25])
    >>> m = np.array([[0.0], [10.0], [10.5]])
    >>> c = np.ones((3, 1, 1))
    >>> w2, m2, c2 = runnalls_reduce(w, m, c, np.zeros((1, 1)), 2)
    >>> w2.tolist(), m2[:, 0].tolist(), c2[:, 0, 0].tolist()
    ([0.5, 0.5], [0.0, 10.25], [1.0, 1.0625])
    """
    w = np.array(weights, dtype=np.float64)
    m = np.array(means, dtype=np.float64)
    c = np.array(covs, dtype=np.float64)
    while w.shape[0] > target:
        i, j = _cheapest_pair(w, m, c, extra, diag)
        w[i], m[i], c[i] = merge_pair(w[i], m[i], c[i], w[j], m[j], c[j], diag)
        keep = np.arange(w.shape[0]) != j
        w, m, c = w[keep], m[keep], c[keep]
    return w, m, c


def _cheapest_pair(w: np.ndarray, m: np.ndarray, c: np.ndarray, extra: np.ndarray,
                   diag: bool) -> tuple[int, int]:
    """(i, j), i < j, of least Runnalls cost; all pairs at once. O(K**2 d**3)."""
    i, j = np.triu_indices(w.shape[0], k=1)
    wi, wj = w[i], w[j]
    tot = wi + wj
    with np.errstate(divide="ignore", invalid="ignore"):
        a = np.where(tot > 0.0, wi / tot, 0.5)
    b = 1.0 - a
    delta = m[i] - m[j]
    between = np.einsum("pd,pe->pde", delta, delta)
    if diag:
        between = between * np.eye(m.shape[1])
    merged = a[:, None, None] * c[i] + b[:, None, None] * c[j] \
        + (a * b)[:, None, None] * between + extra
    logdet_merged = np.linalg.slogdet(merged)[1]
    logdet = np.linalg.slogdet(c + extra)[1]
    cost = 0.5 * (tot * logdet_merged - wi * logdet[i] - wj * logdet[j])
    best = int(np.argmin(cost))
    return int(i[best]), int(j[best])

"""Split-and-merge proposals that free a Gaussian mixture from a poor local optimum.

An online EM fit that followed a drifting stream can be left with a component
stranded where the data no longer is, or two components sharing one mode while
one wide component covers two. EM only climbs, so it never leaves such a
configuration. A split-and-merge move frees one component (the lightest is
dropped, or the two most redundant are merged) and uses it to split another in
two; the mixture keeps a proposal only when, after a few EM iterations on the
recent rows, it explains them clearly better than the current fit refined the
same way (``Mixture`` does that test).

References
----------
Ueda, N., Nakano, R., Ghahramani, Z., Hinton, G. E. (2000). SMEM algorithm for
mixture models. Neural Computation 12(9), 2109-2128.
Richardson, S., Green, P. J. (1997). On Bayesian analysis of mixtures with an
unknown number of components. JRSS B 59(4), 731-792 (moment-preserving splits).
Runnalls, A. R. (2007). Kullback-Leibler approach to Gaussian mixture reduction.
IEEE Transactions on Aerospace and Electronic Systems 43(3).
"""

from __future__ import annotations

import numpy as np

from .mixture_reduce import _cheapest_pair, merge_pair

_SPLIT_OFFSET = 0.5    # each half moves this many sds of the split axis from the mean
_SPLIT_CANDIDATES = 1  # components tried as the one to split, widest mass first


def split_component(w: float, mean: np.ndarray, cov: np.ndarray,
                    diag: bool) -> tuple[float, np.ndarray, np.ndarray, np.ndarray]:
    """Moment-preserving split of one Gaussian into two of equal weight along its
    principal axis: (weight of each, mean 1, mean 2, covariance of each). O(d**3).

    With axis v of variance lam, the halves sit at mean -+ u sqrt(lam) v and each
    has covariance cov - u**2 lam v v^T, so the pair has the original mean and
    covariance exactly (u = 1/2)."""
    if diag:
        axis = int(np.argmax(np.diagonal(cov)))
        lam = float(cov[axis, axis])
        v = np.zeros(cov.shape[0])
        v[axis] = 1.0
    else:
        vals, vecs = np.linalg.eigh(cov)
        lam, v = float(vals[-1]), vecs[:, -1]
    step = _SPLIT_OFFSET * np.sqrt(max(lam, 0.0)) * v
    shrink = (_SPLIT_OFFSET ** 2) * lam * np.outer(v, v)
    return 0.5 * w, mean - step, mean + step, cov - shrink


def proposals(pi: np.ndarray, mu: np.ndarray, cov: np.ndarray, floor: np.ndarray,
              diag: bool) -> list[tuple[np.ndarray, np.ndarray, np.ndarray]]:
    """Split-and-merge proposals (pi, mu, raw covariance) for a mixture of K >= 2.

    The freed component is the lightest one (dropped, its weight shared out) or,
    separately, the second of the cheapest Runnalls pair (merged into the first);
    it then takes half of the ``_SPLIT_CANDIDATES`` other component(s) of largest
    weight times spread. Every proposal keeps the mixture's weights summing to 1.
    O(K**2 d**3)."""
    k = pi.shape[0]
    if k < 2:
        return []
    freed_by: list[tuple[int, np.ndarray, np.ndarray, np.ndarray]] = []
    light = int(np.argmin(pi))
    p = pi.copy()
    p[light] = 0.0
    freed_by.append((light, p / p.sum() if p.sum() > 0.0 else np.full(k, 1.0 / k),
                     mu.copy(), cov.copy()))
    i, j = _cheapest_pair(pi, mu, cov, np.diag(floor), diag)
    if j != light:
        p, m, c = pi.copy(), mu.copy(), cov.copy()
        p[i], m[i], c[i] = merge_pair(pi[i], mu[i], cov[i], pi[j], mu[j], cov[j], diag)
        p[j] = 0.0
        freed_by.append((j, p, m, c))
    spread = np.array([np.linalg.slogdet(c + np.diag(floor))[1] for c in cov])
    out = []
    for freed, p, m, c in freed_by:
        order = np.argsort(-(np.log(np.maximum(p, 1e-300)) + 0.5 * spread))
        for s in [int(s) for s in order if s != freed][:_SPLIT_CANDIDATES]:
            pp, mm, cc = p.copy(), m.copy(), c.copy()
            half, m1, m2, half_cov = split_component(p[s], m[s], c[s] + np.diag(floor), diag)
            pp[s] = pp[freed] = half
            mm[s], mm[freed] = m1, m2
            cc[s] = cc[freed] = half_cov - np.diag(floor)
            out.append((pp, mm, cc))
    return out

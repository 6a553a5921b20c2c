"""Benchmark: Mixture.update throughput against one scikit-learn EM iteration.

Run from the repository root::

    python benchmarks/mixture.py

For each configuration the same 1,000 points (a scenario of our own: K
well-separated Gaussian clusters) are timed two ways in the same run:

- ours: ``Mixture.update`` on the batch (validation, E-step, fold of the
  sufficient statistics, M-step, collapse check), on a warmed state;
- reference: one EM iteration of scikit-learn's ``GaussianMixture`` over the
  same points, i.e. its ``_e_step`` followed by its ``_m_step`` on a fitted
  model (private methods, so that initialisation and convergence checks are
  not counted against it).

Each figure is the best of several repeats (the machine is shared). The ratio
is ours / reference in observations per second; > 1 means the online update
is cheaper than one batch EM iteration. Batch sizes 1 and 10,000 are shown
for the per-call overhead, against the same reference rate. Needs
scikit-learn (a test-only dependency), so it lives outside the runtime path.
"""

from __future__ import annotations

import time
import warnings
from collections.abc import Callable

import numpy as np
from sigmad.estimators import Mixture

CONFIGS = ((3, 1), (4, 4))
BATCH = 1_000


def best_seconds(fn: Callable[[], object], repeats: int = 7, inner: int = 5) -> float:
    """Best mean time of ``inner`` calls over ``repeats`` rounds."""
    best = float("inf")
    for _ in range(repeats):
        start = time.perf_counter()
        for _ in range(inner):
            fn()
        best = min(best, (time.perf_counter() - start) / inner)
    return best


def clusters(k: int, d: int, n: int, rng: np.random.Generator) -> np.ndarray:
    centres = rng.normal(0.0, 6.0, (k, d))
    return centres[rng.integers(0, k, n)] + rng.normal(0.0, 1.0, (n, d))


def sklearn_iteration_seconds(x: np.ndarray, k: int) -> float:
    from sklearn.mixture import GaussianMixture

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        gm = GaussianMixture(k, covariance_type="full", max_iter=20, random_state=0).fit(x)

    def one_iteration() -> None:
        _, log_resp = gm._e_step(x)
        gm._m_step(x, log_resp)

    return best_seconds(one_iteration)


def ours_seconds(x: np.ndarray, k: int, batch: int, rng: np.random.Generator) -> float:
    d = x.shape[1]
    mix = Mixture(k, dim=d, seed=0)
    mix.update(clusters(k, d, 2_000, np.random.default_rng(1)))
    rows = x[rng.integers(0, x.shape[0], batch)] if batch != x.shape[0] else x
    inner = 5 if batch >= 1_000 else 200
    return best_seconds(lambda: mix.update(rows), inner=inner)


def main() -> None:
    rng = np.random.default_rng(0)
    print(f"{'K':>2} {'d':>2} {'batch':>6} {'ours obs/s':>12} {'sklearn 1 EM iter obs/s':>24} "
          f"{'ratio':>6}")
    for k, d in CONFIGS:
        x = clusters(k, d, BATCH, np.random.default_rng(1))
        ref_rate = BATCH / sklearn_iteration_seconds(x, k)
        for batch in (BATCH, 1, 10_000):
            rate = batch / ours_seconds(x, k, batch, rng)
            print(f"{k:>2} {d:>2} {batch:>6} {rate:>12,.0f} {ref_rate:>24,.0f} "
                  f"{rate / ref_rate:>6.2f}")


if __name__ == "__main__":
    main()

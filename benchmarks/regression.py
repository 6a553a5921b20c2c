"""Throughput of Regression.update against numpy.linalg.lstsq, measured in the same run.

    python benchmarks/regression.py [--quick]

For p = 1 and p = 6 and batch sizes 1, 100 and 10,000 it streams the same
rows through ``Regression.update`` (validation, forgetting clock and the QR
update included) and through ``numpy.linalg.lstsq`` fitting each batch's rows
from scratch, the dense solver refitting the same rows in the same calls.
A ratio above 1 means the online update is faster. The machine is shared and
noisy: each figure is the best of a few repeats, and only the ratios travel.
A second reference, lstsq once over every row, is the offline ceiling.
"""

from __future__ import annotations

import argparse
import time

import numpy as np
from sigmad.estimators import HalfLife, Regression


def best_of(repeats: int, run) -> float:
    times = []
    for _ in range(repeats):
        start = time.perf_counter()
        run()
        times.append(time.perf_counter() - start)
    return min(times)


def stream(p: int, batch: int, n: int, seed: int = 1):
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(n, p))
    y = X @ rng.normal(size=p) + 0.5 + rng.normal(scale=0.1, size=n)
    t = np.arange(n, dtype=np.float64) * 1e-3
    return [(X[i:i + batch], y[i:i + batch], t[i:i + batch]) for i in range(0, n, batch)], X, y


def ours(batches, p: int) -> None:
    r = Regression(p, half_life=HalfLife(60.0))
    for X, y, t in batches:
        r.update(X, y, times=t)


def lstsq_per_batch(batches) -> None:
    for X, y, _ in batches:
        np.linalg.lstsq(np.column_stack((np.ones(len(y)), X)), y, rcond=None)


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="fewer rows, one repeat")
    args = parser.parse_args(argv)
    repeats = 1 if args.quick else 3
    # rows per case: enough calls for batch 1 to measure per-call overhead
    sizes = {1: 5_000, 100: 200_000, 10_000: 1_000_000}
    if args.quick:
        sizes = {b: n // 10 for b, n in sizes.items()}
    print(f"{'p':>2} {'batch':>6} {'rows':>9} {'update rows/s':>14} "
          f"{'lstsq/batch rows/s':>19} {'ratio':>6} {'lstsq once rows/s':>18}")
    for p in (1, 6):
        for batch, n in sizes.items():
            batches, X, y = stream(p, batch, n)
            t_ours = best_of(repeats, lambda b=batches, q=p: ours(b, q))
            t_ref = best_of(repeats, lambda b=batches: lstsq_per_batch(b))
            A = np.column_stack((np.ones(n), X))
            t_once = best_of(repeats, lambda a=A, v=y: np.linalg.lstsq(a, v, rcond=None))
            print(f"{p:>2} {batch:>6} {n:>9} {n / t_ours:>14.3g} {n / t_ref:>19.3g} "
                  f"{t_ref / t_ours:>6.2f} {n / t_once:>18.3g}")


if __name__ == "__main__":
    main()

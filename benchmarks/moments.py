"""Moments update throughput as a ratio to numpy's two-pass weighted mean and covariance.

Run: ``python benchmarks/moments.py [--rows N] [--repeat R]``. Each cell is the
rows/s of ``Moments.update`` fed in batches of the given size, divided by the
rows/s of ``np.average`` + ``np.cov(aweights=...)`` over the same rows at once,
both measured in this run (best of R), so the ratio travels between machines.
"""

from __future__ import annotations

import argparse
import time

import numpy as np
from sigmad.estimators import Moments


def _best(fn, repeat: int) -> float:
    best = float("inf")
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - t0)
    return best


def numpy_rate(x: np.ndarray, w: np.ndarray, repeat: int) -> float:
    """Rows/s of numpy's two-pass weighted mean and covariance over all rows."""
    def run():
        np.average(x, axis=0, weights=w)
        np.cov(x.T, aweights=w)
    return len(x) / _best(run, repeat)


def moments_rate(x: np.ndarray, w: np.ndarray, batch: int, repeat: int) -> float:
    """Rows/s of Moments.update fed in batches of ``batch`` rows."""
    d = x.shape[1]
    starts = range(0, len(x), batch)

    def run():
        m = Moments(d)
        if d == 1:
            col = x[:, 0]
            for i in starts:
                m.update(col[i:i + batch], weights=w[i:i + batch])
        else:
            for i in starts:
                m.update(x[i:i + batch], weights=w[i:i + batch])
    return len(x) / _best(run, repeat)


def table(rows: int = 200_000, repeat: int = 3) -> list[tuple[int, int, float, float]]:
    rng = np.random.default_rng(0)
    out = []
    for d in (1, 8):
        x = rng.normal(size=(rows, d))
        w = rng.uniform(0.5, 2.0, rows)
        ref = numpy_rate(x, w, repeat)
        for batch in (1, 100, 10_000):
            n = min(rows, 20_000) if batch == 1 else rows  # batch 1 is slow: fewer rows
            ours = moments_rate(x[:n], w[:n], batch, repeat)
            out.append((d, batch, ours, ours / ref))
    return out


def main(argv: list[str] | None = None) -> None:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--rows", type=int, default=200_000)
    p.add_argument("--repeat", type=int, default=3)
    a = p.parse_args(argv)
    print(f"Moments.update vs numpy two-pass np.average + np.cov(aweights), {a.rows} rows")
    print(f"{'d':>3} {'batch':>7} {'rows/s':>12} {'ratio to numpy':>15}")
    for d, batch, rate, ratio in table(a.rows, a.repeat):
        print(f"{d:>3} {batch:>7} {rate:>12.4g} {ratio:>15.3f}")
    print("target: d=1, batch 10000 >= 0.3")


if __name__ == "__main__":
    main()

"""A short tour of the estimators on invented data: ``python -m sigmad.estimators``.

The scenario is our own: a bakery's oven thermometer that reads every few
seconds, drifts warmer after noon, and is trusted less when its battery is low.
"""

from __future__ import annotations

import numpy as np

from . import HalfLife, Moments


def main() -> None:
    rng = np.random.default_rng(7)
    t = np.cumsum(rng.exponential(4.0, 3000))             # irregular event times, seconds
    temp = 182.0 + 6.0 * (t > t[1500]) + rng.normal(0, 1.5, 3000)
    trust = np.where(rng.random(3000) < 0.1, 0.2, 1.0)    # low-battery readings count less
    oven = Moments(half_life=HalfLife(600.0))              # a ten-minute half-life
    for i in range(0, 3000, 250):
        oven.update(temp[i:i + 250], weights=trust[i:i + 250], times=t[i:i + 250])
        print(f"t={t[min(i + 249, 2999)]:7.0f}s  mean {oven.mean[0]:7.2f}  "
              f"sd {oven.stddev()[0]:5.2f}  p99 {oven.quantile(0.99)[0]:7.2f}  "
              f"effective samples {oven.effective_samples:6.1f}")


if __name__ == "__main__":
    main()

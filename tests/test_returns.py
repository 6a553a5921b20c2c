"""Per-series returns and the volatility of returns, against numpy and pandas.

References: numpy (np.diff, np.log) for returns; pandas ``Series.ewm`` for the
exponentially weighted mean; a simulated Brownian motion of known sigma for the
volatility (the sample is invented, the law is the reference).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from conftest import need_module
from sigmad.estimators import HalfLife, IncompatibleError, Returns, Volatility


def _feed(series: dict, batches: list) -> dict:
    """Feed batches of (series id, time, price) rows, shuffled, to one Returns each."""
    out: dict = {k: ([], []) for k in series}
    for batch in batches:
        for k, r in series.items():
            rows = batch[batch[:, 0] == k]
            step = r.apply(rows[:, 2:3], times=rows[:, 1])
            assert step.late == 0
            out[k][0].extend(step.values[:, 0].tolist())
            out[k][1].extend(step.spans.tolist())
    return out


@pytest.mark.parametrize("kind", ["log_return", "difference"])
def test_returns_equal_numpy_on_interleaved_shuffled_ticks(kind: str) -> None:
    rng = np.random.default_rng(7)
    n = 3000
    ids = rng.integers(0, 3, n).astype(float)
    times = np.cumsum(rng.exponential(0.5, n))
    prices = 100.0 * np.exp(np.cumsum(rng.normal(0.0, 0.01, n)))
    rows = np.column_stack([ids, times, prices])
    cuts = np.sort(rng.choice(np.arange(1, n), 40, replace=False))
    batches = []
    for part in np.split(rows, cuts):     # each flush's rows in a random order
        batches.append(part[rng.permutation(len(part))])
    got = _feed({k: Returns([kind]) for k in (0.0, 1.0, 2.0)}, batches)
    for k in (0.0, 1.0, 2.0):
        p = prices[ids == k]
        t = times[ids == k]
        want = np.diff(np.log(p)) if kind == "log_return" else np.diff(p)   # numpy
        np.testing.assert_allclose(got[k][0], want, rtol=1e-12, atol=1e-15)
        np.testing.assert_allclose(got[k][1], np.diff(t), rtol=1e-15)


def test_first_row_yields_no_return_and_becomes_the_previous() -> None:
    r = Returns(["log_return"])
    first = r.apply([[100.0]], times=[1.0])
    assert first.values.shape == (0, 1)
    second = r.apply([[110.0]], times=[2.0])
    assert second.values[0, 0] == pytest.approx(math.log(1.1), rel=1e-15)   # math.log


def test_rows_older_than_the_latest_are_late_and_change_nothing() -> None:
    r = Returns(["difference"])
    r.apply([[1.0], [2.0]], times=[10.0, 11.0])
    step = r.apply([[5.0], [3.0]], times=[9.0, 12.0])
    assert step.late == 1
    assert step.values[:, 0].tolist() == [1.0]    # 3 - 2: the late row was skipped
    assert r.clock == 12.0


def test_non_positive_price_under_log_return_is_counted_not_taken() -> None:
    r = Returns(["log_return", None])
    step = r.apply([[100.0, 1.0], [0.0, 2.0], [-3.0, 3.0], [101.0, 4.0]],
                   times=[1.0, 2.0, 3.0, 4.0])
    assert step.not_positive == 2
    np.testing.assert_allclose(step.values, [[math.log(1.01), 4.0]], rtol=1e-14)


def test_log_returns_of_prices_whose_ratio_leaves_float64_are_finite() -> None:
    # found by the hostile-input fuzz: prices 4.5e15 then 1.1e-308 have a ratio that
    # underflows to 0 (log -inf), and 1e-300 then 1e100 one that overflows; both are
    # positive prices within max_abs_value. Reference: math.log of each price
    r = Returns(["log_return"])
    prices = [4503599627370496.0, 1.1125369292536007e-308, 1e100, 1e-300, 5e-324, 1.0]
    step = r.apply([[p] for p in prices], times=np.arange(6.0))
    want = [math.log(b) - math.log(a) for a, b in zip(prices[:-1], prices[1:], strict=True)]
    np.testing.assert_allclose(step.values[:, 0], want, rtol=1e-15)
    # a small return keeps its digits: the log of the ratio, not a difference of logs
    small = Returns(["log_return"]).apply([[100.0], [100.0 * (1 + 1e-12)]], times=[0.0, 1.0])
    assert small.values[0, 0] == pytest.approx(math.log1p(1e-12), rel=1e-4)


def test_returns_state_round_trips() -> None:
    r = Returns(["log_return", "difference"])
    r.apply([[100.0, 5.0], [101.0, 6.0]], times=[1.0, 2.0])
    back = Returns.from_dict(r.to_dict())
    a = r.apply([[102.0, 8.0]], times=[3.0]).values
    b = back.apply([[102.0, 8.0]], times=[3.0]).values
    assert a.tolist() == b.tolist()
    with pytest.raises(IncompatibleError, match="version"):
        Returns.from_dict({**r.to_dict(), "version": 99})
    with pytest.raises(IncompatibleError, match="transform"):
        Returns(["square_root"])


def test_volatility_of_brownian_motion_with_exponential_spacing() -> None:
    # log price a Brownian motion with sigma per sqrt(second) = 0.0004: sigma per day
    # is 0.0004 * sqrt(86400) = 0.117576 (the law is the reference)
    rng = np.random.default_rng(2026)
    n, sigma = 200_000, 0.0004
    dt = rng.exponential(0.8, n)
    t = np.cumsum(dt)
    logp = np.log(50.0) + np.cumsum(sigma * np.sqrt(dt) * rng.standard_normal(n))
    prices = np.exp(logp)
    r, v = Returns(["log_return"]), Volatility(1)
    for part in np.array_split(np.arange(n), 100):
        step = r.apply(prices[part, None], times=t[part])
        v.update(step.values, step.spans, times=step.times)
    got = float(v.volatility(unit=86400.0)[0])
    assert got == pytest.approx(sigma * math.sqrt(86400.0), rel=0.02)


def test_volatility_equals_pandas_ewm_of_squared_returns_on_regular_ticks() -> None:
    pd = need_module("pandas")
    rng = np.random.default_rng(11)
    n, spacing, h = 500, 2.0, 30.0
    rets = rng.normal(0.0, 0.01, n)
    t = spacing * np.arange(1, n + 1)
    v = Volatility(1, HalfLife(h))
    for part in np.array_split(np.arange(n), 7):
        v.update(rets[part, None], np.full(part.size, spacing), times=t[part])
    # pandas: halflife in observations = h / spacing; adjust=True is the weighted mean
    want = pd.Series(rets ** 2 / spacing).ewm(halflife=h / spacing, adjust=True).mean()
    assert v.rate[0] == pytest.approx(float(want.iloc[-1]), rel=1e-12)
    assert float(v.volatility(3600.0)[0]) == pytest.approx(
        math.sqrt(float(want.iloc[-1]) * 3600.0), rel=1e-12)


def test_riskmetrics_decay_is_a_half_life_of_11_2_observations() -> None:
    pd = need_module("pandas")
    # RiskMetrics (J.P. Morgan/Reuters 1996): lambda = 0.94 daily; pandas alpha = 1 - lambda
    rng = np.random.default_rng(3)
    rets = rng.normal(0.0, 0.01, 300)
    h = math.log(0.5) / math.log(0.94)
    assert h == pytest.approx(11.2, abs=0.01)
    v = Volatility(1, HalfLife(h, "observations"))
    v.update(rets[:, None], np.ones(300))
    want = pd.Series(rets ** 2).ewm(alpha=0.06, adjust=True).mean().iloc[-1]
    assert v.rate[0] == pytest.approx(float(want), rel=1e-10)


def test_volatility_batches_merge_and_round_trip_agree() -> None:
    rng = np.random.default_rng(5)
    r = rng.normal(0.0, 0.02, (200, 2))
    dt = rng.exponential(1.0, 200)
    t = np.cumsum(dt)
    h = HalfLife(40.0)
    whole = Volatility(2, h)
    whole.update(r, dt, times=t)
    a, b = Volatility(2, h), Volatility(2, h)
    a.update(r[:120], dt[:120], times=t[:120])
    b.update(r[120:], dt[120:], times=t[120:])
    np.testing.assert_allclose(a.merge(b).rate, whole.rate, rtol=1e-12)
    np.testing.assert_allclose(Volatility.from_dict(whole.to_dict()).rate, whole.rate)


def test_zero_time_steps_are_skipped() -> None:
    v = Volatility(1)
    v.update([[0.5], [0.1]], spans=[0.0, 1.0])
    assert v.rate.tolist() == pytest.approx([0.01])
    assert v.count == 1


def test_volatility_survives_any_silence_and_then_follows_new_returns():
    # issue 16: a silence of 10,000 half-lives (W far below float64) changes no estimate,
    # and the rows after it outweigh the old ones entirely (a fresh state's figure)
    rng = np.random.default_rng(12)
    t = np.cumsum(rng.exponential(1.0, 500))
    r = rng.normal(0.0, 0.01, (500, 1)) * np.sqrt(np.diff(t, prepend=0.0))[:, None]
    v = Volatility(1, HalfLife(30.0))
    v.update(r[1:], np.diff(t)[:, None].ravel(), times=t[1:])
    before = v.volatility(86400.0)
    v.decay_to(t[-1] + 30.0 * 10_000)
    np.testing.assert_allclose(v.volatility(86400.0), before, rtol=1e-12)
    again = Volatility.from_dict(v.to_dict())
    np.testing.assert_allclose(again.volatility(86400.0), before, rtol=1e-12)
    later = t[-1] + 30.0 * 10_000 + np.arange(1.0, 21.0)
    rr = rng.normal(0.0, 0.02, (20, 1))
    fresh = Volatility(1, HalfLife(30.0))
    fresh.update(rr, np.ones(20), times=later)
    v.update(rr, np.ones(20), times=later)
    np.testing.assert_allclose(v.volatility(86400.0), fresh.volatility(86400.0), rtol=1e-12)
    np.testing.assert_allclose(again.merge(fresh).volatility(86400.0),
                               fresh.volatility(86400.0), rtol=1e-12)

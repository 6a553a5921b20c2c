"""ThresholdColumns and fold_counts against Thresholds objects folding the same rows.

The reference is the object path (``Thresholds._fold``, itself checked against numpy's
exact counts in tests/test_thresholds.py); with one row per state the columns must
agree bit for bit, with several up to rounding (segment sums add in another order).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from sigmad.estimators import (
    HalfLife,
    Moments,
    MomentsColumns,
    ThresholdColumns,
    Thresholds,
    fold_counts,
    fold_groups,
    fold_rows,
    normal_exceedance,
    normal_exceedance_rows,
)

BOUNDS = [8.0, 10.0, 14.0]
HALF_LIVES = [None, HalfLife(7.0, "observations"), HalfLife(30.0, "seconds")]


def _each_kind(test):
    """Run ``test`` for each kind of forgetting, with and without row weights."""
    test = pytest.mark.parametrize("weighted", [False, True])(test)
    return pytest.mark.parametrize("hl", HALF_LIVES, ids=["none", "count", "time"])(test)


def _states(rng, n: int, hl):
    """n series with some history: (Moments, Thresholds) pairs folded alike."""
    ms, ts = [], []
    for _ in range(n):
        m, t = Moments(1, hl), Thresholds(BOUNDS, hl)
        k = int(rng.integers(0, 4))
        if k:
            x = rng.normal(10.0, 2.0, k)
            w = rng.uniform(0.5, 2.0, k)
            times = np.sort(rng.uniform(0.0, 50.0, k)) if hl is not None and not \
                hl.by_count else None
            m.update(x[:, None], w, times)
            t.update(x, w, times)
        ms.append(m)
        ts.append(t)
    return ms, ts


def _times(rng, hl, ms, m):
    if hl is None or hl.by_count:
        return None
    start = max((s.clock or 0.0) for s in ms)
    return np.sort(rng.uniform(start, start + 40.0, m))


def _same_with_the_moments_factor(new, cols, x, w, res, starts=None):
    """The factor 2**g the moments' fold hands on (``Folded.factor``) gives the bits
    fold_counts computes for itself, and there is one exactly when there is aging."""
    assert (res.factor is None) == (res.aging is None)
    again, ok = fold_counts(cols, x, w, res.decayed, res.aging, starts, res.factor)
    for name in ("cumulative", "value_sum", "W", "above", "E"):
        np.testing.assert_array_equal(getattr(again, name), getattr(new, name))


@_each_kind
def test_one_row_per_state_is_the_objects_bit_for_bit(hl, weighted):
    rng = np.random.default_rng(3)
    ms, ts = _states(rng, 40, hl)
    x = rng.normal(10.0, 2.0, 40)
    x[:4] = BOUNDS + [BOUNDS[0]]          # values on a bound count as at or below it
    w = rng.uniform(0.5, 2.0, 40) if weighted else None
    t = _times(rng, hl, ms, 40)
    cols = ThresholdColumns.of(ts, BOUNDS, hl)
    res = fold_rows(MomentsColumns.of(ms, 1, hl), x[:, None], w, t)
    new, ok = fold_counts(cols, x, w, res.decayed, res.aging)
    assert ok.all() and res.ok.all()
    _same_with_the_moments_factor(new, cols, x, w, res)
    for i, th in enumerate(ts):
        th._fold(x[i:i + 1], None if w is None else w[i:i + 1],
                 None if t is None else t[i:i + 1])
        got = new.state(i, th.clock, th.count)
        assert got.cumulative.tolist() == th.cumulative.tolist()
        assert got.value_sum == th.value_sum and got.W == th.W
        assert got._above.tolist() == th._above.tolist()
        np.testing.assert_array_equal(new.observed_shares()[i], th.observed_share)


@_each_kind
def test_several_rows_per_state_agree_to_rounding(hl, weighted):
    rng = np.random.default_rng(5)
    ms, ts = _states(rng, 30, hl)
    counts = rng.integers(2, 9, 30)
    m = int(counts.sum())
    x = rng.normal(10.0, 2.0, m)
    w = rng.uniform(0.5, 2.0, m) if weighted else None
    starts = np.cumsum(counts) - counts
    t = None
    if hl is not None and not hl.by_count:
        t = np.concatenate([np.sort(rng.uniform(60.0, 90.0, c)) for c in counts])
    res = fold_groups(MomentsColumns.of(ms, 1, hl), x[:, None], w, t, counts)
    cols = ThresholdColumns.of(ts, BOUNDS, hl)
    new, ok = fold_counts(cols, x, w, res.decayed, res.aging, starts)
    assert ok.all()
    _same_with_the_moments_factor(new, cols, x, w, res, starts)
    for i, th in enumerate(ts):
        p = slice(starts[i], starts[i] + counts[i])
        th._fold(x[p], None if w is None else w[p], None if t is None else t[p])
        got = new.state(i, th.clock, th.count)
        np.testing.assert_allclose(got.cumulative, th.cumulative, rtol=1e-13)
        assert math.isclose(got.value_sum, th.value_sum, rel_tol=1e-13)
        assert math.isclose(got.W, th.W, rel_tol=1e-13)
        np.testing.assert_allclose(got._above, th._above, rtol=1e-12, atol=1e-12 * th.W)


def test_a_scale_exponent_or_an_aging_that_would_move_it_is_left_to_the_object():
    hl = HalfLife(1.0, "seconds")
    a, b, c = (Thresholds(BOUNDS, hl) for _ in range(3))
    for th in (a, b, c):
        th.update([9.0], times=[0.0])
    b.decay_to(500.0)          # 500 half-lives: the scale exponent takes them
    assert b.E != 0
    cols = ThresholdColumns.of([a, b, c], BOUNDS, hl)
    g = np.array([-1.0, -1.0, -200.0])
    _, ok = fold_counts(cols, np.array([9.0, 9.0, 9.0]), None, None, g)
    assert ok.tolist() == [True, False, False]


def test_take_put_resize_and_states_round_trip():
    rng = np.random.default_rng(1)
    _, ts = _states(rng, 12, None)
    cols = ThresholdColumns.of(ts, BOUNDS, None)
    grown = cols.resized(20)
    assert grown.n == 20 and not grown.W[12:].any()
    part = grown.take(np.array([3, 7]))
    empty = ThresholdColumns.zeros(2, BOUNDS, None)
    empty.put(slice(None), part)
    for j, i in enumerate((3, 7)):
        assert empty.state(j, None, 0).to_dict() | {"count": ts[i].count, "clock": None} == \
            ts[i].to_dict()


def test_saved_rows_out_of_order_in_the_last_bits_restore_and_real_disorder_is_bad():
    # as Thresholds.from_dict: a count a few ulps above a later one (saved before each
    # batch's counts were kept in order) is put in order; a larger one is a bad row
    rng = np.random.default_rng(4)
    _, ts = _states(rng, 3, None)
    d = ThresholdColumns.of(ts, BOUNDS, None).to_dict()
    cols = ThresholdColumns.from_dict(d)
    cum = cols.cumulative.copy()
    cum[0, 2] = np.nextafter(cum[0, 3], np.inf)          # last bit
    cum[1, 0] = cum[1, 1] * (1 + 1e-6)                   # damage
    d = cols._replace(cumulative=cum).to_dict()
    again = ThresholdColumns.from_dict(d)
    assert again.bad_rows().tolist() == [False, True, False]
    assert again.cumulative[0].tolist() == cum[0, :2].tolist() + [cum[0, 3]] * 2
    assert again.cumulative[2].tolist() == cols.cumulative[2].tolist()


def test_normal_exceedance_rows_is_normal_exceedance():
    means = [10.0, 0.0, 5.0, math.nan, 3.0]
    variances = [4.0, 0.0, -1.0, 1.0, 1e-300]
    rows = normal_exceedance_rows(BOUNDS, means, variances)
    for (m, v), row in zip(zip(means, variances, strict=True), rows, strict=True):
        want = normal_exceedance(BOUNDS, m, math.sqrt(v) if v >= 0.0 else math.nan)
        np.testing.assert_array_equal(np.array(row), want)

"""``fold_groups`` (many states, a batch of rows each, at once) against ``Moments`` one by
one: the reference is ``Moments._fold``, whose maths tests/test_moments.py checks
against numpy. Segment sums add in another order, so states agree to rounding."""

from __future__ import annotations

import numpy as np
import pytest
from sigmad.estimators import HalfLife, Moments, MomentsColumns, fold_groups


def _states(rng, n, dim, hl, timed):
    out = []
    for k in range(n):
        m = Moments(dim, hl)
        if k % 4:   # some states empty, the rest with a few rows of their own
            rows = rng.normal(10.0 * k, 1.0 + k % 3, (int(rng.integers(1, 5)), dim))
            t = np.full(rows.shape[0], 100.0 - rng.uniform(0, 20)) if timed else None
            m.update(rows, times=t)
        out.append(m)
    return out


@pytest.mark.parametrize("dim", [1, 3])
@pytest.mark.parametrize("hl", [None, HalfLife(5.0), HalfLife(4.0, "observations")])
@pytest.mark.parametrize("weighted", [False, True])
def test_fold_groups_equals_moments_batch_by_batch(dim, hl, weighted):
    rng = np.random.default_rng(dim * 10 + weighted)
    timed = hl is not None and not hl.by_count
    states = _states(rng, 40, dim, hl, timed)
    counts = rng.integers(2, 7, len(states))
    x = np.concatenate([rng.normal(10.0 * k + 3.0, 2.0, (c, dim))
                        for k, c in enumerate(counts)])
    w = rng.choice([0.5, 1.0, 3.0], x.shape[0]) if weighted else None
    t = None
    if timed or (hl is None and weighted):   # event times: some rows older than the state
        t = 100.0 + rng.uniform(-30.0, 10.0, x.shape[0])
    cols = MomentsColumns.of(states, dim, hl)
    out, ok, *_ = fold_groups(cols, x, w, t, counts)
    assert ok.all()
    got = out.states()
    at = 0
    for k, m in enumerate(states):
        c = int(counts[k])
        m.update(x[at:at + c], weights=None if w is None else w[at:at + c],
                 times=None if t is None else t[at:at + c])
        at += c
        g = got[k]
        assert (g.count, g.clock) == (m.count, m.clock)
        np.testing.assert_allclose([g.W, g.W2], [m.W, m.W2], rtol=1e-13)
        np.testing.assert_allclose(g.mean, m.mean, rtol=1e-13)
        np.testing.assert_allclose(g.covariance("none"), m.covariance("none"), rtol=1e-9,
                                   atol=1e-9 * np.abs(m.covariance("none")).max())


def test_rows_without_times_leave_the_clock_where_it_was():
    a = Moments()
    a.update([1.0, 2.0], times=[5.0, 6.0])
    b = Moments()
    cols = MomentsColumns.of([a, b], 1, None)
    times = np.array([np.nan, np.nan, 9.0, 8.0])   # group a: no times; group b: times
    out, ok, *_ = fold_groups(cols, np.array([[3.0], [4.0], [5.0], [6.0]]), None, times,
                          np.array([2, 2]))
    assert ok.all()
    assert out.clock.tolist() == [6.0, 9.0] and out.has_clock.tolist() == [True, True]


def test_states_outside_the_common_case_are_left_to_moments():
    quiet = Moments(1, HalfLife(1.0))
    quiet.update([1.0, 2.0], times=[0.0, 0.0])
    cols = MomentsColumns.of([quiet, Moments(1, HalfLife(1.0))], 1, HalfLife(1.0))
    # 500 half-lives of silence would move the first state's scale; huge weights too
    out, ok, *_ = fold_groups(cols, np.array([[1.0], [2.0], [3.0], [4.0]]),
                          np.array([1.0, 1.0, 2.0 ** 120, 1.0]),
                          np.array([500.0, 500.0, 1.0, 1.0]), np.array([2, 2]))
    assert ok.tolist() == [False, False]

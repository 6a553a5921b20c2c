"""Rows joined from several feeds, each as of its latest value, against pandas merge_asof."""

from __future__ import annotations

import numpy as np
import pytest
from conftest import need_module
from sigmad.estimators import IncompatibleError, Legs


def feeds(seed: int, n: int = 2000):
    """Two invented feeds with their own exponential tick spacing."""
    rng = np.random.default_rng(seed)
    ta = np.cumsum(rng.exponential(1.0, n))
    tb = np.cumsum(rng.exponential(1.7, n // 2))
    a = 100.0 + np.cumsum(rng.normal(0, 0.1, ta.size))
    b = 50.0 + np.cumsum(rng.normal(0, 0.1, tb.size))
    return ta, a, tb, b


def merge_asof_reference(ta, a, tb, b, max_age):
    """pandas: each feed's ticks joined backward to the other's (tolerance = the bound),
    rows with a missing leg dropped, the two sides unioned in time order."""
    pd = need_module("pandas")
    fa = pd.DataFrame({"t": ta, "alpha": a})
    fb = pd.DataFrame({"t": tb, "beta": b})
    kw = {"on": "t", "direction": "backward"}
    if max_age is not None:
        kw["tolerance"] = max_age
    left = pd.merge_asof(fa, fb.rename(columns={"t": "tb"}).assign(t=tb), **kw)
    right = pd.merge_asof(fb, fa.rename(columns={"t": "ta"}).assign(t=ta), **kw)
    both = pd.concat([left[["t", "alpha", "beta"]], right[["t", "alpha", "beta"]]])
    both = both.dropna().sort_values("t", kind="stable")
    return both["t"].to_numpy(), both[["alpha", "beta"]].to_numpy()


@pytest.mark.parametrize("max_age", [None, 2.0, 0.5])
def test_join_equals_pandas_merge_asof_over_shuffled_batches(max_age):
    ta, a, tb, b = feeds(3)
    t = np.concatenate([ta, tb])
    v = np.concatenate([a, b])
    leg = np.concatenate([np.zeros(ta.size, int), np.ones(tb.size, int)])
    order = np.argsort(t)
    t, v, leg = t[order], v[order], leg[order]
    rng = np.random.default_rng(9)
    j = Legs(2, max_age)
    times, rows, stale = [], [], 0
    for part in np.array_split(np.arange(t.size), 37):   # flushes, each shuffled
        p = rng.permutation(part)
        out = j.join(v[p], legs=leg[p], times=t[p])
        assert out.late == 0
        times.append(out.times)
        rows.append(out.values)
        stale += out.stale
    want_t, want_rows = merge_asof_reference(ta, a, tb, b, max_age)
    np.testing.assert_array_equal(np.concatenate(times), want_t)
    np.testing.assert_array_equal(np.vstack(rows), want_rows)
    assert stale == t.size - want_t.size
    if max_age == 0.5:
        assert stale > 100          # the bound really cuts rows here


def test_ticks_older_than_the_latest_are_late():
    j = Legs(2, 10.0)
    j.join([1.0, 2.0], legs=[0, 1], times=[5.0, 6.0])
    out = j.join([3.0, 4.0], legs=[0, 1], times=[4.0, 7.0])
    assert out.late == 1
    assert out.values.tolist() == [[1.0, 4.0]]


def test_legs_state_round_trips_and_rejects_bad_maps():
    j = Legs(2, 3.0)
    j.join([1.0, 2.0], legs=[0, 1], times=[5.0, 6.0])
    back = Legs.from_dict(j.to_dict())
    a = j.join([7.0], legs=[0], times=[7.0]).values
    b = back.join([7.0], legs=[0], times=[7.0]).values
    assert a.tolist() == b.tolist() == [[7.0, 2.0]]
    with pytest.raises(IncompatibleError, match="legs"):
        Legs.from_dict({"kind": "legs", "version": 1})
    with pytest.raises(IncompatibleError, match="legs"):
        j.join([1.0], legs=[2], times=[9.0])

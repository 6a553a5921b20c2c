"""Moments against the NIST StRD, numpy, pandas and algebraic properties."""

from __future__ import annotations

import math

import numpy as np
import pytest
from conftest import lre, need_module
from hypothesis import given, settings
from hypothesis import strategies as st
from sigmad.estimators import (
    HalfLife,
    IncompatibleError,
    Moments,
    NonFiniteError,
    ShapeError,
    TimeError,
    WeightError,
    clean_batch,
)
from sigmad.estimators.validation import bound_batch, screen_batch

# ----------------------------------------------------------------- NIST StRD
# NIST StRD univariate summary statistics, NumAcc1-NumAcc4. Data regenerated
# from their published construction (NumAcc1: three values; NumAcc2-4: a centre
# value followed by 500 alternating pairs centre-0.1, centre+0.1). Certified
# mean and sample standard deviation from the NIST StRD pages (from memory:
# the mean is the centre value, the sd 1 for NumAcc1 and 0.1 for the others).


def _numacc(centre: float, lo: float, hi: float) -> np.ndarray:
    return np.array([centre] + [lo, hi] * 500)


NIST = {
    "NumAcc1": (np.array([10000001.0, 10000003.0, 10000002.0]), 10000002.0, 1.0),
    "NumAcc2": (_numacc(1.2, 1.1, 1.3), 1.2, 0.1),
    "NumAcc3": (_numacc(1000000.2, 1000000.1, 1000000.3), 1000000.2, 0.1),
    "NumAcc4": (_numacc(10000000.2, 10000000.1, 10000000.3), 10000000.2, 0.1),
}


def _feed(data: np.ndarray, how: str) -> Moments:
    m = Moments()
    if how == "batch":
        m.update(data)
    elif how == "rows":
        for v in data:
            m.update(v)
    else:  # uneven batches: 1, 2, 3, ... rows
        i, size = 0, 1
        while i < len(data):
            m.update(data[i:i + size])
            i, size = i + size, size + 1
    return m


@pytest.mark.parametrize("name", sorted(NIST))
@pytest.mark.parametrize("how", ["batch", "rows", "uneven"])
def test_nist_univariate_lre_no_worse_than_numpy_two_pass(name, how):
    data, cert_mean, cert_sd = NIST[name]
    m = _feed(data, how)
    ours_mean = lre(float(m.mean[0]), cert_mean)
    ours_sd = lre(float(m.stddev("reliability")[0]), cert_sd)
    ref_mean = lre(float(np.mean(data)), cert_mean)
    ref_sd = lre(float(np.std(data, ddof=1)), cert_sd)
    print(f"{name} {how}: LRE mean {ours_mean:.1f} (numpy {ref_mean:.1f}), "
          f"sd {ours_sd:.1f} (numpy {ref_sd:.1f})")
    assert ours_mean >= ref_mean - 0.5
    assert ours_sd >= ref_sd - 0.5


def test_naive_sum_of_squares_fails_numacc4_so_the_nist_test_can_fail():
    # The textbook one-pass formula (sum x^2 - (sum x)^2 / n) / (n - 1) loses
    # everything on NumAcc4; the NIST check above is therefore able to fail.
    data, _, cert_sd = NIST["NumAcc4"]
    n = len(data)
    naive_var = (np.sum(data * data) - np.sum(data) ** 2 / n) / (n - 1)
    naive_sd = math.sqrt(naive_var) if naive_var > 0 else 0.0
    assert lre(naive_sd, cert_sd) < 2.0
    assert lre(float(_feed(data, "rows").stddev()[0]), cert_sd) > 8.0


# ------------------------------------------------------------------- numpy
def test_mean_matches_numpy_average_with_weights():
    rng = np.random.default_rng(1)
    x, w = rng.normal(3.0, 2.0, (500, 3)), rng.uniform(0.1, 5.0, 500)
    m = Moments(3)
    m.update(x, weights=w)
    np.testing.assert_allclose(m.mean, np.average(x, axis=0, weights=w), rtol=1e-13)


def test_frequency_correction_matches_numpy_cov_fweights():
    rng = np.random.default_rng(2)
    x, f = rng.normal(size=(300, 4)), rng.integers(1, 6, 300)
    m = Moments(4)
    m.update(x, weights=f)
    np.testing.assert_allclose(m.covariance("frequency"), np.cov(x.T, fweights=f), rtol=1e-12)


def test_frequency_weights_equal_repeated_rows():
    # common practice: an integer frequency weight is the same as repeating the row
    rng = np.random.default_rng(3)
    x, f = rng.normal(size=50), rng.integers(1, 4, 50)
    weighted, repeated = Moments(), Moments()
    weighted.update(x, weights=f)
    repeated.update(np.repeat(x, f))
    np.testing.assert_allclose(weighted.variance("frequency"), repeated.variance("frequency"),
                               rtol=1e-12)


def test_reliability_correction_matches_numpy_cov_aweights():
    rng = np.random.default_rng(4)
    x, a = rng.normal(size=(400, 3)), rng.uniform(0.01, 3.0, 400)
    m = Moments(3)
    m.update(x, weights=a)
    np.testing.assert_allclose(m.covariance("reliability"), np.cov(x.T, aweights=a), rtol=1e-12)
    np.testing.assert_allclose(m.covariance("none"), np.cov(x.T, aweights=a, bias=True),
                               rtol=1e-12)


def test_unit_weights_reliability_is_n_minus_1_and_none_is_n():
    # common practice: the unbiased estimator divides by n-1, the ML one by n
    x = np.random.default_rng(5).normal(size=(37, 2))
    m = Moments(2)
    m.update(x)
    assert m.scatter_divisor("reliability") == pytest.approx(36.0, rel=1e-15)
    np.testing.assert_allclose(m.variance("reliability"), np.var(x, axis=0, ddof=1), rtol=1e-13)
    np.testing.assert_allclose(m.variance("none"), np.var(x, axis=0, ddof=0), rtol=1e-13)
    assert m.effective_samples == pytest.approx(37.0, rel=1e-15)


def test_correlation_matches_numpy_corrcoef():
    rng = np.random.default_rng(6)
    x = rng.multivariate_normal([0, 1, 2], [[1, .6, .2], [.6, 2, -.3], [.2, -.3, .5]], 1000)
    m = Moments(3)
    m.update(x)
    np.testing.assert_allclose(m.correlation(), np.corrcoef(x.T), rtol=1e-12)


def test_effective_samples_is_kish():
    # Kish (1965): n_eff = (sum w)^2 / sum w^2
    w = np.array([1.0, 2.0, 3.0, 4.0])
    m = Moments()
    m.update([1.0, 2.0, 3.0, 4.0], weights=w)
    assert m.effective_samples == pytest.approx(w.sum() ** 2 / (w ** 2).sum(), rel=1e-15)


def test_standard_error_and_normal_quantile():
    scipy_stats = need_module("scipy.stats")
    x = np.random.default_rng(7).normal(10.0, 3.0, 200)
    m = Moments()
    m.update(x)
    sd = np.std(x, ddof=1)
    assert m.standard_error()[0] == pytest.approx(sd / math.sqrt(200), rel=1e-12)
    for q in (0.01, 0.5, 0.9, 0.999):
        ref = scipy_stats.norm.ppf(q, loc=np.mean(x), scale=sd)  # scipy.stats.norm
        assert m.quantile(q)[0] == pytest.approx(ref, rel=1e-12)


def test_standard_error_with_frequency_weights_matches_statsmodels_descrstatsw():
    weightstats = need_module("statsmodels.stats.weightstats")
    rng = np.random.default_rng(13)
    x, f = rng.normal(5.0, 2.0, 80), rng.integers(1, 6, 80).astype(float)
    m = Moments()
    m.update(x, weights=f)
    ref = weightstats.DescrStatsW(x, weights=f, ddof=1)  # statsmodels: frequency weights
    assert m.standard_error("frequency")[0] == pytest.approx(ref.std_mean, rel=1e-12)


def test_mahalanobis_matches_direct_solve():
    rng = np.random.default_rng(8)
    x = rng.multivariate_normal([1, -1], [[2, .8], [.8, 1]], 500)
    m = Moments(2)
    m.update(x)
    probe = np.array([[3.0, 0.0], [1.0, -1.0]])
    cov = np.cov(x.T)  # numpy reference
    diff = probe - x.mean(axis=0)
    ref = np.sqrt(np.einsum("ij,jk,ik->i", diff, np.linalg.inv(cov), diff))
    np.testing.assert_allclose(m.mahalanobis(probe), ref, rtol=1e-10)


# ------------------------------------------------------------- forgetting
def test_time_forgetting_matches_pandas_ewm_mean_with_times():
    pd = need_module("pandas")
    rng = np.random.default_rng(9)
    t = np.cumsum(rng.exponential(0.7, 400))          # irregular event times
    x = rng.normal(size=400) + np.sin(t / 20)
    m = Moments(half_life=HalfLife(15.0))
    for i in range(0, 400, 37):
        m.update(x[i:i + 37], times=t[i:i + 37])
    times = pd.to_datetime(t, unit="s")
    ref = pd.Series(x).ewm(halflife=pd.Timedelta(seconds=15), times=times).mean().iloc[-1]
    assert m.mean[0] == pytest.approx(ref, rel=1e-11)


def test_out_of_order_rows_are_weighted_by_their_own_age():
    # reference: numpy weighted average with weights 2**(-(T - t)/h), T the latest time
    rng = np.random.default_rng(10)
    t = rng.uniform(0, 100, 300)
    x, w = rng.normal(size=300), rng.uniform(0.5, 2, 300)
    h = 12.0
    m = Moments(half_life=HalfLife(h))
    for i in range(0, 300, 50):
        m.update(x[i:i + 50], weights=w[i:i + 50], times=t[i:i + 50])
    d = w * 2.0 ** (-(t.max() - t) / h)
    assert m.mean[0] == pytest.approx(np.average(x, weights=d), rel=1e-12)
    assert m.variance("reliability")[0] == pytest.approx(
        np.cov(x, aweights=d), rel=1e-11)
    assert m.weight_sum == pytest.approx(d.sum(), rel=1e-12)



@pytest.mark.parametrize("weighted", [False, True], ids=["unit", "weighted"])
def test_batches_stamped_at_one_arrival_each_are_weighted_by_age(weighted):
    # the daemon stamps a message's rows with its arrival: whole batches at the state's
    # clock (factors of exactly 1), then one led by a row at the clock with an older row
    # inside. Reference: numpy weighted moments with weights w * 2**(-(T - t)/h)
    rng = np.random.default_rng(12)
    t = np.repeat([0.0, 4.0, 4.0, 9.0, 20.0], 60)
    t[-30] = 11.0                                   # older than the last batch's clock
    x, w = rng.normal(size=t.size), rng.uniform(0.5, 2, t.size)
    w = w if weighted else np.ones(t.size)
    h = 8.0
    m = Moments(half_life=HalfLife(h))
    for i in range(0, t.size, 60):
        m.update(x[i:i + 60], weights=w[i:i + 60] if weighted else None, times=t[i:i + 60])
    d = w * 2.0 ** (-(t.max() - t) / h)
    assert m.mean[0] == pytest.approx(np.average(x, weights=d), rel=1e-12)
    assert m.variance("reliability")[0] == pytest.approx(np.cov(x, aweights=d), rel=1e-11)
    assert m.weight_sum == pytest.approx(d.sum(), rel=1e-12)
    assert m.effective_samples == pytest.approx(d.sum() ** 2 / (d @ d), rel=1e-12)

def test_count_forgetting_matches_pandas_ewm_var_and_cov():
    pd = need_module("pandas")
    rng = np.random.default_rng(11)
    x = rng.normal(size=(600, 2)) @ np.array([[1.0, 0.4], [0.0, 0.8]])
    h = 50.0
    m = Moments(2, half_life=HalfLife(h, "observations"))
    for i in range(0, 600, 64):
        m.update(x[i:i + 64])
    a = pd.Series(x[:, 0]).ewm(halflife=h)
    b = pd.Series(x[:, 1])
    assert m.mean[0] == pytest.approx(a.mean().iloc[-1], rel=1e-12)
    assert m.variance("reliability")[0] == pytest.approx(a.var(bias=False).iloc[-1], rel=1e-11)
    assert m.variance("none")[0] == pytest.approx(a.var(bias=True).iloc[-1], rel=1e-11)
    assert m.covariance("reliability")[0, 1] == pytest.approx(
        a.cov(b, bias=False).iloc[-1], rel=1e-11)


def test_decay_to_ages_weights_but_keeps_the_mean():
    m = Moments(half_life=HalfLife(10.0))
    m.update([1.0, 3.0], times=[0.0, 0.0])
    m.decay_to(20.0)   # two half-lives: weights quarter (definition of half-life)
    assert m.weight_sum == pytest.approx(0.5, rel=1e-15)
    assert m.mean[0] == 2.0
    assert m.effective_samples == pytest.approx(2.0, rel=1e-15)
    m.decay_to(5.0)    # never backwards
    assert m.weight_sum == pytest.approx(0.5, rel=1e-15)


def test_decay_far_beyond_float_range_keeps_the_estimates_without_nan():
    # issue 16: decaying every observation by one factor changes no estimate; only the
    # weight sum itself (2**-1e6) is below what float64 shows
    m = Moments(half_life=HalfLife(1.0))
    m.update([5.0], times=[0.0])
    m.decay_to(1e6)
    assert m.weight_sum == 0.0 and m.effective_samples == 1.0 and m.mean[0] == 5.0
    m.update([7.0], times=[1e6])   # the old row weighs 2**-1e6 against the new one
    assert m.mean[0] == 7.0 and m.effective_samples == 1.0


# ------------------------------------------------------------- properties
rows = st.lists(st.floats(-1e6, 1e6, allow_nan=False), min_size=2, max_size=60)


@settings(max_examples=60, deadline=None)
@given(rows, st.data())
def test_batch_equals_rows_equals_merge_of_any_split(values, data):
    x = np.array(values)
    w = np.array(data.draw(st.lists(st.floats(0.01, 100), min_size=len(x), max_size=len(x))))
    cut = data.draw(st.integers(0, len(x)))
    batch, single, left, right = Moments(), Moments(), Moments(), Moments()
    batch.update(x, weights=w)
    for xi, wi in zip(x, w, strict=True):
        single.update(xi, weights=wi)
    left.update(x[:cut], weights=w[:cut])
    right.update(x[cut:], weights=w[cut:])
    merged = left.merge(right)
    scale = max(1.0, float(np.abs(x).max()))
    for other in (single, merged):
        assert other.weight_sum == pytest.approx(batch.weight_sum, rel=1e-12)
        assert other.mean[0] == pytest.approx(batch.mean[0], rel=1e-12, abs=1e-12 * scale)
        assert other.variance("none")[0] == pytest.approx(
            batch.variance("none")[0], rel=1e-9, abs=1e-12 * scale * scale)


@settings(max_examples=40, deadline=None)
@given(rows, st.randoms(use_true_random=False))
def test_permutation_invariance_without_forgetting(values, rnd):
    x = np.array(values)
    shuffled = x.copy()
    rnd.shuffle(shuffled)
    a, b = Moments(), Moments()
    a.update(x)
    for v in shuffled:
        b.update(v)
    scale = max(1.0, float(np.abs(x).max()))
    assert b.mean[0] == pytest.approx(a.mean[0], rel=1e-12, abs=1e-12 * scale)
    assert b.variance()[0] == pytest.approx(a.variance()[0], rel=1e-9, abs=1e-12 * scale ** 2)


@settings(max_examples=40, deadline=None)
@given(rows, st.floats(1e-3, 1e3))
def test_scaling_all_weights_changes_neither_mean_nor_none_or_reliability_variance(values, c):
    x = np.array(values)
    w = np.linspace(0.5, 2.0, len(x))
    a, b = Moments(), Moments()
    a.update(x, weights=w)
    b.update(x, weights=c * w)
    scale = max(1.0, float(np.abs(x).max()))
    assert b.mean[0] == pytest.approx(a.mean[0], rel=1e-12, abs=1e-12 * scale)
    for corr in ("none", "reliability"):
        assert b.variance(corr)[0] == pytest.approx(a.variance(corr)[0], rel=1e-9,
                                                    abs=1e-12 * scale ** 2)


@settings(max_examples=30, deadline=None)
@given(st.lists(st.tuples(st.floats(-100, 100), st.floats(0, 50)), min_size=2, max_size=40),
       st.integers(1, 39))
def test_time_forgetting_merge_of_split_equals_one_state(pairs, cut):
    x = np.array([p[0] for p in pairs])
    t = np.array([p[1] for p in pairs])
    hl = HalfLife(7.0)
    whole, left, right = Moments(half_life=hl), Moments(half_life=hl), Moments(half_life=hl)
    whole.update(x, times=t)
    left.update(x[:cut], times=t[:cut])
    if cut < len(x):
        right.update(x[cut:], times=t[cut:])
    left.merge(right)
    assert left.weight_sum == pytest.approx(whole.weight_sum, rel=1e-12)
    assert left.mean[0] == pytest.approx(whole.mean[0], rel=1e-10, abs=1e-10)


# -------------------------------------------------------- persistence, errors
def test_to_dict_round_trip_is_exact_and_versioned():
    msgpack = need_module("msgpack")
    m = Moments(2, half_life=HalfLife(30.0))
    m.update(np.random.default_rng(12).normal(size=(50, 2)), times=np.arange(50.0))
    d = m.to_dict()
    assert d["kind"] == "moments" and d["version"] == 1
    back = Moments.from_dict(msgpack.unpackb(msgpack.packb(d)))
    assert back.to_dict() == d
    np.testing.assert_array_equal(back.covariance(), m.covariance())


def test_from_dict_rejects_other_kinds_and_versions():
    d = Moments().to_dict()
    with pytest.raises(IncompatibleError, match="kind"):
        Moments.from_dict({**d, "kind": "regression"})
    with pytest.raises(IncompatibleError, match="version"):
        Moments.from_dict({**d, "version": 99})


@pytest.mark.parametrize(("x", "kwargs", "error", "named"), [
    ([[1.0, 2.0]], {}, ShapeError, "x"),
    ([1.0, float("nan")], {}, NonFiniteError, "nan"),
    ([1.0, float("inf")], {}, NonFiniteError, "inf"),
    ([1.0, 2.0], {"weights": [1.0, 0.0]}, WeightError, "0.0"),
    ([1.0, 2.0], {"weights": [1.0, -2.0]}, WeightError, "-2.0"),
    ([1.0, 2.0], {"weights": [1.0, float("nan")]}, WeightError, "nan"),
    ([1.0, 2.0], {"weights": [1.0]}, ShapeError, "weights"),
    ([1.0, 2.0], {"times": [1.0, float("inf")]}, TimeError, "inf"),
])
def test_bad_input_raises_a_specific_error_and_changes_nothing(x, kwargs, error, named):
    m = Moments()
    m.update([4.0, 6.0])
    before = m.to_dict()
    with pytest.raises(error, match=named):
        m.update(x, **kwargs)
    assert m.to_dict() == before


def test_dimension_mismatch_is_a_shape_error():
    with pytest.raises(ShapeError, match="3 columns"):
        Moments(3).update([1.0, 2.0])


def test_merge_refuses_a_different_dimension():
    with pytest.raises(IncompatibleError):
        Moments(2).merge(Moments(3))


def test_clean_batch_drops_bad_rows_and_counts_them_by_reason():
    x = np.array([[1.0, 2.0], [np.nan, 1.0], [3.0, 4.0], [5.0, 6.0], [7.0, 8.0]])
    w = np.array([1.0, 1.0, -1.0, 1.0, 2.0])
    t = np.array([0.0, 0.0, 0.0, np.inf, 1.0])
    batch, dropped = clean_batch(x, 2, w, t)
    assert dropped == {"not_finite": 1, "bad_weight": 1, "bad_time": 1}
    np.testing.assert_array_equal(batch.x, [[1.0, 2.0], [7.0, 8.0]])
    np.testing.assert_array_equal(batch.weights, [1.0, 2.0])


special = st.sampled_from([np.nan, np.inf, -np.inf, 1e308, -1e101, 0.0, 1e-31, 1e31, -1.0])


@settings(max_examples=200, deadline=None)
@given(st.lists(st.tuples(st.one_of(st.floats(-1e3, 1e3), special),
                          st.one_of(st.floats(0.5, 2.0), special),
                          st.one_of(st.floats(0.0, 10.0), special)), min_size=1, max_size=30),
       st.booleans(), st.booleans())
def test_screen_batch_keeps_and_counts_as_clean_then_bound(rows, weighted, timed):
    # the reference is the two passes it shortens: clean_batch, then bound_batch,
    # their counts added up ("bad_weight" can come from both)
    x = np.array([r[0] for r in rows])
    w = np.array([r[1] for r in rows]) if weighted else None
    t = np.array([r[2] for r in rows]) if timed else None
    kept, dropped = screen_batch(x, 1, w, t)
    ref, counts = clean_batch(x, 1, w, t)
    ref, bounded = bound_batch(ref)
    for reason, count in bounded.items():
        counts[reason] = counts.get(reason, 0) + count
    assert dropped == counts
    np.testing.assert_array_equal(kept.x, ref.x)
    for a, b in ((kept.weights, ref.weights), (kept.times, ref.times)):
        assert (a is None) == (b is None)
        if a is not None:
            np.testing.assert_array_equal(a, b)


def test_screen_batch_adds_up_bad_weights_from_both_passes():
    # one weight is negative (clean_batch), one is 1e31 (bound_batch): two in all
    kept, dropped = screen_batch(np.array([1.0, 2.0, 3.0]), 1, np.array([1.0, -1.0, 1e31]))
    assert dropped == {"bad_weight": 2} and kept.x.ravel().tolist() == [1.0]

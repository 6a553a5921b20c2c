"""Issue 16: estimates that stay right for months (precision, weight range, drift, glitches).

Reference sources are named beside each check value: scipy.stats for normal
and mixture distributions, numpy's two-pass variance, exact rational
arithmetic with Python's ``fractions`` module, and scikit-learn's batch EM.
"""

from __future__ import annotations

import math

import msgpack
import numpy as np
import pytest
from scipy import stats
from sigmad.estimators import (
    HalfLife,
    Mixture,
    Moments,
    NonFiniteError,
    RangeError,
    Regression,
)
from sigmad.estimators.mixture_cdf import normal_mixture_quantile


def scipy_mixture_cdf(x, w, mu, sd):
    return sum(wk * stats.norm.cdf(x, loc=m, scale=s) for wk, m, s in zip(w, mu, sd, strict=True))


def scipy_mixture_sf(x, w, mu, sd):
    return sum(wk * stats.norm.sf(x, loc=m, scale=s) for wk, m, s in zip(w, mu, sd, strict=True))


def inverts(x, q, w, mu, sd):
    """x is the q-quantile to 1e-9 in probability, or to float resolution (the CDF
    crosses q between x's neighbours). Reference: scipy.stats.norm.cdf / sf."""
    with np.errstate(over="ignore"):      # scipy's (x - loc) / scale at scale 1e-300
        return _inverts(x, q, w, mu, sd)


def _inverts(x, q, w, mu, sd):
    if q <= 0.5:
        f = lambda v: scipy_mixture_cdf(v, w, mu, sd) - q          # noqa: E731
    else:
        f = lambda v: (1.0 - q) - scipy_mixture_sf(v, w, mu, sd)   # noqa: E731
    if abs(f(x)) <= 1e-9 * min(q, 1.0 - q):
        return True
    return f(np.nextafter(x, -np.inf)) <= 0.0 <= f(np.nextafter(x, np.inf))


# ------------------------------------------------------------ 1. quantile inversion
def test_quantile_of_components_eighty_orders_apart_converges():
    # Reference: 0.9 Phi(x) + 0.1 Phi((x - 1e80) / 1e80) = 1/2, and Phi(-1) is constant
    # there, so x = Phi^-1((0.5 - 0.1 Phi(-1)) / 0.9) (scipy.stats.norm), about 0.0952.
    w, mu, sd = np.array([0.9, 0.1]), np.array([0.0, 1e80]), np.array([1.0, 1e80])
    expected = stats.norm.ppf((0.5 - 0.1 * stats.norm.cdf(-1.0)) / 0.9)
    x = normal_mixture_quantile(0.5, w, mu, sd)
    assert x == pytest.approx(expected, rel=1e-9)


@pytest.mark.parametrize("q", [1e-6, 0.01, 0.5, 0.99, 0.999])
def test_quantile_inversion_for_component_scales_1e_300_to_1e300(q):
    # Reference: scipy.stats.norm.cdf / sf summed over components; every pair of scales
    # from 1e-300 to 1e300 (one component centred at 0, the other at its own scale).
    scales = 10.0 ** np.arange(-300, 301, 60)
    for s1 in scales:
        for s2 in scales:
            w, mu, sd = np.array([0.7, 0.3]), np.array([0.0, s2]), np.array([s1, s2])
            x = normal_mixture_quantile(q, w, mu, sd)
            assert math.isfinite(x), (s1, s2)
            assert inverts(x, q, w, mu, sd), (q, s1, s2, x)


def test_quantile_of_a_wide_and_a_narrow_component_a_hundred_orders_apart():
    # Reference: scipy.stats.norm; three components spanning 1e-150 to 1e150 in scale.
    w = np.array([0.5, 0.3, 0.2])
    mu = np.array([-1e100, 0.0, 1e140])
    sd = np.array([1e-150, 1.0, 1e150])
    for q in (0.1, 0.5, 0.6, 0.75, 0.9, 0.999):
        x = normal_mixture_quantile(q, w, mu, sd)
        assert inverts(x, q, w, mu, sd), (q, x)


def test_quantile_is_nan_when_the_mixture_is_not_a_distribution():
    # Reference: the definition of a quantile (common practice): none exists for NaN
    # or non-positive total weights, so NaN and never an unconverged number.
    for w, mu, sd in (([np.nan, 0.5], [0.0, 1.0], [1.0, 1.0]),
                      ([0.5, 0.5], [0.0, np.nan], [1.0, 1.0]),
                      ([0.5, 0.5], [0.0, 1.0], [np.inf, 1.0]),
                      ([0.0, 0.0], [0.0, 1.0], [1.0, 1.0])):
        assert math.isnan(normal_mixture_quantile(0.5, np.array(w), np.array(mu),
                                                  np.array(sd)))


# ------------------------------------------------------------------ 2. constant data
@pytest.mark.parametrize("value", [5.0, 1000.0, -3.25e7, 1e-9, 7.5e90])
def test_constant_stream_quantiles_equal_the_constant(value):
    # Reference: a constant has every quantile equal to itself and spread 0 (common
    # practice).
    data = np.full(1000, value)
    for mix in (Mixture(2), Mixture(3, half_life=HalfLife(100, "observations")),
                Mixture(2, warmup=2000)):      # the last one still warming
        for i in range(0, 1000, 100):
            mix.update(data[i:i + 100])
        qs = (1e-6, 0.01, 0.5, 0.99, 0.999)
        assert mix.quantile(qs).tolist() == [value] * len(qs)
        # the whole mass sits between the constant's float neighbours
        assert mix.cdf(np.nextafter(value, -np.inf)) == 0.0
        assert mix.cdf(np.nextafter(value, np.inf)) >= 1.0 - 2e-16   # weights sum to 1
    m = Moments(1, HalfLife(10.0))
    m.update(data, times=np.arange(1000.0))
    assert m.quantiles((0.01, 0.99))[:, 0].tolist() == [value, value]


def test_constant_zero_stream_has_no_spread():
    # Reference: as above (common practice); 0 has no magnitude: the floor, sd 1e-50,
    # keeps (2e100)**2 / variance finite.
    mix = Mixture(2)
    mix.update(np.zeros(500))
    assert np.abs(mix.quantile((0.01, 0.99))).max() <= 1e-49


def test_constant_warmup_then_spread_still_fits():
    # Reference: numpy mean / std of the second phase; scipy.stats.norm.ppf.
    rng = np.random.default_rng(4)
    mix = Mixture(2, half_life=HalfLife(500, "observations"))
    mix.update(np.full(300, 5.0))
    later = rng.normal(5.0, 2.0, 20000)
    for i in range(0, later.size, 200):
        mix.update(later[i:i + 200])
    assert mix.quantile(0.99) == pytest.approx(stats.norm.ppf(0.99, 5.0, 2.0), rel=0.05)


# -------------------------------------------------------------- 3. overflowing squares
@pytest.mark.parametrize("bad", [1e155, -1e155, 1e101, 1.7e308])
def test_values_whose_squares_would_overflow_are_rejected_naming_the_value(bad):
    # Reference: float64's largest value is 1.797e308 (numpy.finfo), so sums of squares
    # of values beyond 1e100 lose their headroom; sqrt(1.797e308) = 1.34e154.
    rng = np.random.default_rng(5)
    good = rng.normal(0.0, 1.0, 300)
    for est in (Moments(), Mixture(2, warmup=50)):
        est.update(good)
        before = est.to_dict()
        with pytest.raises(RangeError) as info:
            est.update(np.array([1.0, bad, 2.0]))
        assert info.value.field == "x" and info.value.value == bad
        assert info.value.reason == "out_of_range" and "row 1" in str(info.value)
        assert est.to_dict() == before               # nothing half-applied
        assert np.isfinite(est.quantile(0.5)).all()
    reg = Regression(1)
    for field, x, y in (("X", [[1.0], [bad]], [1.0, 2.0]), ("y", [[1.0], [2.0]], [bad, 1.0])):
        with pytest.raises(RangeError) as info:
            reg.update(x, y)
        assert info.value.field == field and info.value.value == bad
    assert reg.count == 0


def test_nan_is_still_a_non_finite_error_before_any_range_check():
    with pytest.raises(NonFiniteError):
        Moments().update([1e200, np.nan])
    with pytest.raises(NonFiniteError):
        Regression(1).update([[1.0]], [np.inf])


def test_largest_accepted_values_keep_every_read_out_finite():
    # Reference: numpy float64 arithmetic; values at the bound (1e100) into a warm mixture,
    # a constant-0 mixture and Moments leave no overflow anywhere (numpy errstate raises).
    rng = np.random.default_rng(6)
    with np.errstate(over="raise", invalid="raise"):
        mix = Mixture(2, warmup=50)
        mix.update(rng.normal(0.0, 1.0, 200))
        zero = Mixture(2, warmup=50)
        zero.update(np.zeros(100))
        m = Moments()
        for est in (mix, zero, m):
            est.update(np.array([1e100, -1e100, 3.0]))
            est.update(rng.normal(0.0, 1.0, 100))
        assert math.isfinite(mix.average_loglik) and math.isfinite(zero.average_loglik)
        assert np.isfinite(mix.quantile((0.01, 0.5, 0.99))).all()
        assert np.isfinite(m.variance()).all()


# ------------------------------------------------------------ 4. weights of any scale
def test_three_rows_decayed_600_half_lives_keep_variance_and_sample_size():
    # Reference: numpy.var(ddof=1) of [1, 2, 4] = 7/3; three equal weights have Kish
    # n_eff = 3 (Kish 1965). Decay multiplies every weight by one factor: no change.
    m = Moments(1, HalfLife(1.0))
    m.update([1.0, 2.0, 4.0], times=0.0)
    m.decay_to(600.0)
    assert m.variance()[0] == pytest.approx(np.var([1.0, 2.0, 4.0], ddof=1), rel=1e-12)
    assert m.effective_samples == pytest.approx(3.0, rel=1e-12)
    assert m.standard_error()[0] == pytest.approx(math.sqrt(7.0 / 9.0), rel=1e-12)


def test_regression_decayed_600_half_lives_keeps_its_standard_errors():
    # Reference: statsmodels OLS on the same rows (all weights decay alike).
    import statsmodels.api as sm
    rng = np.random.default_rng(7)
    x = rng.normal(0.0, 1.0, 50)
    y = 1.5 + 2.0 * x + rng.normal(0.0, 0.3, 50)
    ols = sm.OLS(y, sm.add_constant(x)).fit()
    r = Regression(1, half_life=HalfLife(1.0))
    r.update(x, y, times=0.0)
    r.decay_to(600.0)
    assert r.stderr()[0] == pytest.approx(ols.bse[1], rel=1e-10)
    assert r.intercept_stderr() == pytest.approx(ols.bse[0], rel=1e-10)
    assert r.effective_samples == pytest.approx(50.0, rel=1e-12)


def moments_readouts(m: Moments) -> np.ndarray:
    return np.hstack([m.mean, m.variance("reliability"), m.variance("none"),
                      m.covariance().ravel(), m.correlation().ravel(), m.standard_error(),
                      [m.effective_samples], m.quantiles((0.01, 0.99)).ravel(),
                      m.mahalanobis([[0.3, -1.0]])])


def regression_readouts(r: Regression) -> np.ndarray:
    """The read-outs that do not depend on the weights' unit (the "none" and
    "frequency" standard errors do, by definition: they scale as W**-1/2)."""
    return np.hstack([r.coefficients, [r.intercept, r.residual_stddev(), r.r_squared,
                                       r.effective_samples, r.residual_dof(),
                                       r.residual_stddev("none")],
                      r.stderr(), [r.intercept_stderr()],
                      r.standardized_residual([[0.5, 1.0]], [2.0])])


def test_estimates_unchanged_to_12_digits_after_10000_half_lives():
    # Reference: the same state before the decay (decay scales every weight alike).
    rng = np.random.default_rng(8)
    x = rng.normal([3.0, -2.0], [1.0, 4.0], (400, 2))
    t = np.sort(rng.uniform(0.0, 50.0, 400))
    m = Moments(2, HalfLife(10.0))
    m.update(x[:200], times=t[:200])
    for i in range(200, 400):                 # half batched, half one at a time
        m.update(x[i], times=t[i])
    r = Regression(2, half_life=HalfLife(10.0))
    r.update(x, x @ [0.5, -1.5] + rng.normal(0.0, 0.2, 400), times=t)
    before_m, before_r = moments_readouts(m), regression_readouts(r)
    for est in (m, r):
        est.decay_to(50.0 + 10.0 * 10_000)
    np.testing.assert_allclose(moments_readouts(m), before_m, rtol=1e-12)
    np.testing.assert_allclose(regression_readouts(r), before_r, rtol=1e-12)
    assert m.weight_sum == 0.0          # 2**-10000 of it: below float64, and said so
    # and through the saved form and the column form
    back = Moments.from_dict(m.to_dict())
    np.testing.assert_array_equal(moments_readouts(back), moments_readouts(m))
    back_r = Regression.from_dict(r.to_dict())
    np.testing.assert_array_equal(regression_readouts(back_r), regression_readouts(r))


@pytest.mark.parametrize("scale", [1e-300, 1e-160, 1e160, 1e300])
def test_weights_scaled_by_1e_300_to_1e300_change_no_estimate(scale):
    # Reference: the same rows with unscaled weights (weights are relative: Kish 1965);
    # numpy.average and numpy.cov(aweights=...) on the unscaled ones.
    rng = np.random.default_rng(9)
    x = rng.normal([1.0, 5.0], [2.0, 0.5], (300, 2))
    w = rng.uniform(0.5, 2.0, 300)
    ref = Moments(2)
    ref.update(x, weights=w)
    np.testing.assert_allclose(ref.mean, np.average(x, axis=0, weights=w), rtol=1e-13)
    np.testing.assert_allclose(ref.covariance("none"),
                               np.cov(x.T, aweights=w, bias=True), rtol=1e-12)
    batched, single = Moments(2), Moments(2)
    batched.update(x[:150], weights=w[:150] * scale)
    batched.update(x[150:], weights=w[150:] * scale)
    for i in range(300):
        single.update(x[i], weights=w[i] * scale)
    for m in (batched, single):
        np.testing.assert_allclose(moments_readouts(m), moments_readouts(ref), rtol=1e-12)
        assert m.weight_sum == pytest.approx(w.sum() * scale, rel=1e-12)
    y = x @ [1.0, -2.0] + rng.normal(0.0, 0.1, 300)
    r_ref, r = Regression(2), Regression(2)
    r_ref.update(x, y, weights=w)
    r.update(x, y, weights=w * scale)
    np.testing.assert_allclose(regression_readouts(r), regression_readouts(r_ref), rtol=1e-12)


def test_weights_1e300_and_1e_300_side_by_side_keep_the_heavy_rows():
    # Reference: numpy.average over the heavy rows alone (the light ones weigh 1e-600
    # relative to them, below float64 resolution).
    x = np.array([1.0, 2.0, 3.0, 10.0, 20.0])
    w = np.array([1e300, 2e300, 1e300, 1e-300, 1e-300])
    m = Moments()
    m.update(x, weights=w)
    assert m.mean[0] == pytest.approx(np.average(x[:3], weights=w[:3]), rel=1e-15)
    assert m.effective_samples == pytest.approx(16.0 / 6.0, rel=1e-12)
    light = Moments()
    light.update(x[3:], weights=w[3:])
    light.merge(m)
    assert light.mean[0] == pytest.approx(m.mean[0], rel=1e-15)


def test_new_rows_after_a_silence_of_10000_half_lives_replace_the_old_state():
    # Reference: numpy.mean / numpy.var(ddof=1) of the new rows alone (the old ones now
    # weigh 2**-10000 relative to them).
    m = Moments(1, HalfLife(1.0))
    m.update([100.0, 200.0, 300.0], times=0.0)
    m.decay_to(10_000.0)
    new = np.array([1.0, 2.0, 4.0, 8.0])
    m.update(new, times=10_000.0)
    assert m.mean[0] == pytest.approx(new.mean(), rel=1e-15)
    assert m.variance()[0] == pytest.approx(np.var(new, ddof=1), rel=1e-13)
    assert m.effective_samples == pytest.approx(4.0, rel=1e-13)


def test_column_form_carries_the_weight_scale():
    # Reference: the Moments read-outs the columns stand for, bit for bit.
    from sigmad.estimators.moments_columns import MomentsColumns
    rng = np.random.default_rng(10)
    states = []
    for scale in (1.0, 1e-300, 1e300):
        m = Moments(2, HalfLife(1.0))
        m.update(rng.normal(size=(20, 2)), weights=np.full(20, scale), times=0.0)
        m.decay_to(3000.0 if scale == 1.0 else 1.0)
        states.append(m)
    cols = MomentsColumns.of(states, 2, HalfLife(1.0))
    back = MomentsColumns.from_dict(cols.to_dict())
    for c in (cols, back):
        for i, m in enumerate(states):
            np.testing.assert_array_equal(c.variances()[i], m.variance())
            np.testing.assert_array_equal(c.variances("frequency")[i], m.variance("frequency"))
            np.testing.assert_array_equal(c.scatters()[i], m.scatter)
            np.testing.assert_array_equal(c.effective_samples()[i], m.effective_samples)
            np.testing.assert_array_equal(c.correlations()[i], m.correlation())
        for m, again in zip(states, c.states(), strict=True):
            np.testing.assert_array_equal(moments_readouts(again), moments_readouts(m))


# ------------------------------------------------------ 5. large offsets, streamed
def exact_cov(x: np.ndarray) -> np.ndarray:
    """Sample covariance (ddof 1) of the float rows x (n, d), in exact rational
    arithmetic (Python's fractions), rounded once to float64 at the end."""
    from fractions import Fraction
    cols = [[Fraction(float(v)) for v in col] for col in x.T]
    n = x.shape[0]
    means = [sum(c) / n for c in cols]
    dev = [[v - m for v in c] for c, m in zip(cols, means, strict=True)]
    return np.array([[float(sum(a * b for a, b in zip(da, db, strict=True)) / (n - 1))
                      for db in dev] for da in dev])


def lre(est: np.ndarray, ref: np.ndarray) -> float:
    """Log relative error (digits agreeing with the reference), capped at 15.9 as in
    McCullough's assessments of statistical software (common practice)."""
    err = np.max(np.abs(np.asarray(est) - ref) / np.abs(ref))
    return 15.9 if err == 0.0 else min(15.9, -math.log10(err))


def streamed(x: np.ndarray, how: str) -> Moments:
    if how == "single":
        m = Moments(x.shape[1])
        for row in x:
            m.update(row)
        return m
    if how == "batched":
        m = Moments(x.shape[1])
        for i in range(0, x.shape[0], 250):
            m.update(x[i:i + 250])
        return m
    shards = []                                  # "merged": ten shards, pooled
    for part in np.array_split(x, 10):
        s = Moments(x.shape[1])
        for i in range(0, part.shape[0], 7):
            s.update(part[i:i + 7])
        shards.append(s)
    for s in shards[1:]:
        shards[0].merge(s)
    return shards[0]


@pytest.mark.parametrize("offset", [1e4, 1e6, 1e8, 1e10])
@pytest.mark.parametrize("how", ["single", "batched", "merged"])
def test_streamed_sd_and_covariance_keep_the_digits_of_numpy_two_pass(offset, how):
    # Reference: exact rational arithmetic (fractions) on the same floats; numpy's
    # two-pass np.std / np.cov as the bar to meet within one digit (issue 16).
    rng = np.random.default_rng(11)
    z = rng.normal(0.0, 1.0, (2000, 2))
    x = offset + np.column_stack((z[:, 0], 0.6 * z[:, 0] + 0.8 * z[:, 1]))
    exact = exact_cov(x)
    numpy_sd = lre(np.std(x, axis=0, ddof=1), np.sqrt(np.diag(exact)))
    numpy_cov = lre(np.cov(x.T), exact)
    m = streamed(x, how)
    assert lre(m.stddev(), np.sqrt(np.diag(exact))) >= min(numpy_sd, 15.0) - 1.0
    assert lre(m.covariance(), exact) >= min(numpy_cov, 15.0) - 1.0
    assert lre(m.mean, x.mean(axis=0)) >= 14.0
    # the column form reads the same bits, and carries the state through its saved form
    from sigmad.estimators.moments_columns import MomentsColumns
    cols = MomentsColumns.from_dict(MomentsColumns.of([m], 2, None).to_dict())
    np.testing.assert_array_equal(cols.covariances("reliability")[0], m.covariance())


@pytest.mark.parametrize("offset", [1e4, 1e10])
@pytest.mark.parametrize("batch", [1, 100])
def test_mixture_component_spread_keeps_its_digits_at_an_offset(offset, batch):
    # Reference: exact rational arithmetic (fractions); a one-component mixture's
    # maximum-likelihood variance is the data's ddof-0 variance (common practice).
    x = np.random.default_rng(12).normal(offset, 1.0, 2000)
    exact = exact_cov(x[:, None])[0, 0] * (x.size - 1) / x.size
    numpy_var = lre(np.var(x), exact)
    mix = Mixture(1, warmup=50, reg=1e-300)     # a floor far below the variance's digits
    for i in range(0, x.size, batch):
        mix.update(x[i:i + batch])
    assert lre(mix.covariances[0, 0, 0], exact) >= min(numpy_var, 15.0) - 1.0


def test_a_saved_state_continues_exactly_as_the_uninterrupted_one():
    # Reference: the same state never saved (the low-order part of the mean is saved).
    x = np.random.default_rng(13).normal(1e10, 1.0, 400)
    m, mix = Moments(), Mixture(1, warmup=50)
    for i in range(200):
        m.update(x[i])
        mix.update(x[i:i + 1])
    m2, mix2 = Moments.from_dict(m.to_dict()), Mixture.from_dict(mix.to_dict())
    for est in (m, m2, mix, mix2):
        for i in range(200, 400):
            est.update(x[i:i + 1])
    assert m2.to_dict() == m.to_dict() and mix2.to_dict() == mix.to_dict()


# ------------------------------------------------------ 6a. per-field physical limits
LIMITS_CONFIG = """
[[source]]
socket = "pull"
bind = "tcp://127.0.0.1:1"

[[stream]]
name = "lat"
topic = "lat.{svc}"
fields = ["ms", "bytes"]
mixture = { components = 2, warmup = 20 }
limits = { ms = [0.0, 60000.0] }
"""


def test_limits_reject_rows_outside_a_fields_range_as_out_of_range():
    # Reference: the configured range itself; numpy.mean of the rows inside it.
    from sigmad.daemon.config.load import parse_config
    from sigmad.daemon.engine.engine import Engine
    from sigmad.daemon.ingest.wire import encode
    cfg = parse_config(LIMITS_CONFIG)
    assert cfg.streams[0].limits == ((0.0, 60000.0), (-math.inf, math.inf))
    e = Engine(cfg)
    rng = np.random.default_rng(14)
    ms = rng.lognormal(3.0, 0.5, 100)
    glitch = ms.copy()
    glitch[[3, 50]] = [-5.0, 1e9]             # a negative latency and a 11-day one
    size = rng.normal(1e3, 10.0, 100)
    e.ingest(b"lat.api", encode({"ms": glitch, "bytes": size}), 1.7e9)
    e.flush(1.7e9)
    assert e.rejected["out_of_range"] == 2
    (state,) = e.export_state()
    keep = np.ones(100, bool)
    keep[[3, 50]] = False
    assert state["moments"]["count"] == 98
    np.testing.assert_allclose(state["moments"]["mean"], [ms[keep].mean(), size[keep].mean()],
                               rtol=1e-12)
    assert state["mixture"]["count"] == 98
    # the edges themselves are inside
    e.ingest(b"lat.api", encode({"ms": [0.0, 60000.0], "bytes": [1.0, 2.0]}), 1.7e9)
    e.flush(1.7e9)
    assert e.rejected["out_of_range"] == 2


@pytest.mark.parametrize(("limits", "words"), [
    ("{ celsius = [0.0, 1.0] }", "is not one of the stream's fields"),
    ("{ ms = [1.0] }", "must be [low, high]"),
    ("{ ms = [5.0, 1.0] }", "must have low < high"),
    ("{ ms = [nan, 1.0] }", "must be [low, high]"),
    ('{ ms = ["a", 1.0] }', "must be [low, high]"),
    ("[0.0, 1.0]", "must be a table"),
])
def test_bad_limits_are_a_config_error_naming_the_key(limits, words):
    from sigmad.daemon.config.errors import ConfigError
    from sigmad.daemon.config.load import parse_config
    with pytest.raises(ConfigError) as info:
        parse_config(LIMITS_CONFIG.replace("{ ms = [0.0, 60000.0] }", limits), "site.toml")
    assert words in str(info.value) and "stream[0].limits" in str(info.value)


# ------------------------------------------------------------- 6b. drift recovery
# Our scenario: request latencies in ms from three log-normal paths (fast, slow, very
# slow); the true distribution is set here and checked through scipy.stats.norm.
DRIFT_W = np.array([0.7, 0.25, 0.05])
DRIFT_MU = np.log([2.0, 30.0, 200.0])
DRIFT_SD = np.array([0.25, 0.4, 0.5])


def drift_draw(rng, n):
    k = rng.choice(3, n, p=DRIFT_W)
    return np.exp(rng.normal(DRIFT_MU[k], DRIFT_SD[k]))


def test_sorted_then_stationary_stream_is_fitted_as_well_as_batch_em():
    # Reference: scikit-learn's GaussianMixture (batch EM, 4 starts) on the log of the
    # last 5,000 rows for the log-likelihood; the true CDF (scipy.stats.norm of the
    # log, weighted) for the rank error of p99. Checked after 40 half-lives.
    from sklearn.mixture import GaussianMixture
    rng = np.random.default_rng(0)
    mix = Mixture(3, log=True, half_life=HalfLife(5000, "observations"))
    drifting = np.sort(drift_draw(rng, 20000))      # a stream that drifts from fast to slow
    for i in range(0, drifting.size, 1000):
        mix.update(drifting[i:i + 1000])
    steady = drift_draw(rng, 40 * 5000)
    for i in range(0, steady.size, 1000):
        mix.update(steady[i:i + 1000])
    recent = np.log(steady[-5000:])
    batch = GaussianMixture(3, n_init=4, random_state=0).fit(recent[:, None])
    ours = float(np.mean(mix.loglik(steady[-5000:]) + recent))   # density of log x
    assert ours >= batch.score(recent[:, None]) - 0.01 * abs(batch.score(recent[:, None]))
    p99 = mix.quantile(0.99)
    true_cdf = float(DRIFT_W @ stats.norm.cdf(math.log(p99), DRIFT_MU, DRIFT_SD))
    assert abs(true_cdf - 0.99) < 2e-3


def test_a_fit_stuck_in_a_local_optimum_is_freed_by_split_and_merge():
    # Our scenario: N(0, 1), N(6, 1), N(10, 1) with weights 0.5, 0.3, 0.2 (set here).
    # The fit starts where online EM alone stays (checked by hand: without the moves
    # two components share the mode at 0 and one, sd 2.3, covers 6 and 10): one
    # component right, one wide over the two upper modes, one stranded in the far tail.
    rng = np.random.default_rng(21)

    def draw(n):
        k = rng.choice(3, n, p=[0.5, 0.3, 0.2])
        return rng.normal(np.array([0.0, 6.0, 10.0])[k], 1.0)

    mix = Mixture(3, half_life=HalfLife(5000, "observations"), warmup=300)
    mix.update(draw(300))
    mix._pi = np.array([0.5, 0.498, 0.002])
    mix._mu = np.array([[0.0], [7.6], [16.0]])
    mix._cov = np.array([[[1.0]], [[5.0]], [[1.0]]])
    mix._mu_lo[:] = 0.0
    mix._prep = None
    for _ in range(200):
        mix.update(draw(1000))
    order = np.argsort(mix.means[:, 0])
    np.testing.assert_allclose(mix.means[order, 0], [0.0, 6.0, 10.0], atol=0.15)
    np.testing.assert_allclose(mix.weights[order], [0.5, 0.3, 0.2], atol=0.02)
    np.testing.assert_allclose(mix.stddevs[order, 0], [1.0, 1.0, 1.0], atol=0.1)


def test_a_well_fitted_stationary_stream_makes_no_moves():
    # Our scenario (as above, the right structure from the start): after convergence no
    # proposal may replace the fit; the re-seed count stays put.
    rng = np.random.default_rng(22)

    def draw(n):
        k = rng.choice(3, n, p=[0.5, 0.3, 0.2])
        return rng.normal(np.array([0.0, 6.0, 12.0])[k], 1.0)

    mix = Mixture(3, half_life=HalfLife(5000, "observations"))
    for _ in range(60):
        mix.update(draw(1000))
    settled = mix.reseeds
    for _ in range(300):
        mix.update(draw(1000))
    assert mix.reseeds == settled


def test_a_split_keeps_the_mean_and_covariance_of_the_component():
    # Reference: the mean and covariance of a two-component mixture (common practice),
    # computed with numpy from the halves.
    from sigmad.estimators.mixture_moves import split_component
    cov = np.array([[4.0, 1.2], [1.2, 1.0]])
    mean = np.array([3.0, -1.0])
    for diag in (False, True):
        c = np.diag(np.diag(cov)) if diag else cov
        w, m1, m2, half = split_component(0.6, mean, c, diag)
        assert w == pytest.approx(0.3)
        np.testing.assert_allclose(0.5 * (m1 + m2), mean, rtol=1e-15)
        pooled = half + 0.5 * (np.outer(m1 - mean, m1 - mean) + np.outer(m2 - mean, m2 - mean))
        np.testing.assert_allclose(pooled, c, rtol=1e-14, atol=1e-15)
        assert (np.linalg.eigvalsh(half) > 0).all()


def test_one_absurd_row_into_a_warm_mixture_is_forgotten():
    # Reference: scipy.stats.norm.ppf of N(0, 1), the stream before and after the row.
    # The component that took the 1e100 row holds none of the recent rows while its
    # weight says it should hold dozens: it is re-seeded (issue 16's glitch).
    rng = np.random.default_rng(23)
    mix = Mixture(2, half_life=HalfLife(2000, "observations"))
    mix.update(rng.normal(0.0, 1.0, 1000))
    mix.update([1e100])
    for _ in range(400):
        mix.update(rng.normal(0.0, 1.0, 100))
    assert mix.quantile(0.5) == pytest.approx(0.0, abs=0.05)
    assert mix.quantile(0.99) == pytest.approx(stats.norm.ppf(0.99), abs=0.05)
    assert math.isfinite(mix.average_loglik)


def test_daemon_counts_values_whose_squares_would_overflow_as_out_of_range():
    # Reference: float64's largest value 1.797e308 (numpy.finfo): squares of 1e155 and
    # beyond overflow; the daemon's bound (max_abs_value, at most 1e100) drops them.
    from sigmad.daemon.config.load import parse_config
    from sigmad.daemon.engine.engine import Engine
    from sigmad.daemon.ingest.wire import encode
    with np.errstate(over="ignore"):
        assert np.isinf(np.float64(1e155) * np.float64(1e155))
    e = Engine(parse_config(LIMITS_CONFIG.replace("limits = { ms = [0.0, 60000.0] }\n", "")))
    e.ingest(b"lat.api", encode({"ms": [1e155, -1e200, 5.0, 1e101, 7.0],
                                 "bytes": [1.0, 2.0, 3.0, 4.0, 5.0]}), 1.7e9)
    e.flush(1.7e9)
    assert e.rejected["out_of_range"] == 3
    (state,) = e.export_state()
    assert state["moments"]["count"] == 2
    assert state["moments"]["mean"] == [6.0, 4.0]


def test_a_mixture_survives_any_silence_with_its_fit_and_effective_samples():
    # issue 16: after 10,000 half-lives of silence (W far below float64) the fit, the
    # effective sample size and the average log-likelihood read as before the silence
    rng = np.random.default_rng(21)
    x = np.concatenate([rng.lognormal(2.0, 0.4, 3000), rng.lognormal(4.0, 0.3, 1000)])
    t = np.arange(x.size, dtype=float)
    m = Mixture(2, log=True, half_life=HalfLife(600.0))
    m.update(rng.permutation(x), times=t)
    before = (m.quantile(0.5), m.quantile(0.99), m.effective_samples, m.average_loglik)
    m.decay_to(t[-1] + 600.0 * 10_000)
    after = (m.quantile(0.5), m.quantile(0.99), m.effective_samples, m.average_loglik)
    np.testing.assert_allclose(after, before, rtol=1e-12)
    again = Mixture.from_dict(msgpack.unpackb(msgpack.packb(m.to_dict())))
    np.testing.assert_allclose((again.quantile(0.99), again.effective_samples),
                               before[1:3], rtol=1e-12)
    # rows after the silence are folded in plain units, and nothing overflows
    m.update(rng.lognormal(2.0, 0.4, 200), times=t[-1] + 600.0 * 10_000 + np.arange(200.0))
    assert np.isfinite(m.quantile(0.5)) and 0 < m.effective_samples <= 200 + 1e-9


@pytest.mark.parametrize("scale", [1e-300, 1e300])
def test_a_mixture_reads_the_same_for_weights_scaled_by_1e300_either_way(scale):
    # issue 16: W, W2 and the corrections are scale-invariant for weights in [1e-300, 1e300]
    rng = np.random.default_rng(22)
    x = rng.lognormal(2.0, 0.5, 3000)
    w = rng.uniform(0.5, 2.0, 3000)
    plain, scaled = Mixture(2, log=True), Mixture(2, log=True)
    for part in np.array_split(np.arange(3000), 3):
        plain.update(x[part], weights=w[part])
        scaled.update(x[part], weights=w[part] * scale)
    for read in (lambda m: m.quantile(0.5), lambda m: m.quantile(0.99),
                 lambda m: m.effective_samples, lambda m: m.average_loglik):
        assert read(scaled) == pytest.approx(read(plain), rel=1e-12)
    assert scaled.weight_sum == pytest.approx(plain.weight_sum * scale, rel=1e-12)

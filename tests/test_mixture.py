"""Mixture: online EM against scikit-learn, scipy and scenarios of known parameters.

Reference sources are named beside each check value: scikit-learn's
GaussianMixture on its bundled iris data, scipy.stats distributions, numpy
empirical quantiles of large samples, and synthetic scenarios of our own whose
true parameters are set in the test.
"""

from __future__ import annotations

import math

import msgpack
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import optimize, stats
from sigmad.estimators import (
    DomainError,
    HalfLife,
    IncompatibleError,
    Mixture,
    NonFiniteError,
    ShapeError,
    WeightError,
)
from sigmad.estimators.mixture_cdf import normal_mixture_cdf, normal_mixture_quantile
from sigmad.estimators.mixture_reduce import runnalls_reduce
from sklearn.datasets import load_iris
from sklearn.mixture import GaussianMixture


def stream(mix: Mixture, x: np.ndarray, batch: int) -> Mixture:
    for i in range(0, len(x), batch):
        mix.update(x[i:i + batch])
    return mix


def mixture_moments(mix: Mixture) -> tuple[np.ndarray, np.ndarray]:
    """Overall mean (d,) and covariance (d, d) of a mixture, from its read-outs."""
    w, mu, cov = mix.weights, mix.means, mix.covariances
    mean = w @ mu
    d = mu - mean
    return mean, np.einsum("k,kij->ij", w, cov) + np.einsum("k,ki,kj->ij", w, d, d)


def scipy_mixture_cdf(x, w, mu, sd):
    return sum(wk * stats.norm.cdf(x, loc=m, scale=s) for wk, m, s in zip(w, mu, sd, strict=True))


def scipy_mixture_sf(x, w, mu, sd):
    return sum(wk * stats.norm.sf(x, loc=m, scale=s) for wk, m, s in zip(w, mu, sd, strict=True))


def lognormal_shard(rng, n, slow_share):
    """Our scenario: request latencies in ms, fast path LN(log 2, 0.25), slow LN(log 30, 0.4)."""
    slow = rng.random(n) < slow_share
    return np.where(slow, rng.lognormal(math.log(30.0), 0.4, n),
                    rng.lognormal(math.log(2.0), 0.25, n))


# ------------------------------------------------------------------ scikit-learn
def test_iris_loglik_within_one_percent_of_sklearn_best_of_ten():
    # Reference: scikit-learn GaussianMixture(3, "full", n_init=10) on its bundled iris
    # data, score() = mean log-likelihood per sample, computed in this run.
    x = load_iris().data
    ref = GaussianMixture(3, covariance_type="full", n_init=10, random_state=0).fit(x).score(x)
    rng = np.random.default_rng(0)
    mix = Mixture(3, dim=4, covariance="full", seed=0)
    for _ in range(5):
        stream(mix, x[rng.permutation(len(x))], batch=10)
    assert mix.warm
    ours = float(mix.loglik(x).mean())
    assert abs(ours - ref) <= 0.01 * abs(ref)


def test_iris_responsibilities_agree_with_sklearn_predict_proba_of_our_parameters():
    # Reference: scikit-learn GaussianMixture.predict_proba with our fitted parameters.
    x = load_iris().data
    mix = stream(Mixture(3, dim=4, seed=1), x[np.random.default_rng(1).permutation(150)], 50)
    mix.update(x)
    gm = GaussianMixture(3, covariance_type="full")
    gm.weights_, gm.means_, gm.covariances_ = mix.weights, mix.means, mix.covariances
    gm.precisions_cholesky_ = np.linalg.cholesky(np.linalg.inv(mix.covariances))
    np.testing.assert_allclose(mix.responsibilities(x), gm.predict_proba(x), atol=1e-10)
    np.testing.assert_allclose(mix.loglik(x), gm.score_samples(x), rtol=1e-10)


# -------------------------------------------------------- synthetic, known truth
def test_recovers_known_one_dimensional_mixture():
    # Our scenario: 0.5 N(0, 1) + 0.3 N(5, 0.7^2) + 0.2 N(12, 2^2), 20 000 draws.
    # Tolerances: weights +-0.02, means +-0.05, sigma +-5 % (a few standard errors).
    rng = np.random.default_rng(7)
    w, mu, sd = np.array([0.5, 0.3, 0.2]), np.array([0.0, 5.0, 12.0]), np.array([1, 0.7, 2])
    lab = rng.choice(3, 20_000, p=w)
    mix = stream(Mixture(3, seed=0), rng.normal(mu[lab], sd[lab]), batch=500)
    order = np.argsort(mix.means[:, 0])
    np.testing.assert_allclose(mix.weights[order], w, atol=0.02)
    np.testing.assert_allclose(mix.means[order, 0], mu, atol=0.05)
    np.testing.assert_allclose(mix.stddevs[order, 0], sd, rtol=0.05)


@pytest.mark.parametrize("covariance", ["full", "diag"])
def test_recovers_known_two_dimensional_mixture(covariance):
    # Our scenario: 0.6 N([0,0], [[1,.6],[.6,1]]) + 0.4 N([4,1], [[.5,-.2],[-.2,.3]]),
    # without the correlations for the diagonal model (which they would misspecify).
    # Tolerances: weights +-0.02, means +-0.05, covariance entries +-0.05.
    rng = np.random.default_rng(8)
    mus = np.array([[0.0, 0.0], [4.0, 1.0]])
    covs = np.array([[[1.0, 0.6], [0.6, 1.0]], [[0.5, -0.2], [-0.2, 0.3]]])
    if covariance == "diag":
        covs = covs * np.eye(2)
    lab = rng.choice(2, 20_000, p=[0.6, 0.4])
    noise = np.einsum("nij,nj->ni", np.linalg.cholesky(covs)[lab], rng.normal(size=(20_000, 2)))
    mix = stream(Mixture(2, dim=2, covariance=covariance, seed=0), mus[lab] + noise, batch=100)
    order = np.argsort(mix.means[:, 0])
    np.testing.assert_allclose(mix.weights[order], [0.6, 0.4], atol=0.02)
    np.testing.assert_allclose(mix.means[order], mus, atol=0.05)
    np.testing.assert_allclose(mix.covariances[order], covs, atol=0.05)


def test_forgetting_follows_a_moving_component():
    # Our scenario: 0.5 N(0, 1) fixed, 0.5 N(m(t), 1) with m moving from 10 to 20 over
    # 40 000 observations. With a half-life of h = 2000 observations the weights' mean age
    # is h / ln 2 (common practice), so the estimate lags to m(end - h/ln 2) = 19.279.
    rng = np.random.default_rng(9)
    n = 40_000
    moving = 10.0 + 10.0 * np.arange(n) / n
    x = np.where(rng.random(n) < 0.5, rng.normal(0.0, 1.0, n), rng.normal(moving, 1.0))
    lagged = 20.0 - 10.0 * (2000 / math.log(2.0)) / n
    tracked = stream(Mixture(2, half_life=HalfLife(2000, "observations")), x, 100)
    assert abs(tracked.means[:, 0].max() - lagged) < 0.1
    frozen = stream(Mixture(2), x, 100)
    assert abs(frozen.means[:, 0].max() - 15.0) < 0.2     # no forgetting: the average path


def test_collapsed_component_is_reseeded_and_counted():
    # Our scenario: three modes during warm-up, then the third goes quiet; with forgetting
    # its weight decays below min_weight and it must be re-seeded.
    rng = np.random.default_rng(10)
    mix = Mixture(3, half_life=HalfLife(300, "observations"), seed=0)
    mix.update(rng.permutation(np.concatenate([rng.normal(c, 1.0, 100) for c in (0, 10, 20)])))
    assert mix.warm and mix.reseeds == 0
    stream(mix, rng.permutation(np.concatenate([rng.normal(c, 1.0, 3000) for c in (0, 10)])),
           50)
    assert mix.reseeds >= 1
    assert np.isclose(mix.weights.sum(), 1.0)
    assert np.isfinite(mix.means).all() and (mix.stddevs > 0).all()


def test_component_collapsing_onto_a_spike_is_reseeded():
    # Our scenario: 30 % of the values are exactly 5.0, so one component's variance falls
    # below the covariance floor: it must be re-seeded, and the fit stays finite.
    rng = np.random.default_rng(3)
    x = np.where(rng.random(5000) < 0.3, 5.0, rng.normal(0.0, 1.0, 5000))
    mix = stream(Mixture(2), x, 100)
    assert mix.reseeds >= 1
    assert np.isfinite(mix.covariances).all() and (mix.stddevs > 0).all()
    # the spike holds about 0.3 of the mass (N(0, 1) puts only 3e-5 in [4, 6])
    assert abs(mix.cdf(6.0) - mix.cdf(4.0) - 0.3) < 0.02


def test_component_order_is_stable_between_reads_and_updates():
    rng = np.random.default_rng(12)
    x = np.concatenate([rng.normal(0, 1, 3000), rng.normal(6, 1, 2000)])
    mix = stream(Mixture(2, seed=3), rng.permutation(x), 250)
    before = mix.means.copy()
    np.testing.assert_array_equal(mix.means, before)       # reads do not mutate
    mix.weights[0] = 99.0                                  # read-outs are copies
    assert mix.weights[0] != 99.0
    stream(mix, rng.permutation(x), 250)
    assert np.abs(mix.means - before).max() < 0.2          # same component, same index


# --------------------------------------------------------------- scipy CDF/ppf
def test_single_gaussian_quantile_and_cdf_match_scipy_norm():
    # Reference: scipy.stats.norm.cdf / ppf at the model's own mean and sigma.
    rng = np.random.default_rng(13)
    mix = stream(Mixture(1, warmup=50), rng.normal(3.0, 2.0, 1000), 100)
    mu, sd = float(mix.means[0, 0]), float(mix.stddevs[0, 0])
    for q in (1e-9, 1e-4, 0.01, 0.3, 0.5, 0.99, 1 - 1e-6):
        x = mix.quantile(q)
        assert abs(stats.norm.cdf(x, mu, sd) - q) <= 1e-9 * max(q, 1e-3)
        assert x == pytest.approx(stats.norm.ppf(q, mu, sd), rel=1e-9, abs=1e-9)
    grid = np.linspace(-5, 11, 33)
    np.testing.assert_allclose(mix.cdf(grid), stats.norm.cdf(grid, mu, sd), rtol=1e-12,
                               atol=1e-15)


def test_mixture_quantile_inverts_scipy_mixture_cdf_to_1e_9():
    # Reference: the sum of scipy.stats.norm.cdf over components (and .sf for upper tails).
    w = np.array([0.7, 0.25, 0.05])
    mu = np.array([0.0, 3.0, 10.0])
    sd = np.array([0.5, 1.0, 3.0])
    for q in (1e-7, 0.001, 0.1, 0.5, 0.9, 0.99, 0.999, 1 - 1e-8):
        x = normal_mixture_quantile(q, w, mu, sd)
        assert abs(scipy_mixture_cdf(x, w, mu, sd) - q) <= 1e-9
        assert abs(scipy_mixture_sf(x, w, mu, sd) - (1 - q)) <= 1e-9 * (1 - q) + 1e-15
    grid = np.linspace(-3, 25, 57)
    np.testing.assert_allclose(normal_mixture_cdf(grid, w, mu, sd),
                               scipy_mixture_cdf(grid, w, mu, sd), rtol=1e-12, atol=1e-16)
    np.testing.assert_allclose(normal_mixture_cdf(grid, w, mu, sd, upper=True),
                               scipy_mixture_sf(grid, w, mu, sd), rtol=1e-12, atol=1e-300)


def test_a_point_mass_holds_all_its_weight_from_its_value_on():
    # Reference: the definition of a point mass at a (common practice): P(X <= x) is 0
    # below a and 1 from a on; the normal half's CDF is scipy.stats.norm.cdf.
    w, mu, sd = np.array([0.5, 0.5]), np.array([0.0, 5.0]), np.array([0.0, 1.0])
    grid = np.array([-1.0, -1e-300, 0.0, 1e-300, 2.0, 5.0, 9.0])
    expected = 0.5 * (grid >= 0.0) + 0.5 * stats.norm.cdf(grid, 5.0, 1.0)
    np.testing.assert_allclose(normal_mixture_cdf(grid, w, mu, sd), expected, rtol=1e-12)
    np.testing.assert_allclose(normal_mixture_cdf(grid, w, mu, sd, upper=True),
                               0.5 * (grid < 0.0) + 0.5 * stats.norm.sf(grid, 5.0, 1.0),
                               rtol=1e-12)
    # the CDF jumps from about 0 to 0.5 at 0, so the quartile is 0; above it the normal
    # half: 0.5 + 0.5 Phi(x - 5) = 0.75 at x = 5 + Phi^-1(0.5) = 5 (scipy.stats.norm.ppf)
    assert normal_mixture_quantile(0.25, w, mu, sd) == pytest.approx(0.0, abs=1e-12)
    assert normal_mixture_quantile(0.75, w, mu, sd) == pytest.approx(
        5.0 + stats.norm.ppf(0.5), abs=1e-9)
    assert normal_mixture_quantile(0.9, w, mu, sd) == pytest.approx(
        5.0 + stats.norm.ppf(0.8), rel=1e-9)


@settings(max_examples=60, deadline=None)
@given(st.lists(st.tuples(st.floats(0.01, 1.0), st.floats(-50, 50), st.floats(1e-3, 20)),
                min_size=1, max_size=5),
       st.floats(1e-6, 1 - 1e-6))
def test_quantile_inversion_property_against_scipy(parts, q):
    # Reference: scipy.stats.norm.cdf / sf summed over arbitrary components.
    w = np.array([p[0] for p in parts])
    w = w / w.sum()
    mu, sd = np.array([p[1] for p in parts]), np.array([p[2] for p in parts])
    x = normal_mixture_quantile(q, w, mu, sd)
    if q <= 0.5:
        assert abs(scipy_mixture_cdf(x, w, mu, sd) - q) <= 1e-9
    else:
        assert abs(scipy_mixture_sf(x, w, mu, sd) - (1 - q)) <= 1e-9


def test_fitted_mixture_quantiles_match_scipy_on_its_parameters():
    # Reference: scipy.stats.norm.cdf mixture at the fitted parameters.
    rng = np.random.default_rng(14)
    x = np.concatenate([rng.normal(0, 1, 3000), rng.normal(5, 2, 1000)])
    mix = stream(Mixture(2), rng.permutation(x), 500)
    w, mu, sd = mix.weights, mix.means[:, 0], mix.stddevs[:, 0]
    qs = [0.01, 0.5, 0.9, 0.99, 0.999]
    for q, v in zip(qs, mix.quantile(qs), strict=True):
        assert abs(scipy_mixture_cdf(v, w, mu, sd) - q) <= 1e-9


def test_log_mixture_quantiles_match_a_large_lognormal_sample():
    # Reference: numpy empirical quantiles of 200 000 draws from our scenario
    # 0.7 LN(log 2, 0.3) + 0.3 LN(log 20, 0.5). Tolerance 1 %, and 2.5 % at 0.999, whose
    # sampling standard error sqrt(q (1-q) / n) / f(x) is about 0.8 % of it here.
    rng = np.random.default_rng(15)
    n = 200_000
    x = np.where(rng.random(n) < 0.7, rng.lognormal(math.log(2), 0.3, n),
                 rng.lognormal(math.log(20), 0.5, n))
    mix = stream(Mixture(2, log=True), x, 1000)
    qs = [0.5, 0.9, 0.99, 0.999]
    ours, empirical = mix.quantile(qs), np.quantile(x, qs)
    np.testing.assert_allclose(ours[:3], empirical[:3], rtol=0.01)
    np.testing.assert_allclose(ours[3], empirical[3], rtol=0.025)
    # Reference: the true mixture quantiles, scipy.optimize.brentq on scipy.stats.lognorm.cdf.
    def true_cdf(v):
        return 0.7 * stats.lognorm.cdf(v, 0.3, scale=2) + 0.3 * stats.lognorm.cdf(v, 0.5,
                                                                                  scale=20)
    truth = [optimize.brentq(lambda v, q=q: true_cdf(v) - q, 1e-3, 1e4, xtol=1e-12)
             for q in qs]
    np.testing.assert_allclose(mix.quantile(qs), truth, rtol=0.01)
    order = np.argsort(mix.means[:, 0])
    # Reference: scipy.stats.lognorm mean/std of each true component (LN(mu, s): scale e^mu).
    true_mean = [stats.lognorm.mean(0.3, scale=2), stats.lognorm.mean(0.5, scale=20)]
    true_sd = [stats.lognorm.std(0.3, scale=2), stats.lognorm.std(0.5, scale=20)]
    np.testing.assert_allclose(mix.original_means[order, 0], true_mean, rtol=0.02)
    np.testing.assert_allclose(mix.original_stddevs[order, 0], true_sd, rtol=0.03)


def test_log_mixture_loglik_is_the_density_of_x_including_the_jacobian():
    # Reference: scipy.stats.lognorm.pdf of each fitted component (s = sigma, scale = e^mu).
    rng = np.random.default_rng(16)
    x = np.where(rng.random(5000) < 0.6, rng.lognormal(0, 0.3, 5000),
                 rng.lognormal(2, 0.4, 5000))
    mix = stream(Mixture(2, log=True), x, 1000)
    w, mu, sd = mix.weights, mix.means[:, 0], mix.stddevs[:, 0]
    pts = np.array([0.5, 1.0, 3.0, 7.0, 20.0])
    want = np.log(sum(wk * stats.lognorm.pdf(pts, s, scale=math.exp(m))
                      for wk, m, s in zip(w, mu, sd, strict=True)))
    np.testing.assert_allclose(mix.loglik(pts), want, rtol=1e-12)
    assert mix.loglik([-1.0, 0.0]).tolist() == [-np.inf, -np.inf]
    assert np.isnan(mix.responsibilities([0.0])).all()
    # Reference: scipy.stats.lognorm.cdf mixture for the original-units CDF.
    want_cdf = sum(wk * stats.lognorm.cdf(pts, s, scale=math.exp(m))
                   for wk, m, s in zip(w, mu, sd, strict=True))
    np.testing.assert_allclose(mix.cdf(pts), want_cdf, rtol=1e-12)
    assert mix.cdf(-3.0) == 0.0


def test_full_covariance_loglik_matches_scipy_multivariate_normal():
    # Reference: scipy.stats.multivariate_normal.pdf summed over the fitted components.
    rng = np.random.default_rng(17)
    x = np.concatenate([rng.normal([0, 0, 0], 1, (2000, 3)), rng.normal([3, 1, -2], 0.5,
                                                                       (2000, 3))])
    mix = stream(Mixture(2, dim=3), rng.permutation(x), 400)
    pts = rng.normal(1, 2, (20, 3))
    want = np.log(sum(w * stats.multivariate_normal(m, c).pdf(pts)
                      for w, m, c in zip(mix.weights, mix.means, mix.covariances, strict=True)))
    np.testing.assert_allclose(mix.loglik(pts), want, rtol=1e-10)


# ----------------------------------------------------------------- warming up
def test_until_warm_reads_come_from_the_single_gaussian_of_the_buffer():
    # Reference: scipy.stats.norm.ppf at numpy's mean and (ddof=0) std of the buffer.
    rng = np.random.default_rng(18)
    x = rng.normal(10.0, 3.0, 120)
    mix = Mixture(2, warmup=200)
    mix.update(x)
    assert not mix.warm
    assert np.isnan(mix.weights).all() and math.isnan(mix.average_loglik)
    want = stats.norm.ppf(0.99, x.mean(), x.std())
    assert mix.quantile(0.99) == pytest.approx(want, rel=1e-6)     # floor: 1e-6 of var
    mix.update(rng.normal(10.0, 3.0, 80))
    assert mix.warm and math.isfinite(mix.average_loglik)


def test_log_mixture_warming_falls_back_to_single_lognormal():
    # Reference: scipy.stats.lognorm.ppf with s = std(log x), scale = exp(mean(log x)).
    rng = np.random.default_rng(19)
    x = rng.lognormal(1.0, 0.5, 100)
    mix = Mixture(2, log=True)
    mix.update(x)
    want = stats.lognorm.ppf(0.9, np.log(x).std(), scale=math.exp(np.log(x).mean()))
    assert mix.quantile(0.9) == pytest.approx(want, rel=1e-6)


def test_empty_state_reads_nan():
    mix = Mixture(2)
    assert math.isnan(mix.quantile(0.5)) and math.isnan(mix.cdf(1.0))
    assert np.isnan(mix.loglik([1.0])).all()


# -------------------------------------------------------------------- pooling
def test_merge_is_the_weighted_mixture_of_the_two_distributions():
    rng = np.random.default_rng(20)
    a = stream(Mixture(2, log=True), lognormal_shard(rng, 6000, 0.05), 1000)
    b = stream(Mixture(2, log=True), lognormal_shard(rng, 2000, 0.4), 1000)
    m = a.copy().merge(b)
    assert m.components == 4 and m.weight_sum == a.weight_sum + b.weight_sum
    grid = np.array([1.0, 2.0, 5.0, 30.0, 80.0])
    want = (a.weight_sum * a.cdf(grid) + b.weight_sum * b.cdf(grid)) / m.weight_sum
    np.testing.assert_allclose(m.cdf(grid), want, rtol=1e-13)
    assert a.components == 2 and b.components == 2       # inputs unchanged


def test_merge_and_reduce_preserve_pooled_mean_and_variance_and_pool_p99():
    # Our scenario: a shard with 2 % slow requests (30 000) and one with 30 % (10 000).
    # Reference for the pooled p99: a Mixture fitted on the union of both shards' data.
    rng = np.random.default_rng(11)
    xa, xb = lognormal_shard(rng, 30_000, 0.02), lognormal_shard(rng, 10_000, 0.3)
    a, b = stream(Mixture(2, log=True), xa, 1000), stream(Mixture(2, log=True), xb, 1000)
    merged = a.copy().merge(b)
    reduced = merged.reduce(2)
    mean_a, cov_a = mixture_moments(a)
    mean_b, cov_b = mixture_moments(b)
    wa, wb = a.weight_sum / merged.weight_sum, b.weight_sum / merged.weight_sum
    pooled_mean = wa * mean_a + wb * mean_b
    pooled_cov = wa * (cov_a + np.outer(mean_a - pooled_mean, mean_a - pooled_mean)) \
        + wb * (cov_b + np.outer(mean_b - pooled_mean, mean_b - pooled_mean))
    for mix in (merged, reduced):
        mean, cov = mixture_moments(mix)
        np.testing.assert_allclose(mean, pooled_mean, rtol=1e-12)
        np.testing.assert_allclose(cov, pooled_cov, rtol=1e-12)
    union = stream(Mixture(2, log=True), rng.permutation(np.concatenate([xa, xb])), 1000)
    assert reduced.components == 2
    assert reduced.quantile(0.99) == pytest.approx(union.quantile(0.99), rel=0.01)
    # and the tempting shortcut is wrong: the mean of the shards' p99 misses by > 5 %
    averaged = 0.5 * (a.quantile(0.99) + b.quantile(0.99))
    assert abs(averaged / union.quantile(0.99) - 1.0) > 0.05


def test_merge_with_a_warming_state_adds_its_single_gaussian():
    rng = np.random.default_rng(21)
    warm = stream(Mixture(2), rng.normal(0, 1, 500), 100)
    warming = Mixture(2)
    warming.update(rng.normal(5, 1, 50))
    m = warm.copy().merge(warming)
    assert m.warm and m.components == 3
    grid = np.array([-1.0, 0.0, 2.0, 5.0])
    want = (warm.weight_sum * warm.cdf(grid) + warming.weight_sum * warming.cdf(grid)) \
        / m.weight_sum
    np.testing.assert_allclose(m.cdf(grid), want, rtol=1e-12)


def test_merging_two_warming_states_pools_their_buffers():
    rng = np.random.default_rng(22)
    x = rng.normal(0, 1, 150)
    a, b = Mixture(2, warmup=200), Mixture(2, warmup=200)
    a.update(x[:100])
    b.update(x[100:])
    m = a.merge(b)
    assert not m.warm and m.quantile(0.5) == pytest.approx(
        stats.norm.ppf(0.5, x.mean(), x.std()), rel=1e-9)    # Reference: scipy.stats.norm


def test_runnalls_merges_the_closest_pair_first():
    # Reference: Runnalls (2007) cost; two near-identical components merge before a far one.
    w = np.array([0.4, 0.3, 0.3])
    m = np.array([[0.0], [5.0], [5.1]])
    c = np.array([[[1.0]], [[1.0]], [[1.0]]])
    w2, m2, c2 = runnalls_reduce(w, m, c, np.zeros((1, 1)), 2)
    np.testing.assert_allclose(w2, [0.4, 0.6])
    np.testing.assert_allclose(m2[:, 0], [0.0, 5.05])
    np.testing.assert_allclose(c2[:, 0, 0], [1.0, 1.0 + 0.25 * 0.01])


# ------------------------------------------------------------------ forgetting
def test_decay_to_halves_the_weight_after_one_half_life_and_keeps_the_fit():
    # Reference: the definition of a half-life (common practice).
    rng = np.random.default_rng(23)
    mix = Mixture(2, half_life=HalfLife(60.0))
    mix.update(rng.normal(0, 1, 400), times=np.linspace(0, 10, 400))
    w, q = mix.weight_sum, mix.quantile(0.9)
    mix.decay_to(70.0)
    assert mix.weight_sum == pytest.approx(w / 2, rel=1e-14)
    assert mix.quantile(0.9) == q


def test_constant_weights_change_the_weight_sum_not_the_fit():
    rng = np.random.default_rng(24)
    x = rng.normal(0, 1, 600)
    one, two = Mixture(2), Mixture(2)
    stream(one, x, 100)
    for i in range(0, 600, 100):
        two.update(x[i:i + 100], weights=2.0)
    assert two.weight_sum == 2 * one.weight_sum
    np.testing.assert_allclose(two.means, one.means, rtol=1e-12, atol=1e-14)


# ----------------------------------------------------------------- persistence
@pytest.mark.parametrize("rows", [120, 700])      # still warming, and warm
def test_round_trip_through_msgpack_continues_identically(rows):
    rng = np.random.default_rng(25)
    x = rng.lognormal(0, 1, (rows + 500, 2))
    mix = Mixture(2, dim=2, log=True, half_life=HalfLife(1000, "observations"), seed=4)
    mix.update(x[:rows])
    restored = Mixture.from_dict(msgpack.unpackb(msgpack.packb(mix.to_dict())))
    assert restored.to_dict() == mix.to_dict()
    for m in (mix, restored):
        stream(m, x[rows:], 50)
    assert restored.to_dict() == mix.to_dict()


def test_same_seed_and_data_give_the_same_fit():
    x = np.random.default_rng(26).normal(0, 1, (400, 2))
    a, b = Mixture(3, dim=2, seed=9), Mixture(3, dim=2, seed=9)
    a.update(x)
    b.update(x)
    assert a.to_dict() == b.to_dict()


def test_from_dict_rejects_foreign_forms():
    with pytest.raises(IncompatibleError, match="kind"):
        Mixture.from_dict({"kind": "moments", "version": 1})
    with pytest.raises(IncompatibleError, match="version"):
        Mixture.from_dict({**Mixture(2).to_dict(), "version": 99})
    with pytest.raises(IncompatibleError, match="malformed"):
        Mixture.from_dict({"kind": "mixture", "version": 1})


# ---------------------------------------------------------------------- errors
def test_log_mixture_rejects_non_positive_values_naming_them_and_changes_nothing():
    mix = Mixture(2, log=True)
    mix.update([1.0, 2.0])
    before = mix.to_dict()
    with pytest.raises(DomainError, match=r"row 1, column 0 must be > 0") as err:
        mix.update([3.0, -0.5, 4.0])
    assert err.value.value == -0.5 and err.value.field == "x"
    assert mix.to_dict() == before


@pytest.mark.parametrize("bad, error", [
    ([1.0, float("nan")], NonFiniteError),
    (np.ones((3, 2)), ShapeError),
])
def test_bad_batches_raise_and_change_nothing(bad, error):
    mix = Mixture(2)
    mix.update([1.0, 2.0])
    before = mix.to_dict()
    with pytest.raises(error):
        mix.update(bad)
    with pytest.raises(WeightError):
        mix.update([1.0, 2.0], weights=[1.0, 0.0])
    assert mix.to_dict() == before


@pytest.mark.parametrize("kwargs", [
    {"components": 0}, {"components": 2, "dim": 0}, {"components": 2, "covariance": "tied"},
    {"components": 2, "warmup": 1}, {"components": 2, "min_weight": 0.6},
    {"components": 2, "reg": 0.0}, {"components": 2, "log": 1},
])
def test_constructor_rejects_bad_settings(kwargs):
    with pytest.raises(IncompatibleError):
        Mixture(**kwargs)


def test_read_outs_reject_bad_arguments():
    mix = stream(Mixture(2, dim=2), np.random.default_rng(27).normal(size=(300, 2)), 100)
    with pytest.raises(IncompatibleError, match="q"):
        mix.quantile(1.0)
    with pytest.raises(ShapeError, match="field"):
        mix.quantile(0.5, field=2)
    with pytest.raises(IncompatibleError, match="other"):
        mix.merge(Mixture(2, dim=1))


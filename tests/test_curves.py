"""The plot maths in estimators/curves.py against scipy.stats and numpy.linalg."""

from __future__ import annotations

import math

import numpy as np
import pytest
from conftest import need_module
from sigmad.estimators.curves import (
    ellipse,
    line_band,
    mixture_density,
    normal_density,
    normal_tail_rate,
)
from sigmad.estimators.errors import DomainError, ShapeError


def test_normal_density_matches_scipy_norm_pdf():
    stats = need_module("scipy.stats")
    x = np.linspace(-7.0, 13.0, 101)
    # reference: scipy.stats.norm.pdf(x, loc, scale)
    np.testing.assert_allclose(normal_density(x, 3.0, 2.5), stats.norm.pdf(x, 3.0, 2.5),
                               rtol=1e-13, atol=0)


def test_mixture_density_matches_weighted_scipy_norm_pdfs():
    stats = need_module("scipy.stats")
    x = np.linspace(-5.0, 25.0, 121)
    w, mu, sd = [0.7, 0.2, 0.1], [0.0, 8.0, 15.0], [1.0, 2.0, 4.0]
    total, parts = mixture_density(x, w, mu, sd)
    # reference: sum_k w_k scipy.stats.norm.pdf(x, mu_k, sd_k)
    ref = [wk * stats.norm.pdf(x, m, s) for wk, m, s in zip(w, mu, sd, strict=True)]
    np.testing.assert_allclose(parts, ref, rtol=1e-13, atol=1e-300)
    np.testing.assert_allclose(total, np.sum(ref, axis=0), rtol=1e-13)


def test_log_mixture_density_is_scipy_lognorm_in_original_units():
    stats = need_module("scipy.stats")
    x = np.linspace(0.5, 200.0, 157)
    w, mu, sd = [0.8, 0.2], [math.log(8.0), math.log(60.0)], [0.25, 0.35]
    total, parts = mixture_density(x, w, mu, sd, log=True)
    # reference: scipy.stats.lognorm.pdf(x, s=sigma, scale=exp(mu)) is the log-normal density
    ref = [wk * stats.lognorm.pdf(x, s, scale=math.exp(m)) for wk, m, s in zip(w, mu, sd,
                                                                             strict=True)]
    np.testing.assert_allclose(parts, ref, rtol=1e-12, atol=1e-300)
    np.testing.assert_allclose(total, np.sum(ref, axis=0), rtol=1e-12)


def test_log_mixture_density_integrates_to_one():
    integrate = need_module("scipy.integrate")
    # reference: a density integrates to 1 (scipy.integrate.quad over (0, inf))
    got, _ = integrate.quad(lambda v: float(mixture_density([v], [0.6, 0.4], [1.0, 2.5],
                                                             [0.3, 0.5], log=True)[0][0]),
                            0.0, np.inf, limit=200)
    assert got == pytest.approx(1.0, abs=1e-8)


def test_mixture_density_rejects_bad_input_naming_it():
    with pytest.raises(ShapeError, match="components"):
        mixture_density([1.0], [1.0], [0.0, 1.0], [1.0])
    with pytest.raises(DomainError, match="sds"):
        mixture_density([1.0], [1.0], [0.0], [0.0])
    with pytest.raises(DomainError, match="x"):
        mixture_density([0.0, 1.0], [1.0], [0.0], [1.0], log=True)
    with pytest.raises(DomainError, match="sd"):
        normal_density([1.0], 0.0, -1.0)


def test_ellipse_axes_are_numpy_eigh_axes_and_points_lie_on_the_contour():
    cov = np.array([[4.0, 1.5], [1.5, 2.0]])
    mean = np.array([10.0, -3.0])
    pts = ellipse(mean, cov, nsigma=2.0, points=360)
    # reference: numpy.linalg.eigh gives the principal axes; semi-axes are n sqrt(lambda)
    lam, vec = np.linalg.eigh(cov)
    radii = np.linalg.norm(pts - mean, axis=1)
    assert radii.max() == pytest.approx(2.0 * math.sqrt(lam[1]), rel=1e-12)
    assert radii.min() == pytest.approx(2.0 * math.sqrt(lam[0]), rel=1e-4)
    # the first point lies along the major eigenvector (up to sign)
    first = (pts[0] - mean) / np.linalg.norm(pts[0] - mean)
    assert abs(first @ vec[:, 1]) == pytest.approx(1.0, rel=1e-12)
    # every point has Mahalanobis distance n (inverse from numpy.linalg.inv)
    d = pts - mean
    maha = np.einsum("ij,jk,ik->i", d, np.linalg.inv(cov), d)
    np.testing.assert_allclose(maha, 4.0, rtol=1e-12)


def test_ellipse_of_a_singular_covariance_is_a_segment_and_bad_ones_are_refused():
    pts = ellipse([0.0, 0.0], [[1.0, 1.0], [1.0, 1.0]], 1.0, 8)
    # all points on the line y = x (the only direction with variance)
    np.testing.assert_allclose(pts[:, 0], pts[:, 1], atol=1e-12)
    with pytest.raises(DomainError, match="cov2x2"):
        ellipse([0.0, 0.0], [[1.0, 2.0], [2.0, 1.0]])
    with pytest.raises(DomainError, match="cov2x2"):
        ellipse([0.0, 0.0], [[np.nan, 0.0], [0.0, 1.0]])
    with pytest.raises(ShapeError):
        ellipse([0.0], [[1.0]])


def test_line_band_matches_statsmodels_prediction_centre():
    sm = need_module("statsmodels.api")
    rng = np.random.default_rng(7)
    x = rng.normal(100.0, 5.0, 400)
    y = 1.5 * x + 2.0 + rng.normal(0.0, 0.3, 400)
    fit = sm.OLS(y, sm.add_constant(x)).fit()
    grid = np.linspace(90.0, 110.0, 11)
    centre, lo, hi = line_band(grid, fit.params[1], fit.params[0], math.sqrt(fit.scale), 2.0)
    # reference: statsmodels OLSResults.predict for the centre line
    np.testing.assert_allclose(centre, fit.predict(sm.add_constant(grid)), rtol=1e-13)
    np.testing.assert_allclose(hi - lo, 4.0 * math.sqrt(fit.scale), rtol=1e-13)


def test_normal_tail_rate_matches_twice_scipy_norm_sf():
    stats = need_module("scipy.stats")
    for k in (0.0, 1.0, 2.0, 3.0, 5.0):
        # reference: 2 * scipy.stats.norm.sf(k)
        assert normal_tail_rate(k) == pytest.approx(2.0 * stats.norm.sf(k), rel=1e-12)
    with pytest.raises(DomainError, match="k"):
        normal_tail_rate(-1.0)

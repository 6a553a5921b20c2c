"""Curves to draw an estimate with: normal and mixture densities, covariance ellipses,
a regression line's residual band, and the normal tail rate an outlier count compares to.

Pure numpy; the status page calls these and only maps the points to pixels.
"""

from __future__ import annotations

import math

import numpy as np

from .errors import DomainError, ShapeError

_INV_SQRT_2PI = 1.0 / math.sqrt(2.0 * math.pi)


def normal_density(x: object, mean: float, sd: float) -> np.ndarray:
    """The normal density N(x; mean, sd**2) at each x.

    Parameters
    ----------
    x : array_like
        Points, any shape.
    mean, sd : float
        Location and scale; ``sd`` > 0.

    Returns
    -------
    ndarray
        Densities, the shape of ``x``. O(len(x)).

    Raises
    ------
    DomainError
        ``sd`` not positive and finite.

    Notes
    -----
    phi(x) = exp(-z**2 / 2) / (sd sqrt(2 pi)), z = (x - mean) / sd.

    Examples
    --------
    >>> round(float(normal_density(0.0, 0.0, 1.0)), 6)
    0.398942
    """
    if not (math.isfinite(sd) and sd > 0.0):
        raise DomainError("sd", sd, "must be positive and finite")
    z = (np.asarray(x, dtype=np.float64) - mean) / sd
    return np.exp(-0.5 * z * z) * (_INV_SQRT_2PI / sd)


def mixture_density(x: object, weights: object, means: object, sds: object,
                    log: bool = False) -> tuple[np.ndarray, np.ndarray]:
    """The density of a one-field Gaussian mixture and of each weighted component.

    Parameters
    ----------
    x : array_like, shape (n,)
        Points in the stream's units (> 0 when ``log``).
    weights, means, sds : array_like, shape (K,)
        Component weights (summing to 1) and the components' means and standard
        deviations in the fitted space (of log x when ``log``).
    log : bool
        The mixture was fitted to log x: return the density of x itself.

    Returns
    -------
    total : ndarray, shape (n,)
        The mixture density at each x.
    parts : ndarray, shape (K, n)
        Each component's weighted density; ``parts.sum(0) == total``. O(K n).

    Raises
    ------
    ShapeError
        Weights, means and sds of different lengths.
    DomainError
        A standard deviation not positive, or (with ``log``) a point <= 0.

    Notes
    -----
    p(x) = sum_k w_k N(y; mu_k, s_k**2) |dy/dx| with y = x, or y = log x and
    |dy/dx| = 1/x: each component is then a log-normal density.

    Examples
    --------
    >>> total, parts = mixture_density([1.0], [0.5, 0.5], [0.0, 0.0], [1.0, 1.0], log=True)
    >>> round(float(total[0]), 6), parts.shape
    (0.398942, (2, 1))
    """
    w = np.asarray(weights, dtype=np.float64).ravel()
    mu = np.asarray(means, dtype=np.float64).ravel()
    s = np.asarray(sds, dtype=np.float64).ravel()
    if not (w.shape == mu.shape == s.shape):
        raise ShapeError("components", (w.shape, mu.shape, s.shape),
                         "weights, means and sds must have the same length")
    bad = ~(np.isfinite(s) & (s > 0.0))
    if bad.any():
        raise DomainError("sds", float(s[bad][0]), "must be positive and finite")
    xs = np.asarray(x, dtype=np.float64).ravel()
    if log:
        if (xs <= 0.0).any():
            raise DomainError("x", float(xs[xs <= 0.0][0]), "must be > 0 for a log mixture")
        y, jac = np.log(xs), 1.0 / xs
    else:
        y, jac = xs, np.ones_like(xs)
    z = (y[None, :] - mu[:, None]) / s[:, None]
    parts = np.exp(-0.5 * z * z) * (w * _INV_SQRT_2PI / s)[:, None] * jac[None, :]
    return parts.sum(axis=0), parts


def ellipse(mean2: object, cov2x2: object, nsigma: float = 1.0,
            points: int = 64) -> np.ndarray:
    """Points on the nsigma contour of a bivariate normal: a covariance ellipse.

    Parameters
    ----------
    mean2 : array_like, shape (2,)
        Centre.
    cov2x2 : array_like, shape (2, 2)
        Symmetric positive semi-definite covariance.
    nsigma : float
        Mahalanobis radius (1 draws the one-sigma ellipse).
    points : int
        Number of points (>= 3); the curve is closed by the caller.

    Returns
    -------
    ndarray, shape (points, 2)
        The contour, counter-clockwise from the major axis. O(points).

    Raises
    ------
    ShapeError
        Wrong shapes.
    DomainError
        A non-finite covariance or a negative eigenvalue beyond rounding.

    Notes
    -----
    With C = V diag(l1, l2) V^T (eigen-decomposition), the contour
    (x - m)^T C^-1 (x - m) = n**2 is x = m + n V diag(sqrt l) (cos t, sin t).

    Examples
    --------
    >>> e = ellipse([0.0, 0.0], [[4.0, 0.0], [0.0, 1.0]], 1.0, 4)
    >>> np.round(np.abs(e).max(axis=0), 6).tolist()
    [2.0, 1.0]
    """
    m = np.asarray(mean2, dtype=np.float64)
    c = np.asarray(cov2x2, dtype=np.float64)
    if m.shape != (2,) or c.shape != (2, 2):
        raise ShapeError("cov2x2", (m.shape, c.shape), "need a mean (2,) and a covariance (2, 2)")
    if points < 3:
        raise DomainError("points", points, "must be >= 3")
    if not np.isfinite(c).all():
        raise DomainError("cov2x2", c.tolist(), "must be finite")
    lam, vec = np.linalg.eigh(0.5 * (c + c.T))
    if lam[0] < -1e-12 * max(abs(lam[1]), 1.0):
        raise DomainError("cov2x2", c.tolist(), "must be positive semi-definite")
    lam = np.clip(lam, 0.0, None)
    # eigh sorts ascending: put the major axis first so t = 0 points along it
    axes = vec[:, ::-1] * (nsigma * np.sqrt(lam[::-1]))
    t = np.linspace(0.0, 2.0 * math.pi, points, endpoint=False)
    return m + np.column_stack([np.cos(t), np.sin(t)]) @ axes.T


def line_band(x: object, slope: float, intercept: float, residual_sd: float,
              k: float = 2.0) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """A fitted line y = intercept + slope x and the band of +-k residual standard deviations.

    Parameters
    ----------
    x : array_like, shape (n,)
        Abscissae.
    slope, intercept, residual_sd : float
        The line and the residual scale (>= 0).
    k : float
        Half-width of the band in residual standard deviations.

    Returns
    -------
    centre, lower, upper : ndarray, shape (n,)
        O(n).

    Notes
    -----
    The residual band shows where about 95 % of new points fall for k = 2
    when the residuals are normal (it leaves out the coefficients' own error).

    Examples
    --------
    >>> [a.tolist() for a in line_band([0.0, 1.0], 2.0, 1.0, 0.5, 2.0)]
    [[1.0, 3.0], [0.0, 2.0], [2.0, 4.0]]
    """
    xs = np.asarray(x, dtype=np.float64).ravel()
    if not (math.isfinite(residual_sd) and residual_sd >= 0.0):
        raise DomainError("residual_sd", residual_sd, "must be finite and >= 0")
    centre = intercept + slope * xs
    return centre, centre - k * residual_sd, centre + k * residual_sd


def normal_tail_rate(k: float) -> float:
    """P(|Z| > k) for a standard normal Z: the outlier rate to expect beyond k sigma.

    Parameters
    ----------
    k : float
        Threshold in standard deviations (>= 0).

    Returns
    -------
    float
        erfc(k / sqrt 2). O(1).

    Examples
    --------
    >>> round(normal_tail_rate(3.0), 6)
    0.0027
    """
    if not (math.isfinite(k) and k >= 0.0):
        raise DomainError("k", k, "must be finite and >= 0")
    return math.erfc(k / math.sqrt(2.0))

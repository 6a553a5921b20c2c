"""One plot per series for the status page, drawn from its immutable ``SeriesView``.

- one field: the fitted density over the value axis (the mixture and its weighted
  components when warm, else the normal of the weighted mean and variance) with
  the quantiles marked;
- two or more fields: the 1 and 2 sigma covariance ellipses of the first two
  fields (or of the regression's first x and its y) and, with a regression, the
  fitted line and its band of +-2 residual standard deviations.

Each plot is O(points x components); the maths comes from ``estimators.curves``.
"""

from __future__ import annotations

import math

import numpy as np
from sigmad.daemon.engine.snapshot import SeriesView
from sigmad.daemon.web.svg import (
    INK,
    MUTED,
    Scale,
    area,
    esc,
    figure,
    line,
    log_ticks,
    polygon,
    ticks,
    vmarker,
    xaxis,
    yaxis,
)
from sigmad.estimators import ellipse, line_band, mixture_density, normal_density

W, H = 400, 180
LEFT, RIGHT, TOP, BOTTOM = 44, 12, 18, 34
POINTS = 160
TOTAL = "#0f766e"                                   # the fitted density / the ellipse
COMPONENTS = ("#c2410c", "#6d28d9", "#0369a1", "#a16207", "#be185d", "#4d7c0f")
BAND = "#b45309"
THRESHOLD = "#b91c1c"                               # a configured threshold (le bound)


def _empty(text: str) -> str:
    body = (f'<text x="{W / 2}" y="{H / 2}" font-size="12" fill="{MUTED}" '
            f'text-anchor="middle">{esc(text)}</text>')
    return figure(W, H, body, text)


def _warm(v: SeriesView) -> bool:
    m = v.mixture
    return m is not None and m.warm and len(m.log_means) > 0


def _quantiles(v: SeriesView, field: int) -> list[tuple[float, float]]:
    return [(q, x) for i, q, x in v.quantiles if i == field and math.isfinite(x)]


def density_range(v: SeriesView, field: int = 0) -> tuple[float, float]:
    """The value axis of a density plot: every component to 3.5 sd (the normal to 4 sd)
    and every quantile marked; in the stream's units."""
    m = v.mixture
    if _warm(v):
        mu = np.asarray([r[field] for r in m.log_means])
        s = np.asarray([r[field] for r in m.log_stddevs])
        lo, hi = float(np.min(mu - 3.5 * s)), float(np.max(mu + 3.5 * s))
        if m.log:
            lo, hi = math.exp(lo), math.exp(hi)
    else:
        lo, hi = v.mean[field] - 4.0 * v.stddev[field], v.mean[field] + 4.0 * v.stddev[field]
    qs = _quantiles(v, field)
    if qs:   # keep every marked quantile on the axis
        lo, hi = min(lo, min(x for _, x in qs)), max(hi, max(x for _, x in qs))
    return lo, hi


def density_figure(v: SeriesView, field: int = 0) -> str:
    """The fitted density of one field with its quantile markers."""
    mean, sd = v.mean[field], v.stddev[field]
    m = v.mixture
    warm = _warm(v)
    if not warm and not (math.isfinite(mean) and math.isfinite(sd) and sd > 0):
        return _empty("waiting for data")
    qs = _quantiles(v, field)
    log = bool(warm and m.log)
    if warm:
        w = np.asarray(m.weights)
        mu = np.asarray([r[field] for r in m.log_means])
        s = np.asarray([r[field] for r in m.log_stddevs])
    sx = Scale(*density_range(v, field), LEFT, W - RIGHT, log=log)
    lo, hi = sx.domain
    xs = np.logspace(math.log10(lo), math.log10(hi), POINTS) if log else np.linspace(lo, hi, POINTS)
    if warm:
        total, parts = mixture_density(xs, w, mu, s, log=log)
        if log:   # on a log axis the area under x p(x) is what reads as probability
            total, parts = total * xs, parts * xs
    else:
        total, parts = normal_density(xs, mean, sd), np.empty((0, POINTS))
    peak = float(total.max()) or 1.0
    sy = Scale(0.0, peak * 1.12, H - BOTTOM, TOP)
    px, base = sx(xs), np.full(POINTS, H - BOTTOM)
    body = [yaxis(sy, LEFT, ticks(0.0, peak * 1.12, 3)[1:], W - RIGHT)]
    body.append(area(px, sy(total), base, TOTAL, 0.14))
    body.append(line(px, sy(total), TOTAL, 2.2, cls="density"))
    for k in range(parts.shape[0]):   # on top: where components overlap the total they show
        body.append(line(px, sy(parts[k]), COMPONENTS[k % len(COMPONENTS)], 1.3, "4 3",
                         cls="component"))
    for q, x in qs:
        body.append(vmarker(float(sx(x)), TOP + 2, H - BOTTOM, f"p{q * 100:g}"))
    for i, bounds in v.threshold_at:   # thresholds on the axis, below the quantile labels
        if i == field:
            body.extend(vmarker(float(sx(b)), TOP + 14, H - BOTTOM, f"{b:g}", THRESHOLD)
                        for b in bounds if lo <= b <= hi)
    unit = v.fields[field]
    what = "density per ln-unit, log axis" if log else "density"
    body.append(xaxis(sx, H - BOTTOM, log_ticks(lo, hi) if log else ticks(lo, hi, 5),
                      f"{unit} ({what})"))
    kind = (f"{len(m.weights)}-component {'log-normal' if log else 'normal'} mixture" if warm
            else "normal (weighted mean and variance)")
    return figure(W, H, "".join(body), f"{v.stream} {unit}: fitted {kind}")


def _pair(v: SeriesView) -> tuple[int, int]:
    r = v.regression
    if r is not None and r.y in v.fields and r.terms and r.terms[0] in v.fields:
        return v.fields.index(r.terms[0]), v.fields.index(r.y)
    return 0, 1


def _cov2(v: SeriesView, i: int, j: int) -> np.ndarray:
    c = {(a, b): x for a, b, x in v.covariance}
    cij = c.get((min(i, j), max(i, j)), math.nan)
    return np.array([[v.variance[i], cij], [cij, v.variance[j]]])


def _latest(r, sx: Scale, sy: Scale) -> str:
    """The last row as a point (kept inside the frame), titled with its spread and z."""
    if len(r.latest) != 2 or not all(map(math.isfinite, r.latest)):
        return ""
    x = min(max(r.latest[0], sx.domain[0]), sx.domain[1])
    y = min(max(r.latest[1], sy.domain[0]), sy.domain[1])
    spread = (f"residual {r.residual:.4g}, z = {r.residual_z:.2f}"
              if math.isfinite(r.residual_z) else "residual not defined yet")
    return (f'<circle class="latest" cx="{float(sx(x)):.1f}" cy="{float(sy(y)):.1f}" r="3.5" '
            f'fill="{BAND}" stroke="{INK}" stroke-width="1"><title>latest row: '
            f'{esc(spread)}</title></circle>')


def pair_figure(v: SeriesView) -> str:
    """Covariance ellipses of two fields, and the regression line and band if any."""
    i, j = _pair(v)
    mean = np.array([v.mean[i], v.mean[j]])
    cov = _cov2(v, i, j)
    if not (np.isfinite(mean).all() and np.isfinite(cov).all()) or min(cov[0, 0],
                                                                     cov[1, 1]) <= 0:
        return _empty("waiting for data")
    sd = np.sqrt(np.diag(cov))
    sx = Scale(mean[0] - 3 * sd[0], mean[0] + 3 * sd[0], LEFT, W - RIGHT)
    sy = Scale(mean[1] - 3 * sd[1], mean[1] + 3 * sd[1], H - BOTTOM, TOP)
    body = [yaxis(sy, LEFT, ticks(*sy.domain, 4), W - RIGHT)]
    r = v.regression
    if r is not None and r.ok and r.y == v.fields[j]:
        xs = np.linspace(*sx.domain, 40)
        intercept = r.coefficients[r.terms.index("intercept")] if "intercept" in r.terms else 0.0
        # other x terms held at their means: the line is the fit's slice through the centre
        for t, b in zip(r.terms[1:], r.coefficients[1:], strict=True):
            if t != "intercept":
                intercept += b * v.mean[v.fields.index(t)]
        centre, lo, hi = line_band(xs, r.coefficients[0], intercept, r.residual_stddev, 2.0)
        ylo, yhi = sy.domain
        clip = lambda a: np.clip(a, ylo, yhi)  # noqa: E731 (keep the band inside the frame)
        body.append(area(sx(xs), sy(clip(hi)), sy(clip(lo)), BAND, 0.16))
        body.append(line(sx(xs), sy(clip(centre)), BAND, 1.8, cls="fit"))
        body.append(_latest(r, sx, sy))
    for n, dash in ((1.0, None), (2.0, "5 3")):
        e = ellipse(mean, cov, n, 72)
        body.append(polygon(sx(e[:, 0]), sy(e[:, 1]), TOTAL, 0.07 if n == 1 else 0.0, 1.6,
                            dash))
    body.append(f'<circle cx="{float(sx(mean[0])):.1f}" cy="{float(sy(mean[1])):.1f}" r="2.5" '
                f'fill="{INK}"/>')
    body.append(xaxis(sx, H - BOTTOM, ticks(*sx.domain, 5), v.fields[i]))
    body.append(f'<text x="{LEFT + 4}" y="{TOP - 5}" font-size="10" fill="{MUTED}">'
                f'{esc(v.fields[j])} ↑  (ellipses: 1σ, 2σ)</text>')
    title = f"{v.stream}: {v.fields[j]} against {v.fields[i]}, covariance ellipses"
    return figure(W, H, "".join(body), title)


def series_figure(v: SeriesView) -> str:
    return density_figure(v) if len(v.fields) == 1 else pair_figure(v)

"""Prometheus export: the metric model of a snapshot.

Every sample comes from one of three generators over the immutable
``Snapshot`` (never live estimator state): ``static_samples`` (changes only
when the series does), ``dynamic_samples`` (moves with the clock) and
``health_samples`` (the daemon's own counters). ``HealthCollector`` yields the
health families to prometheus-client; the per-series part is rendered by
``render.SeriesRenderer``, which caches each series' text until it changes,
and ``families`` gives the same samples as metric families (the reference the
renderer is tested and benchmarked against). Non-finite values (an estimate
not defined yet, such as a variance from one observation) are left out rather
than exported as NaN.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Iterator
from itertools import chain

from prometheus_client.metrics_core import Metric
from prometheus_client.utils import floatToGoString
from sigmad.daemon.engine.snapshot import SeriesView, Snapshot

# name -> (type, help). The names are the contract in DESIGN.md.
METRICS: dict[str, tuple[str, str]] = {
    "sigmad_mean": ("gauge", "Weighted, decayed mean of a field."),
    "sigmad_stddev": ("gauge", "Standard deviation of a field under the stream's correction."),
    "sigmad_variance": ("gauge", "Variance of a field under the stream's correction."),
    "sigmad_weight": ("gauge", "Decayed sum of weights W (the pooling weight)."),
    "sigmad_weight_squared": ("gauge", "Decayed sum of squared weights W2 (for exact pooling)."),
    "sigmad_effective_samples": ("gauge", "Kish effective sample size W^2/W2."),
    "sigmad_scatter": ("gauge", "Centred weighted sum of squares of a field, sum w (x - mean)^2 "
                                "(for exact pooling under any correction)."),
    "sigmad_covariance": ("gauge", "Covariance of two fields under the stream's correction."),
    "sigmad_correlation": ("gauge", "Pearson correlation of two fields."),
    "sigmad_quantile": ("gauge", "Estimated q-quantile of a field, in the stream's units."),
    "sigmad_value": ("histogram", "Weighted count of a field's values at or below each of the "
                                  "stream's thresholds (le), never decayed."),
    "sigmad_exceedance": ("gauge", "Decayed share of a field's values above a threshold, from "
                                   "the fitted model (the mixture when warm, else normal)."),
    "sigmad_exceedance_observed": ("gauge", "Decayed weighted share of a field's values above "
                                            "a threshold, counted from the data."),
    "sigmad_mixture_weight": ("gauge", "Weight of a mixture component."),
    "sigmad_mixture_mean": ("gauge", "Mean of a mixture component, in the stream's units."),
    "sigmad_mixture_stddev": ("gauge",
                              "Standard deviation of a mixture component, in the stream's units."),
    "sigmad_mixture_loglik": ("gauge", "Decayed average log-likelihood per observation."),
    "sigmad_mixture_warm": ("gauge", "1 once the mixture is initialised, 0 while warming up."),
    "sigmad_mixture_reseeds": ("counter", "Mixture components re-seeded after collapsing."),
    "sigmad_regression_coefficient": ("gauge", "Least-squares coefficient of a term."),
    "sigmad_regression_stderr": ("gauge", "Standard error of a least-squares coefficient."),
    "sigmad_regression_residual_stddev": ("gauge", "Noise standard deviation of the fitted line."),
    "sigmad_regression_r_squared": ("gauge", "Coefficient of determination of the fitted line."),
    "sigmad_regression_residual": ("gauge", "The last row's residual y - fit (the spread), "
                                            "against the fit of the rows before it."),
    "sigmad_regression_residual_z": ("gauge", "The last row's residual over its prediction "
                                              "standard error."),
    "sigmad_volatility": ("gauge", "Volatility of a return field per the stream's "
                                   "volatility_unit: sqrt of the decayed mean of r^2/dt."),
    "sigmad_observations": ("counter", "Accepted observations."),
    "sigmad_outliers": ("counter",
                        "Observations beyond a distance threshold, scored before the update."),
    "sigmad_update_age_seconds": ("gauge", "Seconds since the series last accepted a row."),
    "sigmad_series": ("gauge", "Live series per stream."),
    "sigmad_rejected": ("counter", "Rejected observations by reason."),
    "sigmad_messages": ("counter", "Messages received per source endpoint."),
    "sigmad_sequence_gaps": ("counter", "Messages missing from a producer's sequence numbers."),
    "sigmad_merge_shards": ("gauge", "Shards whose snapshots a merger pools (live) or has "
                                     "left out after they went silent (expired)."),
    "sigmad_shard_age_seconds": ("gauge", "Seconds since a live shard's latest snapshot arrived."),
    "sigmad_session_close_timestamp_seconds": ("gauge", "Unix time of the stream's latest "
                                                        "session boundary."),
    "sigmad_session_close_mean": ("gauge", "Mean of a field when the latest session closed."),
    "sigmad_session_close_stddev": ("gauge", "Standard deviation of a field when the latest "
                                             "session closed."),
    "sigmad_session_close_weight": ("gauge", "Decayed sum of weights when the latest session "
                                             "closed."),
    "sigmad_session_close_observations": ("gauge", "Observations in the latest closed "
                                                   "session."),
    "sigmad_session_close_volatility": ("gauge", "Volatility of a return field when the "
                                                 "latest session closed."),
    "sigmad_session_close_regression_coefficient": ("gauge", "Least-squares coefficient of "
                                                             "a term when the latest session "
                                                             "closed."),
}


HEALTH = ("sigmad_series", "sigmad_rejected", "sigmad_messages", "sigmad_sequence_gaps")
#: Exported by the merge tier's own collector (daemon/merge.py), not from a snapshot.
MERGE_METRICS = ("sigmad_merge_shards", "sigmad_shard_age_seconds")
#: The closing values of the latest session of each stream with session_reset.
SESSION = tuple(name for name in METRICS if name.startswith("sigmad_session_close_"))
SERIES = tuple(name for name in METRICS if name not in HEALTH and name not in MERGE_METRICS
               and name not in SESSION)

Sample = tuple[str, dict[str, str], float]   # (family, labels, value)
#: A histogram's samples name their part; the family is the histogram's name.
HISTOGRAM_PARTS = {f"sigmad_value_{part}": "sigmad_value" for part in ("bucket", "count", "sum")}


def series_labels(v: SeriesView) -> dict[str, str]:
    labels = {"stream": v.stream}
    labels.update(v.labels)
    return labels


def static_samples(v: SeriesView) -> Iterator[Sample]:
    """The samples of a series that change only when the series does. O(samples)."""
    base = series_labels(v)
    yield "sigmad_effective_samples", base, v.effective_samples
    yield "sigmad_observations", base, float(v.observations)
    per_field = [dict(base, field=f) for f in v.fields]
    for i, lab in enumerate(per_field):
        yield "sigmad_mean", lab, v.mean[i]
        yield "sigmad_stddev", lab, v.stddev[i]
        yield "sigmad_variance", lab, v.variance[i]
    for i, j, c in v.covariance:
        yield "sigmad_covariance", dict(base, field=v.fields[i], field_b=v.fields[j]), c
    for i, j, r in v.correlation:
        yield "sigmad_correlation", dict(base, field=v.fields[i], field_b=v.fields[j]), r
    for f, vol in v.volatility:
        yield "sigmad_volatility", dict(base, field=f), vol
    for i, q, value in v.quantiles:
        yield "sigmad_quantile", dict(per_field[i], q=_fmt_q(q)), value
    for thr, count in v.outliers:
        yield "sigmad_outliers", dict(base, threshold=_fmt_q(thr)), float(count)
    for (i, bounds), cum, total, model, seen in zip(
            v.threshold_at, v.buckets, v.value_sums, v.exceedance, v.exceedance_observed,
            strict=True):
        lab = per_field[i]
        for b, c in zip(bounds, cum, strict=False):
            yield "sigmad_value_bucket", dict(lab, le=floatToGoString(b)), c
        yield "sigmad_value_bucket", dict(lab, le="+Inf"), cum[-1]
        yield "sigmad_value_count", lab, cum[-1]
        yield "sigmad_value_sum", lab, total
        for b, p, q in zip(bounds, model, seen, strict=True):
            above = dict(lab, above=floatToGoString(b))
            yield "sigmad_exceedance", above, p
            yield "sigmad_exceedance_observed", above, q
    mx = v.mixture
    if mx is not None:
        yield "sigmad_mixture_warm", base, 1.0 if mx.warm else 0.0
        yield "sigmad_mixture_reseeds", base, float(mx.reseeds)
        yield "sigmad_mixture_loglik", base, mx.average_loglik
        for k, wk in enumerate(mx.weights):
            comp = dict(base, component=str(k))
            yield "sigmad_mixture_weight", comp, wk
            for i, f in enumerate(v.fields):
                yield "sigmad_mixture_mean", dict(comp, field=f), mx.means[k][i]
                yield "sigmad_mixture_stddev", dict(comp, field=f), mx.stddevs[k][i]
    rg = v.regression
    if rg is not None and rg.ok:
        for term, b, se in zip(rg.terms, rg.coefficients, rg.stderr, strict=True):
            yield "sigmad_regression_coefficient", dict(base, term=term), b
            yield "sigmad_regression_stderr", dict(base, term=term), se
        yield "sigmad_regression_residual_stddev", base, rg.residual_stddev
        yield "sigmad_regression_r_squared", base, rg.r_squared
        yield "sigmad_regression_residual", base, rg.residual
        yield "sigmad_regression_residual_z", base, rg.residual_z


def dynamic_samples(v: SeriesView, now: float) -> Iterator[Sample]:
    """The samples of a series that move with the clock: decayed weights, age. O(1)."""
    base = series_labels(v)
    w, w2 = v.weights_at(now)
    yield "sigmad_weight", base, w
    yield "sigmad_weight_squared", base, w2
    yield "sigmad_update_age_seconds", base, max(0.0, now - v.last_update)
    for f, c in zip(v.fields, v.scatter_at(now), strict=False):
        yield "sigmad_scatter", dict(base, field=f), c


def health_samples(snap: Snapshot) -> Iterator[Sample]:
    for stream, count in snap.series_per_stream:
        yield "sigmad_series", {"stream": stream}, float(count)
    h = snap.health
    for reason, count in h.rejected:
        yield "sigmad_rejected", {"reason": reason}, float(count)
    for endpoint, count in h.messages:
        yield "sigmad_messages", {"endpoint": endpoint}, float(count)
    for producer, count in h.sequence_gaps:
        yield "sigmad_sequence_gaps", {"producer": producer}, float(count)


def session_samples(snap: Snapshot) -> Iterator[Sample]:
    """The closing values of each stream's latest session, until the next one closes."""
    for stream, boundary, views in snap.closed:
        yield "sigmad_session_close_timestamp_seconds", {"stream": stream}, boundary
        for v in views:
            base = series_labels(v)
            yield "sigmad_session_close_observations", base, float(v.observations)
            yield "sigmad_session_close_weight", base, v.weights_at(boundary)[0]
            for i, f in enumerate(v.fields):
                yield "sigmad_session_close_mean", dict(base, field=f), v.mean[i]
                yield "sigmad_session_close_stddev", dict(base, field=f), v.stddev[i]
            for f, vol in v.volatility:
                yield "sigmad_session_close_volatility", dict(base, field=f), vol
            rg = v.regression
            if rg is not None and rg.ok:
                for term, b in zip(rg.terms, rg.coefficients, strict=True):
                    yield "sigmad_session_close_regression_coefficient", dict(base, term=term), b


def sample_name(family: str) -> str:
    """The sample name of a family (or histogram part): counters take ``_total``."""
    if family in HISTOGRAM_PARTS:
        return family
    return family + "_total" if METRICS[family][0] == "counter" else family


def family_of(name: str) -> str:
    """The family a sample's family-or-part name belongs to."""
    return HISTOGRAM_PARTS.get(name, name)


def _families(names: tuple[str, ...], samples) -> Iterator[Metric]:
    fams = {name: Metric(name, METRICS[name][1], METRICS[name][0]) for name in names}
    for family, labels, value in samples:
        if math.isfinite(value):
            fams[family_of(family)].add_sample(sample_name(family), labels, value)
    for fam in fams.values():
        if fam.samples:
            yield fam


def families(snap: Snapshot, now: float) -> Iterator[Metric]:
    """Every per-series metric family of a snapshot as of ``now``, as prometheus-client
    metric families (the model the fast renderer in ``render.py`` must agree with).
    O(samples)."""
    def samples():
        for v in snap.series.values():
            yield from static_samples(v)
            yield from dynamic_samples(v, now)
    return _families(SERIES, samples())


def _fmt_q(q: float) -> str:
    """Label text for a quantile or threshold: 0.99 -> "0.99", 3.0 -> "3"."""
    return repr(float(q)).removesuffix(".0")


class HealthCollector:
    """A prometheus-client collector of the daemon's own counters in the latest snapshot."""

    def __init__(self, current: Callable[[], Snapshot]) -> None:
        self._current = current

    def collect(self) -> Iterator[Metric]:
        snap = self._current()
        return _families(HEALTH + SESSION, chain(health_samples(snap), session_samples(snap)))

    def describe(self) -> list:
        return []   # unchecked collector: its samples depend on the traffic

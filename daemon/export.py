"""Prometheus export: a custom collector that yields metric families from a snapshot.

The collector never touches live estimator state and never renders text: it
reads the latest immutable ``Snapshot`` at scrape time and yields families;
prometheus-client renders them. Non-finite values (an estimate that is not
defined yet, such as a variance from one observation) are left out rather
than exported as NaN.
"""

from __future__ import annotations

import math
import time
from collections.abc import Callable, Iterator

from prometheus_client.metrics_core import Metric

from .snapshot import SeriesView, Snapshot

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
}


#: Exported by the merge tier's own collector (daemon/merge.py), not from a snapshot.
MERGE_METRICS = ("sigmad_merge_shards", "sigmad_shard_age_seconds")


def _family(name: str) -> Metric:
    kind, doc = METRICS[name]
    return Metric(name, doc, kind)


def _g(fam: Metric, labels: dict[str, str], value: float) -> None:
    if math.isfinite(value):
        fam.add_sample(fam.name if fam.type == "gauge" else fam.name + "_total", labels, value)


def _series_labels(v: SeriesView) -> dict[str, str]:
    labels = {"stream": v.stream}
    labels.update(v.labels)
    return labels


def families(snap: Snapshot, now: float) -> Iterator[Metric]:
    """Every metric family of a snapshot, as of wall-clock time ``now``. O(samples)."""
    fams = {name: _family(name) for name in METRICS if name not in MERGE_METRICS}
    f_mean, f_sd, f_var = fams["sigmad_mean"], fams["sigmad_stddev"], fams["sigmad_variance"]
    f_q = fams["sigmad_quantile"]
    for v in snap.series.values():
        base = _series_labels(v)
        w, w2 = v.weights_at(now)
        _g(fams["sigmad_weight"], base, w)
        _g(fams["sigmad_weight_squared"], base, w2)
        _g(fams["sigmad_effective_samples"], base, v.effective_samples)
        _g(fams["sigmad_observations"], base, float(v.observations))
        _g(fams["sigmad_update_age_seconds"], base, max(0.0, now - v.last_update))
        per_field = [dict(base, field=f) for f in v.fields]
        for i, lab in enumerate(per_field):
            _g(f_mean, lab, v.mean[i])
            _g(f_sd, lab, v.stddev[i])
            _g(f_var, lab, v.variance[i])
        for lab, c in zip(per_field, v.scatter_at(now), strict=False):
            _g(fams["sigmad_scatter"], lab, c)
        for i, j, c in v.covariance:
            _g(fams["sigmad_covariance"], dict(base, field=v.fields[i], field_b=v.fields[j]), c)
        for i, j, r in v.correlation:
            _g(fams["sigmad_correlation"], dict(base, field=v.fields[i], field_b=v.fields[j]), r)
        for i, q, value in v.quantiles:
            _g(f_q, dict(per_field[i], q=_fmt_q(q)), value)
        for thr, count in v.outliers:
            _g(fams["sigmad_outliers"], dict(base, threshold=_fmt_q(thr)), float(count))
        mx = v.mixture
        if mx is not None:
            _g(fams["sigmad_mixture_warm"], base, 1.0 if mx.warm else 0.0)
            _g(fams["sigmad_mixture_reseeds"], base, float(mx.reseeds))
            _g(fams["sigmad_mixture_loglik"], base, mx.average_loglik)
            for k, wk in enumerate(mx.weights):
                comp = dict(base, component=str(k))
                _g(fams["sigmad_mixture_weight"], comp, wk)
                for i, f in enumerate(v.fields):
                    _g(fams["sigmad_mixture_mean"], dict(comp, field=f), mx.means[k][i])
                    _g(fams["sigmad_mixture_stddev"], dict(comp, field=f), mx.stddevs[k][i])
        rg = v.regression
        if rg is not None and rg.ok:
            for term, b, se in zip(rg.terms, rg.coefficients, rg.stderr, strict=True):
                _g(fams["sigmad_regression_coefficient"], dict(base, term=term), b)
                _g(fams["sigmad_regression_stderr"], dict(base, term=term), se)
            _g(fams["sigmad_regression_residual_stddev"], base, rg.residual_stddev)
            _g(fams["sigmad_regression_r_squared"], base, rg.r_squared)
    for stream, count in snap.series_per_stream:
        _g(fams["sigmad_series"], {"stream": stream}, float(count))
    h = snap.health
    for reason, count in h.rejected:
        _g(fams["sigmad_rejected"], {"reason": reason}, float(count))
    for endpoint, count in h.messages:
        _g(fams["sigmad_messages"], {"endpoint": endpoint}, float(count))
    for producer, count in h.sequence_gaps:
        _g(fams["sigmad_sequence_gaps"], {"producer": producer}, float(count))
    for fam in fams.values():
        if fam.samples:
            yield fam


def _fmt_q(q: float) -> str:
    """Label text for a quantile or threshold: 0.99 -> "0.99", 3.0 -> "3"."""
    return repr(float(q)).removesuffix(".0")


class SnapshotCollector:
    """A prometheus-client collector over whichever snapshot ``current()`` returns."""

    def __init__(self, current: Callable[[], Snapshot],
                 clock: Callable[[], float] = time.time) -> None:
        self._current = current
        self._clock = clock

    def collect(self) -> Iterator[Metric]:
        return families(self._current(), self._clock())

    def describe(self) -> list:
        return []   # unchecked collector: its families depend on the configuration

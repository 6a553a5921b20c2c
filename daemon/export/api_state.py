"""The JSON form of a snapshot, served at /api/state.

Schema (version 1)::

    {"schema": 1, "taken_at": unix seconds, "now": unix seconds,
     "health": {"messages": {endpoint: n}, "rejected": {reason: n},
                "sequence_gaps": {producer: n}, "flushes": n},
     "streams": {name: {"series": n}},
     "sessions": {name: {"closed_at": unix seconds, "series": [series as below, as of
                                                               the close]}},
     "series": [{"stream": name, "labels": {label: value}, "fields": [..],
                 "observations": n, "update_age_seconds": s,
                 "weight_sum": W, "effective_samples": n_eff,
                 "mean": [..], "stddev": [..], "variance": [..],
                 "covariance": [[field, field_b, value], ..],
                 "correlation": [[field, field_b, value], ..],
                 "quantiles": [[field, q, value], ..],
                 "outliers": [[threshold, count], ..],
                 "thresholds": [{"field": f, "bounds": [..], "cumulative": [.., total],
                                 "sum": x, "exceedance": [..],
                                 "exceedance_observed": [..]}, ..],
                 "volatility": {return field: per volatility_unit},
                 "mixture": null | {"warm": bool, "log": bool, "weights": [..],
                                    "means": [[..]], "stddevs": [[..]],
                                    "average_loglik": x, "reseeds": n,
                                    "log_means": [[..]], "log_stddevs": [[..]]},
                 "regression": null | {"ok": bool, "y": field, "terms": [..],
                                       "coefficients": [..], "stderr": [..],
                                       "residual_stddev": x, "residual_dof": x,
                                       "r_squared": x, "latest": [x0, y],
                                       "residual": x, "residual_z": x},
                 "history": [[unix seconds, [mean per field]], ..]}]}

Values that are not defined yet (NaN) are written as null. ``history`` holds the
series' mean sampled every few seconds over the last minutes (oldest first; empty
until the first sample), the same points the status page's sparklines draw.
"""

from __future__ import annotations

import dataclasses
import json
import math
from collections.abc import Iterator
from itertools import islice

from sigmad.daemon.engine.snapshot import SeriesView, Snapshot
from sigmad.daemon.web.history import History

SCHEMA = 1


def _num(x: float) -> float | None:
    return float(x) if math.isfinite(x) else None


def _nums(xs) -> list:
    return [_num(x) for x in xs]


def series_json(v: SeriesView, now: float, history: History | None = None) -> dict:
    f = v.fields
    w, _ = v.weights_at(now)
    out = {
        "stream": v.stream, "labels": dict(v.labels), "fields": list(f),
        "observations": v.observations,
        "update_age_seconds": max(0.0, now - v.last_update),
        "weight_sum": _num(w), "effective_samples": _num(v.effective_samples),
        "mean": _nums(v.mean), "stddev": _nums(v.stddev), "variance": _nums(v.variance),
        "covariance": [[f[i], f[j], _num(c)] for i, j, c in v.covariance],
        "correlation": [[f[i], f[j], _num(r)] for i, j, r in v.correlation],
        "quantiles": [[f[i], q, _num(x)] for i, q, x in v.quantiles],
        "outliers": [[thr, n] for thr, n in v.outliers],
        "thresholds": [{"field": f[i], "bounds": list(b), "cumulative": list(c), "sum": _num(s),
                        "exceedance": _nums(p), "exceedance_observed": _nums(q)}
                       for (i, b), c, s, p, q in zip(v.threshold_at, v.buckets, v.value_sums,
                                                     v.exceedance, v.exceedance_observed,
                                                     strict=True)],
        "volatility": {name: _num(x) for name, x in v.volatility},
        "mixture": None, "regression": None,
        "history": ([[t, _nums(m)] for t, m in history.of(v.key)] if history is not None
                    else []),
    }
    if v.mixture is not None:
        m = v.mixture
        out["mixture"] = {"warm": m.warm, "log": m.log, "weights": _nums(m.weights),
                          "means": [_nums(r) for r in m.means],
                          "stddevs": [_nums(r) for r in m.stddevs],
                          "average_loglik": _num(m.average_loglik), "reseeds": m.reseeds,
                          "log_means": [_nums(r) for r in m.log_means],
                          "log_stddevs": [_nums(r) for r in m.log_stddevs]}
    if v.regression is not None:
        r = v.regression
        out["regression"] = {"ok": r.ok, "y": r.y, "terms": list(r.terms),
                             "coefficients": _nums(r.coefficients), "stderr": _nums(r.stderr),
                             "residual_stddev": _num(r.residual_stddev),
                             "residual_dof": _num(r.residual_dof),
                             "r_squared": _num(r.r_squared), "latest": _nums(r.latest),
                             "residual": _num(r.residual),
                             "residual_z": _num(r.residual_z)}
    return out


def snapshot_json(snap: Snapshot, now: float, history: History | None = None) -> dict:
    h = snap.health
    return {
        "schema": SCHEMA, "taken_at": snap.taken_at, "now": now,
        "health": {"messages": dict(h.messages), "rejected": dict(h.rejected),
                   "sequence_gaps": dict(h.sequence_gaps), "flushes": h.flushes},
        "streams": {name: {"series": n} for name, n in snap.series_per_stream},
        "sessions": {name: {"closed_at": at, "series": [series_json(v, at) for v in views]}
                     for name, at, views in snap.closed},
        "series": [series_json(v, now, history) for v in snap.series.values()],
    }


def _dumps(obj: object) -> str:
    """JSON as /api/state writes it (``web.server.json_bytes``): compact, no NaN."""
    return json.dumps(obj, separators=(",", ":"), allow_nan=False)


def snapshot_json_bytes(snap: Snapshot, now: float, history: History | None = None,
                        block: int = 500) -> bytes:
    """``json_bytes(snapshot_json(...))``, byte for byte: ``b"".join`` of
    ``snapshot_json_chunks``. O(series)."""
    return b"".join(snapshot_json_chunks(snap, now, history, block))


def snapshot_json_chunks(snap: Snapshot, now: float, history: History | None = None,
                         block: int = 500) -> Iterator[bytes]:
    """The document of ``snapshot_json_bytes`` in pieces of ``block`` series, made as
    they are written: neither the per-series dicts nor the views nor the text of the
    whole document exist at once (at 100,000 series the document is about 100 MB, and
    the process would keep that high-water mark). O(series)."""
    head = _dumps(snapshot_json(dataclasses.replace(snap, series={}), now, history))
    if not head.endswith('"series":[]}'):
        raise AssertionError("the series list must be the document's last key")
    yield head[:-2].encode()
    views = iter(snap.series.values())
    first = True
    while part := list(islice(views, block)):
        text = _dumps([series_json(v, now, history) for v in part])
        yield (text[1:-1] if first else "," + text[1:-1]).encode()
        first = False
    yield b"]}"

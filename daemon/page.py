"""The status page served at /: every series at a glance, rendered on the server."""

from __future__ import annotations

import html
import math

from .snapshot import SeriesView, Snapshot


def _n(x: float, digits: int = 4) -> str:
    return f"{x:.{digits}g}" if math.isfinite(x) else "–"


def _row(v: SeriesView) -> str:
    labels = ", ".join(f"{k}={val}" for k, val in v.labels) or "—"
    fields = "<br>".join(
        f"{html.escape(f)}: {_n(v.mean[i])} ± {_n(v.stddev[i])}" for i, f in enumerate(v.fields))
    qs = "<br>".join(f"{html.escape(v.fields[i])} q{q:g} = {_n(x)}" for i, q, x in v.quantiles)
    return (f"<tr><td>{html.escape(v.stream)}</td><td>{html.escape(labels)}</td>"
            f"<td>{v.observations}</td><td>{_n(v.effective_samples)}</td>"
            f"<td>{fields}</td><td>{qs}</td></tr>")


def render_page(snap: Snapshot, now: float) -> bytes:
    """A plain HTML page of every series; refreshes itself every 5 s. O(series)."""
    rows = "\n".join(_row(v) for v in sorted(snap.series.values(), key=lambda v: v.key))
    doc = f"""<!doctype html>
<html lang="en"><head><meta charset="utf-8"><meta http-equiv="refresh" content="5">
<title>sigmad</title></head><body>
<h1>sigmad</h1>
<p>{len(snap.series)} live series. Metrics for Prometheus at <a href="/metrics">/metrics</a>,
the same state as JSON at <a href="/api/state">/api/state</a>.</p>
<table><thead><tr><th>stream</th><th>labels</th><th>observations</th>
<th>effective samples</th><th>mean ± σ</th><th>quantiles</th></tr></thead>
<tbody>
{rows}
</tbody></table></body></html>
"""
    return doc.encode()

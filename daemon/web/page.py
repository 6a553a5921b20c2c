"""The status page served at /: every series at a glance, rendered on the server.

Plain HTML with inline SVG, no script and nothing fetched from elsewhere; it
reloads itself every ``REFRESH`` seconds. The markup is also well-formed XML, so
tests can parse it strictly. At most ``LIMIT`` series get a card (the most
recently updated ones, shown in stream and label order); the page says so when
it leaves some out, and /api/state always has them all. Rendering is
O(series + shown x (plot points + history)).
"""

from __future__ import annotations

import heapq
import math
import time

from sigmad.daemon.engine.snapshot import SeriesView, Snapshot
from sigmad.daemon.web.history import History
from sigmad.daemon.web.plots import COMPONENTS, TOTAL, series_figure
from sigmad.daemon.web.svg import esc, num, sparkline
from sigmad.estimators import normal_tail_rate

REFRESH = 5          # seconds between reloads
LIMIT = 30           # series cards per page
SHIFT_SIGMAS = 0.5   # |mean now - mean at the start of the window| / sd that reads as "shifting"
NOISY_FACTOR = 2.0   # outlier rate above this many times the normal tail rate reads as "noisy"
NOISY_MIN_OBS = 200
IDLE_SECONDS = 30.0
CAUTION = ("Statistical estimates from the data received, not a safety system and "
           "not trading advice.")

CSS = """
:root{--paper:#f4f1ea;--card:#fffdf8;--line:#e2dccf;--ink:#22262e;--muted:#6b7280;
--head:#1d2b36;--teal:#0f766e;--amber:#b45309;--red:#b91c1c;--green:#15803d}
*{box-sizing:border-box}
body{margin:0;background:var(--paper);color:var(--ink);font:14px/1.4 system-ui,sans-serif}
header{background:var(--head);color:#f4f1ea;padding:14px 24px}
header h1{margin:0;font-size:20px;font-weight:650;letter-spacing:.02em}
header h1 span{font-weight:400;color:#b8c4cc}
header p{margin:4px 0 0;color:#cfd8de;font-size:13px}
header a{color:#9fe0d6}
.caution{background:#fff4d6;border-bottom:1px solid #ecd9a0;padding:6px 24px;font-size:13px}
main{padding:16px 24px}
.note{color:var(--muted);margin:0 0 12px}
.grid{display:grid;grid-template-columns:repeat(auto-fill,minmax(420px,1fr));gap:14px}
.card{background:var(--card);border:1px solid var(--line);border-radius:8px;padding:12px 14px}
.card h2{margin:0;font-size:16px;font-weight:650}
.card h2 .labels{font-weight:400;color:var(--muted);font-size:14px}
.meta{color:var(--muted);font-size:12px;margin:2px 0 8px}
.badge{display:inline-block;border-radius:10px;padding:0 8px;font-size:11px;font-weight:600;
margin-left:6px;vertical-align:2px;color:#fff}
.b-steady{background:var(--green)}.b-shifting{background:var(--amber)}
.b-noisy{background:var(--red)}.b-warming,.b-idle{background:#8a8f98}
table{border-collapse:collapse;width:100%;font-size:13px;font-variant-numeric:tabular-nums}
th{text-align:left;color:var(--muted);font-weight:500;font-size:11px;
border-bottom:1px solid var(--line)}
td{padding:3px 6px 3px 0;vertical-align:middle}
td.big{font-size:14px;font-weight:600}
td.big span{white-space:nowrap}
td svg{max-width:100%;height:auto}
.q{display:block;white-space:nowrap;font-size:12px}
.up{color:var(--amber)}.calm{color:var(--muted)}
.extra{font-size:12px;color:var(--ink);margin:6px 0}
.extra b{font-weight:600}
.swatch{display:inline-block;width:10px;height:3px;vertical-align:3px;margin-right:3px}
svg.plot{display:block;width:100%;height:auto;margin-top:6px}
footer{color:var(--muted);font-size:12px;padding:8px 24px 24px}
"""


def _labels(v: SeriesView) -> str:
    return ", ".join(f"{k}={val}" for k, val in v.labels)


def series_id(v: SeriesView) -> str:
    """The name a series goes by on the page (and in the DOM's data-series)."""
    return f"{v.stream}{{{_labels(v)}}}" if v.labels else v.stream


def _shift(v: SeriesView, points, field: int) -> float:
    """(mean now - oldest sampled mean) / sd now, NaN without history."""
    if not points or not (math.isfinite(v.stddev[field]) and v.stddev[field] > 0):
        return math.nan
    return (v.mean[field] - points[0][1][field]) / v.stddev[field]


def _outlier_rates(v: SeriesView) -> list[tuple[float, float, float]]:
    """(threshold, observed rate, rate a normal would give) per configured threshold."""
    if v.observations <= 0:
        return []
    return [(thr, n / v.observations, normal_tail_rate(thr)) for thr, n in v.outliers]


def _badges(v: SeriesView, shifts: list[float], rates, now: float) -> list[str]:
    out = []
    if v.mixture is not None and not v.mixture.warm:
        out.append("warming")
    if now - v.last_update > IDLE_SECONDS:
        out.append("idle")
    if any(math.isfinite(s) and abs(s) >= SHIFT_SIGMAS for s in shifts):
        out.append("shifting")
    if v.observations >= NOISY_MIN_OBS and rates and rates[0][1] > NOISY_FACTOR * rates[0][2]:
        out.append("noisy")
    return out or ["steady"]


def _field_rows(v: SeriesView, points, shifts: list[float]) -> str:
    rows = []
    for i, f in enumerate(v.fields):
        qs = " ".join(f'<span class="q">p{q * 100:g} <b>{num(x, 4)}</b></span>'
                      for j, q, x in v.quantiles if j == i)
        s = shifts[i]
        cls = "up" if math.isfinite(s) and abs(s) >= SHIFT_SIGMAS else "calm"
        shift = f"{s:+.2f}σ" if math.isfinite(s) else "–"
        spark = sparkline([t for t, _ in points], [m[i] for _, m in points],
                          TOTAL, width=100, title=f"mean of {f} over the last minutes") if len(
                              v.fields) <= 4 else ""
        rows.append(
            f'<tr class="field" data-field="{esc(f)}">'
            f'<td>{esc(f)}</td>'
            f'<td class="big"><span class="mean" data-value="{v.mean[i]!r}">{num(v.mean[i])}'
            f'</span> <span>± <span class="sd" data-value="{v.stddev[i]!r}">'
            f'{num(v.stddev[i])}</span></span>'
            f'</td><td>{qs or "–"}</td><td>{spark}</td><td class="{cls}">{shift}</td></tr>')
    return ("<table><thead><tr><th>field</th><th>mean ± σ</th><th>quantiles</th>"
            "<th>mean, recent</th><th>drift</th></tr></thead><tbody>"
            + "".join(rows) + "</tbody></table>")


def _extras(v: SeriesView, rates) -> str:
    lines = []
    if rates:
        lines.append("outliers since start: " + ", ".join(
            f'&gt;{thr:g}σ <b class="outlier-rate" data-value="{obs!r}">{obs * 100:.2f}%</b>'
            f" (normal {exp * 100:.2g}%)" for thr, obs, exp in rates))
    for (i, bounds), model, seen in zip(v.threshold_at, v.exceedance, v.exceedance_observed,
                                        strict=True):
        lines.append(f"share above ({esc(v.fields[i])}): " + ", ".join(
            f'&gt;{b:g} <span class="exceedance">model <b data-value="{p!r}">{pct(p)}</b>'
            f'</span> · <span class="exceedance-observed">data <b data-value="{q!r}">{pct(q)}'
            f"</b></span>" for b, p, q in zip(bounds, model, seen, strict=True)))
    m = v.mixture
    if m is not None and m.warm:
        comps = ", ".join(
            f'<span class="swatch" style="background:{COMPONENTS[k % len(COMPONENTS)]}"></span>'
            f"{m.weights[k] * 100:.0f}% at {num(m.means[k][0])} ± {num(m.stddevs[k][0])}"
            for k in range(len(m.weights)))
        lines.append(f"mixture{' (log-normal)' if m.log else ''}: {comps}"
                     + (f"; re-seeded {m.reseeds}×" if m.reseeds else ""))
    elif m is not None:
        lines.append("mixture warming up: the normal fit is shown meanwhile")
    r = v.regression
    if r is not None:
        if r.ok:
            coefs = ", ".join(
                f'{esc(t)} <b class="coef" data-value="{b!r}">{num(b)}</b> ± {num(se, 3)}'
                for t, b, se in zip(r.terms, r.coefficients, r.stderr, strict=True))
            lines.append(f"{esc(r.y)} ~ {coefs}; R² {num(r.r_squared, 3)}, residual σ "
                         f"{num(r.residual_stddev)} (band ±2σ)")
        else:
            lines.append("regression: not enough data yet")
    return "".join(f'<p class="extra">{x}</p>' for x in lines)


def pct(p: float) -> str:
    """A share as a percentage with two decimals ("–" while undefined)."""
    return f"{p * 100:.2f}%" if math.isfinite(p) else "–"


def _card(v: SeriesView, history: History | None, now: float) -> str:
    points = history.of(v.key) if history is not None else ()
    shifts = [_shift(v, points, i) for i in range(len(v.fields))]
    rates = _outlier_rates(v)
    badges = "".join(f'<span class="badge b-{b}">{b}</span>'
                     for b in _badges(v, shifts, rates, now))
    labels = f' <span class="labels">{esc(_labels(v))}</span>' if v.labels else ""
    age = max(0.0, now - v.last_update)
    return (f'<section class="card" data-series="{esc(series_id(v))}" '
            f'data-effective-samples="{v.effective_samples!r}">'
            f"<h2>{esc(v.stream)}{labels}{badges}</h2>"
            f'<p class="meta">effective samples <b>{num(v.effective_samples, 5)}</b> · '
            f"observations {v.observations} · updated {age:.1f} s ago</p>"
            + _field_rows(v, points, shifts) + _extras(v, rates) + series_figure(v)
            + "</section>")


def _shown(snap: Snapshot, limit: int) -> list[SeriesView]:
    views = snap.series.values()
    if len(snap.series) > limit:
        latest = getattr(snap.series, "latest", None)   # a SeriesTable: without every view
        views = [v for _, v in latest(limit)] if latest is not None else \
            heapq.nlargest(limit, views, key=lambda v: v.last_update)
    return sorted(views, key=lambda v: v.key)


def render_page(snap: Snapshot, now: float, history: History | None = None,
                limit: int = LIMIT) -> bytes:
    """The status page of a snapshot as UTF-8 HTML.

    Parameters
    ----------
    snap : Snapshot
        What to show.
    now : float
        Wall-clock seconds (for ages).
    history : History or None
        Sampled means for the sparklines and drift column.
    limit : int
        Most series cards drawn; the rest are counted in a note.

    Returns
    -------
    bytes
        O(series + limit x (plot points + history length)).
    """
    shown = _shown(snap, limit)
    h = snap.health
    messages = sum(n for _, n in h.messages)
    rejected = sum(n for _, n in h.rejected)
    gaps = sum(n for _, n in h.sequence_gaps)
    streams = ", ".join(f"{esc(s)} ({n})" for s, n in snap.series_per_stream) or "none yet"
    note = (f"Showing the {len(shown)} most recently updated of {len(snap.series)} series; "
            f'all of them are in <a href="/api/state">/api/state</a>.'
            if len(shown) < len(snap.series) else
            f"{len(snap.series)} live series.")
    taken = time.strftime("%Y-%m-%d %H:%M:%S", time.localtime(snap.taken_at))
    cards = "\n".join(_card(v, history, now) for v in shown)
    doc = f"""<!DOCTYPE html>
<html lang="en" xmlns="http://www.w3.org/1999/xhtml"><head><meta charset="utf-8"/>
<meta http-equiv="refresh" content="{REFRESH}"/>
<meta name="viewport" content="width=device-width, initial-scale=1"/>
<title>sigmad · {len(snap.series)} series</title><style>{CSS}</style></head>
<body><header><h1>sigmad <span>live estimates</span></h1>
<p>snapshot {taken} · {messages} messages · {rejected} rejected · {gaps} sequence gaps ·
streams: {streams} · <a href="/metrics">/metrics</a> · <a href="/api/state">/api/state</a></p>
</header>
<div class="caution" role="note">{CAUTION}</div>
<main><p class="note">{note} Badges: <b>shifting</b> = mean moved ≥ {SHIFT_SIGMAS:g}σ over
the sparkline's window; <b>noisy</b> = more outliers than {NOISY_FACTOR:g}× a normal's rate.
Reloads every {REFRESH} s.</p>
<div class="grid">
{cards}
</div></main>
<footer>Plots: the fitted density with quantiles (one field), covariance ellipses and the
least-squares line with its ±2 residual-σ band (two fields).</footer>
</body></html>
"""
    return doc.encode()

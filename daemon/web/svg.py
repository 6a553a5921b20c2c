"""SVG drawing primitives for the status page: scales, ticks, paths, bands, sparklines.

Every function returns a string of well-formed SVG (it also parses as XML), with
coordinates rounded to 0.1 px to keep the page small. No maths of estimates here:
the curves come from ``estimators.curves``; this file only maps them to pixels.
"""

from __future__ import annotations

import html
import math
from collections.abc import Sequence

import numpy as np

INK = "#22262e"
MUTED = "#6b7280"
GRID = "#e6e1d6"


def esc(text: object) -> str:
    return html.escape(str(text), quote=True)


def num(x: float, digits: int = 4) -> str:
    """A number for people: ``digits`` significant digits, a dash when undefined."""
    if not math.isfinite(x):
        return "–"
    if x != 0.0 and (abs(x) >= 1e6 or abs(x) < 1e-3):
        return f"{x:.{max(digits - 1, 1)}e}"
    return f"{x:.{digits}g}"


class Scale:
    """A linear (or log10) map from a data interval onto a pixel interval."""

    def __init__(self, lo: float, hi: float, p0: float, p1: float, log: bool = False) -> None:
        if log:
            lo, hi = math.log10(lo), math.log10(hi)
        if not hi > lo:   # a degenerate range still draws: widen it symmetrically
            pad = abs(lo) * 0.05 or 1.0
            lo, hi = lo - pad, hi + pad
        self.lo, self.hi, self.p0, self.p1, self.log = lo, hi, p0, p1, log

    def __call__(self, v):
        v = np.log10(v) if self.log else np.asarray(v, dtype=np.float64)
        return self.p0 + (v - self.lo) * (self.p1 - self.p0) / (self.hi - self.lo)

    @property
    def domain(self) -> tuple[float, float]:
        if self.log:
            return 10.0 ** self.lo, 10.0 ** self.hi
        return self.lo, self.hi


def ticks(lo: float, hi: float, n: int = 5) -> list[float]:
    """About ``n`` round tick values (1, 2 or 5 times a power of ten) inside [lo, hi]."""
    if not (math.isfinite(lo) and math.isfinite(hi)) or hi <= lo:
        return []
    raw = (hi - lo) / max(n, 1)
    mag = 10.0 ** math.floor(math.log10(raw))
    step = next(m * mag for m in (1.0, 2.0, 5.0, 10.0) if m * mag >= raw)
    first = math.ceil(lo / step) * step
    count = int(math.floor((hi - first) / step + 1e-9)) + 1
    return [round(first + i * step, 12) for i in range(max(count, 0))]


def log_ticks(lo: float, hi: float) -> list[float]:
    """1, 2, 5 times powers of ten inside [lo, hi] (lo > 0)."""
    out = []
    for e in range(math.floor(math.log10(lo)), math.ceil(math.log10(hi)) + 1):
        for m in (1.0, 2.0, 5.0):
            v = m * 10.0 ** e
            if lo <= v <= hi:
                out.append(v)
    return out


def path_d(px: Sequence[float], py: Sequence[float], closed: bool = False) -> str:
    pts = " ".join(f"{x:.1f},{y:.1f}" for x, y in zip(px, py, strict=True))
    return f"M{pts}{' Z' if closed else ''}"


def line(px, py, colour: str, width: float = 1.5, dash: str | None = None,
         cls: str = "") -> str:
    extra = f' stroke-dasharray="{dash}"' if dash else ""
    c = f' class="{cls}"' if cls else ""
    return (f'<path{c} d="{path_d(px, py)}" fill="none" stroke="{colour}" '
            f'stroke-width="{width}" stroke-linejoin="round"{extra}/>')


def area(px, py_top, py_bottom, colour: str, opacity: float = 0.18) -> str:
    """The region between two curves over the same x (a band, or a curve and its axis)."""
    xs = list(px) + list(px)[::-1]
    ys = list(py_top) + list(py_bottom)[::-1]
    return (f'<path d="{path_d(xs, ys, closed=True)}" fill="{colour}" '
            f'fill-opacity="{opacity}" stroke="none"/>')


def polygon(px, py, colour: str, fill_opacity: float = 0.08, width: float = 1.5,
            dash: str | None = None) -> str:
    extra = f' stroke-dasharray="{dash}"' if dash else ""
    return (f'<path d="{path_d(px, py, closed=True)}" fill="{colour}" '
            f'fill-opacity="{fill_opacity}" stroke="{colour}" stroke-width="{width}"{extra}/>')


def vmarker(x: float, top: float, bottom: float, label: str, colour: str = MUTED) -> str:
    """A dashed vertical line with a small label at its top (a quantile)."""
    return (f'<line x1="{x:.1f}" y1="{top:.1f}" x2="{x:.1f}" y2="{bottom:.1f}" '
            f'stroke="{colour}" stroke-width="1" stroke-dasharray="3 3"/>'
            f'<text x="{x:.1f}" y="{top - 3:.1f}" font-size="10" fill="{colour}" '
            f'text-anchor="middle">{esc(label)}</text>')


def xaxis(scale: Scale, y: float, values: Sequence[float], label: str = "") -> str:
    parts = [f'<line x1="{scale.p0:.1f}" y1="{y:.1f}" x2="{scale.p1:.1f}" y2="{y:.1f}" '
             f'stroke="{MUTED}" stroke-width="1"/>']
    for v in values:
        x = float(scale(v))
        text = num(v, 3)
        half = 2.8 * len(text)   # about half the label's width at font-size 10
        # a label centred on a tick near an end would be cut off by the plot's edge
        anchor = "end" if x + half > scale.p1 + 8 else "start" if x - half < scale.p0 - 8 \
            else "middle"
        parts.append(f'<line x1="{x:.1f}" y1="{y:.1f}" x2="{x:.1f}" y2="{y + 4:.1f}" '
                     f'stroke="{MUTED}"/><text x="{x:.1f}" y="{y + 15:.1f}" font-size="10" '
                     f'fill="{MUTED}" text-anchor="{anchor}">{text}</text>')
    if label:
        parts.append(f'<text x="{scale.p1:.1f}" y="{y + 27:.1f}" font-size="10" '
                     f'fill="{MUTED}" text-anchor="end">{esc(label)}</text>')
    return "".join(parts)


def yaxis(scale: Scale, x: float, values: Sequence[float], x_end: float) -> str:
    """Tick labels at the left and light grid lines across the plot."""
    parts = []
    for v in values:
        y = float(scale(v))
        parts.append(f'<line x1="{x:.1f}" y1="{y:.1f}" x2="{x_end:.1f}" y2="{y:.1f}" '
                     f'stroke="{GRID}" stroke-width="1"/><text x="{x - 4:.1f}" y="{y + 3:.1f}" '
                     f'font-size="10" fill="{MUTED}" text-anchor="end">{num(v, 3)}</text>')
    return "".join(parts)


def figure(width: int, height: int, body: str, title: str, cls: str = "plot") -> str:
    """An <svg> element with an accessible title; it scales with the page's width."""
    return (f'<svg class="{cls}" xmlns="http://www.w3.org/2000/svg" role="img" '
            f'viewBox="0 0 {width} {height}" width="{width}" height="{height}" '
            f'font-family="system-ui, sans-serif"><title>{esc(title)}</title>{body}</svg>')


def sparkline(times: Sequence[float], values: Sequence[float], colour: str,
              width: int = 150, height: int = 30, title: str = "") -> str:
    """A small line of ``values`` over ``times`` with its last point dotted; O(points)."""
    t = np.asarray(times, dtype=np.float64)
    v = np.asarray(values, dtype=np.float64)
    ok = np.isfinite(t) & np.isfinite(v)
    t, v = t[ok], v[ok]
    if len(v) < 2:
        body = (f'<text x="{width / 2:.0f}" y="{height / 2 + 3:.0f}" font-size="10" '
                f'fill="{MUTED}" text-anchor="middle">collecting…</text>')
        return figure(width, height, body, title or "not enough history yet", "spark")
    sx = Scale(float(t[0]), float(t[-1]), 2.0, width - 4.0)
    sy = Scale(float(v.min()), float(v.max()), height - 3.0, 3.0)
    px, py = sx(t), sy(v)
    body = (line(px, py, colour, 1.4) +
            f'<circle cx="{px[-1]:.1f}" cy="{py[-1]:.1f}" r="2.2" fill="{colour}"/>')
    return figure(width, height, body, title, "spark")

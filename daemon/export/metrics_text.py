"""Fast text rendering of the per-series metrics, caching each series until it changes.

A scrape of 10,000 series re-renders only the series whose version changed
since the last scrape, plus the three clock-dependent samples of each series;
the rest is joined from cached bytes. The output is the Prometheus text
exposition format, sample for sample what prometheus-client would render from
``export.families`` (a test checks this).
"""

from __future__ import annotations

import math
from collections.abc import Iterable

from prometheus_client.utils import floatToGoString
from sigmad.daemon.engine.snapshot import Snapshot
from sigmad.daemon.export.model import (
    METRICS,
    SERIES,
    Sample,
    dynamic_samples,
    family_of,
    sample_name,
    static_samples,
)


def _escape(value: str) -> str:
    return value.replace("\\", r"\\").replace("\n", r"\n").replace('"', r"\"")


def _lines(samples: Iterable[Sample]) -> dict[str, str]:
    """Text lines per family for some samples (labels sorted as prometheus-client does)."""
    out: dict[str, list[str]] = {}
    for family, labels, value in samples:
        if not math.isfinite(value):
            continue
        text = ",".join(f'{k}="{_escape(v)}"' for k, v in sorted(labels.items()))
        out.setdefault(family_of(family), []).append(
            f"{sample_name(family)}{{{text}}} {floatToGoString(value)}\n")
    return {family: "".join(lines) for family, lines in out.items()}


def _header(family: str) -> str:
    kind, doc = METRICS[family]
    name = sample_name(family)
    return f"# HELP {name} {doc}\n# TYPE {name} {kind}\n"


#: Family tuples shared by the series of one shape (bounded: few shapes exist)
_SHAPES: dict[tuple, tuple] = {}


def _cached(view: object, lines: dict[str, str]) -> tuple:
    """(view, its families in order, their texts in UTF-8): a tuple of bytes per series
    and one shared tuple of families rather than a map of one string per family
    (tracemalloc, 10,000 scalar series: 1,310 B a series before, see DEVELOPERS.md)."""
    families = tuple(lines)
    if len(_SHAPES) < 256:
        families = _SHAPES.setdefault(families, families)
    return view, families, tuple(text.encode() for text in lines.values())


class SeriesRenderer:
    """Renders the per-series part of /metrics. Safe to call from several threads:
    the cache is replaced whole at the end of each render."""

    def __init__(self) -> None:
        self._cache: dict = {}   # series key -> (view, families, texts) (see ``_cached``)

    def render(self, snap: Snapshot, now: float, tail: bytes = b"") -> bytes:
        """Exposition text of every series in ``snap`` as of ``now``, then ``tail`` (the
        rest of the page: joined here rather than added by ``+``, which would copy the
        whole page once more). O(changed series * samples + series).

        The cached texts are bytes, joined once: no string per line per scrape and
        no second copy of the page (at 100,000 series those made the scrape's peak,
        and the process keeps its high-water mark)."""
        old = self._cache
        cache = {}
        per_family: dict[str, list[bytes]] = {name: [] for name in SERIES}
        for key, v in snap.series.items():
            hit = old.get(key)
            if hit is None or hit[0] is not v:    # views are immutable: a new one = a change
                hit = _cached(v, _lines(static_samples(v)))
            cache[key] = hit
            for family, text in zip(hit[1], hit[2], strict=True):
                per_family[family].append(text)
            for family, lines in _lines(dynamic_samples(v, now)).items():
                per_family[family].append(lines.encode())
        self._cache = cache
        parts = []
        for family, texts in per_family.items():
            if texts:
                parts.append(_header(family).encode())
                parts.extend(texts)
        parts.append(tail)
        return b"".join(parts)

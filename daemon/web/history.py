"""A short, bounded memory of each series' mean, for the status page's sparklines.

The engine thread calls ``record`` after each flush; at most one sample per
``every`` seconds is kept, ``length`` samples per series (a ring buffer), and a
series that has left the snapshot (expired) is forgotten at the next sample.
HTTP threads read copies with ``of``; a short lock guards the buffers.
"""

from __future__ import annotations

import heapq
import threading
from collections import deque

from sigmad.daemon.engine.snapshot import Snapshot

Key = tuple[str, tuple[tuple[str, str], ...]]
Point = tuple[float, tuple[float, ...]]     # (wall-clock seconds, per-field mean)


def _last_update(item) -> float:
    return item[1].last_update


class History:
    """Ring buffers of (time, mean) per series, sampled every ``every`` seconds.

    Parameters
    ----------
    every : float
        Seconds between samples (> 0).
    length : int
        Samples kept per series (>= 2).
    max_series : int
        Series followed at most: beyond it, the most recently updated ones (the page
        draws 30), so memory is O(max_series x length x fields) however many series
        the daemon holds.
    """

    def __init__(self, every: float = 5.0, length: int = 72, max_series: int = 1000) -> None:
        if not every > 0:
            raise ValueError(f"history every must be > 0 (got {every!r})")
        if length < 2:
            raise ValueError(f"history length must be >= 2 (got {length!r})")
        self.every = float(every)
        self.length = int(length)
        self.max_series = int(max_series)
        self._buffers: dict[Key, deque[Point]] = {}
        self._last: float | None = None
        self._lock = threading.Lock()

    def record(self, snap: Snapshot, now: float) -> bool:
        """Sample every series' mean if ``every`` seconds have passed; True if it did.
        O(series)."""
        if self._last is not None and now - self._last < self.every:
            return False
        self._last = now
        with self._lock:
            old = self._buffers
            fresh: dict[Key, deque[Point]] = {}
            items = snap.series.items()
            if len(snap.series) > self.max_series:
                latest = getattr(snap.series, "latest", None)   # a SeriesTable
                items = latest(self.max_series) if latest is not None else \
                    heapq.nlargest(self.max_series, items, key=_last_update)
            for key, view in items:
                buf = old.get(key)
                if buf is None:
                    buf = deque(maxlen=self.length)
                buf.append((now, view.mean))
                fresh[key] = buf
            self._buffers = fresh      # series gone from the snapshot are dropped here
        return True

    def of(self, key: Key) -> tuple[Point, ...]:
        """An immutable copy of one series' samples, oldest first. O(length)."""
        with self._lock:
            buf = self._buffers.get(key)
            return tuple(buf) if buf is not None else ()

    def __len__(self) -> int:
        return len(self._buffers)

"""Rows joined from several feeds ("legs"), each as of its latest value.

Two instruments published on their own topics become one row of two fields:
whenever either leg ticks, the row holds that tick and the latest value of the
other leg, provided that value is not older than a bound.
"""

from __future__ import annotations

import math
from typing import NamedTuple

import numpy as np

from .errors import IncompatibleError


class Joined(NamedTuple):
    """What :meth:`Legs.join` makes of a batch of leg ticks.

    ``values`` (m, k) are the joined rows, with the ``weights`` and ``times`` of the
    ticks that formed them (``weights`` None when none were given); ``late`` counts
    ticks older than the latest one taken before, ``stale`` ticks that formed no row
    because some leg had no value within ``max_age``.
    """

    values: np.ndarray
    weights: np.ndarray | None
    times: np.ndarray
    late: int
    stale: int


def _listed(a: np.ndarray) -> list:
    """A vector as a list with None for NaN (a leg with no value yet)."""
    return [None if math.isnan(v) else v for v in a.tolist()]


def _array(values: list, n: int) -> np.ndarray:
    out = np.array([math.nan if v is None else float(v) for v in values], dtype=np.float64)
    if out.shape != (n,) or np.isinf(out).any():
        raise IncompatibleError("legs.last", values, f"must hold {n} finite numbers or nil")
    return out


class Legs:
    """As-of join of k one-value feeds into rows of k fields.

    Parameters
    ----------
    count : int
        Number of legs k >= 1.
    max_age : float or None
        A leg's latest value joins a row only while it is at most this much older
        than the row's event time; None: any age.

    Notes
    -----
    A batch of ticks (value, leg index, event time, weight) is sorted by event
    time (stable: ticks of equal time keep their arrival order). Each tick forms
    one row at its own time, holding its value for its leg and, for every other
    leg, the latest value at or before that time (from this batch or carried over
    from earlier ones). A row is formed only when every leg has such a value no
    older than ``max_age``; otherwise the tick is counted as stale but still
    becomes its leg's latest value. Ticks older than the latest tick already
    taken (of any leg) cannot be placed and are counted as late. This is the
    backward as-of join (``pandas.merge_asof(direction="backward",
    tolerance=max_age)``) of each leg's ticks against the others, unioned in
    time order. O(n log n + n k).

    Examples
    --------
    >>> j = Legs(2, max_age=5.0)
    >>> out = j.join([10.0, 20.0, 11.0, 12.0], legs=[0, 1, 0, 0], times=[0.0, 1.0, 2.0, 9.0])
    >>> out.values.tolist(), out.times.tolist(), out.stale
    ([[10.0, 20.0], [11.0, 20.0]], [1.0, 2.0], 2)
    """

    __slots__ = ("count", "max_age", "last", "last_time", "clock")
    kind = "legs"
    version = 1

    def __init__(self, count: int, max_age: float | None = None) -> None:
        if not isinstance(count, int) or isinstance(count, bool) or count < 1:
            raise IncompatibleError("count", count, "must be an integer >= 1")
        if max_age is not None and not (math.isfinite(max_age) and max_age > 0):
            raise IncompatibleError("max_age", max_age, "must be a finite number > 0")
        self.count = count
        self.max_age = max_age
        self.last = np.full(count, np.nan)         # each leg's latest value
        self.last_time = np.full(count, np.nan)    # and its event time
        self.clock: float | None = None            # the latest tick taken

    @property
    def seen(self) -> bool:
        """True once any tick has been taken."""
        return self.clock is not None

    def join(self, values: object, legs: object, times: object,
             weights: object = None) -> Joined:
        """Join a batch of ticks; see the class notes. Values must be finite."""
        v = np.asarray(values, dtype=np.float64).reshape(-1)
        leg = np.asarray(legs, dtype=np.intp).reshape(-1)
        t = np.asarray(times, dtype=np.float64).reshape(-1)
        w = None if weights is None else np.asarray(weights, dtype=np.float64).reshape(-1)
        if not (leg.shape == t.shape == v.shape):
            raise IncompatibleError("legs", f"shape {leg.shape}",
                                    f"values, legs and times must have one entry per tick "
                                    f"({v.shape[0]})")
        if leg.size and (leg.min() < 0 or leg.max() >= self.count):
            raise IncompatibleError("legs", int(leg.max()), f"must lie in 0..{self.count - 1}")
        if t.size > 1 and (np.diff(t) < 0).any():
            order = np.argsort(t, kind="stable")
            v, leg, t = v[order], leg[order], t[order]
            w = None if w is None else w[order]
        late = 0
        if self.clock is not None and t.size and t[0] < self.clock:
            keep = t >= self.clock
            late = int(t.size - keep.sum())
            v, leg, t = v[keep], leg[keep], t[keep]
            w = None if w is None else w[keep]
        m = t.size
        if m == 0:
            return Joined(np.empty((0, self.count)), None if w is None else w, t, late, 0)
        at = np.arange(m)
        rows = np.empty((m, self.count))
        ages = np.empty((m, self.count))
        for j in range(self.count):
            latest = np.maximum.accumulate(np.where(leg == j, at, -1))
            have = latest >= 0
            pick = np.where(have, latest, 0)
            rows[:, j] = np.where(have, v[pick], self.last[j])
            ages[:, j] = t - np.where(have, t[pick], self.last_time[j])
            if have[-1]:
                self.last[j], self.last_time[j] = v[latest[-1]], t[latest[-1]]
        self.clock = float(t[-1])
        with np.errstate(invalid="ignore"):
            fresh = (ages <= (math.inf if self.max_age is None else self.max_age)).all(axis=1)
        stale = int(m - fresh.sum())
        if stale:
            rows, t = rows[fresh], t[fresh]
            w = None if w is None else w[fresh]
        return Joined(rows, w, t, late, stale)

    # ------------------------------------------------------------- persistence
    def to_dict(self) -> dict:
        return {"kind": self.kind, "version": self.version, "count": self.count,
                "max_age": self.max_age, "last": _listed(self.last),
                "last_time": _listed(self.last_time), "clock": self.clock}

    @classmethod
    def from_dict(cls, d: dict) -> Legs:
        """Rebuild from ``to_dict``; raises IncompatibleError on a malformed map."""
        if not isinstance(d, dict) or d.get("kind") != cls.kind:
            raise IncompatibleError("legs", type(d).__name__, "is not a legs state")
        if d.get("version") != cls.version:
            raise IncompatibleError("legs.version", d.get("version"),
                                    f"this build reads version {cls.version}")
        try:
            j = cls(int(d["count"]), None if d["max_age"] is None else float(d["max_age"]))
            j.last = _array(d["last"], j.count)
            j.last_time = _array(d["last_time"], j.count)
            if not (np.isfinite(j.last) == np.isfinite(j.last_time)).all():
                raise IncompatibleError("legs.last", d["last"], "and last_time come together")
            j.clock = None if d["clock"] is None else float(d["clock"])
        except (KeyError, TypeError, ValueError) as exc:
            if isinstance(exc, IncompatibleError):
                raise
            raise IncompatibleError("legs", type(exc).__name__,
                                    f"malformed state: {exc}") from None
        return j

    def __repr__(self) -> str:
        return f"Legs(count={self.count}, max_age={self.max_age}, clock={self.clock})"

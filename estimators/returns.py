"""Per-series transforms of a price into a return: log returns and differences.

A series keeps its previous row and that row's event time, so a return can be
formed across batches (and across restarts, through ``to_dict``). Rows of a
batch are taken in event-time order; a row older than the latest one already
taken cannot be placed and is set aside as late.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import NamedTuple

import numpy as np

from .errors import IncompatibleError

#: The transforms a field may take (None: the field passes through unchanged).
TRANSFORMS: tuple[str, ...] = ("log_return", "difference")


_TINY, _HUGE = float(np.finfo(np.float64).tiny), float(np.finfo(np.float64).max)


def _log_ratio(cur: np.ndarray, prev: np.ndarray) -> np.ndarray:
    """log(cur / prev) of positive prices. The log of the ratio keeps a small return's
    digits; where the ratio leaves float64's normal range (prices 1e-308 and 1e15
    apart: it underflows to 0, whose log is -inf), the difference of the logs, which
    is finite for any positive finite prices. O(n)."""
    with np.errstate(over="ignore", under="ignore", divide="ignore"):
        ratio = cur / prev
        out = np.log(ratio)
    far = ~((ratio >= _TINY) & (ratio <= _HUGE))
    if far.any():
        out[far] = np.log(cur[far]) - np.log(prev[far])
    return out


class Stepped(NamedTuple):
    """What :meth:`Returns.apply` makes of a batch.

    ``values`` (m, d) are the transformed rows, ``weights`` and ``times`` theirs
    (``weights`` None when none were given), ``spans`` (m,) each row's event-time
    step from the row before it; ``late`` and ``not_positive`` count the rows set
    aside (older than the series' latest row; a non-positive price under
    ``log_return``).
    """

    values: np.ndarray
    weights: np.ndarray | None
    times: np.ndarray
    spans: np.ndarray
    late: int
    not_positive: int


class Returns:
    """Turns each row of prices into the step from the previous row, per field.

    Parameters
    ----------
    kinds : sequence of {"log_return", "difference", None}
        One per field: ``log_return`` gives ln(p_i / p_{i-1}), ``difference``
        gives p_i - p_{i-1}, None passes the value through.

    Notes
    -----
    A batch is sorted by event time (stable, so rows of equal time keep their
    arrival order); rows older than the latest event time taken so far are
    dropped and counted as late; under ``log_return`` a row with a price <= 0
    is dropped and counted. The first row a series ever sees has no predecessor:
    it yields no return and becomes the previous row. Each returned row carries
    ``span`` = t_i - t_{i-1} >= 0, what a volatility per unit of time needs.
    Values must be finite (the caller screens them). O(n log n) for the sort.

    Examples
    --------
    >>> r = Returns(["difference", None])
    >>> out = r.apply([[10.0, 1.0], [12.0, 2.0], [11.0, 3.0]], times=[0.0, 2.0, 1.0])
    >>> out.values.tolist(), out.spans.tolist(), out.late
    ([[1.0, 3.0], [1.0, 2.0]], [1.0, 1.0], 0)
    >>> r.apply([[9.0, 4.0]], times=[0.5]).late   # older than t = 2: late
    1
    """

    __slots__ = ("kinds", "last", "clock", "_log", "_diff")
    kind = "returns"
    version = 1

    def __init__(self, kinds: Sequence[str | None]) -> None:
        kinds = tuple(kinds)
        for k in kinds:
            if k is not None and k not in TRANSFORMS:
                raise IncompatibleError("transform", k, f"must be one of {list(TRANSFORMS)}")
        if not any(kinds):
            raise IncompatibleError("transform", list(kinds), "must transform at least one field")
        self.kinds = kinds
        self.last: np.ndarray | None = None   # the previous row, (d,)
        self.clock: float | None = None       # its event time
        self._log = np.array([k == "log_return" for k in kinds])
        self._diff = np.array([k == "difference" for k in kinds])

    @property
    def dim(self) -> int:
        return len(self.kinds)

    def apply(self, x: object, times: object, weights: object = None) -> Stepped:
        """Transform a batch of rows x (n, d) with event times (n,); see the class notes.

        Returns
        -------
        Stepped
        """
        x = np.asarray(x, dtype=np.float64).reshape(-1, self.dim)
        t = np.asarray(times, dtype=np.float64).reshape(-1)
        w = None if weights is None else np.asarray(weights, dtype=np.float64).reshape(-1)
        if t.shape[0] != x.shape[0]:
            raise IncompatibleError("times", f"shape {t.shape}",
                                    f"must hold one time per row ({x.shape[0]})")
        if t.shape[0] > 1 and (np.diff(t) < 0).any():
            order = np.argsort(t, kind="stable")
            x, t = x[order], t[order]
            w = None if w is None else w[order]
        keep = np.ones(t.shape[0], bool)
        late = 0
        if self.clock is not None:
            keep &= t >= self.clock
            late = int(t.shape[0] - keep.sum())
        not_positive = 0
        if self._log.any():
            bad = keep & (x[:, self._log] <= 0.0).any(axis=1)
            not_positive = int(bad.sum())
            keep &= ~bad
        if not keep.all():
            x, t = x[keep], t[keep]
            w = None if w is None else w[keep]
        if x.shape[0] == 0:
            return Stepped(np.empty((0, self.dim)), None if w is None else w, t, t, late,
                           not_positive)
        if self.last is None:
            prev_x, prev_t = x[:-1], t[:-1]
            cur_x, cur_t = x[1:], t[1:]
            w = None if w is None else w[1:]
        else:
            prev_x = np.vstack((self.last[None, :], x[:-1]))
            prev_t = np.concatenate(([self.clock], t[:-1]))
            cur_x, cur_t = x, t
        out = cur_x.copy()
        if self._log.any():
            out[:, self._log] = _log_ratio(cur_x[:, self._log], prev_x[:, self._log])
        if self._diff.any():
            out[:, self._diff] = cur_x[:, self._diff] - prev_x[:, self._diff]
        self.last = x[-1].copy()
        self.clock = float(t[-1])
        return Stepped(out, w, cur_t, cur_t - prev_t, late, not_positive)

    # ------------------------------------------------------------- persistence
    def to_dict(self) -> dict:
        return {"kind": self.kind, "version": self.version, "kinds": list(self.kinds),
                "last": None if self.last is None else self.last.tolist(),
                "clock": self.clock}

    @classmethod
    def from_dict(cls, d: dict) -> Returns:
        """Rebuild from ``to_dict``; raises IncompatibleError on a malformed map."""
        if not isinstance(d, dict) or d.get("kind") != cls.kind:
            raise IncompatibleError("returns", type(d).__name__, "is not a returns state")
        if d.get("version") != cls.version:
            raise IncompatibleError("returns.version", d.get("version"),
                                    f"this build reads version {cls.version}")
        try:
            r = cls([None if k is None else str(k) for k in d["kinds"]])
            last, clock = d["last"], d["clock"]
            if (last is None) != (clock is None):
                raise IncompatibleError("returns.last", last, "and clock come together")
            if last is not None:
                r.last = np.asarray(last, dtype=np.float64).reshape(r.dim)
                r.clock = float(clock)
                if not (np.isfinite(r.last).all() and np.isfinite(r.clock)):
                    raise IncompatibleError("returns.last", last, "must be finite")
        except (KeyError, TypeError, ValueError) as exc:
            if isinstance(exc, IncompatibleError):
                raise
            raise IncompatibleError("returns", type(exc).__name__,
                                    f"malformed state: {exc}") from None
        return r

    def __repr__(self) -> str:
        return f"Returns(kinds={list(self.kinds)}, clock={self.clock})"

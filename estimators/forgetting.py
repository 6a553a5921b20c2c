"""Exponential forgetting by a half-life, in event-time seconds or in observations.

An observation of weight w and event time t counts, at time ``now``, as
``w * 2**(-(now - t) / h)``. All estimators share this clock so that their
decayed weight sums agree and can be pooled.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Literal, NamedTuple

import numpy as np

from .errors import EstimatorError, TimeError

Unit = Literal["seconds", "observations"]


@dataclass(frozen=True, slots=True)
class HalfLife:
    """A half-life: after ``length`` seconds (or observations) a weight counts half.

    Parameters
    ----------
    length : float
        Finite and > 0.
    unit : {"seconds", "observations"}
        "seconds" ages rows by their event times; "observations" by their
        position in the stream (the newest row has age 0).

    Notes
    -----
    The weights of a steady stream form a geometric series, so the mean age of
    the weights is ``h / ln 2`` (about 1.44 h) and the effective window, the
    total weight per unit rate, is also ``h / ln 2``.

    Examples
    --------
    >>> HalfLife(10.0).factor(10.0)
    0.5
    >>> HalfLife(5000, "observations").mean_age
    7213.475204444817
    """

    length: float
    unit: Unit = "seconds"

    def __post_init__(self) -> None:
        if not (isinstance(self.length, (int, float)) and math.isfinite(self.length)
                and self.length > 0):
            raise EstimatorError("half_life", self.length, "must be a finite number > 0")
        if self.unit not in ("seconds", "observations"):
            raise EstimatorError("half_life.unit", self.unit,
                                 'must be "seconds" or "observations"')

    @property
    def by_count(self) -> bool:
        return self.unit == "observations"

    @property
    def mean_age(self) -> float:
        """Mean age of the weights of a steady stream, h / ln 2."""
        return self.length / math.log(2.0)

    def factor(self, age: float) -> float:
        """Weight multiplier for something ``age`` old: 2**(-age/h)."""
        return 2.0 ** (-age / self.length)

    def to_dict(self) -> dict:
        return {"length": float(self.length), "unit": self.unit}

    @classmethod
    def from_dict(cls, d: dict | None) -> HalfLife | None:
        return None if d is None else cls(float(d["length"]), d["unit"])


def check_times(times: object, n: int) -> np.ndarray | None:
    """Return event times as a float64 vector of n, or None; raise on bad ones."""
    if times is None:
        return None
    t = np.asarray(times, dtype=np.float64)
    if t.ndim == 0:
        t = np.full(n, float(t))
    if t.shape != (n,):
        raise TimeError("times", f"shape {t.shape}", f"must hold one time per row ({n})")
    if not np.isfinite(t).all():
        bad = t[~np.isfinite(t)][0]
        raise TimeError("times", float(bad), "must be finite")
    return t


def advance(half_life: HalfLife | None, clock: float | None, n: int,
            times: np.ndarray | None) -> tuple[float | None, float, np.ndarray | None]:
    """Work out how a batch of n rows meets a state whose clock reads ``clock``.

    Returns ``(new_clock, state_log2, row_factors)``: the state's weights are
    multiplied by ``2**state_log2`` (a logarithm, so that a silence of any
    length is a finite number) and row i's weight by ``row_factors[i]`` (None
    means all ones). Rows older than the state's clock are weighted by their
    own age; newer ones move the clock forward. Rows without times are
    stamped with the state's clock (event-time forgetting) and with their
    position (count forgetting). O(n).
    """
    if half_life is None:
        if times is None:
            return clock, 0.0, None
        latest = float(times.max())
        return (latest if clock is None else max(clock, latest)), 0.0, None
    h = half_life.length
    if half_life.by_count:
        start = 0.0 if clock is None else clock
        ages = np.arange(n - 1, -1, -1, dtype=np.float64)
        return start + n, -n / h, np.exp2(-ages / h)
    if times is None:
        return clock, 0.0, None
    latest = float(times.max())
    new_clock = latest if clock is None else max(clock, latest)
    state_log2 = 0.0 if clock is None else -(new_clock - clock) / h
    if times[0] == new_clock and times.min() == new_clock:
        return new_clock, state_log2, None      # all at the clock: factors of exactly 1
    return new_clock, state_log2, np.exp2(-(new_clock - times) / h)


def catch_up_log2(half_life: HalfLife | None, clock: float | None,
                  t: float) -> tuple[float | None, float]:
    """(new clock, log2 of the factor) that ages a state from ``clock`` to event time
    ``t`` (never backwards). Count-based forgetting does not move with wall time: 0."""
    if not math.isfinite(t):
        raise TimeError("t", t, "must be finite")
    if half_life is None or half_life.by_count:
        return clock, 0.0
    if clock is None or t <= clock:
        return (t if clock is None else clock), 0.0
    return t, -(t - clock) / half_life.length


def catch_up(half_life: HalfLife | None, clock: float | None,
             t: float) -> tuple[float | None, float]:
    """The factor that ages a state from ``clock`` to event time ``t`` (never backwards);
    it underflows to 0 after about 1,075 half-lives (``catch_up_log2`` does not).

    Count-based forgetting does not move with wall time: factor 1.
    """
    clock, g = catch_up_log2(half_life, clock, t)
    return clock, (1.0 if g == 0.0 else 2.0 ** g)



def sums_at(half_life: HalfLife | None, clock: float | None, t: float,
            weight_sum: float, weight_sq_sum: float,
            scatter: tuple[float, ...] = ()) -> tuple[float, float, tuple[float, ...]]:
    """A state's weight sums aged from ``clock`` to event time ``t`` without touching it.

    W and the centred scatter decay by the factor f, W2 by f squared; the mean,
    the variances and the Kish effective sample size W**2 / W2 do not change.

    >>> sums_at(HalfLife(10.0), 0.0, 20.0, 8.0, 4.0, (2.0,))
    (2.0, 0.25, (0.5,))
    """
    _, f = catch_up(half_life, clock, t)
    return weight_sum * f, weight_sq_sum * f * f, tuple(c * f for c in scatter)


class BatchAging(NamedTuple):
    """How a batch meets a state (``batch_aging``): the state's new clock, the log2 of
    the factor its stored weights take, and the rows' effective weights (each row's
    weight times its own decay; None means all ones)."""

    clock: float | None
    log2: float
    decayed: np.ndarray | None


class BatchSums(NamedTuple):
    """A batch's sums as one estimator of a series computed them, for the others to
    take instead of computing them again: the rows' own weights summed (undecayed, in
    plain units; the row count for unit weights), the batch's first row, and the
    weighted sums of each field's distance from it."""

    weight: float
    base: np.ndarray
    about: np.ndarray

    def field(self, i: int) -> tuple[float, float]:
        """(sum_i w_i, sum_i w_i x_i) of field i. O(1)."""
        return self.weight, float(self.about[i] + self.base[i] * self.weight)


def batch_aging(half_life: HalfLife | None, clock: float | None, n: int,
                times: np.ndarray | None, weights: np.ndarray | None) -> BatchAging:
    """``advance``, with the rows' effective weights: what every estimator of one
    series folding the same batch at the same clock computes alike, so that they can
    compute it once (``take_batch``'s ``aging``). O(n)."""
    clock, g, rf = advance(half_life, clock, n, times)
    if rf is None:
        return BatchAging(clock, g, weights)
    return BatchAging(clock, g, rf if weights is None else weights * rf)


def take_batch(state, n: int, times: np.ndarray | None, weights: np.ndarray | None,
               aging: BatchAging | None = None) -> np.ndarray | None:
    """Age ``state`` to a batch of n rows and count them; return the rows' effective
    weights (their own weight times their decay; None means all ones).

    ``state`` has ``half_life``, ``clock``, ``count`` and an ``_age(g)`` method that
    multiplies its weights by 2**g (and squared weights by 2**(2 g)): the shape every
    estimator shares. ``aging``, when given, is ``batch_aging`` of this state's
    half-life and clock and of these rows, already computed (by another estimator
    of the same series): the same bits, without the O(n) work. O(n).
    """
    if aging is None:
        aging = batch_aging(state.half_life, state.clock, n, times, weights)
    if aging.log2 != 0.0:
        state._age(aging.log2)
    state.clock = aging.clock
    state.count += n
    return aging.decayed


def copy_state(state):
    """A copy of a slotted estimator state: every slot, numpy arrays copied (the
    shape ``take_batch`` describes; read-only values such as HalfLife are shared).
    O(state)."""
    cls = type(state)
    new = cls.__new__(cls)
    for name in cls.__slots__:
        value = getattr(state, name)
        setattr(new, name, value.copy() if isinstance(value, np.ndarray) else value)
    return new


def merge_clocks(state, other):
    """Bring ``other`` to ``state``'s footing before the two are pooled, and count its
    rows in: a copy of ``other`` aged to the later clock (``state`` is aged too); with
    count-based forgetting each is taken as of its own latest row and the clocks add.
    Returns the aged copy; ``other`` itself is not changed. O(state)."""
    o = other.copy()
    if state.half_life is not None and state.half_life.by_count:
        state.clock = (state.clock or 0.0) + (o.clock or 0.0)
    elif o.clock is not None:
        state.decay_to(o.clock)
        o.decay_to(state.clock)
    state.count += o.count
    return o


def age_to(state, t: float) -> None:
    """Age ``state`` (the shape ``take_batch`` describes) to event time t, never
    backwards. Count-based forgetting and none do not move with time. O(state)."""
    state.clock, g = catch_up_log2(state.half_life, state.clock, float(t))
    if g != 0.0:
        state._age(g)


#: Stored weight sums are kept within [2**-LOG2_RANGE, 2**LOG2_RANGE] of their
#: state's scale 2**E (``WeightScale``); beyond, the scale moves instead.
LOG2_RANGE = 100


def scale_step(w: float, g: float, even: bool = False) -> tuple[int, float]:
    """How a stored weight sum ``w`` ages by 2**g: ``(k, f)`` with 2**g = 2**k * f, the
    scale exponent moving by k and the stored sums multiplied by f.

    k is 0 (and f = 2**g exactly as before) while ``w * f`` stays above
    2**-LOG2_RANGE; otherwise k = ceil(g) (even when ``even``, for square-root
    factors) and f in (1/4, 1]: a silence of any length ages the state exactly,
    its stored sums never underflow. O(1)."""
    if math.frexp(w)[1] + g > -LOG2_RANGE:
        return 0, 2.0 ** g
    k = math.ceil(g / 2.0) * 2 if even else math.ceil(g)
    return k, 2.0 ** (g - k)


def rescale_exponent(w: float, even: bool = False) -> int:
    """The exponent k by which a positive stored sum ``w`` outside the kept range must
    be divided (``w * 2**-k`` near 1; even when ``even``), else 0. O(1)."""
    e = math.frexp(w)[1]
    if -LOG2_RANGE <= e <= LOG2_RANGE or not w > 0.0 or math.isinf(w):
        return 0
    return e + (e & 1) if even else e


def batch_exponent(v: np.ndarray, even: bool = False) -> int:
    """The exponent k that brings the largest of the row weights ``v`` near 1 when it
    lies outside the kept range (so that v**2 neither underflows nor overflows), else
    0. O(n)."""
    return rescale_exponent(float(v.max()), even) if v.size else 0


def unit(e: int) -> float:
    """2**-e, the number 1 in a state's stored units (0 or inf beyond float64)."""
    if e > 1074:
        return 0.0
    if e < -1023:
        return math.inf
    return math.ldexp(1.0, -e)


def ldexp(a: np.ndarray, k: int) -> np.ndarray:
    """a * 2**k elementwise for any integer k (numpy's ldexp takes 32-bit exponents;
    beyond +-2,200 every float64 has under- or overflowed anyway)."""
    return np.ldexp(a, max(-2200, min(2200, k)))


def true_sum(w: float, e: int) -> float:
    """w * 2**e, inf when it overflows float64 (and 0 when it underflows)."""
    try:
        return math.ldexp(w, e)
    except OverflowError:
        return math.inf

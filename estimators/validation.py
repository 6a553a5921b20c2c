"""Checking batches before they touch a state.

``check_batch`` raises on the first problem (for library callers: a rejected
batch changes nothing). ``clean_batch`` drops bad rows one by one and counts
them by reason (for the daemon, which must keep the good rows of a bad batch).
"""

from __future__ import annotations

from typing import NamedTuple

import numpy as np

from .errors import (
    IncompatibleError,
    NonFiniteError,
    RangeError,
    ShapeError,
    TimeError,
    WeightError,
)
from .forgetting import check_times

#: Default largest accepted |value|: squares and weighted cross-products of
#: values and weights within these bounds stay far inside float64's 1.8e308.
MAX_ABS_VALUE = 1e100


class Batch(NamedTuple):
    x: np.ndarray            # (n, d) float64
    weights: np.ndarray | None  # (n,) float64, finite and > 0, or None for all ones
    times: np.ndarray | None    # (n,) float64, finite, or None


def as_rows(x: object, dim: int, field: str = "x") -> np.ndarray:
    """Coerce x to an (n, dim) float64 array: a scalar or a vector of n is a column
    when dim == 1; a vector of dim is one row when dim > 1."""
    try:
        a = np.asarray(x, dtype=np.float64)
    except (TypeError, ValueError) as exc:
        raise ShapeError(field, type(x).__name__, f"is not numeric ({exc})") from None
    if a.ndim == 0:
        if dim != 1:
            raise ShapeError(field, float(a), f"a scalar fits only dimension 1, not {dim}")
        return a.reshape(1, 1)
    if a.ndim == 1:
        if dim == 1:
            return a.reshape(-1, 1)
        if a.shape[0] == dim:
            return a.reshape(1, dim)
        raise ShapeError(field, f"shape {a.shape}", f"needs {dim} columns")
    if a.ndim == 2 and a.shape[1] == dim:
        return a
    raise ShapeError(field, f"shape {a.shape}", f"must be (n, {dim})")


def as_weights(weights: object, n: int) -> np.ndarray | None:
    if weights is None:
        return None
    w = np.asarray(weights, dtype=np.float64)
    if w.ndim == 0:
        w = np.full(n, float(w))
    if w.shape != (n,):
        raise ShapeError("weights", f"shape {w.shape}", f"must hold one weight per row ({n})")
    return w


def check_values(a: np.ndarray, field: str) -> None:
    """Raise NonFiniteError or RangeError naming the first value of ``a`` (n, d) that is
    not finite or exceeds ``MAX_ABS_VALUE`` in magnitude. O(n d)."""
    if not a.size or np.abs(a).max() <= MAX_ABS_VALUE:    # NaN fails the comparison
        return
    finite = np.isfinite(a)
    if not finite.all():
        row, col = np.argwhere(~finite)[0]
        raise NonFiniteError(field, float(a[row, col]),
                             f"row {row}, column {col} must be finite")
    row, col = np.argwhere(np.abs(a) > MAX_ABS_VALUE)[0]
    raise RangeError(field, float(a[row, col]),
                     f"row {row}, column {col} must not exceed {MAX_ABS_VALUE:g} in "
                     f"magnitude (its square, and sums of squares, must stay finite)")


def check_batch(x: object, dim: int, weights: object = None, times: object = None) -> Batch:
    """Validate a whole batch; raise a specific error naming the first bad value: a
    NonFiniteError for NaN or inf, a RangeError for |x| > MAX_ABS_VALUE. O(n d)."""
    a = as_rows(x, dim)
    n = a.shape[0]
    check_values(a, "x")
    w = as_weights(weights, n)
    if w is not None:
        ok = np.isfinite(w) & (w > 0)
        if not ok.all():
            i = int(np.argmin(ok))
            raise WeightError("weights", float(w[i]), f"row {i} must be finite and > 0")
    return Batch(a, w, check_times(times, n))


def clean_batch(x: object, dim: int, weights: object = None,
                times: object = None) -> tuple[Batch, dict[str, int]]:
    """Drop the bad rows of a batch instead of rejecting it.

    Returns the good rows and a count of dropped rows by reason
    ("not_finite", "bad_weight", "bad_time"); each row is counted once, under
    the first reason that applies. Shape errors still raise: they concern the
    whole batch. O(n d).
    """
    a = as_rows(x, dim)
    n = a.shape[0]
    w = as_weights(weights, n)
    t = None if times is None else np.asarray(times, dtype=np.float64)
    if t is not None:
        if t.ndim == 0:
            t = np.full(n, float(t))
        if t.shape != (n,):
            raise TimeError("times", f"shape {t.shape}", f"must hold one time per row ({n})")
    # the usual batch is all good: whole-array tests first, row masks only when needed
    good_x = bool(np.isfinite(a).all())
    good_w = w is None or bool((w > 0).all() and np.isfinite(w).all())
    good_t = t is None or bool(np.isfinite(t).all())
    if good_x and good_w and good_t:
        return Batch(a, w, t), {}
    bad_x = np.zeros(n, bool) if good_x else ~np.isfinite(a).all(axis=1)
    bad_w = np.zeros(n, bool) if good_w else ~(np.isfinite(w) & (w > 0)) & ~bad_x
    bad_t = np.zeros(n, bool) if good_t else ~np.isfinite(t) & ~bad_x & ~bad_w
    counts = {reason: int(mask.sum()) for reason, mask in
              (("not_finite", bad_x), ("bad_weight", bad_w), ("bad_time", bad_t)) if mask.any()}
    if not counts:
        return Batch(a, w, t), counts
    keep = ~(bad_x | bad_w | bad_t)
    return Batch(a[keep], None if w is None else w[keep], None if t is None else t[keep]), counts


#: Accepted weights lie in [MIN_WEIGHT, MAX_WEIGHT]: W2 = sum(w**2) neither
#: underflows to 0 (Kish's W**2/W2 would be 0/0) nor overflows.
MIN_WEIGHT = 1e-30
MAX_WEIGHT = 1e30


def bound_batch(batch: Batch, max_abs: float = MAX_ABS_VALUE, min_weight: float = MIN_WEIGHT,
                max_weight: float = MAX_WEIGHT) -> tuple[Batch, dict[str, int]]:
    """Drop rows of a clean batch whose magnitudes would overflow the state.

    Values with ``|x| > max_abs`` are counted as "out_of_range"; weights outside
    ``[min_weight, max_weight]`` as "bad_weight" (each row once, values first).
    With the defaults every centred square and weighted cross-product stays
    below 1e230, so the state (and every read-out) stays finite. O(n d).

    Examples
    --------
    >>> import numpy as np
    >>> b = Batch(np.array([[1.0], [1e308], [2.0]]), np.array([1.0, 1.0, 1e300]), None)
    >>> kept, dropped = bound_batch(b)
    >>> kept.x.ravel().tolist(), dropped
    ([1.0], {'out_of_range': 1, 'bad_weight': 1})
    """
    a, w, t = batch
    bad_x = (np.abs(a) > max_abs).any(axis=1)
    bad_w = np.zeros_like(bad_x) if w is None else ((w < min_weight) | (w > max_weight)) & ~bad_x
    counts = {reason: int(mask.sum()) for reason, mask in
              (("out_of_range", bad_x), ("bad_weight", bad_w)) if mask.any()}
    if not counts:
        return batch, counts
    keep = ~(bad_x | bad_w)
    return Batch(a[keep], None if w is None else w[keep], None if t is None else t[keep]), counts


def limit_batch(batch: Batch, low: np.ndarray, high: np.ndarray) -> tuple[Batch, int]:
    """Drop the rows of a clean batch with a value outside [low, high] (per field, (d,)
    each); returns the kept rows and how many were dropped. O(n d).

    Examples
    --------
    >>> import numpy as np
    >>> b = Batch(np.array([[5.0], [-1.0], [70000.0]]), None, None)
    >>> kept, dropped = limit_batch(b, np.array([0.0]), np.array([60000.0]))
    >>> kept.x.ravel().tolist(), dropped
    ([5.0], 2)
    """
    a, w, t = batch
    if not a.shape[0] or ((a >= low).all() and (a <= high).all()):
        return batch, 0
    keep = ((a >= low) & (a <= high)).all(axis=1)
    return Batch(a[keep], None if w is None else w[keep], None if t is None else t[keep]), \
        int((~keep).sum())


def screen_batch(x: object, dim: int, weights: object = None, times: object = None,
                 max_abs: float = MAX_ABS_VALUE, min_weight: float = MIN_WEIGHT,
                 max_weight: float = MAX_WEIGHT) -> tuple[Batch, dict[str, int]]:
    """``clean_batch`` then ``bound_batch``: the same rows kept and the same counts,
    with one whole-array test of each column for the usual all-good batch.

    ``max |x| <= max_abs`` holds only when every value is finite and in range
    (NaN compares false, inf exceeds any finite bound), and ``min_weight <=
    w <= max_weight`` only when every weight is finite, positive and in
    range, so an all-good batch costs a maximum, a minimum and a finiteness
    test of the times; any other batch takes the two passes. O(n d).

    Examples
    --------
    >>> import numpy as np
    >>> kept, dropped = screen_batch(np.array([1.0, np.nan, 1e308]), 1)
    >>> kept.x.ravel().tolist(), dropped
    ([1.0], {'not_finite': 1, 'out_of_range': 1})
    """
    a = as_rows(x, dim)
    n = a.shape[0]
    w = as_weights(weights, n)
    if n and np.abs(a).max() <= max_abs and (
            w is None or (w.min() >= min_weight and w.max() <= max_weight)):
        t = None if times is None else np.asarray(times, dtype=np.float64)
        if t is None or (t.shape == (n,) and np.isfinite(t).all()):
            return Batch(a, w, t), {}
    batch, dropped = clean_batch(a, dim, w, times)
    batch, bounded = bound_batch(batch, max_abs, min_weight, max_weight)
    for reason, count in bounded.items():   # "bad_weight" may come from both passes
        dropped[reason] = dropped.get(reason, 0) + count
    return batch, dropped


def screen_rows(x: np.ndarray, weights: np.ndarray | None, times: np.ndarray | None,
                given: np.ndarray | None, max_abs: float = MAX_ABS_VALUE,
                min_weight: float = MIN_WEIGHT,
                max_weight: float = MAX_WEIGHT) -> tuple[np.ndarray, list[tuple[str, np.ndarray]]]:
    """``screen_batch`` as masks over rows (n, d) that belong to many series at once:
    which rows to keep, and the rows dropped for each reason (each row under the first
    that applies, in ``screen_batch``'s order: not_finite, bad_weight, bad_time,
    out_of_range). ``times`` counts only where ``given`` is True (None: everywhere);
    elsewhere a row has no time of its own and is never a bad_time. O(n d).

    Examples
    --------
    >>> import numpy as np
    >>> keep, why = screen_rows(np.array([[1.0], [np.nan], [1e308]]), None, None, None)
    >>> keep.tolist(), [(r, m.tolist()) for r, m in why]
    ([True, False, False], [('not_finite', [False, True, False]), \
('out_of_range', [False, False, True])])
    """
    n = x.shape[0]
    with np.errstate(invalid="ignore"):
        if n and np.abs(x).max() <= max_abs and (
                weights is None or (weights.min() >= min_weight
                                    and weights.max() <= max_weight)) and (
                times is None or np.isfinite(times if given is None else times[given]).all()):
            return np.ones(n, bool), []
        bad_x = ~np.isfinite(x).all(axis=1)
        bad_w = np.zeros(n, bool) if weights is None else \
            ~(np.isfinite(weights) & (weights > 0)) & ~bad_x
        bad_t = np.zeros(n, bool)
        if times is not None:
            bad_t = ~np.isfinite(times) & ~bad_x & ~bad_w
            if given is not None:
                bad_t &= given
        dropped = bad_x | bad_w | bad_t
        far = (np.abs(x) > max_abs).any(axis=1) & ~dropped
        if weights is not None:
            bad_w |= ((weights < min_weight) | (weights > max_weight)) & ~dropped & ~far
    why = [(reason, mask) for reason, mask in (("not_finite", bad_x), ("bad_weight", bad_w),
                                               ("bad_time", bad_t), ("out_of_range", far))
           if mask.any()]
    return ~(dropped | far | bad_w), why


def check_xy(x: object, y: object, dim: int, weights: object = None,
             times: object = None) -> Batch:
    """Validate a regression batch: design rows X (n, dim) and responses y (n,).

    X is coerced as by ``as_rows`` (a vector of n is a column when dim == 1, a
    vector of dim is one row when dim > 1); y must hold one number per row.
    Returns a Batch whose ``x`` is the stacked (n, dim + 1) array [X | y].
    Raises ShapeError, NonFiniteError or RangeError (field "X" or "y"), WeightError or
    TimeError on the first problem; nothing is returned half-checked. O(n dim).
    """
    a = as_rows(x, dim, "X")
    n = a.shape[0]
    try:
        b = np.asarray(y, dtype=np.float64)
    except (TypeError, ValueError) as exc:
        raise ShapeError("y", type(y).__name__, f"is not numeric ({exc})") from None
    if b.ndim == 0:
        b = b.reshape(1)
    if b.shape != (n,):
        raise ShapeError("y", f"shape {b.shape}", f"must hold one response per row of X ({n})")
    check_values(a, "X")
    check_values(b.reshape(-1, 1), "y")
    w = as_weights(weights, n)
    if w is not None:
        ok = np.isfinite(w) & (w > 0)
        if not ok.all():
            i = int(np.argmin(ok))
            raise WeightError("weights", float(w[i]), f"row {i} must be finite and > 0")
    return Batch(np.column_stack((a, b)), w, check_times(times, n))


def check_saved(d: object, kind: str, version: int) -> dict:
    """A saved state (``to_dict`` form) of the given kind and version, or
    IncompatibleError naming the field at fault."""
    if not isinstance(d, dict) or d.get("kind") != kind:
        raise IncompatibleError("kind", d.get("kind") if isinstance(d, dict) else d,
                                f'must be "{kind}"')
    if d.get("version") != version:
        raise IncompatibleError("version", d.get("version"), f"must be {version}")
    return d


def saved_exponent(d: dict, even: bool = False) -> int:
    """A saved state's scale exponent (``scale_exponent``, 0 when absent): a whole
    number within +-2**40 (even when ``even``); ValueError naming it otherwise."""
    e = d.get("scale_exponent", 0)
    if type(e) is not int or abs(e) > 1 << 40:
        raise ValueError(f"scale_exponent {e!r} is not a whole number in range")
    if even and e % 2:
        raise ValueError(f"scale_exponent {e} must be even")
    return e

"""Exceptions raised by the estimators; each names the field and the value at fault."""

from __future__ import annotations


class EstimatorError(ValueError):
    """Base class: a value handed to an estimator is not acceptable.

    Attributes
    ----------
    field : str
        The argument or field at fault ("x", "weights", "times", "half_life", ...).
    value : object
        The offending value (a scalar or a short description of an array).
    reason : str
        A short machine-readable reason, the same words the daemon counts rejections by.
    """

    reason = "invalid"

    def __init__(self, field: str, value: object, message: str) -> None:
        super().__init__(f"{field}: {message} (got {value!r})")
        self.field = field
        self.value = value


class ShapeError(EstimatorError):
    """An array has the wrong number of dimensions, rows or columns."""

    reason = "shape"


class NonFiniteError(EstimatorError):
    """A value is NaN or infinite."""

    reason = "not_finite"


class RangeError(EstimatorError):
    """A value's magnitude exceeds the bound within which its square, and sums of
    squares, stay finite (``validation.MAX_ABS_VALUE``)."""

    reason = "out_of_range"


class WeightError(EstimatorError):
    """A weight is not finite and > 0."""

    reason = "bad_weight"


class TimeError(EstimatorError):
    """An event time is not finite."""

    reason = "bad_time"


class IncompatibleError(EstimatorError):
    """Two states cannot be merged, or a saved state does not fit this estimator."""

    reason = "incompatible"


class DomainError(EstimatorError):
    """A value lies outside the estimator's domain (a log model needs x > 0)."""

    reason = "out_of_domain"

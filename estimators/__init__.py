"""sigmad's estimators: pure numpy state objects, no I/O, clocks or threads.

Every estimator has the same shape of API: ``update(x, weights=None,
times=None)`` on batches, ``merge(other)``, ``decay_to(t)``,
``to_dict()``/``from_dict()`` and named read-outs.
"""

from .errors import (
    DomainError,
    EstimatorError,
    IncompatibleError,
    NonFiniteError,
    RangeError,
    ShapeError,
    TimeError,
    WeightError,
)
from .forgetting import HalfLife
from .legs import Joined, Legs
from .mixture import Mixture
from .moments import CORRECTIONS, Moments
from .regression import Regression
from .returns import TRANSFORMS, Returns, Stepped
from .validation import check_batch, clean_batch
from .volatility import Volatility

__all__ = [
    "CORRECTIONS",
    "DomainError",
    "EstimatorError",
    "HalfLife",
    "IncompatibleError",
    "Joined",
    "Legs",
    "Mixture",
    "Moments",
    "NonFiniteError",
    "RangeError",
    "Regression",
    "Returns",
    "ShapeError",
    "Stepped",
    "TRANSFORMS",
    "TimeError",
    "Volatility",
    "WeightError",
    "check_batch",
    "clean_batch",
]

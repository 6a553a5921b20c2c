"""sigmad's estimators: pure numpy state objects, no I/O, clocks or threads.

Every estimator has the same shape of API: ``update(x, weights=None,
times=None)`` on batches, ``merge(other)``, ``decay_to(t)``,
``to_dict()``/``from_dict()`` and named read-outs.
"""

from .curves import ellipse, line_band, mixture_density, normal_density, normal_tail_rate
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
from .forgetting import HalfLife, batch_aging, sums_at
from .legs import Joined, Legs
from .mixture import Mixture
from .model_tail import nominal_rate, outlier_counts
from .moments import CORRECTIONS, Moments
from .moments_columns import (
    Folded,
    MomentsColumns,
    blob,
    fold_groups,
    fold_rows,
    from_blob,
    mahalanobis_rows,
)
from .regression import Regression
from .returns import TRANSFORMS, Returns, Stepped
from .threshold_columns import ThresholdColumns, fold_counts, normal_exceedance_rows
from .thresholds import Thresholds, mixture_exceedance, normal_exceedance
from .validation import (
    MAX_WEIGHT,
    MIN_WEIGHT,
    check_batch,
    clean_batch,
    limit_batch,
    screen_batch,
    screen_rows,
)
from .volatility import Volatility

__all__ = [
    "CORRECTIONS",
    "DomainError",
    "EstimatorError",
    "Folded",
    "HalfLife",
    "IncompatibleError",
    "Joined",
    "Legs",
    "MAX_WEIGHT",
    "MIN_WEIGHT",
    "Mixture",
    "Moments",
    "MomentsColumns",
    "NonFiniteError",
    "RangeError",
    "Regression",
    "Returns",
    "ShapeError",
    "Stepped",
    "TRANSFORMS",
    "ThresholdColumns",
    "Thresholds",
    "TimeError",
    "Volatility",
    "WeightError",
    "batch_aging",
    "blob",
    "check_batch",
    "clean_batch",
    "ellipse",
    "fold_counts",
    "fold_groups",
    "fold_rows",
    "from_blob",
    "limit_batch",
    "line_band",
    "mixture_density",
    "mixture_exceedance",
    "nominal_rate",
    "normal_density",
    "normal_exceedance",
    "normal_exceedance_rows",
    "normal_tail_rate",
    "outlier_counts",
    "mahalanobis_rows",
    "screen_batch",
    "screen_rows",
    "sums_at",
]

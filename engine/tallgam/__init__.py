"""tallgam: generalized additive models fitted to data larger than memory.

Data stream from Parquet (or anything DuckDB reads) in batches; numba kernels build the
penalized normal equations; smoothing parameters and coefficients come from a small
dense stage. See ``DEVELOPERS.md`` for the architecture and ``docs/`` for the guides.
"""

from .errors import (
    ColumnNotFound,
    ConvergenceWarning,
    DataError,
    FitError,
    ModelFileError,
    SpecError,
    TallgamError,
    TallgamWarning,
)
from .families import get_family
from .links import get_link
from .model import Model
from .modelfile import load
from .result import FitResult
from .sources import sql
from .terms import adjacency, categorical, cyclic, linear, random_effect, spline, surface

__version__ = "0.1.0"

__all__ = [
    "ColumnNotFound",
    "ConvergenceWarning",
    "DataError",
    "FitError",
    "FitResult",
    "Model",
    "ModelFileError",
    "SpecError",
    "TallgamError",
    "TallgamWarning",
    "adjacency",
    "categorical",
    "cyclic",
    "get_family",
    "get_link",
    "linear",
    "load",
    "random_effect",
    "spline",
    "sql",
    "surface",
]

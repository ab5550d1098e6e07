"""tallgam: generalized additive models fitted to data larger than memory.

Data stream from Parquet (or anything DuckDB reads) in batches; numba kernels build the
penalized normal equations; smoothing parameters and coefficients come from a small
dense stage. See ``DEVELOPERS.md`` for the architecture and ``docs/`` for the guides.
"""

from tallgam.data.sources import sql
from tallgam.errors import (
    ColumnNotFound,
    ConvergenceWarning,
    DataError,
    FitError,
    ModelFileError,
    OutOfMemoryError,
    OutputError,
    SpecError,
    TallgamError,
    TallgamWarning,
)
from tallgam.families import get_family
from tallgam.families.links import get_link
from tallgam.model import Model
from tallgam.outputs.modelfile import load
from tallgam.outputs.result import FitResult
from tallgam.terms import adjacency, categorical, cyclic, linear, random_effect, spline, surface
from tallgam.version import __version__

__all__ = [
    "__version__",
    "ColumnNotFound",
    "ConvergenceWarning",
    "DataError",
    "FitError",
    "FitResult",
    "Model",
    "ModelFileError",
    "OutOfMemoryError",
    "OutputError",
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

"""tallgam: generalized additive models fitted to data larger than memory.

Data stream from Parquet (or anything DuckDB reads) in batches; numba kernels build the
penalized normal equations; smoothing parameters and coefficients come from a small
dense stage. See ``DEVELOPERS.md`` for the architecture and ``docs/`` for the guides.

The public names below load on first use, so ``import tallgam`` is quick.
"""

from __future__ import annotations

import importlib

from tallgam.version import __version__

_PUBLIC = {
    "Model": "tallgam.model",
    "load": "tallgam.model",
    "FitResult": "tallgam.outputs.result",
    "RunOptions": "tallgam.options",
    "Tuning": "tallgam.options",
    "sql": "tallgam.data.sources",
    "spline": "tallgam.terms",
    "cyclic": "tallgam.terms",
    "surface": "tallgam.terms",
    "linear": "tallgam.terms",
    "categorical": "tallgam.terms",
    "random_effect": "tallgam.terms",
    "adjacency": "tallgam.terms",
    "tariff": "tallgam.outputs.tariff",
    "Tariff": "tallgam.outputs.tariff",
    "get_family": "tallgam.families",
    "get_link": "tallgam.families.links",
    "ColumnNotFound": "tallgam.errors",
    "ConvergenceWarning": "tallgam.errors",
    "DataError": "tallgam.errors",
    "FitError": "tallgam.errors",
    "ModelFileError": "tallgam.errors",
    "OutOfMemoryError": "tallgam.errors",
    "OutputError": "tallgam.errors",
    "SpecError": "tallgam.errors",
    "TallgamError": "tallgam.errors",
    "TallgamWarning": "tallgam.errors",
}
_SUBPACKAGES = ("terms", "families", "data", "passes", "solve", "outputs", "options",
                "errors")

__all__ = ["__version__", *sorted(_PUBLIC), *_SUBPACKAGES]


def __getattr__(name: str):
    if name in _PUBLIC:
        value = getattr(importlib.import_module(_PUBLIC[name]), name)
    elif name in _SUBPACKAGES:
        value = importlib.import_module(f"tallgam.{name}")
    else:
        raise AttributeError(f"module 'tallgam' has no attribute {name!r}")
    globals()[name] = value
    return value


def __dir__():
    return sorted(set(globals()) | set(__all__))

"""Model terms: one module per kind, each holding its spec, its basis and everything the
engine asks of it (see :mod:`tallgam.terms.base` for the protocol and the registry).

Kinds: :mod:`.spline` (with per-level curves, multipliers, shapes), :mod:`.cyclic`,
:mod:`.surface`, :mod:`.linear`, :mod:`.levels` (categorical and random effect),
:mod:`.adjacency`. A kind defined elsewhere joins with :func:`register`.
"""

from tallgam.terms.adjacency import AdjacencyBasis, AdjacencySpec, adjacency
from tallgam.terms.base import (
    Basis,
    InterceptBasis,
    TermSpec,
    basis_from_dict,
    kinds,
    register,
    spec_from_dict,
    term_matrix,
    unregister,
)
from tallgam.terms.cyclic import CyclicBasis, CyclicSpec, cyclic
from tallgam.terms.levels import (
    CategoricalBasis,
    CategoricalSpec,
    LevelBasis,
    RandomEffectBasis,
    RandomEffectSpec,
    categorical,
    random_effect,
)
from tallgam.terms.linear import LinearBasis, LinearSpec, linear
from tallgam.terms.spline import SplineBasis, SplineSpec, spline
from tallgam.terms.surface import SurfaceBasis, SurfaceSpec, surface

__all__ = [
    "AdjacencyBasis", "AdjacencySpec", "Basis", "CategoricalBasis", "CategoricalSpec",
    "CyclicBasis", "CyclicSpec", "InterceptBasis", "LevelBasis", "LinearBasis", "LinearSpec",
    "RandomEffectBasis", "RandomEffectSpec", "SplineBasis", "SplineSpec", "SurfaceBasis",
    "SurfaceSpec", "TermSpec", "adjacency", "basis_from_dict", "categorical", "cyclic",
    "kinds", "linear", "random_effect", "register", "spec_from_dict", "spline", "surface",
    "term_matrix", "unregister",
]

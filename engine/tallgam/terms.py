"""Model terms: what the user asks for (specs) and what the data makes of them (bases).

A *spec* (``tg.spline``, ``tg.linear``, ``tg.categorical``) is an immutable request. The
profile pass turns it into a *basis*: knots, level codes, centring. A basis tells the
design how to encode a batch into sparse rows (:meth:`Basis.encode` / :meth:`Basis.codes`),
and tells the dense stage its penalties and its identifiability constraint. Everything a
basis needs to score new data round-trips through ``to_dict`` / ``basis_from_dict``.
"""

from __future__ import annotations

import warnings
from collections.abc import Sequence
from dataclasses import asdict, dataclass

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from . import basis as bs
from .errors import DataError, SpecError, TallgamWarning
from .profile import DataProfile, Field

# ---------------------------------------------------------------------------------------
# specs: public constructors


@dataclass(frozen=True)
class TermSpec:
    """Base of the term requests. ``column`` is a column name of the source."""

    column: str

    kind = "term"

    @property
    def label(self) -> str:
        return f"{self.kind}({self.column})"

    @property
    def inputs(self) -> tuple[str, ...]:
        return (self.column,)

    def profile_fields(self) -> list[Field]:
        return [Field(key=f"num:{self.column}", expr=_q(self.column), kind="numeric")]

    def build(self, profile: DataProfile) -> Basis:
        raise NotImplementedError

    def to_dict(self) -> dict:
        out = {"kind": self.kind}
        for k, v in asdict(self).items():
            out[k] = list(v) if isinstance(v, tuple) else v
        return out


@dataclass(frozen=True)
class SplineSpec(TermSpec):
    size: int = 10
    knots: str | tuple[float, ...] | None = None
    penalty: str = "curvature"
    smoothing: float | None = None

    kind = "spline"

    def __post_init__(self):
        if isinstance(self.knots, (list, tuple, np.ndarray)):
            object.__setattr__(self, "knots", tuple(float(k) for k in self.knots))
        elif self.knots not in (None, "quantile", "uniform"):
            raise SpecError(f"spline({self.column!r}): knots must be 'quantile', 'uniform' or a "
                            f"sequence of positions, got {self.knots!r}")
        if self.penalty not in ("curvature", "difference"):
            raise SpecError(f"spline({self.column!r}): penalty must be 'curvature' or "
                            f"'difference', got {self.penalty!r}")
        if not isinstance(self.knots, tuple) and (int(self.size) != self.size or self.size < 4):
            raise SpecError(f"spline({self.column!r}): size must be an integer ≥ 4 "
                            f"(cubic splines), got {self.size!r}")
        _check_smoothing(self.column, self.smoothing)

    def profile_fields(self) -> list[Field]:
        return [Field(key=f"num:{self.column}", expr=_q(self.column), kind="numeric",
                      histogram=True)]

    def build(self, profile: DataProfile) -> SplineBasis:
        fp = profile[f"num:{self.column}"]
        lo, hi = fp.min, fp.max
        where = f"spline({self.column!r})"
        if isinstance(self.knots, tuple):
            pos = np.unique(np.asarray(self.knots, dtype=np.float64))
            if len(pos) < 2:
                raise SpecError(f"{where}: give at least two distinct knot positions")
            if lo < pos[0] or hi > pos[-1]:
                raise DataError(
                    f"{where}: the given knots span [{pos[0]:g}, {pos[-1]:g}] but the column "
                    f"ranges over [{lo:g}, {hi:g}]; extend the first and last knot")
            knots = bs.clamped_knots(pos[1:-1], pos[0], pos[-1])
        else:
            distinct = fp.distinct
            if distinct < 4:
                raise DataError(
                    f"{where}: the column has only {distinct} distinct value(s); a cubic "
                    "spline needs at least 4. Use tg.categorical or tg.linear for it.")
            size = int(self.size)
            if distinct < size:
                warnings.warn(TallgamWarning(
                    f"{where}: the column has {distinct} distinct values, fewer than size="
                    f"{size}; the basis size was reduced to {distinct}"), stacklevel=2)
                size = distinct
            if self.knots == "uniform":
                interior = bs.interior_uniform(lo, hi, size)
            else:
                interior = bs.interior_from_quantiles(fp.values, fp.counts, size)
                if len(interior) < size - 4:
                    warnings.warn(TallgamWarning(
                        f"{where}: ties in the data left {len(interior) + 4} distinct quantile "
                        f"knots; the basis size was reduced from {size} to {len(interior) + 4}"),
                        stacklevel=2)
            knots = bs.clamped_knots(interior, lo, hi)
        return SplineBasis(self, knots)


@dataclass(frozen=True)
class LinearSpec(TermSpec):
    kind = "linear"

    def build(self, profile: DataProfile) -> LinearBasis:
        fp = profile[f"num:{self.column}"]
        if not fp.sd or fp.sd <= 0:
            raise DataError(f"linear({self.column!r}): the column is constant "
                            f"(every value is {fp.min:g}); drop the term")
        return LinearBasis(self, float(fp.mean), float(fp.sd))


@dataclass(frozen=True)
class CategoricalSpec(TermSpec):
    base: str | None = None

    kind = "categorical"

    def profile_fields(self) -> list[Field]:
        return [Field(key=f"lev:{self.column}", expr=_q(self.column), kind="levels")]

    def build(self, profile: DataProfile) -> CategoricalBasis:
        fp = profile[f"lev:{self.column}"]
        levels = [str(v) for v in fp.values]
        if len(levels) < 2:
            raise DataError(f"categorical({self.column!r}): the column has "
                            f"{len(levels)} level(s); a categorical term needs at least 2")
        if self.base is not None and str(self.base) not in levels:
            raise SpecError(f"categorical({self.column!r}): base level {self.base!r} does not "
                            f"occur in the data; levels are {_few(levels)}")
        return CategoricalBasis(self, levels, counts=[int(c) for c in fp.counts])


def spline(column: str, size: int = 10, *, knots: str | Sequence[float] | None = None,
           penalty: str = "curvature", smoothing: float | None = None) -> SplineSpec:
    """A smooth function of a numeric column: a penalized cubic B-spline.

    Parameters
    ----------
    column : the numeric column.
    size : number of basis functions (coefficients before the centring constraint).
    knots : ``"quantile"`` (default: interior knots at quantiles of the column),
        ``"uniform"``, or explicit positions, first and last being the boundary.
    penalty : ``"curvature"`` (∫f''(x)² dx on the column's own scale) or ``"difference"``
        (second differences of the coefficients, P-splines).
    smoothing : a fixed smoothing parameter λ; ``None`` lets the criterion choose.
    """
    return SplineSpec(column, size=size, knots=knots, penalty=penalty, smoothing=smoothing)


def linear(column: str) -> LinearSpec:
    """A straight-line effect of a numeric column (centred and scaled internally)."""
    return LinearSpec(column)


def categorical(column: str, *, base: str | None = None) -> CategoricalSpec:
    """One unpenalized coefficient per level of ``column``, measured from a base level.

    ``base`` defaults to the level with the largest total exposure (or weight, or rows).
    """
    return CategoricalSpec(column, base=None if base is None else str(base))


SPECS: dict[str, type[TermSpec]] = {
    cls.kind: cls for cls in (SplineSpec, LinearSpec, CategoricalSpec)
}


def spec_from_dict(d: dict) -> TermSpec:
    d = dict(d)
    kind = d.pop("kind", None)
    if kind not in SPECS:
        raise SpecError(f"unknown term kind {kind!r}; choose one of {', '.join(SPECS)}")
    return SPECS[kind](**d)


def _check_smoothing(column: str, smoothing) -> None:
    if smoothing is not None and not (np.isfinite(smoothing) and smoothing >= 0):
        raise SpecError(f"term on {column!r}: smoothing must be a number ≥ 0, got {smoothing!r}")


def _q(name: str) -> str:
    from .sources import quote

    return quote(name)


def _few(items: Sequence[str], n: int = 8) -> str:
    shown = ", ".join(repr(i) for i in items[:n])
    return shown + (f", ... ({len(items)} in all)" if len(items) > n else "")


# ---------------------------------------------------------------------------------------
# bases: data-dependent, encode rows, carry penalties and constraints


class Basis:
    """A term made concrete by the data. ``group`` is ``"dense"`` or ``"levels"``."""

    group = "dense"
    width = 0  # non-zeros per row in the dense group

    def __init__(self, spec: TermSpec):
        self.spec = spec

    @property
    def label(self) -> str:
        return self.spec.label

    @property
    def n_raw(self) -> int:
        raise NotImplementedError

    @property
    def inputs(self) -> tuple[str, ...]:
        return self.spec.inputs

    def encode(self, cols: dict, idx: np.ndarray, val: np.ndarray, col0: int) -> None:
        """Fill ``idx`` (n × width) and ``val`` with this term's non-zeros (dense group)."""
        raise NotImplementedError

    def codes(self, cols: dict) -> np.ndarray:
        """Level index of every row, −1 where the level is unknown (level group)."""
        raise NotImplementedError

    def penalties(self) -> list[np.ndarray]:
        """Penalty matrices (n_raw × n_raw) of this term, one smoothing parameter each."""
        return []

    def fixed_smoothing(self) -> list[float | None]:
        return [getattr(self.spec, "smoothing", None)] * len(self.penalties())

    def constraint(self, colsum: np.ndarray) -> np.ndarray:
        """Z (n_raw × n_free) with β = Zγ, from Σ wᵢ xᵢ (the weighted column sums)."""
        return np.eye(self.n_raw)

    def to_dict(self) -> dict:
        return {"spec": self.spec.to_dict()}


class InterceptBasis(Basis):
    width = 1

    def __init__(self):
        super().__init__(TermSpec(""))

    @property
    def label(self) -> str:
        return "intercept"

    @property
    def inputs(self) -> tuple[str, ...]:
        return ()

    @property
    def n_raw(self) -> int:
        return 1

    def encode(self, cols, idx, val, col0):
        idx[:, 0] = col0
        val[:, 0] = 1.0

    def to_dict(self):
        return {"spec": {"kind": "intercept"}}


class SplineBasis(Basis):
    width = bs.ORDER

    def __init__(self, spec: SplineSpec, knots: np.ndarray):
        super().__init__(spec)
        self.knots = np.asarray(knots, dtype=np.float64)

    @property
    def n_raw(self) -> int:
        return len(self.knots) - bs.ORDER

    @property
    def range(self) -> tuple[float, float]:
        return float(self.knots[0]), float(self.knots[-1])

    def encode(self, cols, idx, val, col0):
        first, values = bs.evaluate(self.knots, cols[self.spec.column])
        idx[:] = (first + col0)[:, None] + np.arange(bs.ORDER, dtype=np.int32)
        val[:] = values

    def penalties(self):
        if self.spec.penalty == "difference":
            return [bs.difference_penalty(self.n_raw)]
        return [bs.curvature_penalty(self.knots)]

    def constraint(self, colsum):
        return sum_to_zero(colsum)

    def to_dict(self):
        return {"spec": self.spec.to_dict(), "knots": self.knots.tolist()}


class LinearBasis(Basis):
    width = 1

    def __init__(self, spec: LinearSpec, centre: float, scale: float):
        super().__init__(spec)
        self.centre = centre
        self.scale = scale

    @property
    def n_raw(self) -> int:
        return 1

    def encode(self, cols, idx, val, col0):
        idx[:, 0] = col0
        val[:, 0] = (cols[self.spec.column] - self.centre) / self.scale

    def to_dict(self):
        return {"spec": self.spec.to_dict(), "centre": self.centre, "scale": self.scale}


class CategoricalBasis(Basis):
    group = "levels"

    def __init__(self, spec: CategoricalSpec, levels: list[str], counts: list[int] | None = None,
                 base: str | None = None):
        super().__init__(spec)
        self.levels = list(levels)
        self.counts = counts
        self.base = base if base is not None else spec.base
        self._value_set = pa.array(self.levels, type=pa.string())

    @property
    def n_raw(self) -> int:
        return len(self.levels)

    def codes(self, cols):
        arr = cols[self.spec.column]
        if not isinstance(arr, (pa.Array, pa.ChunkedArray)):
            arr = pa.array(arr, type=pa.string())
        found = pc.index_in(arr, value_set=self._value_set)
        return found.fill_null(-1).to_numpy(zero_copy_only=False).astype(np.int32)

    def constraint(self, colsum):
        if self.base is None:
            self.base = self.levels[int(np.argmax(colsum))]
        keep = [i for i, lev in enumerate(self.levels) if lev != self.base]
        return np.eye(self.n_raw)[:, keep]

    def profile_fields(self):
        return self.spec.profile_fields()

    def to_dict(self):
        return {"spec": self.spec.to_dict(), "levels": self.levels, "base": self.base,
                "counts": self.counts}


def sum_to_zero(colsum: np.ndarray) -> np.ndarray:
    """Orthonormal basis Z of {β : colsumᵀβ = 0}, shape (k, k−1), by a Householder QR."""
    c = np.asarray(colsum, dtype=np.float64)
    norm = np.linalg.norm(c)
    if not norm > 0:
        raise DataError("a term's basis columns sum to zero over the data (no weight)")
    q, _ = np.linalg.qr(c[:, None] / norm, mode="complete")
    return q[:, 1:]


def basis_from_dict(d: dict) -> Basis:
    spec_d = d["spec"]
    if spec_d.get("kind") == "intercept":
        return InterceptBasis()
    spec = spec_from_dict(spec_d)
    if isinstance(spec, SplineSpec):
        return SplineBasis(spec, np.asarray(d["knots"], dtype=np.float64))
    if isinstance(spec, LinearSpec):
        return LinearBasis(spec, float(d["centre"]), float(d["scale"]))
    if isinstance(spec, CategoricalSpec):
        return CategoricalBasis(spec, d["levels"], d.get("counts"), d.get("base"))
    raise SpecError(f"cannot rebuild a term of kind {spec.kind!r}")

"""Model terms: what the user asks for (specs) and what the data makes of them (bases).

A *spec* (``tg.spline``, ``tg.cyclic``, ``tg.surface``, ``tg.linear``, ``tg.categorical``,
``tg.random_effect``, ``tg.adjacency``) is an immutable request. The profile pass turns
it into a *basis*: knots, level codes, centring, a neighbour graph. A basis tells the
design how to encode a batch into sparse rows (:meth:`Basis.encode` / :meth:`Basis.codes`)
and tells the dense stage its penalties and its identifiability constraint. Everything a
basis needs to score new data round-trips through ``to_dict`` / ``basis_from_dict``.

Two groups of columns exist (see :mod:`tallgam.design`): the *dense* group, whose rows
have a few non-zeros at varying places (splines, surfaces, linear terms), and the *level*
group, where a row hits exactly one column per term (categoricals, random effects,
territories), so its block of XᵀWX is diagonal and never stored densely.
"""

from __future__ import annotations

import json
import os
import warnings
from collections.abc import Mapping, Sequence
from dataclasses import asdict, dataclass

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from tallgam.data.profile import DataProfile, Field
from tallgam.errors import DataError, SpecError, TallgamWarning
from tallgam.terms import bsplines as bs

KNOT_CHOICES = (None, "quantile", "uniform")

# ---------------------------------------------------------------------------------------
# specs: public constructors


@dataclass(frozen=True)
class TermSpec:
    """Base of the term requests."""

    kind = "term"

    @property
    def label(self) -> str:
        return f"{self.kind}({self.column})"

    def input_kinds(self) -> dict[str, str]:
        """Input columns and how they are read: ``"numeric"`` or ``"levels"``."""
        return {self.column: "numeric"}

    @property
    def inputs(self) -> tuple[str, ...]:
        return tuple(self.input_kinds())

    def profile_fields(self) -> list[Field]:
        return [_numeric_field(c) if k == "numeric" else _level_field(c)
                for c, k in self.input_kinds().items()]

    def build(self, profile: DataProfile) -> Basis:
        raise NotImplementedError

    def to_dict(self) -> dict:
        out = {"kind": self.kind}
        for k, v in asdict(self).items():
            out[k] = list(v) if isinstance(v, tuple) else v
        return out


def _numeric_field(column: str, histogram: bool = False) -> Field:
    return Field(key=f"num:{column}", expr=_q(column), kind="numeric", histogram=histogram)


def _level_field(column: str) -> Field:
    return Field(key=f"lev:{column}", expr=_q(column), kind="levels")


@dataclass(frozen=True)
class SplineSpec(TermSpec):
    column: str
    size: int = 10
    knots: str | tuple[float, ...] | None = None
    penalty: str = "curvature"
    smoothing: float | None = None
    per: str | None = None
    multiplier: str | None = None
    select: bool = False
    shape: str | None = None

    kind = "spline"

    def __post_init__(self):
        where = f"spline({self.column!r})"
        if isinstance(self.knots, (list, tuple, np.ndarray)):
            object.__setattr__(self, "knots", tuple(float(k) for k in self.knots))
        elif self.knots not in KNOT_CHOICES:
            raise SpecError(f"{where}: knots must be 'quantile', 'uniform' or a sequence of "
                            f"positions, got {self.knots!r}")
        if self.penalty not in ("curvature", "difference"):
            raise SpecError(f"{where}: penalty must be 'curvature' or 'difference', "
                            f"got {self.penalty!r}")
        if not isinstance(self.knots, tuple):
            _check_size(where, self.size)
        _check_smoothing(where, self.smoothing)
        if self.per is not None and self.per == self.column:
            raise SpecError(f"{where}: per= must name another column")
        if self.shape is not None:
            from tallgam.solve.shapes import SHAPES

            if self.shape not in SHAPES:
                raise SpecError(f"{where}: shape must be one of {', '.join(SHAPES)}, "
                                f"got {self.shape!r}")
            if self.per or self.multiplier:
                raise SpecError(f"{where}: shape= works on a plain spline (no per= or "
                                "multiplier=)")

    @property
    def label(self) -> str:
        extra = ""
        if self.per:
            extra += f" per {self.per}"
        if self.multiplier:
            extra += f" × {self.multiplier}"
        return f"spline({self.column}{extra})"

    def input_kinds(self):
        out = {self.column: "numeric"}
        if self.per:
            out[self.per] = "levels"
        if self.multiplier:
            out[self.multiplier] = "numeric"
        return out

    def profile_fields(self):
        fields = [_numeric_field(self.column, histogram=True)]
        if self.per:
            fields.append(_level_field(self.per))
        if self.multiplier:
            fields.append(_numeric_field(self.multiplier))
        return fields

    def build(self, profile: DataProfile) -> SplineBasis:
        knots = margin_knots(profile, self.column, self.size, self.knots, self.label)
        levels = [str(v) for v in profile[f"lev:{self.per}"].values] if self.per else None
        centred = not self.multiplier
        if self.multiplier:
            fm = profile[f"num:{self.multiplier}"]
            if fm.min is not None and fm.min == fm.max:  # f(x)·c overlaps the intercept
                centred = True
                warnings.warn(TallgamWarning(
                    f"{self.label}: the multiplier {self.multiplier!r} is {fm.min:g} on every "
                    "row, so the uncentred curve would repeat the intercept; it is centred like "
                    "an ordinary spline"), stacklevel=2)
        return SplineBasis(self, knots, levels, centred=centred)


@dataclass(frozen=True)
class CyclicSpec(TermSpec):
    column: str
    period: float = None
    size: int = 10
    origin: float | None = None
    knots: str = "uniform"
    smoothing: float | None = None

    kind = "cyclic"

    def __post_init__(self):
        where = f"cyclic({self.column!r})"
        if self.period is None or not (np.isfinite(self.period) and self.period > 0):
            raise SpecError(f"{where}: give the period, a positive number (12 for months, "
                            f"7 for weekdays, 24 for hours), got {self.period!r}")
        _check_size(where, self.size)
        if self.knots not in ("uniform", "quantile"):
            raise SpecError(f"{where}: knots must be 'uniform' or 'quantile', got {self.knots!r}")
        _check_smoothing(where, self.smoothing)

    def profile_fields(self):
        return [_numeric_field(self.column, histogram=True)]

    def build(self, profile: DataProfile) -> CyclicBasis:
        fp = profile[f"num:{self.column}"]
        where = self.label
        origin = float(fp.min if self.origin is None else self.origin)
        size = int(self.size)
        if fp.distinct < 4:
            raise DataError(f"{where}: the column has only {fp.distinct} distinct value(s); "
                            "a cyclic spline needs at least 4")
        if fp.distinct < size:
            warnings.warn(TallgamWarning(
                f"{where}: the column has {fp.distinct} distinct values, fewer than size="
                f"{size}; the basis size was reduced to {fp.distinct}"), stacklevel=2)
            size = fp.distinct
        period = float(self.period)
        if self.knots == "quantile":
            wrapped = origin + np.mod(fp.values - origin, period)
            order = np.argsort(wrapped)
            inner = bs.interior_from_quantiles(
                np.concatenate([[origin], wrapped[order], [origin + period]]),
                np.concatenate([[0.0], fp.counts[order], [0.0]]), size + 3)
            if len(inner) < size - 1:
                raise DataError(f"{where}: ties leave too few distinct quantile knots; use "
                                "knots='uniform'")
            breaks = np.concatenate([[origin], inner, [origin + period]])
        else:
            breaks = origin + period * np.arange(size + 1) / size
        return CyclicBasis(self, bs.periodic_knots(breaks, period), period)


@dataclass(frozen=True)
class SurfaceSpec(TermSpec):
    columns: tuple[str, ...]
    size: int | tuple[int, ...] = 5
    knots: str | None = None
    smoothing: float | tuple[float | None, ...] | None = None
    select: bool = False

    kind = "surface"

    def __post_init__(self):
        cols = tuple(str(c) for c in self.columns)
        object.__setattr__(self, "columns", cols)
        where = self.label
        if not 2 <= len(cols) <= 3 or len(set(cols)) != len(cols):
            raise SpecError(f"{where}: a surface takes two or three different columns")
        sizes = (self.size,) * len(cols) if np.isscalar(self.size) else tuple(self.size)
        if len(sizes) != len(cols):
            raise SpecError(f"{where}: give one size per column, got {self.size!r}")
        for s in sizes:
            _check_size(where, s)
        object.__setattr__(self, "size", tuple(int(s) for s in sizes))
        if self.knots not in KNOT_CHOICES:
            raise SpecError(f"{where}: knots must be 'quantile' or 'uniform'")
        sm = self.smoothing
        if sm is not None:
            sm = (sm,) * len(cols) if np.isscalar(sm) else tuple(sm)
            if len(sm) != len(cols):
                raise SpecError(f"{where}: give one smoothing per column")
            for v in sm:
                _check_smoothing(where, v)
            object.__setattr__(self, "smoothing", sm)

    @property
    def label(self) -> str:
        return f"surface({', '.join(self.columns)})"

    def input_kinds(self):
        return dict.fromkeys(self.columns, "numeric")

    def profile_fields(self):
        return [_numeric_field(c, histogram=True) for c in self.columns]

    def build(self, profile: DataProfile) -> SurfaceBasis:
        margins = [margin_knots(profile, c, s, self.knots, self.label)
                   for c, s in zip(self.columns, self.size)]
        return SurfaceBasis(self, margins)


@dataclass(frozen=True)
class LinearSpec(TermSpec):
    column: str

    kind = "linear"

    def profile_fields(self):
        return [_numeric_field(self.column, histogram=True)]  # values for relativity tables

    def build(self, profile: DataProfile) -> LinearBasis:
        fp = profile[f"num:{self.column}"]
        if not fp.sd or fp.sd <= 0:
            raise DataError(f"linear({self.column!r}): the column is constant "
                            f"(every value is {fp.min:g}); drop the term")
        return LinearBasis(self, float(fp.mean), float(fp.sd))


@dataclass(frozen=True)
class CategoricalSpec(TermSpec):
    column: str
    base: str | None = None

    kind = "categorical"

    def input_kinds(self):
        return {self.column: "levels"}

    def build(self, profile: DataProfile) -> CategoricalBasis:
        levels = _levels_of(profile, self.column, self.label, minimum=2)
        if self.base is not None and str(self.base) not in levels:
            raise SpecError(f"{self.label}: base level {self.base!r} does not occur in the "
                            f"data; levels are {_few(levels)}")
        counts = [int(c) for c in profile[f"lev:{self.column}"].counts]
        return CategoricalBasis(self, levels, counts=counts)


@dataclass(frozen=True)
class RandomEffectSpec(TermSpec):
    column: str
    smoothing: float | None = None

    kind = "random_effect"

    def __post_init__(self):
        _check_smoothing(self.label, self.smoothing)

    def input_kinds(self):
        return {self.column: "levels"}

    def build(self, profile: DataProfile) -> RandomEffectBasis:
        levels = _levels_of(profile, self.column, self.label, minimum=2)
        counts = [int(c) for c in profile[f"lev:{self.column}"].counts]
        return RandomEffectBasis(self, levels, counts=counts)


@dataclass(frozen=True)
class AdjacencySpec(TermSpec):
    column: str
    neighbours: str | Mapping | None = None
    smoothing: float | None = None

    kind = "adjacency"

    def __post_init__(self):
        if self.neighbours is None:
            raise SpecError(f"{self.label}: give neighbours=, a JSON file mapping each region "
                            "to its neighbours, a two-column Parquet/CSV file of pairs, or a "
                            "dict")
        if isinstance(self.neighbours, os.PathLike):
            object.__setattr__(self, "neighbours", os.fspath(self.neighbours))
        _check_smoothing(self.label, self.smoothing)

    def input_kinds(self):
        return {self.column: "levels"}

    def build(self, profile: DataProfile) -> AdjacencyBasis:
        data_levels = _levels_of(profile, self.column, self.label, minimum=1)
        graph = read_neighbours(self.neighbours, self.label)
        missing = sorted(set(data_levels) - set(graph))
        if missing:
            raise DataError(
                f"{self.label}: {len(missing)} region(s) in the data are not in the neighbour "
                f"list: {_few(missing)}. Add them (with an empty list for an island).")
        levels = sorted(graph, key=_natural)
        return AdjacencyBasis(self, levels, graph_edges(graph, levels), set(data_levels))


def spline(column: str, size: int = 10, *, knots: str | Sequence[float] | None = None,
           penalty: str = "curvature", smoothing: float | None = None, per: str | None = None,
           multiplier: str | None = None, select: bool = False,
           shape: str | None = None) -> SplineSpec:
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
    per : a categorical column: one curve per level, each with its own λ, each centred
        over its level's rows (the model must also hold ``tg.categorical(per)``).
    multiplier : a numeric column z: the term is f(x)·z (a varying coefficient), not
        centred.
    select : add a penalty on the curve's straight-line part, so the criterion can remove
        the term altogether (Marra & Wood 2011); its EDF then goes to zero.
    shape : ``"increasing"``, ``"decreasing"``, ``"convex"`` or ``"concave"``: the fitted
        curve keeps that shape everywhere (see :mod:`tallgam.shape`).
    """
    return SplineSpec(column, size=size, knots=knots, penalty=penalty, smoothing=smoothing,
                      per=per, multiplier=multiplier, select=select, shape=shape)


def cyclic(column: str, *, period: float, size: int = 10, origin: float | None = None,
           knots: str = "uniform", smoothing: float | None = None) -> CyclicSpec:
    """A periodic smooth (month, weekday, hour): value, slope and curvature match across
    the period's ends. ``origin`` is where a period starts (default: the column's
    minimum); values outside [origin, origin + period) wrap around."""
    return CyclicSpec(column, period=period, size=size, origin=origin, knots=knots,
                      smoothing=smoothing)


def surface(*columns: str, size: int | Sequence[int] = 5, knots: str | None = None,
            smoothing: float | Sequence[float | None] | None = None,
            select: bool = False) -> SurfaceSpec:
    """A smooth surface of two or three numeric columns (e.g. longitude, latitude): the
    tensor product of cubic B-spline margins, with one curvature penalty and one λ per
    margin (Wood 2006). ``size`` per margin; 16 non-zeros a row for two margins."""
    return SurfaceSpec(tuple(columns), size=size if np.isscalar(size) else tuple(size),
                       knots=knots, smoothing=smoothing, select=select)


def linear(column: str) -> LinearSpec:
    """A straight-line effect of a numeric column (centred and scaled internally)."""
    return LinearSpec(column)


def categorical(column: str, *, base: str | None = None) -> CategoricalSpec:
    """One unpenalized coefficient per level of ``column``, measured from a base level.

    ``base`` defaults to the level with the largest total exposure (or weight, or rows).
    """
    return CategoricalSpec(column, base=None if base is None else str(base))


def random_effect(column: str, *, smoothing: float | None = None) -> RandomEffectSpec:
    """One coefficient per level, shrunk towards zero by a ridge penalty λ·Σβ².

    With REML, λ is the ratio of the scale to the variance of the level effects (a
    random intercept), so sparse levels get credibility-weighted estimates. Fast for tens
    of thousands of levels: their block of the normal equations is diagonal.
    """
    return RandomEffectSpec(column, smoothing=smoothing)


def adjacency(column: str, *, neighbours, smoothing: float | None = None) -> AdjacencySpec:
    """Territory smoothing: one coefficient per region, penalized by the squared
    differences between neighbours (the graph Laplacian; an intrinsic Gaussian Markov
    random field, Besag, York & Mollié 1991; Rue & Held 2005).

    ``neighbours``: a JSON file mapping each region to the list of its neighbours, a
    two-column Parquet/CSV file of neighbour pairs, or such a dict. Regions in the list
    but not in the data get effects smoothed from their neighbours.
    """
    return AdjacencySpec(column, neighbours=neighbours, smoothing=smoothing)


SPECS: dict[str, type[TermSpec]] = {
    cls.kind: cls for cls in (SplineSpec, CyclicSpec, SurfaceSpec, LinearSpec, CategoricalSpec,
                              RandomEffectSpec, AdjacencySpec)
}


def spec_from_dict(d: dict) -> TermSpec:
    d = dict(d)
    kind = d.pop("kind", None)
    if kind not in SPECS:
        raise SpecError(f"unknown term kind {kind!r}; choose one of {', '.join(SPECS)}")
    if kind == "surface" and "columns" in d:
        d["columns"] = tuple(d["columns"])
    try:
        return SPECS[kind](**d)
    except TypeError as exc:
        raise SpecError(f"bad arguments for a {kind} term: {exc}") from None


def _check_size(where: str, size) -> None:
    if isinstance(size, bool) or not float(size).is_integer() or int(size) < 4:
        raise SpecError(f"{where}: size must be an integer ≥ 4 (cubic splines), got {size!r}")


def _check_smoothing(where: str, smoothing) -> None:
    if smoothing is not None and not (np.isfinite(smoothing) and smoothing >= 0):
        raise SpecError(f"{where}: smoothing must be a number ≥ 0, got {smoothing!r}")


def _q(name: str) -> str:
    from tallgam.data.sources import quote

    return quote(name)


def _few(items: Sequence[str], n: int = 8) -> str:
    shown = ", ".join(repr(i) for i in items[:n])
    return shown + (f", ... ({len(items)} in all)" if len(items) > n else "")


def _natural(label: str):
    try:
        return (0, float(label), label)
    except ValueError:
        return (1, 0.0, label)


def _levels_of(profile: DataProfile, column: str, where: str, minimum: int) -> list[str]:
    levels = [str(v) for v in profile[f"lev:{column}"].values]
    if len(levels) < minimum:
        raise DataError(f"{where}: the column has {len(levels)} level(s); the term needs at "
                        f"least {minimum}")
    return levels


def margin_knots(profile: DataProfile, column: str, size, knots, where: str) -> np.ndarray:
    """The clamped cubic knot vector of one numeric column (a spline or a surface margin)."""
    fp = profile[f"num:{column}"]
    lo, hi = fp.min, fp.max
    if isinstance(knots, tuple):
        pos = np.unique(np.asarray(knots, dtype=np.float64))
        if len(pos) < 2:
            raise SpecError(f"{where}: give at least two distinct knot positions")
        if lo < pos[0] or hi > pos[-1]:
            raise DataError(
                f"{where}: the given knots span [{pos[0]:g}, {pos[-1]:g}] but {column!r} "
                f"ranges over [{lo:g}, {hi:g}]; extend the first and last knot")
        return bs.clamped_knots(pos[1:-1], pos[0], pos[-1])
    distinct = fp.distinct
    if distinct < 4:
        raise DataError(
            f"{where}: {column!r} has only {distinct} distinct value(s); a cubic spline needs "
            "at least 4. Use tg.categorical or tg.linear for it.")
    size = int(size)
    if distinct < size:
        warnings.warn(TallgamWarning(
            f"{where}: {column!r} has {distinct} distinct values, fewer than size={size}; the "
            f"basis size was reduced to {distinct}"), stacklevel=3)
        size = distinct
    if knots == "uniform":
        interior = bs.interior_uniform(lo, hi, size)
    else:
        interior = bs.interior_from_quantiles(fp.values, fp.counts, size)
        if len(interior) < size - 4:
            warnings.warn(TallgamWarning(
                f"{where}: ties in {column!r} left {len(interior) + 4} distinct quantile knots; "
                f"the basis size was reduced from {size} to {len(interior) + 4}"), stacklevel=3)
    return bs.clamped_knots(interior, lo, hi)


def read_neighbours(source, where: str) -> dict[str, list[str]]:
    """A symmetric neighbour mapping from a dict, a JSON file or a two-column table file."""
    if isinstance(source, Mapping):
        raw = {str(k): [str(v) for v in vs] for k, vs in source.items()}
    else:
        path = os.fspath(source)
        if not os.path.exists(path):
            raise DataError(f"{where}: the neighbour file {path!r} does not exist")
        if path.lower().endswith(".json"):
            try:
                with open(path, encoding="utf-8") as fh:
                    data = json.load(fh)
            except (OSError, json.JSONDecodeError) as exc:
                raise DataError(f"{where}: cannot read {path!r}: {exc}") from None
            if not isinstance(data, dict) or not all(isinstance(v, list) for v in data.values()):
                raise DataError(f"{where}: {path!r} must map each region to a list of regions")
            raw = {str(k): [str(v) for v in vs] for k, vs in data.items()}
        else:
            import duckdb

            reader = "read_parquet" if path.lower().endswith((".parquet", ".pq")) else "read_csv"
            try:
                rows = duckdb.connect().execute(
                    f"SELECT * FROM {reader}(?)", [path]).fetchall()
            except duckdb.Error as exc:
                raise DataError(f"{where}: cannot read {path!r}: {exc}") from None
            if rows and len(rows[0]) < 2:
                raise DataError(f"{where}: {path!r} needs two columns (region, neighbour)")
            raw = {}
            for row in rows:
                a = str(row[0])
                raw.setdefault(a, [])
                if row[1] is not None:
                    raw[a].append(str(row[1]))
    graph: dict[str, set[str]] = {k: set() for k in raw}
    for a, vs in raw.items():
        for b in vs:
            if b == a:
                continue
            graph.setdefault(b, set())
            graph[a].add(b)
            graph[b].add(a)
    return {k: sorted(v, key=_natural) for k, v in graph.items()}


def graph_edges(graph: Mapping[str, Sequence[str]], levels: list[str]) -> np.ndarray:
    """Edges (i < j) of a neighbour mapping as an (m × 2) int array over ``levels``."""
    index = {lev: i for i, lev in enumerate(levels)}
    edges = {(min(index[a], index[b]), max(index[a], index[b]))
             for a, vs in graph.items() for b in vs}
    return np.array(sorted(edges), dtype=np.int64).reshape(-1, 2)


# ---------------------------------------------------------------------------------------
# bases: data-dependent, encode rows, carry penalties and constraints


class Basis:
    """A term made concrete by the data. ``group`` is ``"dense"`` or ``"levels"``."""

    group = "dense"
    width = 0  # non-zeros per row in the dense group
    selection = False  # an extra penalty on the null space of the term's penalties

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

    def clamp_ranges(self) -> dict[str, tuple[float, float]]:
        """Numeric inputs whose values are held inside a training range when scoring."""
        return {}

    def level_sets(self) -> dict[str, list[str]]:
        """Level inputs and their known levels (for unseen-level checks when scoring)."""
        return {}

    def effect_grid(self, points: int, ranges: dict[str, tuple[float, float]]) -> dict:
        """Input values at which to draw the term's effect: numeric columns as arrays,
        level columns as lists of labels (``ranges``: training ranges of numeric inputs)."""
        raise SpecError(f"the term {self.label} has no effect to draw")

    def to_dict(self) -> dict:
        return {"spec": self.spec.to_dict()}


class InterceptBasis(Basis):
    width = 1

    def __init__(self):
        super().__init__(TermSpec())

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


def _codes(values, value_set: pa.Array) -> np.ndarray:
    if not isinstance(values, (pa.Array, pa.ChunkedArray)):
        values = pa.array(values, type=pa.string())
    found = pc.index_in(values, value_set=value_set)
    return found.fill_null(-1).to_numpy(zero_copy_only=False).astype(np.int32)


class SplineBasis(Basis):
    """A cubic B-spline of one column; per level of another column, or times a third."""

    width = bs.ORDER

    def __init__(self, spec: SplineSpec, knots: np.ndarray, levels: list[str] | None = None,
                 centred: bool | None = None):
        super().__init__(spec)
        self.knots = np.asarray(knots, dtype=np.float64)
        self.levels = list(levels) if levels is not None else None
        # a multiplier's curve f(x)·z is not centred, unless z is constant in the data
        self.centred = not spec.multiplier if centred is None else bool(centred)
        self._value_set = pa.array(self.levels, type=pa.string()) if levels else None
        self.selection = bool(spec.select)

    @property
    def size(self) -> int:
        return len(self.knots) - bs.ORDER

    @property
    def n_blocks(self) -> int:
        return len(self.levels) if self.levels else 1

    @property
    def n_raw(self) -> int:
        return self.size * self.n_blocks

    @property
    def range(self) -> tuple[float, float]:
        return float(self.knots[0]), float(self.knots[-1])

    def encode(self, cols, idx, val, col0):
        spec = self.spec
        bs.encode_rows(self.knots, cols[spec.column], col0, idx, val,
                       codes=self.level_codes(cols) if self.levels else None, stride=self.size,
                       multiplier=cols[spec.multiplier] if spec.multiplier else None)

    def level_codes(self, cols) -> np.ndarray:
        return _codes(cols[self.spec.per], self._value_set)

    def penalties(self):
        if self.spec.penalty == "difference":
            s = bs.difference_penalty(self.size)
        else:
            s = bs.curvature_penalty(self.knots)
        if not self.levels:
            return [s]
        out = []
        for j in range(self.n_blocks):
            m = np.zeros((self.n_raw, self.n_raw))
            sl = slice(j * self.size, (j + 1) * self.size)
            m[sl, sl] = s
            out.append(m)
        return out

    def constraint(self, colsum):
        if not self.centred:  # f(x)·z is identifiable without centring
            return np.eye(self.n_raw)
        k = self.size
        return _block_diag([sum_to_zero(colsum[j * k:(j + 1) * k]) for j in range(self.n_blocks)])

    def clamp_ranges(self):
        return {self.spec.column: self.range}

    def level_sets(self):
        return {self.spec.per: self.levels} if self.levels else {}

    def effect_grid(self, points, ranges):
        x = np.linspace(*self.range, points)
        grid = {self.spec.column: x}
        if self.levels:
            grid = {self.spec.column: np.tile(x, len(self.levels)),
                    self.spec.per: [lev for lev in self.levels for _ in range(points)]}
        if self.spec.multiplier:  # the curve f(x), i.e. the effect per unit of the multiplier
            grid[self.spec.multiplier] = np.ones(len(grid[self.spec.column]))
        return grid

    def to_dict(self):
        out = {"spec": self.spec.to_dict(), "knots": self.knots.tolist()}
        if self.levels:
            out["levels"] = self.levels
        if self.spec.multiplier:
            out["centred"] = self.centred
        return out


class CyclicBasis(Basis):
    """A periodic cubic B-spline: k functions on one period, wrapped."""

    width = bs.ORDER

    def __init__(self, spec: CyclicSpec, knots: np.ndarray, period: float):
        super().__init__(spec)
        self.knots = np.asarray(knots, dtype=np.float64)  # extended (periodic) knot vector
        self.period = float(period)

    @property
    def n_raw(self) -> int:
        return len(self.knots) - 7

    @property
    def origin(self) -> float:
        return float(self.knots[3])

    def encode(self, cols, idx, val, col0):
        bs.encode_rows(self.knots, cols[self.spec.column], col0, idx, val, period=self.period,
                       wrap=self.n_raw)

    def penalties(self):
        ext = bs.curvature_penalty(self.knots, self.origin, self.origin + self.period)
        fold = bs.periodic_fold(self.n_raw)
        s = fold.T @ ext @ fold
        return [0.5 * (s + s.T)]

    def constraint(self, colsum):
        return sum_to_zero(colsum)

    def effect_grid(self, points, ranges):
        return {self.spec.column: np.linspace(self.origin, self.origin + self.period, points)}

    def to_dict(self):
        return {"spec": self.spec.to_dict(), "knots": self.knots.tolist(),
                "period": self.period}


class SurfaceBasis(Basis):
    """Tensor product of cubic B-spline margins; column index Σ_m i_m · stride_m."""

    def __init__(self, spec: SurfaceSpec, margins: list[np.ndarray]):
        super().__init__(spec)
        self.margins = [np.asarray(m, dtype=np.float64) for m in margins]
        self.selection = bool(spec.select)

    @property
    def sizes(self) -> list[int]:
        return [len(m) - bs.ORDER for m in self.margins]

    @property
    def strides(self) -> list[int]:
        sizes = self.sizes
        return [int(np.prod(sizes[i + 1:])) for i in range(len(sizes))]

    @property
    def width(self) -> int:
        return bs.ORDER ** len(self.margins)

    @property
    def n_raw(self) -> int:
        return int(np.prod(self.sizes))

    def encode(self, cols, idx, val, col0):
        if len(self.margins) == 2:
            (k1, k2), (c1, c2) = self.margins, self.spec.columns
            bs.encode_tensor2(k1, cols[c1], k2, cols[c2], col0, idx, val)
            return
        n = idx.shape[0]
        index = np.full((n, 1), col0, dtype=np.int64)
        value = np.ones((n, 1))
        for knots, column, stride in zip(self.margins, self.spec.columns, self.strides):
            first, values = bs.evaluate(knots, cols[column])
            cols_m = (first[:, None] + np.arange(bs.ORDER)) * stride
            index = (index[:, :, None] + cols_m[:, None, :]).reshape(n, -1)
            value = (value[:, :, None] * values[:, None, :]).reshape(n, -1)
        idx[:] = index
        val[:] = value

    def penalties(self):
        sizes = self.sizes
        out = []
        for m, knots in enumerate(self.margins):
            mats = [np.eye(s) for s in sizes]
            mats[m] = bs.curvature_penalty(knots)
            full = mats[0]
            for nxt in mats[1:]:
                full = np.kron(full, nxt)
            out.append(full)
        return out

    def fixed_smoothing(self):
        sm = self.spec.smoothing
        return list(sm) if sm is not None else [None] * len(self.margins)

    def constraint(self, colsum):
        return sum_to_zero(colsum)

    def clamp_ranges(self):
        return {c: (float(k[0]), float(k[-1])) for c, k in zip(self.spec.columns, self.margins)}

    def effect_grid(self, points, ranges):
        per_margin = max(2, min(points, 50))
        axes = [np.linspace(k[0], k[-1], per_margin) for k in self.margins]
        mesh = np.meshgrid(*axes, indexing="ij")
        return {c: m.ravel() for c, m in zip(self.spec.columns, mesh)}

    def to_dict(self):
        return {"spec": self.spec.to_dict(), "margins": [m.tolist() for m in self.margins]}


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

    def effect_grid(self, points, ranges):
        lo, hi = ranges.get(self.spec.column, (self.centre - 2 * self.scale,
                                               self.centre + 2 * self.scale))
        return {self.spec.column: np.linspace(lo, hi, points)}

    def to_dict(self):
        return {"spec": self.spec.to_dict(), "centre": self.centre, "scale": self.scale}


class LevelBasis(Basis):
    """A term with one coefficient per level of a column (the level group)."""

    group = "levels"

    def __init__(self, spec: TermSpec, levels: list[str], counts: list[int] | None = None):
        super().__init__(spec)
        self.levels = [str(v) for v in levels]
        self.counts = counts
        self._value_set = pa.array(self.levels, type=pa.string())

    @property
    def n_raw(self) -> int:
        return len(self.levels)

    def codes(self, cols):
        return _codes(cols[self.spec.column], self._value_set)

    def level_sets(self):
        return {self.spec.column: self.levels}

    def effect_grid(self, points, ranges):
        return {self.spec.column: list(self.levels)}

    def to_dict(self):
        return {"spec": self.spec.to_dict(), "levels": self.levels, "counts": self.counts}


class CategoricalBasis(LevelBasis):
    def __init__(self, spec: CategoricalSpec, levels: list[str], counts: list[int] | None = None,
                 base: str | None = None):
        super().__init__(spec, levels, counts)
        self.base = base if base is not None else spec.base

    def constraint(self, colsum):
        if self.base is None:
            self.base = self.levels[int(np.argmax(colsum))]
        keep = [i for i, lev in enumerate(self.levels) if lev != self.base]
        return np.eye(self.n_raw)[:, keep]

    def to_dict(self):
        return {**super().to_dict(), "base": self.base}


class RandomEffectBasis(LevelBasis):
    """Ridge-penalized level effects: identifiable through the penalty, no constraint."""

    def penalties(self):
        return [np.eye(self.n_raw)]


class AdjacencyBasis(LevelBasis):
    """Region effects penalized by Σ_{neighbours i~j} (β_i − β_j)² (graph Laplacian)."""

    def __init__(self, spec: AdjacencySpec, levels: list[str], edges: np.ndarray,
                 data_levels: set[str] | None = None, counts: list[int] | None = None):
        super().__init__(spec, levels, counts)
        self.edges = np.asarray(edges, dtype=np.int64).reshape(-1, 2)
        from scipy.sparse import coo_matrix
        from scipy.sparse.csgraph import connected_components

        k = self.n_raw
        adj = coo_matrix((np.ones(len(self.edges)), (self.edges[:, 0], self.edges[:, 1])),
                         shape=(k, k))
        self.n_parts, self.part = connected_components(adj, directed=False)
        degree = np.bincount(self.edges.ravel(), minlength=k)
        self.islands = [self.levels[i] for i in np.flatnonzero(degree == 0)]
        if data_levels is not None:
            has_data = np.array([lev in data_levels for lev in self.levels])
            self.empty_parts = [p for p in range(self.n_parts)
                                if not has_data[self.part == p].any()]
            if self.n_parts > 1 or self.islands:
                sizes = np.bincount(self.part)
                order = np.argsort(-sizes, kind="stable")
                apart = [f"[{_few([self.levels[i] for i in np.flatnonzero(self.part == p)], 4)}]"
                         for p in order[1:6]]
                warnings.warn(TallgamWarning(
                    f"{self.label}: the neighbour graph has {self.n_parts} separate parts "
                    f"(sizes {', '.join(str(s) for s in sorted(sizes, reverse=True)[:8])}"
                    f"{', ...' if len(sizes) > 8 else ''}); each part keeps its own level"
                    + (f"; apart from the largest part: {', '.join(apart)}"
                       f"{', ...' if self.n_parts > 6 else ''}" if apart else "")
                    + (f"; {len(self.islands)} island(s) without neighbours are not smoothed"
                       f" ({_few(self.islands, 5)})" if self.islands else "")
                    + (f"; {len(self.empty_parts)} part(s) have no data and are held at 0"
                       if self.empty_parts else "")), stacklevel=3)
        else:
            self.empty_parts = []

    def penalties(self):
        k = self.n_raw
        lap = np.zeros((k, k))
        i, j = self.edges[:, 0], self.edges[:, 1]
        np.add.at(lap, (i, i), 1.0)
        np.add.at(lap, (j, j), 1.0)
        np.add.at(lap, (i, j), -1.0)
        np.add.at(lap, (j, i), -1.0)
        return [lap]

    def constraint(self, colsum):
        rows = [np.asarray(colsum, dtype=np.float64)]
        for p in self.empty_parts:  # no data can place these parts: hold their mean at 0
            rows.append((self.part == p).astype(np.float64))
        c = np.array(rows)
        q, r = np.linalg.qr(c.T / np.linalg.norm(c, axis=1), mode="complete")
        return q[:, len(rows):]

    def to_dict(self):
        return {**super().to_dict(), "edges": self.edges.tolist(),
                "empty_parts": [int(p) for p in self.empty_parts]}


def sum_to_zero(colsum: np.ndarray) -> np.ndarray:
    """Orthonormal basis Z of {β : colsumᵀβ = 0}, shape (k, k−1), by a Householder QR."""
    c = np.asarray(colsum, dtype=np.float64)
    norm = np.linalg.norm(c)
    if not norm > 0:
        raise DataError("a term's basis columns sum to zero over the data (no weight)")
    q, _ = np.linalg.qr(c[:, None] / norm, mode="complete")
    return q[:, 1:]


def _block_diag(blocks: list[np.ndarray]) -> np.ndarray:
    from scipy.linalg import block_diag

    return block_diag(*blocks)


def basis_from_dict(d: dict) -> Basis:
    spec_d = d["spec"]
    if spec_d.get("kind") == "intercept":
        return InterceptBasis()
    spec = spec_from_dict(spec_d)
    if isinstance(spec, SplineSpec):
        return SplineBasis(spec, np.asarray(d["knots"]), d.get("levels"), d.get("centred"))
    if isinstance(spec, CyclicSpec):
        return CyclicBasis(spec, np.asarray(d["knots"]), float(d["period"]))
    if isinstance(spec, SurfaceSpec):
        return SurfaceBasis(spec, [np.asarray(m) for m in d["margins"]])
    if isinstance(spec, LinearSpec):
        return LinearBasis(spec, float(d["centre"]), float(d["scale"]))
    if isinstance(spec, CategoricalSpec):
        return CategoricalBasis(spec, d["levels"], d.get("counts"), d.get("base"))
    if isinstance(spec, RandomEffectSpec):
        return RandomEffectBasis(spec, d["levels"], d.get("counts"))
    if isinstance(spec, AdjacencySpec):
        b = AdjacencyBasis(spec, d["levels"], np.asarray(d["edges"]), None, d.get("counts"))
        b.empty_parts = [int(p) for p in d.get("empty_parts", [])]
        return b
    raise SpecError(f"cannot rebuild a term of kind {spec.kind!r}")


def term_matrix(b: Basis, grid: dict) -> np.ndarray:
    """The dense rows (n × n_raw) of one term at the given input values."""
    cols = {k: (pa.array(v, type=pa.string()) if isinstance(v, list) else
                np.ascontiguousarray(v, dtype=np.float64)) for k, v in grid.items()}
    n = len(next(iter(grid.values())))
    out = np.zeros((n, b.n_raw))
    if b.group == "levels":
        code = b.codes(cols)
        ok = code >= 0
        out[np.flatnonzero(ok), code[ok]] = 1.0
        return out
    idx = np.empty((n, b.width), dtype=np.int32)
    val = np.empty((n, b.width))
    b.encode(cols, idx, val, 0)
    np.add.at(out, (np.repeat(np.arange(n), b.width), idx.ravel()), val.ravel())
    return out

"""The spline kind: a penalized cubic B-spline of a numeric column.

Variants: one curve per level of another column (``per=``), a curve times a numeric
column (``multiplier=``, a varying coefficient), a removable curve (``removable=True``: an
extra penalty on the curve's straight-line part lets the criterion remove it, Marra & Wood
2011), and shape-constrained curves (``shape=``).

Shapes: a cubic B-spline's derivative is a quadratic B-spline whose coefficients are
scaled differences of the spline's coefficients (de Boor 1978), and its second derivative a
linear B-spline; B-splines are non-negative, so f' ≥ 0 (or f'' ≥ 0) everywhere when those
coefficients are ≥ 0. :meth:`SplineBasis.shape_rows` gives that linear inequality; the
dense stage imposes it (:mod:`tallgam.solve.shapes`).
"""

from __future__ import annotations

import warnings
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from scipy.interpolate import BSpline

from tallgam.data.profile import DataProfile
from tallgam.errors import DataError, SpecError, TallgamWarning
from tallgam.terms import bsplines as bs
from tallgam.terms import sqltext
from tallgam.terms.base import (
    Basis,
    TermSpec,
    block_diag,
    check_size,
    check_smoothing,
    data_points,
    register,
    sum_to_zero,
)

KNOT_CHOICES = (None, "quantile", "uniform")
SHAPES = ("increasing", "decreasing", "convex", "concave")


@dataclass(frozen=True)
class SplineSpec(TermSpec):
    """See :func:`spline`."""

    column: str
    size: int = 10
    knots: str | tuple[float, ...] | None = None
    penalty: str = "curvature"
    smoothing: float | None = None
    per: str | None = None
    multiplier: str | None = None
    removable: bool = False
    shape: str | None = None

    kind = "spline"
    extra_option_types = {"penalty": (str,), "per": (str,), "multiplier": (str,),
                          "shape": (str,)}

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
            check_size(where, self.size)
        check_smoothing(where, self.smoothing)
        if self.per is not None and self.per == self.column:
            raise SpecError(f"{where}: per= must name another column")
        if self.shape is not None:
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

    def check_with(self, terms, criterion):
        super().check_with(terms, criterion)
        if self.per and not any(t.input_kinds() == {self.per: "levels"} for t in terms):
            raise SpecError(f"{self.label} needs the level means too: add a categorical "
                            f"term of {self.per!r}")

    def build(self, profile: DataProfile) -> SplineBasis:
        knots = margin_knots(profile, self.column, self.size, self.knots, self.label)
        levels = [str(v) for v in profile.levels(self.per).labels] if self.per else None
        centred = not self.multiplier
        if self.multiplier:
            fm = profile.numeric(self.multiplier)
            if fm.min is not None and fm.min == fm.max:  # f(x)·c overlaps the intercept
                centred = True
                warnings.warn(TallgamWarning(
                    f"{self.label}: the multiplier {self.multiplier!r} is {fm.min:g} on every "
                    "row, so the uncentred curve would repeat the intercept; it is centred like "
                    "an ordinary spline"), stacklevel=2)
        z_exp = 0
        if self.multiplier:
            fm = profile.numeric(self.multiplier)
            z_exp = bs.unit_exponent(max(abs(fm.min or 0.0), abs(fm.max or 0.0)))
        return SplineBasis(self, knots, levels, centred=centred, z_exp=z_exp)


def spline(column: str, size: int = 10, *, knots: str | Sequence[float] | None = None,
           penalty: str = "curvature", smoothing: float | None = None, per: str | None = None,
           multiplier: str | None = None, removable: bool = False,
           shape: str | None = None, title: str | None = None) -> SplineSpec:
    """A smooth function of a numeric column: a penalized cubic B-spline.

    Parameters
    ----------
    column : str
        The numeric column.
    size : int, default 10
        Number of basis functions (coefficients before the centring constraint).
    knots : {"quantile", "uniform"} or sequence of float, optional
        ``None``/``"quantile"``: interior knots at quantiles of the column; ``"uniform"``:
        evenly spaced; or explicit positions, the first and last being the boundary.
    penalty : {"curvature", "difference"}, default "curvature"
        ∫f''(x)² dx on the column's own scale, or second differences of the coefficients
        (P-splines, Eilers & Marx 1996).
    smoothing : float, optional
        A fixed smoothing parameter λ; ``None`` lets the criterion choose.
    per : str, optional
        A level column: one curve per level, each with its own λ, each centred over its
        level's rows (the model must also hold ``tg.categorical(per)``).
    multiplier : str, optional
        A numeric column z: the term is f(x)·z (a varying coefficient), not centred.
    removable : bool, default False
        Add a penalty on the curve's straight-line part, so the criterion can remove the
        term altogether (Marra & Wood 2011); its EDF then goes to zero.
    shape : {"increasing", "decreasing", "convex", "concave"}, optional
        The fitted curve keeps that shape everywhere.
    title : str, optional
        The name shown in summaries, charts and table headers (default: the column).

    Returns
    -------
    SplineSpec
    """
    return SplineSpec(column, size=size, knots=knots, penalty=penalty, smoothing=smoothing,
                      per=per, multiplier=multiplier, removable=removable, shape=shape,
                      title=title)


def margin_knots(profile: DataProfile, column: str, size, knots, where: str) -> np.ndarray:
    """The clamped cubic knot vector of one numeric column (a spline or a surface margin)."""
    fp = profile.numeric(column)
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
            "at least 4. Make it a categorical or a linear term.")
    size = int(size)
    if distinct < size:
        warnings.warn(TallgamWarning(
            f"{where}: {column!r} has {distinct} distinct values, fewer than size={size}; the "
            f"basis size was reduced to {distinct}"), stacklevel=3)
        size = distinct
    if knots == "uniform":
        interior = bs.interior_uniform(lo, hi, size)
    else:
        interior = bs.interior_from_quantiles(fp.values, fp.rows, size)
        if len(interior) < size - 4:
            warnings.warn(TallgamWarning(
                f"{where}: ties in {column!r} left {len(interior) + 4} distinct quantile knots; "
                f"the basis size was reduced from {size} to {len(interior) + 4}"), stacklevel=3)
    return bs.clamped_knots(interior, lo, hi)


def derivative_rows(knots: np.ndarray, order: int) -> np.ndarray:
    """D (m × k): the B-spline coefficients of f^(order) as D·β, for f = Σ β_j B_j."""
    k = len(knots) - 4
    rows = []
    for j in range(k):
        unit = np.zeros(k)
        unit[j] = 1.0
        rows.append(BSpline(knots, unit, 3).derivative(order).c[: k - order])
    return np.array(rows).T


class SplineBasis(Basis):
    """A cubic B-spline of one column; per level of another column, or times a third."""

    width = bs.ORDER

    def __init__(self, spec: SplineSpec, knots: np.ndarray, per_levels: list[str] | None = None,
                 centred: bool | None = None, z_exp: int = 0):
        super().__init__(spec)
        self.knots = np.asarray(knots, dtype=np.float64)
        # internal units (powers of two): x measured in 2**x_exp, the multiplier in 2**z_exp
        self.x_exp = bs.unit_exponent(self.knots[-1] - self.knots[0])
        self.z_exp = int(z_exp)
        self.per_levels = list(per_levels) if per_levels is not None else None
        # a multiplier's curve f(x)·z is not centred, unless z is constant in the data
        self.centred = not spec.multiplier if centred is None else bool(centred)

    @property
    def size(self) -> int:
        return len(self.knots) - bs.ORDER

    @property
    def n_curves(self) -> int:
        return len(self.per_levels) if self.per_levels else 1

    @property
    def n_raw(self) -> int:
        return self.size * self.n_curves

    @property
    def range(self) -> tuple[float, float]:
        return float(self.knots[0]), float(self.knots[-1])

    def default_title(self) -> str:
        spec = self.spec
        out = spec.column
        if spec.per:
            out += f" by {spec.per}"
        if spec.multiplier:
            out += f" × {spec.multiplier}"
        return out

    def encode(self, cols, idx, val, col0):
        spec = self.spec
        codes = self.input_codes(cols, spec.per) if self.per_levels else None
        bs.encode_rows(self.knots, cols[spec.column], col0, idx, val, codes=codes,
                       stride=self.size,
                       multiplier=np.ldexp(cols[spec.multiplier], -self.z_exp)
                       if spec.multiplier else None)

    def penalties(self):
        if self.spec.penalty == "difference":
            s = bs.difference_penalty(self.size)
        else:
            s = bs.curvature_penalty(np.ldexp(self.knots, -self.x_exp))
        if not self.per_levels:
            return [s]
        out = []
        for j in range(self.n_curves):
            m = np.zeros((self.n_raw, self.n_raw))
            sl = slice(j * self.size, (j + 1) * self.size)
            m[sl, sl] = s
            out.append(m)
        return out

    @property
    def n_penalties(self) -> int:
        return self.n_curves

    def penalty_exponents(self):
        e = -2 * self.z_exp - (0 if self.spec.penalty == "difference" else 3 * self.x_exp)
        return [e] * self.n_curves

    def constraint(self, colsum):
        if not self.centred:  # f(x)·z is identifiable without centring
            return np.eye(self.n_raw)
        k = self.size
        return block_diag([sum_to_zero(colsum[j * k:(j + 1) * k]) for j in range(self.n_curves)])

    def shape_rows(self):
        shape = self.spec.shape
        if not shape:
            return None
        order = 1 if shape in ("increasing", "decreasing") else 2
        sign = 1.0 if shape in ("increasing", "convex") else -1.0
        d = derivative_rows(np.ldexp(self.knots, -self.x_exp), order)
        scale = np.max(np.abs(d), axis=1, keepdims=True)
        return sign * d / np.where(scale > 0, scale, 1.0)

    def clamp_ranges(self):
        return {self.spec.column: self.range}

    def knots_along(self, column):
        return np.unique(self.knots) if column == self.spec.column else None

    def level_sets(self):
        return {self.spec.per: self.per_levels} if self.per_levels else {}

    def effect_grid(self, points, profile):
        spec = self.spec
        x = data_points(profile, spec.column, points, self.range)
        grid = {spec.column: x}
        if self.per_levels:
            grid = {spec.column: np.tile(x, self.n_curves),
                    spec.per: [lev for lev in self.per_levels for _ in range(len(x))]}
        if spec.multiplier:  # the curve f(x), i.e. the effect per unit of the multiplier
            grid[spec.multiplier] = np.ones(len(grid[spec.column]))
        return grid

    def reference(self, profile, base_levels):
        out = super().reference(profile, base_levels)
        if self.spec.multiplier:  # f(x)·0: the reference of a varying coefficient is 0
            out[self.spec.multiplier] = 0.0
        return out

    def sql(self, coef):
        spec = self.spec
        lo, hi = self.range
        x = sqltext.clamped(spec.column, lo, hi)
        k = self.size
        if self.per_levels:
            curves = [sqltext.piecewise(x, self.knots, coef[j * k:(j + 1) * k], lo, hi)
                      for j in range(self.n_curves)]
            out = sqltext.levels_case(spec.per, self.per_levels, curves, "NULL")
        else:
            out = sqltext.piecewise(x, self.knots, coef, lo, hi)
        if spec.multiplier:
            z = sqltext.column(spec.multiplier)
            out = f"({out} * ({z} * {sqltext.num(np.ldexp(1.0, -self.z_exp))}))"
        return out

    def to_dict(self):
        out = {"spec": self.spec.to_dict(), "knots": self.knots.tolist()}
        if self.per_levels:
            out["levels"] = self.per_levels
        if self.spec.multiplier:
            out["centred"] = self.centred
            out["multiplier_unit_exponent"] = self.z_exp
        return out

    @classmethod
    def from_dict(cls, spec, d):
        return cls(spec, np.asarray(d["knots"]), d.get("levels"), d.get("centred"),
                   int(d.get("multiplier_unit_exponent", 0)))


register(SplineSpec, SplineBasis)

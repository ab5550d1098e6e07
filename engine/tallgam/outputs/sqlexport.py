"""A fitted model as one DuckDB SQL expression, for scoring inside the warehouse.

The expression reproduces ``predict(output="response")``: every spline becomes its
piecewise cubic polynomial (one CASE branch per knot interval, Horner form in the local
variable, the column clamped to the training range as ``predict`` does; a cyclic column
wrapped into its period; a surface a sum of products of such polynomials), linear terms a
product, level terms (categoricals, random effects, territories) a CASE over the levels
(an unseen level gives NULL, where ``predict`` would raise), then the offset and the
inverse link. Numbers are written in
exponent form so DuckDB reads them as DOUBLE (a plain ``0.1`` would be a DECIMAL).
"""

from __future__ import annotations

import numpy as np
from scipy.interpolate import BSpline, PPoly

from tallgam.data.inputs import legacy_level_key, level_key
from tallgam.data.sources import quote
from tallgam.errors import SpecError
from tallgam.terms import (
    CyclicBasis,
    InterceptBasis,
    LevelBasis,
    LinearBasis,
    SplineBasis,
    SurfaceBasis,
)


def num(v: float) -> str:
    """A float literal DuckDB parses as DOUBLE, exactly (17 significant digits)."""
    v = float(v)
    if not np.isfinite(v):
        raise SpecError("cannot write a non-finite coefficient to SQL")
    return f"{v:.17e}"


def _column(name: str) -> str:
    return f"CAST({quote(name)} AS DOUBLE)"


def piecewise_sql(x: str, knots: np.ndarray, coef: np.ndarray, lo: float, hi: float) -> str:
    """Σ coef_j B_j(x) for x already inside [lo, hi], as a CASE over knot intervals, each
    a cubic in Horner form in the local variable (x − left knot)."""
    pp = PPoly.from_spline(BSpline(knots, coef, 3, extrapolate=False))
    pieces = []
    for i in range(len(pp.x) - 1):
        a, z = pp.x[i], pp.x[i + 1]
        if not z > a or z <= lo or a >= hi:
            continue
        c = pp.c[:, i]  # highest power first, in (x − a)
        d = f"({x} - {num(a)})"
        poly = f"(({num(c[0])} * {d} + {num(c[1])}) * {d} + {num(c[2])}) * {d} + {num(c[3])}"
        pieces.append((z, poly))
    if not pieces:
        return num(0.0)
    parts = [f"WHEN {x} < {num(z)} THEN {poly}" for z, poly in pieces[:-1]]
    return f"(CASE {' '.join(parts)} ELSE {pieces[-1][1]} END)" if parts else f"({pieces[-1][1]})"


def _clamped(column: str, lo: float, hi: float) -> str:
    return f"least(greatest({_column(column)}, {num(lo)}), {num(hi)})"


def _levels_case(column: str, labels: list[str], values: list[str], otherwise: str) -> str:
    col = level_key(quote(column))
    keys = [legacy_level_key(lev) for lev in labels]
    whens = " ".join(f"WHEN '{key.replace(chr(39), chr(39) * 2)}' THEN {v}"
                     for key, v in zip(keys, values))
    return f"(CASE {col} {whens} ELSE {otherwise} END)"


def spline_sql(b: SplineBasis, coef: np.ndarray) -> str:
    """A spline (per level: a CASE over the levels; with a multiplier: times it), the
    column clamped to the training range as ``predict`` does."""
    lo, hi = b.range
    x = _clamped(b.spec.column, lo, hi)
    k = b.size
    if b.levels:
        curves = [piecewise_sql(x, b.knots, coef[j * k:(j + 1) * k], lo, hi)
                  for j in range(len(b.levels))]
        out = _levels_case(b.spec.per, b.levels, curves, "NULL")
    else:
        out = piecewise_sql(x, b.knots, coef, lo, hi)
    if b.spec.multiplier:
        out = f"({out} * {_column(b.spec.multiplier)})"
    return out


def cyclic_sql(b: CyclicBasis, coef: np.ndarray) -> str:
    """A periodic spline: the column wrapped into [origin, origin + period) first."""
    origin, period = b.origin, b.period
    k = b.n_raw
    x = (f"({num(origin)} + ((({_column(b.spec.column)} - {num(origin)}) % {num(period)}) "
         f"+ {num(period)}) % {num(period)})")
    extended = coef[np.arange(k + 3) % k]
    return piecewise_sql(x, b.knots, extended, origin, origin + period)


def surface_sql(b: SurfaceBasis, coef: np.ndarray) -> str:
    """A tensor product: Σ_i B_i(x₁)·g_i(x₂, …), each factor a piecewise polynomial."""
    cols, margins = b.spec.columns, b.margins
    sizes = b.sizes
    grid = coef.reshape(sizes)

    def nested(level: int, c: np.ndarray) -> str:
        knots = margins[level]
        lo, hi = float(knots[0]), float(knots[-1])
        x = _clamped(cols[level], lo, hi)
        if level == len(sizes) - 1:
            return piecewise_sql(x, knots, c, lo, hi)
        terms = []
        for i in range(sizes[level]):
            unit = np.zeros(sizes[level])
            unit[i] = 1.0
            inner = nested(level + 1, c[i])
            terms.append(f"({piecewise_sql(x, knots, unit, lo, hi)} * {inner})")
        return "(" + " + ".join(terms) + ")"

    return nested(0, grid)


def categorical_sql(b: LevelBasis, coef: np.ndarray) -> str:
    """One value per level; an unseen level gives NULL (``predict`` raises instead)."""
    return _levels_case(b.spec.column, b.levels, [num(c) for c in coef], "NULL")


def linear_sql(b: LinearBasis, coef: np.ndarray) -> str:
    return f"({num(coef[0] / b.scale)} * ({_column(b.spec.column)} - {num(b.centre)}))"


def link_sql(fit, *, with_offset: bool = True) -> str:
    """SQL of the linear predictor η (including the offset unless with_offset=False)."""
    parts = []
    for b, sl in zip(fit.bases, fit.design.slices):
        coef = fit.coefficients_raw[sl]
        if isinstance(b, InterceptBasis):
            parts.append(num(coef[0]))
        elif isinstance(b, SplineBasis):
            parts.append(spline_sql(b, coef))
        elif isinstance(b, CyclicBasis):
            parts.append(cyclic_sql(b, coef))
        elif isinstance(b, SurfaceBasis):
            parts.append(surface_sql(b, coef))
        elif isinstance(b, LinearBasis):
            parts.append(linear_sql(b, coef))
        elif isinstance(b, LevelBasis):
            parts.append(categorical_sql(b, coef))
        else:
            raise SpecError(f"the term {b.label} cannot be exported to SQL yet")
    if with_offset:
        exprs = fit.expressions
        if "exposure" in exprs:
            parts.append(f"ln(CAST({exprs['exposure']} AS DOUBLE))")
        if "offset" in exprs:
            parts.append(f"CAST({exprs['offset']} AS DOUBLE)")
    return "(" + "\n + ".join(parts) + ")"


def to_sql(fit, *, output: str = "response", with_offset: bool = True) -> str:
    """One DuckDB SQL expression of the prediction (``"response"`` or ``"link"``)."""
    eta = link_sql(fit, with_offset=with_offset)
    if output == "link":
        return eta
    if output != "response":
        raise SpecError(f"output must be 'response' or 'link', got {output!r}")
    return fit.model.link.sql_inverse(eta)

"""A fitted model as one DuckDB SQL expression, for scoring inside the warehouse.

The expression reproduces ``predict(output="response")``: every spline becomes its
piecewise cubic polynomial (one CASE branch per knot interval, Horner form in the local
variable, the column clamped to the training range as ``predict`` does), linear terms a
product, categoricals a CASE over the levels (an unseen level gives NULL, where
``predict`` would raise), then the offset and the inverse link. Numbers are written in
exponent form so DuckDB reads them as DOUBLE (a plain ``0.1`` would be a DECIMAL).
"""

from __future__ import annotations

import numpy as np
from scipy.interpolate import BSpline, PPoly

from .errors import SpecError
from .sources import quote
from .terms import CategoricalBasis, InterceptBasis, LinearBasis, SplineBasis


def num(v: float) -> str:
    """A float literal DuckDB parses as DOUBLE, exactly (17 significant digits)."""
    v = float(v)
    if not np.isfinite(v):
        raise SpecError("cannot write a non-finite coefficient to SQL")
    return f"{v:.17e}"


def _column(name: str) -> str:
    return f"CAST({quote(name)} AS DOUBLE)"


def spline_sql(b: SplineBasis, coef: np.ndarray) -> str:
    """f(x) = Σ coef_j B_j(x) as a CASE over knot intervals, x clamped to the range."""
    lo, hi = b.range
    x = f"least(greatest({_column(b.spec.column)}, {num(lo)}), {num(hi)})"
    pp = PPoly.from_spline(BSpline(b.knots, coef, 3, extrapolate=False))
    breaks = pp.x
    pieces = []
    for i in range(len(breaks) - 1):
        a, z = breaks[i], breaks[i + 1]
        if not z > a:
            continue
        c = pp.c[:, i]  # highest power first, in (x − a)
        d = f"({x} - {num(a)})"
        poly = f"(({num(c[0])} * {d} + {num(c[1])}) * {d} + {num(c[2])}) * {d} + {num(c[3])}"
        pieces.append((z, poly))
    if not pieces:
        return num(0.0)
    parts = [f"WHEN {x} < {num(z)} THEN {poly}" for z, poly in pieces[:-1]]
    return f"(CASE {' '.join(parts)} ELSE {pieces[-1][1]} END)" if parts else f"({pieces[-1][1]})"


def categorical_sql(b: CategoricalBasis, coef: np.ndarray) -> str:
    col = f"CAST({quote(b.spec.column)} AS VARCHAR)"
    whens = " ".join(
        f"WHEN '{lev.replace(chr(39), chr(39) * 2)}' THEN {num(c)}"
        for lev, c in zip(b.levels, coef))
    return f"(CASE {col} {whens} ELSE NULL END)"


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
        elif isinstance(b, LinearBasis):
            parts.append(linear_sql(b, coef))
        elif isinstance(b, CategoricalBasis):
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

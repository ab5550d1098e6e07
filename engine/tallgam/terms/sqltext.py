"""Pieces of DuckDB SQL that term kinds build their exported expressions from.

Numbers are written in exponent form with 17 significant digits, so DuckDB reads them as
DOUBLE exactly (a plain ``0.1`` would be a DECIMAL); column names are always quoted.
"""

from __future__ import annotations

import numpy as np
from scipy.interpolate import BSpline, PPoly

from tallgam.data.inputs import legacy_level_key, level_key
from tallgam.data.sources import quote
from tallgam.errors import SpecError

__all__ = ["clamped", "column", "levels_case", "num", "piecewise", "quote", "text"]


def num(v: float) -> str:
    """A float literal DuckDB parses as DOUBLE, exactly (17 significant digits)."""
    v = float(v)
    if not np.isfinite(v):
        raise SpecError("cannot write a non-finite coefficient to SQL")
    return f"{v:.17e}"


def column(name: str) -> str:
    """A column read as DOUBLE."""
    return f"CAST({quote(name)} AS DOUBLE)"


def clamped(name: str, lo: float, hi: float) -> str:
    """A numeric column held inside [lo, hi], as scoring does."""
    return f"least(greatest({column(name)}, {num(lo)}), {num(hi)})"


def text(value: str) -> str:
    """A string literal."""
    return "'" + str(value).replace("'", "''") + "'"


def levels_case(name: str, labels: list[str], values: list[str], otherwise: str) -> str:
    """CASE over the levels of a column: ``values[i]`` for ``labels[i]``, the column read
    as the level key fitting used (:func:`tallgam.data.inputs.level_key`; labels of older
    model files mapped to today's keys)."""
    col = level_key(quote(name))
    whens = " ".join(f"WHEN {text(legacy_level_key(lev))} THEN {v}"
                     for lev, v in zip(labels, values))
    return f"(CASE {col} {whens} ELSE {otherwise} END)"


def piecewise(x: str, knots: np.ndarray, coef: np.ndarray, lo: float, hi: float) -> str:
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

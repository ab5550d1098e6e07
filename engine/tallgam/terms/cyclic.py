"""The cyclic kind: a periodic cubic B-spline (month, weekday, hour of day), whose value,
slope and curvature match across the ends of the period."""

from __future__ import annotations

import warnings
from dataclasses import dataclass

import numpy as np

from tallgam.data.profile import DataProfile
from tallgam.errors import DataError, SpecError, TallgamWarning
from tallgam.terms import bsplines as bs
from tallgam.terms import sqltext
from tallgam.terms.base import Basis, TermSpec, check_size, check_smoothing, register, sum_to_zero


@dataclass(frozen=True)
class CyclicSpec(TermSpec):
    """See :func:`cyclic`."""

    column: str
    period: float = None
    size: int = 10
    origin: float | None = None
    knots: str = "uniform"
    smoothing: float | None = None

    kind = "cyclic"
    extra_option_types = {"period": (int, float), "origin": (int, float)}

    def __post_init__(self):
        where = f"cyclic({self.column!r})"
        if self.period is None or not (np.isfinite(self.period) and self.period > 0):
            raise SpecError(f"{where}: give the period, a positive number (12 for months, "
                            f"7 for weekdays, 24 for hours), got {self.period!r}")
        check_size(where, self.size)
        if self.knots not in ("uniform", "quantile"):
            raise SpecError(f"{where}: knots must be 'uniform' or 'quantile', got {self.knots!r}")
        check_smoothing(where, self.smoothing)

    def build(self, profile: DataProfile) -> CyclicBasis:
        fp = profile.numeric(self.column)
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
                np.concatenate([[0.0], fp.rows[order], [0.0]]), size + 3)
            if len(inner) < size - 1:
                raise DataError(f"{where}: ties leave too few distinct quantile knots; set "
                                "knots to \"uniform\"")
            breaks = np.concatenate([[origin], inner, [origin + period]])
        else:
            breaks = origin + period * np.arange(size + 1) / size
        return CyclicBasis(self, bs.periodic_knots(breaks, period), period)


def cyclic(column: str, *, period: float, size: int = 10, origin: float | None = None,
           knots: str = "uniform", smoothing: float | None = None,
           title: str | None = None) -> CyclicSpec:
    """A periodic smooth of a numeric column.

    Parameters
    ----------
    column : str
        The numeric column (month, weekday, hour, ...).
    period : float
        Length of one period in the column's units (12 for months, 7 for weekdays).
    size : int, default 10
        Number of periodic basis functions.
    origin : float, optional
        Where a period starts (default: the column's minimum); values outside
        [origin, origin + period) wrap around.
    knots : {"uniform", "quantile"}, default "uniform"
    smoothing : float, optional
        A fixed smoothing parameter λ; ``None`` lets the criterion choose.
    title : str, optional
        The name shown in summaries, charts and table headers (default: the column).

    Returns
    -------
    CyclicSpec
    """
    return CyclicSpec(column, period=period, size=size, origin=origin, knots=knots,
                      smoothing=smoothing, title=title)


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

    @property
    def x_exp(self) -> int:
        """The column is measured in 2**x_exp inside the engine (see bsplines.unit_exponent)."""
        return bs.unit_exponent(self.period)

    def penalty_exponents(self):
        return [-3 * self.x_exp]
    def knots_along(self, column):
        return np.unique(self.knots) if column == self.spec.column else None

    def penalties(self):
        e = self.x_exp
        ext = bs.curvature_penalty(np.ldexp(self.knots, -e), np.ldexp(self.origin, -e),
                                   np.ldexp(self.origin + self.period, -e))
        fold = bs.periodic_fold(self.n_raw)
        s = fold.T @ ext @ fold
        return [0.5 * (s + s.T)]

    def constraint(self, colsum):
        return sum_to_zero(colsum)

    def effect_grid(self, points, profile):
        return {self.spec.column: np.linspace(self.origin, self.origin + self.period, points)}

    def sql(self, coef):
        origin, period = self.origin, self.period
        n = sqltext.num
        x = (f"({n(origin)} + ((({sqltext.column(self.spec.column)} - {n(origin)}) % "
             f"{n(period)}) + {n(period)}) % {n(period)})")
        extended = coef[np.arange(self.n_raw + 3) % self.n_raw]
        return sqltext.piecewise(x, self.knots, extended, origin, origin + period)

    def to_dict(self):
        return {"spec": self.spec.to_dict(), "knots": self.knots.tolist(),
                "period": self.period}

    @classmethod
    def from_dict(cls, spec, d):
        return cls(spec, np.asarray(d["knots"]), float(d["period"]))


register(CyclicSpec, CyclicBasis)

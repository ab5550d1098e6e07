"""The surface kind: a tensor product of cubic B-spline margins (Wood 2006), e.g. of
longitude and latitude, with one curvature penalty and one smoothing parameter per margin."""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from tallgam.data.profile import DataProfile
from tallgam.errors import SpecError
from tallgam.terms import bsplines as bs
from tallgam.terms import sqltext
from tallgam.terms.base import (
    Basis,
    TermSpec,
    check_size,
    check_smoothing,
    data_points,
    register,
    sum_to_zero,
)
from tallgam.terms.spline import KNOT_CHOICES, margin_knots

MARGIN_POINTS = 50  # drawn and tabulated values per margin


@dataclass(frozen=True)
class SurfaceSpec(TermSpec):
    """See :func:`surface`."""

    columns: tuple[str, ...]
    size: int | tuple[int, ...] = 5
    knots: str | None = None
    smoothing: float | tuple[float | None, ...] | None = None
    removable: bool = False

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
            check_size(where, s)
        object.__setattr__(self, "size", tuple(int(s) for s in sizes))
        if self.knots not in KNOT_CHOICES:
            raise SpecError(f"{where}: knots must be 'quantile' or 'uniform'")
        sm = self.smoothing
        if sm is not None:
            sm = (sm,) * len(cols) if np.isscalar(sm) else tuple(sm)
            if len(sm) != len(cols):
                raise SpecError(f"{where}: give one smoothing per column")
            for v in sm:
                check_smoothing(where, v)
            object.__setattr__(self, "smoothing", sm)

    def input_kinds(self):
        return dict.fromkeys(self.columns, "numeric")

    def build(self, profile: DataProfile) -> SurfaceBasis:
        margins = [margin_knots(profile, c, s, self.knots, self.label)
                   for c, s in zip(self.columns, self.size)]
        return SurfaceBasis(self, margins)


def surface(*columns: str, size: int | Sequence[int] = 5, knots: str | None = None,
            smoothing: float | Sequence[float | None] | None = None,
            removable: bool = False, title: str | None = None) -> SurfaceSpec:
    """A smooth surface of two or three numeric columns (e.g. longitude, latitude).

    Parameters
    ----------
    *columns : str
        Two or three numeric columns.
    size : int or sequence of int, default 5
        Basis functions per margin (16 non-zeros a row for two margins).
    knots : {"quantile", "uniform"}, optional
    smoothing : float or sequence of float, optional
        Fixed smoothing parameters, one per margin (None: chosen).
    removable : bool, default False
        Add a penalty on the surface's unpenalized part so it can be removed.
    title : str, optional
        The name shown in summaries, charts and table headers (default: the columns).

    Returns
    -------
    SurfaceSpec
    """
    return SurfaceSpec(tuple(columns), size=size if np.isscalar(size) else tuple(size),
                       knots=knots, smoothing=smoothing, removable=removable,
                       title=title)


class SurfaceBasis(Basis):
    """Tensor product of cubic B-spline margins; column index Σ_m i_m · stride_m."""

    figure = "surface"

    def __init__(self, spec: SurfaceSpec, margins: list[np.ndarray]):
        super().__init__(spec)
        self.margins = [np.asarray(m, dtype=np.float64) for m in margins]

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

    def knots_along(self, column):
        for knots, c in zip(self.margins, self.spec.columns):
            if c == column:
                return np.unique(knots)
        return None

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
            mats[m] = bs.curvature_penalty(np.ldexp(knots, -self.margin_exponents[m]))
            full = mats[0]
            for nxt in mats[1:]:
                full = np.kron(full, nxt)
            out.append(full)
        return out

    @property
    def n_penalties(self) -> int:
        return len(self.margins)

    @property
    def margin_exponents(self) -> list[int]:
        """Each margin measured in 2**e inside the engine (see bsplines.unit_exponent)."""
        return [bs.unit_exponent(k[-1] - k[0]) for k in self.margins]

    def penalty_exponents(self):
        return [-3 * e for e in self.margin_exponents]

    def fixed_smoothing(self):
        sm = self.spec.smoothing
        return list(sm) if sm is not None else [None] * len(self.margins)

    def constraint(self, colsum):
        return sum_to_zero(colsum)

    def clamp_ranges(self):
        return {c: (float(k[0]), float(k[-1])) for c, k in zip(self.spec.columns, self.margins)}

    def effect_grid(self, points, profile):
        per_margin = max(2, min(points, MARGIN_POINTS))
        ranges = self.clamp_ranges()
        axes = [data_points(profile, c, per_margin, ranges[c]) for c in self.spec.columns]
        mesh = np.meshgrid(*axes, indexing="ij")
        return {c: m.ravel() for c, m in zip(self.spec.columns, mesh)}

    def sql(self, coef):
        """Σ_i B_i(x₁)·g_i(x₂, …), each factor a piecewise polynomial."""
        cols, margins, sizes = self.spec.columns, self.margins, self.sizes
        grid = coef.reshape(sizes)

        def nested(level: int, c: np.ndarray) -> str:
            knots = margins[level]
            lo, hi = float(knots[0]), float(knots[-1])
            x = sqltext.clamped(cols[level], lo, hi)
            if level == len(sizes) - 1:
                return sqltext.piecewise(x, knots, c, lo, hi)
            terms = []
            for i in range(sizes[level]):
                unit = np.zeros(sizes[level])
                unit[i] = 1.0
                inner = nested(level + 1, c[i])
                terms.append(f"({sqltext.piecewise(x, knots, unit, lo, hi)} * {inner})")
            return "(" + " + ".join(terms) + ")"

        return nested(0, grid)

    def to_dict(self):
        return {"spec": self.spec.to_dict(), "margins": [m.tolist() for m in self.margins]}

    @classmethod
    def from_dict(cls, spec, d):
        return cls(spec, [np.asarray(m) for m in d["margins"]])


register(SurfaceSpec, SurfaceBasis)

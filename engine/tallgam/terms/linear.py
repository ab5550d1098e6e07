"""The linear kind: a straight-line effect of a numeric column, centred and scaled
internally (well-conditioned normal equations) and reported per unit of the column."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from tallgam.data.profile import DataProfile
from tallgam.errors import DataError
from tallgam.terms import sqltext
from tallgam.terms.base import Basis, TermSpec, register


@dataclass(frozen=True)
class LinearSpec(TermSpec):
    """See :func:`linear`."""

    column: str

    kind = "linear"

    def build(self, profile: DataProfile) -> LinearBasis:
        fp = profile.numeric(self.column)
        if fp.min is None or not fp.max > fp.min:
            raise DataError(f"linear({self.column!r}): the column is constant "
                            f"(every value is {fp.min:g}); drop the term")
        scale = fp.sd
        span = fp.max - fp.min
        if not (scale is not None and np.isfinite(scale) and scale > 1e-12 * span):
            scale = span  # the standard deviation over- or underflowed: the range serves
        centre = fp.mean if fp.mean is not None and np.isfinite(fp.mean) else \
            0.5 * fp.min + 0.5 * fp.max
        return LinearBasis(self, float(centre), float(scale))


def linear(column: str, *, title: str | None = None) -> LinearSpec:
    """A straight-line effect of a numeric column.

    Parameters
    ----------
    column : str
        The numeric column; centred and scaled internally, reported per unit.
    title : str, optional
        The name shown in summaries, charts and table headers (default: the column).

    Returns
    -------
    LinearSpec
    """
    return LinearSpec(column, title=title)


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

    def coefficient_names(self):
        return [self.spec.column]

    def coefficient_units(self):
        return self.scale

    def intercept_contrast(self):
        return np.array([-self.centre / self.scale])

    def sql(self, coef):
        return (f"({sqltext.num(coef[0] / self.scale)} * ({sqltext.column(self.spec.column)} - "
                f"{sqltext.num(self.centre)}))")

    def to_dict(self):
        return {"spec": self.spec.to_dict(), "centre": self.centre, "scale": self.scale}

    @classmethod
    def from_dict(cls, spec, d):
        return cls(spec, float(d["centre"]), float(d["scale"]))


register(LinearSpec, LinearBasis)

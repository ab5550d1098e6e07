"""Level kinds: one coefficient per level of a column (the design's level group).

* categorical: unpenalized effects measured from a base level (the level with the largest
  exposure unless given);
* random effect: effects shrunk towards zero by a ridge penalty λ·Σβ², whose REML λ is the
  variance-component ratio (credibility shrinkage of sparse levels). Its block of the
  normal equations is diagonal, so the dense stage may eliminate it by its Schur
  complement (``eliminable``), and tens of thousands of levels cost little.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from tallgam.data.profile import DataProfile
from tallgam.errors import DataError, SpecError
from tallgam.terms import sqltext
from tallgam.terms.base import Basis, TermSpec, check_smoothing, few, register


def levels_of(profile: DataProfile, column: str, where: str, minimum: int) -> list[str]:
    """The training levels of a column (DataError when fewer than ``minimum``)."""
    levels = [str(v) for v in profile.levels(column).labels]
    if len(levels) < minimum:
        raise DataError(f"{where}: the column has {len(levels)} level(s); the term needs at "
                        f"least {minimum}")
    return levels


class LevelBasis(Basis):
    """A term with one coefficient per level of a column (the level group)."""

    group = "levels"

    def __init__(self, spec: TermSpec, levels: list[str], counts: list[int] | None = None):
        super().__init__(spec)
        self.levels = [str(v) for v in levels]
        self.counts = counts

    @property
    def n_raw(self) -> int:
        return len(self.levels)

    def level_sets(self):
        return {self.spec.column: self.levels}

    def coefficient_names(self):
        return list(self.levels)

    def effect_grid(self, points, profile):
        return {self.spec.column: list(self.levels)}

    def sql(self, coef):
        """One value per level; an unseen level gives NULL (``predict`` raises instead)."""
        return sqltext.levels_case(self.spec.column, self.levels,
                                   [sqltext.num(c) for c in coef], "NULL")

    def to_dict(self):
        return {"spec": self.spec.to_dict(), "levels": self.levels, "counts": self.counts}


@dataclass(frozen=True)
class CategoricalSpec(TermSpec):
    """See :func:`categorical`."""

    column: str
    base: str | None = None

    kind = "categorical"
    extra_option_types = {"base": (str, int)}

    def __post_init__(self):
        if self.base is not None:
            object.__setattr__(self, "base", str(self.base))

    def input_kinds(self):
        return {self.column: "levels"}

    def build(self, profile: DataProfile) -> CategoricalBasis:
        levels = levels_of(profile, self.column, self.label, minimum=2)
        if self.base is not None and str(self.base) not in levels:
            raise SpecError(f"{self.label}: base level {self.base!r} does not occur in the "
                            f"data; levels are {few(levels)}")
        counts = [int(c) for c in profile.levels(self.column).rows]
        return CategoricalBasis(self, levels, counts=counts)


def categorical(column: str, *, base: str | None = None,
                title: str | None = None) -> CategoricalSpec:
    """One unpenalized coefficient per level of a column, measured from a base level.

    Parameters
    ----------
    column : str
        The level column (any type; levels are compared as text).
    base : str, optional
        The base level; default the level with the largest total exposure (or weight,
        or rows).
    title : str, optional
        The name shown in summaries, charts and table headers (default: the column).

    Returns
    -------
    CategoricalSpec
    """
    return CategoricalSpec(column, base=None if base is None else str(base), title=title)


class CategoricalBasis(LevelBasis):
    def __init__(self, spec: CategoricalSpec, levels: list[str], counts: list[int] | None = None,
                 base: str | None = None):
        super().__init__(spec, levels, counts)
        self.base = base if base is not None else spec.base

    def constraint(self, colsum):
        if self.base is None:
            self.base = self.levels[int(np.argmax(colsum))]
        keep = [i for i, lev in enumerate(self.levels) if lev != self.base]
        z = np.zeros((self.n_raw, len(keep)))
        z[keep, np.arange(len(keep))] = 1.0
        return z

    def base_levels(self):
        return {self.spec.column: self.base} if self.base is not None else {}

    def to_dict(self):
        return {**super().to_dict(), "base": self.base}

    @classmethod
    def from_dict(cls, spec, d):
        return cls(spec, d["levels"], d.get("counts"), d.get("base"))


@dataclass(frozen=True)
class RandomEffectSpec(TermSpec):
    """See :func:`random_effect`."""

    column: str
    smoothing: float | None = None

    kind = "random_effect"

    def __post_init__(self):
        check_smoothing(self.label, self.smoothing)

    def input_kinds(self):
        return {self.column: "levels"}

    def build(self, profile: DataProfile) -> RandomEffectBasis:
        levels = levels_of(profile, self.column, self.label, minimum=2)
        counts = [int(c) for c in profile.levels(self.column).rows]
        return RandomEffectBasis(self, levels, counts=counts)


def random_effect(column: str, *, smoothing: float | None = None,
                  title: str | None = None) -> RandomEffectSpec:
    """One coefficient per level, shrunk towards zero by a ridge penalty λ·Σβ².

    With REML, λ is the ratio of the scale to the variance of the level effects (a random
    intercept), so sparse levels get credibility-weighted estimates. Fast for tens of
    thousands of levels: their block of the normal equations is diagonal.

    Parameters
    ----------
    column : str
        The level column.
    smoothing : float, optional
        A fixed λ; ``None`` lets the criterion choose.
    title : str, optional
        The name shown in summaries, charts and table headers (default: the column).

    Returns
    -------
    RandomEffectSpec
    """
    return RandomEffectSpec(column, smoothing=smoothing, title=title)


class RandomEffectBasis(LevelBasis):
    """Ridge-penalized level effects: identifiable through the penalty, no constraint."""

    eliminable = True

    def penalties(self):
        return [np.eye(self.n_raw)]

    @property
    def n_penalties(self) -> int:
        return 1

    @classmethod
    def from_dict(cls, spec, d):
        return cls(spec, d["levels"], d.get("counts"))


register(CategoricalSpec, CategoricalBasis)
register(RandomEffectSpec, RandomEffectBasis)

"""Relativity tables: every term's effect on a grid or per level, as a pricing team reads it.

For a log-link model the prediction factorises as

    μ / exposure = base rate × Π_terms relativity_term(x),

where the *base rate* is the prediction at the reference point (base levels, splines at
their reference values) and each relativity is exp(f(x) − f(reference)). References:
the base level of a categorical; zero (the average level) for random effects and
territories; the exposure-weighted median of the training data for splines, linear
terms and surfaces (or values given by the caller). A per-level curve is measured from the
base level's curve at the reference, so the product above holds row by row. Bands come
from the covariance of the difference f(x) − f(reference).
"""

from __future__ import annotations

import os
from dataclasses import dataclass, field

import numpy as np
import pyarrow as pa
from scipy import stats

from tallgam.errors import SpecError
from tallgam.terms.base import GRID_POINTS, Basis, term_matrix


@dataclass
class RelativityTables:
    """All terms' tables. ``base_rate`` is None unless the link is log."""

    base_rate: float | None
    base_link: float
    references: dict[str, dict] = field(default_factory=dict)
    tables: dict[str, pa.Table] = field(default_factory=dict)

    def write(self, folder, formats=("csv", "parquet")) -> list[str]:
        """Write one file per term and format, plus ``base.csv``; returns the paths."""
        import pyarrow.csv as pacsv
        import pyarrow.parquet as pq

        from tallgam.atomic import make_folder, replacing, write_text

        unknown = [f for f in formats if f not in ("csv", "parquet")]
        if unknown:
            raise SpecError(f"unknown table format {unknown[0]!r}; use csv or parquet")
        make_folder(folder)
        paths = []
        for label, table in self.tables.items():
            stem = os.path.join(folder, file_stem(label))
            for fmt in formats:
                path = f"{stem}.{fmt}"
                with replacing(path) as tmp:
                    if fmt == "csv":
                        pacsv.write_csv(table, tmp)
                    else:
                        pq.write_table(table, tmp)
                paths.append(path)
        base = os.path.join(folder, "base.csv")
        lines = ["quantity,value", f"base_link,{self.base_link!r}"]
        if self.base_rate is not None:
            lines.append(f"base_rate,{self.base_rate!r}")
        for label, ref in self.references.items():
            for col, value in ref.items():
                lines.append(f"reference {label} {col},{value}")
        write_text(base, "\n".join(lines) + "\n")
        paths.append(base)
        return paths


def file_stem(label: str) -> str:
    """A file name from a term label: spline(driver_age) → spline_driver_age."""
    keep = "".join(c if c.isalnum() else "_" for c in label)
    return "_".join(part for part in keep.split("_") if part)


def base_levels(fit) -> dict[str, str]:
    """The base level of every level column measured from one (categoricals)."""
    out: dict[str, str] = {}
    for b in fit.bases:
        out.update(b.base_levels())
    return out


def references(fit, overrides: dict | None = None) -> dict[str, dict]:
    """Reference inputs per term (see the module docstring and
    :meth:`tallgam.terms.base.Basis.reference`); ``overrides`` maps a column to a chosen
    reference value."""
    overrides = dict(overrides or {})
    bases = base_levels(fit)
    out: dict[str, dict] = {}
    for b in fit.bases[1:]:
        ref = b.reference(fit.profile, bases)
        out[b.label] = {c: overrides.get(c, v) for c, v in ref.items()}
    return out


def _point(b: Basis, ref: dict, n: int) -> dict:
    return {c: ([ref[c]] * n if kind == "levels" else np.full(n, float(ref[c])))
            for c, kind in b.spec.input_kinds().items()}


def relativity_rows(fit, label: str, grid: dict, refs: dict[str, dict] | None = None,
                    level: float = 0.95) -> dict[str, np.ndarray]:
    """A term's effect at the inputs ``grid`` (column → values), measured from its
    reference: ``estimate`` (link scale, centred as fitted), ``difference`` from the
    reference with ``std_error``, ``lower``, ``upper``, and for the log link the
    ``relativity`` exp(difference) with its bounds."""
    refs = refs if refs is not None else references(fit)
    b, sl = fit.term(label)
    beta = fit.coefficients_raw[sl]
    if b.group == "levels":
        # one coefficient per row, measured from the base level (coefficient 0, variance 0)
        # or from zero: the variance is the level's own; no L × L matrix is formed
        cols = {k: pa.array(v, type=pa.string()) if isinstance(v, list) else v
                for k, v in grid.items()}
        code = b.codes(cols)
        if np.any(code < 0):
            raise SpecError(f"{label}: levels not seen in training cannot be tabulated")
        est = beta[code]
        diff = est
        se = np.sqrt(np.maximum(fit.covariance.diagonal()[sl][code], 0.0))
    else:
        X = term_matrix(b, grid)
        n = X.shape[0]
        est = X @ beta
        point = _point(b, refs[b.label], 1)
        if any(v == [None] for v in point.values()):
            R = np.zeros_like(X)
        else:
            R = np.repeat(term_matrix(b, point), n, axis=0)
        D = X - R
        diff = D @ beta
        se = np.sqrt(np.maximum(fit.covariance.term_variances(sl, D), 0.0))
    z = stats.norm.ppf(0.5 + level / 2.0)
    out = {"estimate": est, "difference": diff, "std_error": se, "lower": diff - z * se,
           "upper": diff + z * se}
    if fit.model.link.multiplicative:
        out.update(relativity=np.exp(diff), relativity_lower=np.exp(diff - z * se),
                   relativity_upper=np.exp(diff + z * se))
    return out


def relativity_tables(fit, *, reference: dict | None = None,
                      level: float = 0.95) -> RelativityTables:
    """Tables of every term (see the module docstring). ``reference`` overrides the
    reference value of a column, e.g. ``{"driver_age": 40}``."""
    refs = references(fit, reference)
    base_link = float(fit.coefficients_raw[fit.design.slices[0]][0])
    tables: dict[str, pa.Table] = {}
    for b, sl in zip(fit.bases[1:], fit.design.slices[1:]):
        ref = refs[b.label]
        if b.group != "levels" and all(v is not None for v in ref.values()):
            base_link += float((term_matrix(b, _point(b, ref, 1)) @ fit.coefficients_raw[sl])[0])
        grid = b.effect_grid(GRID_POINTS, fit.profile)
        rows = relativity_rows(fit, b.label, grid, refs, level)
        cols = {k: (pa.array(v, type=pa.string()) if isinstance(v, list) else v)
                for k, v in grid.items()}
        share = training_weight(fit.profile, grid)
        if share is not None:
            cols["training_weight"] = share
        cols.update(rows)
        tables[b.label] = pa.table(cols)
    base_rate = float(np.exp(base_link)) if fit.model.link.multiplicative else None
    return RelativityTables(base_rate=base_rate, base_link=base_link, references=refs,
                            tables=tables)


def training_weight(profile, grid: dict) -> np.ndarray | None:
    """Training exposure (or weight, or rows) that each tabulated row stands for, when the
    rows vary in one input only: a level's own, or for a numeric input the values nearer
    to that row's value than to any other row's. None for rows varying in several inputs."""
    varying = [c for c, v in grid.items() if len(set(np.asarray(v).tolist())) > 1]
    if len(varying) != 1 or profile is None or not profile.has_column(varying[0]):
        return None
    c = varying[0]
    prof = profile.columns[c]
    if prof.kind == "levels":
        return prof.mass_of(grid[c])
    if not prof.distinct:
        return None
    x = np.asarray(grid[c], dtype=np.float64)
    order = np.argsort(x, kind="stable")
    xs = x[order]
    nearest = np.searchsorted(0.5 * (xs[1:] + xs[:-1]), prof.values, side="right")
    share = np.zeros(len(x))
    share[order] = np.bincount(nearest, weights=prof.mass, minlength=len(x))
    return share

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
from tallgam.terms import (
    Basis,
    CategoricalBasis,
    InterceptBasis,
    LevelBasis,
    SplineBasis,
    term_matrix,
)

GRID_POINTS = 101


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


def references(fit, overrides: dict | None = None) -> dict[str, dict]:
    """Reference inputs per term (see the module docstring); ``overrides`` maps a column
    to a chosen reference value."""
    overrides = dict(overrides or {})
    cols = fit.profile.get("columns", {})
    out: dict[str, dict] = {}
    for b in fit.bases:
        if isinstance(b, InterceptBasis):
            continue
        ref: dict = {}
        for c, kind in b.spec.input_kinds().items():
            if c in overrides:
                ref[c] = overrides[c]
            elif kind == "levels":
                ref[c] = _base_level(fit, c)
            elif getattr(b.spec, "multiplier", None) == c:
                ref[c] = 0.0
            else:
                info = cols.get(f"num:{c}", {})
                med = info.get("weighted_median")
                ref[c] = float(med if med is not None else info.get("mean", 0.0))
        out[b.label] = ref
    return out


def _base_level(fit, column: str):
    """The base level a column's effects are measured from (None: the average level)."""
    for b in fit.bases:
        if isinstance(b, CategoricalBasis) and b.spec.column == column:
            return b.base
    return None


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
    if isinstance(b, LevelBasis):
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
        ref = dict(refs[b.label])
        if isinstance(b, SplineBasis) and b.levels:  # per-level curves: from the base curve
            ref[b.spec.per] = _base_level(fit, b.spec.per)
        point = _point(b, ref, 1)
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
    if fit.model.link.name == "log":
        out.update(relativity=np.exp(diff), relativity_lower=np.exp(diff - z * se),
                   relativity_upper=np.exp(diff + z * se))
    return out


def table_grid(fit, b: Basis) -> dict:
    """Where to tabulate a term: listed training values of small-valued numeric columns
    (ages, bonus levels), else an even grid; every level of level columns."""
    cols = fit.profile.get("columns", {})
    ranges = {k.split(":", 1)[1]: (v["min"], v["max"]) for k, v in cols.items()
              if k.startswith("num:") and v.get("min") is not None}
    grid = b.effect_grid(GRID_POINTS, ranges)
    kinds = b.spec.input_kinds()
    numeric = [c for c, k in kinds.items() if k == "numeric"
               and c != getattr(b.spec, "multiplier", None)]
    if len(numeric) == 1 and not isinstance(b, LevelBasis):
        c = numeric[0]
        listed = cols.get(f"num:{c}", {}).get("values")
        if listed is not None and len(grid[c]):
            values = np.asarray(listed, dtype=np.float64)
            reps = len(grid[c]) // len(np.unique(grid[c]))
            per = getattr(b.spec, "per", None)
            grid = {c: np.tile(values, reps)}
            if per:
                grid[per] = [lev for lev in b.levels for _ in range(len(values))]
            if getattr(b.spec, "multiplier", None):
                grid[b.spec.multiplier] = np.ones(len(grid[c]))
    return grid


def relativity_tables(fit, *, reference: dict | None = None,
                      level: float = 0.95) -> RelativityTables:
    """Tables of every term (see the module docstring). ``reference`` overrides the
    reference value of a column, e.g. ``{"driver_age": 40}``."""
    refs = references(fit, reference)
    base_link = float(fit.coefficients_raw[fit.design.slices[0]][0])
    tables: dict[str, pa.Table] = {}
    counts = _level_counts(fit)
    for b, sl in zip(fit.bases, fit.design.slices):
        if isinstance(b, InterceptBasis):
            continue
        ref = dict(refs[b.label])
        if isinstance(b, SplineBasis) and b.levels:
            ref[b.spec.per] = _base_level(fit, b.spec.per)
        if not isinstance(b, LevelBasis) and all(v is not None for v in ref.values()):
            base_link += float((term_matrix(b, _point(b, ref, 1)) @ fit.coefficients_raw[sl])[0])
        grid = table_grid(fit, b)
        rows = relativity_rows(fit, b.label, grid, refs, level)
        cols = {k: (pa.array(v, type=pa.string()) if isinstance(v, list) else v)
                for k, v in grid.items()}
        share = _share(fit, b, grid, counts)
        if share is not None:
            cols["training_weight"] = share
        cols.update(rows)
        tables[b.label] = pa.table(cols)
    base_rate = float(np.exp(base_link)) if fit.model.link.name == "log" else None
    return RelativityTables(base_rate=base_rate, base_link=base_link, references=refs,
                            tables=tables)


def _level_counts(fit) -> dict[str, dict[str, float]]:
    out = {}
    for key, info in fit.profile.get("columns", {}).items():
        if key.startswith("lev:"):
            out[key[4:]] = info.get("levels", {})
        elif key.startswith("num:") and "values" in info:
            out[key[4:]] = dict(zip((repr(float(v)) for v in info["values"]),
                                    info.get("value_weights", [])))
    return out


def _share(fit, b: Basis, grid: dict, counts: dict) -> np.ndarray | None:
    """Training rows (or exposure) at each tabulated value or level, where known."""
    kinds = b.spec.input_kinds()
    main = [c for c, k in kinds.items() if c != getattr(b.spec, "multiplier", None)]
    if len(main) != 1 or main[0] not in counts:
        return None
    c = main[0]
    table = counts[c]
    values = grid[c]
    if kinds[c] == "levels":
        return np.array([float(table.get(str(v), 0.0)) for v in values])
    return np.array([float(table.get(repr(float(v)), 0.0)) for v in values])

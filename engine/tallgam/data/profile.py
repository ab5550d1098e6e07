"""The profile pass: what the training data look like, from two aggregate queries.

The first query returns the row count and, per profiled quantity, NULL and non-finite
counts, minimum, maximum, mean, standard deviation and whether every value is a whole
number; the row count of every level of a level column; and counts with a few example
values of rows that break a stated rule (e.g. negative claim counts). The second
(:func:`add_value_histograms`) counts the rows, and sums the exposure (or weights), per
value of every numeric model column and per level of every level column: numeric values
are placed on a grid of ``HIST_BUCKETS`` steps from the column's minimum to its maximum,
which is exact for whole-number columns spanning at most that many values (ages, years,
bonus levels). A positive column whose values bunch at the low end of a range of several
orders of magnitude (a population density, a sum insured: :func:`geometric_grid`) gets
steps of equal ratio instead, so the bulk of its data is not crushed into the first steps.
Grid values are rounded to 12 significant digits (:func:`tidy`). One grouped query serves
all columns; memory is bounded by the grid, never by the rows.

The result is a :class:`DataProfile`: the model's columns (:meth:`DataProfile.numeric`,
:meth:`DataProfile.levels`) and its roles (response, weights, exposure, offset:
:meth:`DataProfile.role`). It is kept on the fit result and saved in the model file, with
the value histograms merged to at most ``SAVED_VALUES`` values per column
(:meth:`DataProfile.compact`).
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace

import numpy as np

from tallgam.data.sources import Source
from tallgam.errors import DataError, ModelFileError

HIST_BUCKETS = 10_000  # grid steps from minimum to maximum in the value histograms
TIDY_DIGITS = 12       # significant digits kept of grid values (no float noise)
SAVED_VALUES = 2_000   # histogram values kept per column in the model file
EXAMPLES = 5
ROLES = ("response", "weights", "exposure", "offset")


@dataclass
class Field:
    """One thing to profile: a model column (``role`` None) or a role of the model
    (response, weights, exposure, offset). ``expr`` is SQL over the source; ``kind`` is
    ``"numeric"`` or ``"levels"``."""

    name: str
    expr: str
    kind: str = "numeric"
    role: str | None = None

    @property
    def key(self) -> str:
        """The name rules refer to: the role, or the column."""
        return self.role or self.name


@dataclass
class Rule:
    """Rows where ``condition`` (SQL over ``{role}`` placeholders) holds are counted as bad."""

    key: str
    field: str
    condition: str
    message: str


@dataclass
class NumericProfile:
    """A numeric column or role: counts, range, moments and the value histogram.

    ``values`` (m,) are the histogram's grid values in increasing order, ``rows`` (m,) the
    rows at each and ``weight`` (m,) their total exposure (or prior weight; None when the
    model has neither)."""

    nulls: int = 0
    nonfinite: int = 0
    min: float | None = None
    max: float | None = None
    mean: float | None = None
    sd: float | None = None
    integer: bool = False  # every finite value is a whole number
    values: np.ndarray | None = None
    rows: np.ndarray | None = None
    weight: np.ndarray | None = None

    kind = "numeric"

    @property
    def distinct(self) -> int:
        """Distinct histogram values (the distinct values for whole-number columns)."""
        return 0 if self.values is None else len(self.values)

    @property
    def mass(self) -> np.ndarray | None:
        """Exposure (or weight) per histogram value, else rows."""
        return self.weight if self.weight is not None else self.rows

    def weighted_quantiles(self, probs) -> np.ndarray:
        """Exposure- (or weight-) weighted quantiles of the histogram's values."""
        if not self.distinct:
            return np.full(np.shape(probs), np.nan)
        cum = np.cumsum(self.mass)
        idx = np.searchsorted(cum, np.asarray(probs, dtype=np.float64) * cum[-1], side="left")
        return self.values[np.minimum(idx, self.distinct - 1)]

    def weighted_median(self) -> float | None:
        """The exposure- (or weight-) weighted median of the histogram's values."""
        if not self.distinct:
            return None
        return float(self.weighted_quantiles(0.5))

    def to_dict(self) -> dict:
        out = {"kind": "numeric", "nulls": self.nulls, "nonfinite": self.nonfinite,
               "min": self.min, "max": self.max, "mean": self.mean, "sd": self.sd,
               "integer": self.integer}
        if self.values is not None:
            out["histogram"] = {"values": self.values.tolist(), "rows": self.rows.tolist(),
                                "weight": None if self.weight is None else self.weight.tolist()}
        return out

    def compact(self, limit: int = SAVED_VALUES) -> NumericProfile:
        """A copy whose histogram has at most ``limit`` values (neighbours merged)."""
        if self.values is None or len(self.values) <= limit:
            return self
        values, rows, weight = _merged(self.values, self.rows, self.weight, limit)
        return replace(self, values=values, rows=rows, weight=weight)

    @classmethod
    def from_dict(cls, d: dict) -> NumericProfile:
        out = cls(nulls=int(d.get("nulls", 0)), nonfinite=int(d.get("nonfinite", 0)),
                  min=_opt_float(d.get("min")), max=_opt_float(d.get("max")),
                  mean=_opt_float(d.get("mean")), sd=_opt_float(d.get("sd")),
                  integer=bool(d.get("integer", False)))
        hist = d.get("histogram")
        if hist is not None:
            out.values = np.asarray(hist["values"], dtype=np.float64)
            out.rows = np.asarray(hist["rows"], dtype=np.float64)
            if hist.get("weight") is not None:
                out.weight = np.asarray(hist["weight"], dtype=np.float64)
        elif "values" in d:  # files of schema 1 and 2: a short list of listed values
            out.values = np.asarray(d["values"], dtype=np.float64)
            out.rows = np.asarray(d.get("value_weights", np.ones(len(out.values))),
                                  dtype=np.float64)
        return out


@dataclass
class LevelProfile:
    """A level column: its levels in level order, rows and exposure (or weight) of each."""

    nulls: int = 0
    labels: np.ndarray | None = None
    rows: np.ndarray | None = None
    weight: np.ndarray | None = None

    kind = "levels"

    @property
    def distinct(self) -> int:
        return 0 if self.labels is None else len(self.labels)

    @property
    def mass(self) -> np.ndarray | None:
        return self.weight if self.weight is not None else self.rows

    def mass_of(self, labels) -> np.ndarray:
        """Exposure (or rows) of the given levels; 0 for levels not in the training data."""
        index = {str(v): i for i, v in enumerate(self.labels if self.labels is not None
                                                  else [])}
        mass = self.mass
        return np.array([float(mass[index[str(v)]]) if str(v) in index else 0.0
                         for v in labels])

    def to_dict(self) -> dict:
        labels = [] if self.labels is None else [str(v) for v in self.labels]
        out = {"kind": "levels", "nulls": self.nulls,
               "levels": {lab: int(c) for lab, c in zip(labels, self.rows)}}
        if self.weight is not None:
            out["weight"] = [float(v) for v in self.weight]
        return out

    @classmethod
    def from_dict(cls, d: dict) -> LevelProfile:
        levels = d.get("levels", {})
        out = cls(nulls=int(d.get("nulls", 0)),
                  labels=np.array([str(k) for k in levels], dtype=object),
                  rows=np.array([float(v) for v in levels.values()], dtype=np.float64))
        if d.get("weight") is not None:
            out.weight = np.asarray(d["weight"], dtype=np.float64)
        return out


ColumnProfile = NumericProfile | LevelProfile


@dataclass
class DataProfile:
    """The training data as the model saw them: rows, its columns and its roles.

    ``weight_name`` says what the histograms' ``weight`` sums: ``"exposure"``,
    ``"weights"`` or None (rows only)."""

    rows: int
    columns: dict[str, ColumnProfile] = field(default_factory=dict)
    roles: dict[str, NumericProfile] = field(default_factory=dict)
    violations: dict[str, tuple[int, list, str]] = field(default_factory=dict)
    weight_name: str | None = None

    def numeric(self, column: str) -> NumericProfile:
        """The profile of a numeric model column (DataError if it was not profiled so)."""
        return self._column(column, NumericProfile, "numeric")

    def levels(self, column: str) -> LevelProfile:
        """The profile of a level column (DataError if it was not profiled so)."""
        return self._column(column, LevelProfile, "level")

    def role(self, name: str) -> NumericProfile | None:
        """The profile of a role (``"response"``, ``"weights"``, ``"exposure"``,
        ``"offset"``), or None when the model has no such role."""
        return self.roles.get(name)

    def has_column(self, column: str) -> bool:
        return column in self.columns

    def ranges(self) -> dict[str, tuple[float, float]]:
        """(min, max) of every numeric model column."""
        return {c: (p.min, p.max) for c, p in self.columns.items()
                if isinstance(p, NumericProfile) and p.min is not None}

    def _column(self, column, cls, what):
        prof = self.columns.get(column)
        if not isinstance(prof, cls):
            raise DataError(f"the data profile has no {what} column {column!r}")
        return prof

    def missing(self) -> dict[str, tuple[int, int]]:
        """(NULL, NaN/inf) counts of every profiled column and role that has any."""
        out = {}
        for name, prof in [*self.roles.items(), *self.columns.items()]:
            bad = (prof.nulls, getattr(prof, "nonfinite", 0))
            if sum(bad):
                out[name] = bad
        return out

    def compact(self, limit: int = SAVED_VALUES) -> DataProfile:
        """A copy with every histogram merged to at most ``limit`` values: what a fit result
        keeps and its model file holds."""
        columns = {k: (p.compact(limit) if isinstance(p, NumericProfile) else p)
                   for k, p in self.columns.items()}
        return replace(self, columns=columns)

    def to_dict(self) -> dict:
        return {"rows": self.rows, "weight_name": self.weight_name,
                "roles": {k: p.to_dict() for k, p in self.roles.items()},
                "columns": {k: p.to_dict() for k, p in self.columns.items()}}

    @classmethod
    def from_dict(cls, d: dict) -> DataProfile:
        """Read a saved profile (this schema, or the "num:"/"lev:" keys of schemas 1–2)."""
        if not isinstance(d, dict) or "rows" not in d:
            raise ModelFileError("the data profile lacks its row count")
        out = cls(rows=int(d["rows"]), weight_name=d.get("weight_name"))
        for name, p in d.get("roles", {}).items():
            out.roles[name] = NumericProfile.from_dict(p)
        for key, p in d.get("columns", {}).items():
            if key in ROLES:                      # schema 1–2: roles beside the columns
                out.roles[key] = NumericProfile.from_dict(p)
                continue
            name = key.split(":", 1)[1] if key[:4] in ("num:", "lev:") else key
            if p.get("kind") == "levels":
                out.columns[name] = LevelProfile.from_dict(p)
            else:
                out.columns[name] = NumericProfile.from_dict(p)
        return out


def tidy(values, digits: int = TIDY_DIGITS) -> np.ndarray:
    """Values rounded to ``digits`` significant digits: removes the float noise of sums and
    grid arithmetic (0.1 + 0.2) and leaves any value written with fewer digits unchanged."""
    x = np.asarray(values, dtype=np.float64)
    # decimal rounding through the shortest text: exact at every magnitude (1e-300 too)
    return np.array([float(f"{v:.{digits}g}") for v in x.ravel()],
                    dtype=np.float64).reshape(x.shape)


def geometric_grid(fp: NumericProfile) -> bool:
    """Whether a numeric column's histogram uses steps of equal ratio: a positive column,
    not whole numbers on a short range, spanning at least two orders of magnitude with its
    mean in the lowest 5% of the range (the skew of a lognormal-like column)."""
    lo, hi, mean = fp.min, fp.max, fp.mean
    if lo is None or hi is None or mean is None or not lo > 0:
        return False
    if fp.integer and hi - lo <= HIST_BUCKETS:
        return False
    return hi / lo >= 100 and (mean - lo) < 0.05 * (hi - lo)


def _opt_float(v) -> float | None:
    return None if v is None else float(v)


def _merged(values, rows, weight, limit: int):
    """A histogram with at most ``limit`` values: neighbouring values merged into their
    row-weighted mean (exact when there are no more than ``limit``)."""
    if len(values) <= limit:
        return values, rows, weight
    group = np.floor(np.arange(len(values)) * limit / len(values)).astype(np.int64)
    r = np.bincount(group, weights=rows)
    mass = weight if weight is not None else rows
    m = np.bincount(group, weights=mass)
    v = np.bincount(group, weights=values * np.maximum(mass, 1e-300)) / np.maximum(
        np.bincount(group, weights=np.maximum(mass, 1e-300)), 1e-300)
    v[0], v[-1] = values[0], values[-1]        # the extremes stay exact
    return v, r, (m if weight is not None else None)


def _alias(i: int) -> str:
    return f"f{i}"


def _profile_of(f: Field) -> ColumnProfile:
    return NumericProfile() if f.kind == "numeric" else LevelProfile()


def _store(prof: DataProfile, f: Field, p: ColumnProfile) -> None:
    if f.role is not None:
        prof.roles[f.role] = p
    else:
        prof.columns[f.name] = p


def _lookup(prof: DataProfile, f: Field) -> ColumnProfile:
    return prof.roles[f.role] if f.role is not None else prof.columns[f.name]


def run_profile(source: Source, fields: list[Field], rules: list[Rule], where: str | None,
                histograms: bool = True, weight_expr: str | None = None,
                weight_name: str | None = None) -> DataProfile:
    """Profile ``fields`` over ``source`` filtered by ``where``: one aggregate query, then
    with ``histograms`` the value histograms (:func:`add_value_histograms`, Σ
    ``weight_expr`` per value when given)."""
    alias = {f.key: _alias(i) for i, f in enumerate(fields)}
    inner = []
    finite = []   # numeric fields again with non-finite values as NULL: no FILTER clauses
    for f in fields:
        cast = "DOUBLE" if f.kind == "numeric" else "VARCHAR"
        inner.append(f"CAST({f.expr} AS {cast}) AS {alias[f.key]}")
        if f.kind == "numeric":
            a = alias[f.key]
            finite.append(f"CASE WHEN isfinite({a}) THEN {a} END AS g{a}")
    aggs = ["count(*)"]
    layout: list[tuple[Field, str]] = []
    for f in fields:
        a = alias[f.key]
        aggs.append(f"count(*) - count({a})")
        layout.append((f, "nulls"))
        if f.kind == "numeric":
            g = f"g{a}"
            aggs += [f"count({a}) - count({g})", f"min({g})", f"max({g})", f"avg({g})",
                     f"stddev_pop({g})", f"bool_and({g} = floor({g}))"]
            layout += [(f, k) for k in ("nonfinite", "min", "max", "mean", "sd", "integer")]
        else:
            aggs.append(f"histogram({a})")
            layout.append((f, "hist"))
    for r in rules:
        cond = r.condition.format(**alias)
        a = alias[r.field]
        aggs += [f"count(*) FILTER (WHERE {cond})", f"min({a}, {EXAMPLES}) FILTER (WHERE {cond})"]
        layout += [(r, "rule_n"), (r, "rule_ex")]
    where_sql = f" WHERE {where}" if where else ""
    text = (f"WITH r AS (SELECT {', '.join(inner)} FROM tallgam_source{where_sql}), "
            f"s AS (SELECT *{''.join(', ' + x for x in finite)} FROM r) "
            f"SELECT {', '.join(aggs)} FROM s")
    row = source.fetchall(text)[0]
    prof = DataProfile(rows=int(row[0]), weight_name=weight_name if weight_expr else None)
    for f in fields:
        _store(prof, f, _profile_of(f))
    pending: dict[str, dict] = {}
    for (item, what), value in zip(layout, row[1:]):
        if what == "rule_n":
            pending[item.key] = {"n": int(value or 0), "rule": item}
        elif what == "rule_ex":
            pending[item.key]["ex"] = list(value or [])
            continue
        p = _lookup(prof, item) if isinstance(item, Field) else None
        if what == "hist":
            _set_levels(p, value or {})
        elif what == "integer":
            p.integer = bool(value)
        elif what in ("nulls", "nonfinite"):
            setattr(p, what, int(value or 0))
        elif what != "rule_n":
            setattr(p, what, None if value is None else float(value))
    for key, info in pending.items():
        if info["n"]:
            prof.violations[key] = (info["n"], info["ex"], info["rule"].message)
    if histograms:
        add_value_histograms(source, prof, fields, weight_expr, where, weight_name)
    return prof


def _set_levels(lp: LevelProfile, hist: dict) -> None:
    """Level labels and their row counts, in level order."""
    keys = list(hist.keys())
    rows = np.array([hist[k] for k in keys], dtype=np.float64)
    labels = np.array([str(k) for k in keys], dtype=object)
    order = level_order(labels)
    lp.labels = labels[order]
    lp.rows = rows[order]


def level_order(labels: np.ndarray) -> np.ndarray:
    """Sort order of level labels: numerically when every label is a number, else as text."""
    try:
        nums = np.array([float(v) for v in labels])
        return np.lexsort((labels.astype(str), nums))
    except ValueError:
        return np.argsort(labels.astype(str), kind="stable")


def add_value_histograms(source: Source, prof: DataProfile, fields: list[Field],
                         weight_expr: str | None, where: str | None,
                         weight_name: str | None = None) -> None:
    """Rows (and Σ weight, with ``weight_expr``) per grid value of every numeric model
    column and per level of every level column, in one grouped query; needs the minimum
    and maximum from :func:`run_profile`."""
    prof.weight_name = weight_name if weight_expr else None
    numeric = [f for f in fields if f.role is None and f.kind == "numeric"
               and prof.columns[f.name].min is not None]
    levels = [f for f in fields if f.role is None and f.kind == "levels"]
    if not numeric and not levels:
        return
    keys = [f"h{i}" for i in range(len(numeric) + len(levels))]
    grids = []
    inner = []
    for f, k in zip(numeric, keys):
        fp = prof.columns[f.name]
        lo, hi = float(fp.min), float(fp.max)
        x = f"CAST({f.expr} AS DOUBLE)"
        if geometric_grid(fp):  # steps of equal ratio: k = round(ln(x / lo) / ln-step)
            step = float(np.log(hi / lo)) / HIST_BUCKETS
            grids.append((lo, step, True))
            inner.append(f"CASE WHEN isfinite({x}) THEN CAST(round(ln({x} / {lo!r}) / "
                         f"{step!r}) AS BIGINT) END AS {k}")
            continue
        step = 1.0 if fp.integer and hi - lo <= HIST_BUCKETS else (hi - lo) / HIST_BUCKETS
        step = step or 1.0
        grids.append((lo, step, False))
        inner.append(f"CASE WHEN isfinite({x}) THEN CAST(round(({x} - {lo!r}) / {step!r}) "
                     f"AS BIGINT) END AS {k}")
    for f, k in zip(levels, keys[len(numeric):]):
        inner.append(f"CAST({f.expr} AS VARCHAR) AS {k}")
    weight = f"CAST({weight_expr} AS DOUBLE)" if weight_expr else "1.0"
    where_sql = f" WHERE {where}" if where else ""
    sets = ", ".join(f"({k})" for k in keys)
    text = (f"WITH s AS (SELECT {', '.join(inner)}, {weight} AS w "
            f"FROM tallgam_source{where_sql}) "
            f"SELECT grouping_id({', '.join(keys)}) AS gid, {', '.join(keys)}, count(*), "
            f"sum(w) FROM s GROUP BY GROUPING SETS ({sets})")
    rows = source.fetchall(text)
    n = len(keys)
    per: list[dict] = [{} for _ in keys]
    for row in rows:
        gid = row[0]
        for i in range(n):
            if not (gid >> (n - 1 - i)) & 1:  # this set groups by key i
                if row[1 + i] is not None:
                    per[i][row[1 + i]] = (int(row[-2]), float(row[-1] or 0.0))
                break
    for i, f in enumerate(numeric):
        fp = prof.columns[f.name]
        lo, step, ratio = grids[i]
        ks = np.array(sorted(per[i]), dtype=np.int64)
        grid = lo * np.exp(ks * step) if ratio else lo + ks * step
        fp.values = np.minimum(tidy(grid), fp.max) if len(ks) else np.zeros(0)
        fp.rows = np.array([per[i][k][0] for k in ks], dtype=np.float64)
        if weight_expr:
            fp.weight = np.array([per[i][k][1] for k in ks], dtype=np.float64)
    if weight_expr:
        for j, f in enumerate(levels):
            lp = prof.columns[f.name]
            got = per[len(numeric) + j]
            lp.weight = np.array([got.get(str(lab), (0, 0.0))[1] for lab in lp.labels],
                                 dtype=np.float64)

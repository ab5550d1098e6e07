"""The profile pass: what the training data look like, from two scans.

The first scan (:func:`profile_scan`) gives the row count and, per profiled quantity, NULL and
non-finite counts, minimum, maximum, mean, standard deviation and whether every value is a
whole number; the row count of every level of a level column; and counts with a few example
values of rows that break a stated rule (e.g. negative claim counts). The second
(:func:`histogram_scan`) counts the rows, and sums the exposure (or weights), per value of
every numeric model column and per level of every level column: numeric values are placed on a
grid of ``HIST_BUCKETS`` steps from the column's minimum to its maximum, which is exact for
whole-number columns spanning at most that many values (ages, years, bonus levels). A positive
column whose values bunch at the low end of a range of several orders of magnitude (a
population density, a sum insured: :func:`geometric_grid`) gets steps of equal ratio instead,
so the bulk of its data is not crushed into the first steps. Grid values are rounded to 12
significant digits (:func:`tidy`). DuckDB reads, filters and casts; small numba loops reduce
each batch into sums that merge by addition, so cluster workers can profile parts of the data
and the client merges them (:class:`ProfileSums`, :class:`HistogramSums`). Memory is bounded
by the grid and a batch, never by the rows.

The result is a :class:`DataProfile`: the model's columns (:meth:`DataProfile.numeric`,
:meth:`DataProfile.levels`) and its roles (response, weights, exposure, offset:
:meth:`DataProfile.role`). It is kept on the fit result and saved in the model file, with
the value histograms merged to at most ``SAVED_VALUES`` values per column
(:meth:`DataProfile.compact`).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field, replace

import numba
import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

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


# --------------------------------------------------------------------------- the scans
# Both scans read the profiled quantities in batches and reduce them with small numba loops
# into sums that merge by addition (or min/max), so a profile is the same whether one
# process reads the whole source or cluster workers read its parts and the client merges.

SCAN_ROWS = 1_000_000  # rows per batch of a profile scan


@numba.njit(cache=True)
def _numeric_sums(x):
    """(finite rows, min, max, mean, M2 = Σ(x − mean)², all whole numbers) of x's finite
    values (mean and M2 by two loops over the batch)."""
    n = 0
    lo = np.inf
    hi = -np.inf
    total = 0.0
    whole = True
    for v in x:
        if math.isfinite(v):
            n += 1
            lo = min(lo, v)
            hi = max(hi, v)
            total += v
            if whole and v != math.floor(v):
                whole = False
    mean = total / n if n else 0.0
    m2 = 0.0
    for v in x:
        if math.isfinite(v):
            d = v - mean
            m2 += d * d
    return n, lo, hi, mean, m2, whole


@numba.njit(cache=True)
def _bucket_sums(x, w, lo, step, ratio, buckets, rows, weight):
    """rows[k] += 1 and weight[k] += w for every finite x, k = round((x − lo)/step), or
    with ``ratio`` k = round(ln(x/lo)/step), rounded half away from zero and clipped to
    [0, buckets]."""
    for i in range(x.shape[0]):
        v = x[i]
        if math.isfinite(v):
            if ratio:
                t = math.log(v / lo) / step if v > 0 else 0.0
            else:
                t = (v - lo) / step
            k = int(math.floor(t + 0.5))
            if k < 0:
                k = 0
            elif k > buckets:
                k = buckets
            rows[k] += 1.0
            weight[k] += w[i]


@dataclass
class ColumnSums:
    """The first scan's sums of one numeric quantity."""

    nulls: int = 0
    nonfinite: int = 0
    n: int = 0
    min: float = math.inf
    max: float = -math.inf
    mean: float = 0.0
    m2: float = 0.0
    whole: bool = True

    def add(self, nulls: int, nonfinite: int, n, lo, hi, mean, m2, whole) -> None:
        self.nulls += nulls
        self.nonfinite += nonfinite
        if n:   # Chan, Golub & LeVeque (1983): pooled mean and sum of squares
            total = self.n + n
            delta = mean - self.mean
            self.mean += delta * n / total
            self.m2 += m2 + delta * delta * self.n * n / total
            self.n = total
            self.min, self.max = min(self.min, lo), max(self.max, hi)
            self.whole = self.whole and bool(whole)

    def merge(self, other: ColumnSums) -> ColumnSums:
        out = replace(self)
        out.add(other.nulls, other.nonfinite, other.n, other.min, other.max, other.mean,
                other.m2, other.whole)
        return out


@dataclass
class ProfileSums:
    """What the first profile scan takes from a source (or a part of it): rows, per numeric
    quantity :class:`ColumnSums`, per level column its NULLs and rows per level, per rule
    its count of bad rows and smallest examples. Parts merge with :meth:`merge`."""

    rows: int = 0
    numeric: dict = field(default_factory=dict)   # field key -> ColumnSums
    levels: dict = field(default_factory=dict)    # field key -> (nulls, {label: rows})
    rules: dict = field(default_factory=dict)     # rule key -> (bad rows, examples)

    def merge(self, other: ProfileSums) -> ProfileSums:
        out = ProfileSums(self.rows + other.rows)
        for k in self.numeric.keys() | other.numeric.keys():
            a, b = self.numeric.get(k), other.numeric.get(k)
            out.numeric[k] = a.merge(b) if a and b else replace(a or b)
        for k in self.levels.keys() | other.levels.keys():
            na, ca = self.levels.get(k, (0, {}))
            nb, cb = other.levels.get(k, (0, {}))
            counts = dict(ca)
            for label, c in cb.items():
                counts[label] = counts.get(label, 0) + c
            out.levels[k] = (na + nb, counts)
        for k in self.rules.keys() | other.rules.keys():
            na, ea = self.rules.get(k, (0, []))
            nb, eb = other.rules.get(k, (0, []))
            out.rules[k] = (na + nb, sorted(ea + eb)[:EXAMPLES])
        return out

    def profile(self, fields: list[Field], rules: list[Rule]) -> DataProfile:
        """The :class:`DataProfile` (without value histograms) these sums describe."""
        prof = DataProfile(rows=int(self.rows))
        for f in fields:
            if f.kind == "numeric":
                c = self.numeric[f.key]
                p = NumericProfile(nulls=c.nulls, nonfinite=c.nonfinite)
                if c.n:
                    p.min, p.max, p.mean = float(c.min), float(c.max), float(c.mean)
                    p.sd = float(math.sqrt(max(c.m2, 0.0) / c.n))
                    p.integer = bool(c.whole)
            else:
                nulls, counts = self.levels[f.key]
                p = LevelProfile(nulls=nulls)
                _set_levels(p, counts)
            _store(prof, f, p)
        for r in rules:
            n, examples = self.rules.get(r.key, (0, []))
            if n:
                prof.violations[r.key] = (int(n), list(examples), r.message)
        return prof


def _scan(source: Source, columns: list[str], where: str | None, extra: list[str] = (),
          batch_rows: int = SCAN_ROWS):
    """Arrow batches of ``columns`` (SQL with aliases) over the filtered source, and of
    ``extra`` (SQL over those aliases)."""
    where_sql = f" WHERE {where}" if where else ""
    text = f"SELECT {', '.join(columns)} FROM tallgam_source{where_sql}"
    if extra:
        text = f"WITH r AS ({text}) SELECT *, {', '.join(extra)} FROM r"
    yield from source.stream(text, batch_rows, "profiling")


def profile_scan(source: Source, fields: list[Field], rules: list[Rule],
                 where: str | None, batch_rows: int = SCAN_ROWS) -> ProfileSums:
    """The first profile scan of ``source`` (filtered by ``where``): :class:`ProfileSums`
    of ``fields`` and ``rules``."""
    alias = {f.key: _alias(i) for i, f in enumerate(fields)}
    columns = [f"CAST({f.expr} AS {'DOUBLE' if f.kind == 'numeric' else 'VARCHAR'}) "
               f"AS {alias[f.key]}" for f in fields]
    checks = [f"coalesce(CAST(({r.condition.format(**alias)}) AS BOOLEAN), false) AS q{i}"
              for i, r in enumerate(rules)]
    out = ProfileSums()
    for f in fields:
        if f.kind == "numeric":
            out.numeric[f.key] = ColumnSums()
        else:
            out.levels[f.key] = (0, {})
    for r in rules:
        out.rules[r.key] = (0, [])
    for batch in _scan(source, columns, where, checks, batch_rows):
        out.rows += batch.num_rows
        cols = dict(zip(batch.schema.names, batch.columns))
        for f in fields:
            col = cols[alias[f.key]]
            if f.kind == "numeric":
                x = np.ascontiguousarray(col.to_numpy(zero_copy_only=False), dtype=np.float64)
                n, lo, hi, mean, m2, whole = _numeric_sums(x)
                nonfinite = len(x) - n - col.null_count
                out.numeric[f.key].add(col.null_count, nonfinite, n, lo, hi, mean, m2, whole)
            else:
                nulls, counts = out.levels[f.key]
                for item in pc.value_counts(col).to_pylist():
                    if item["values"] is not None:
                        label = str(item["values"])
                        counts[label] = counts.get(label, 0) + int(item["counts"])
                out.levels[f.key] = (nulls + col.null_count, counts)
        for i, r in enumerate(rules):
            bad = cols[f"q{i}"]
            count = pc.sum(bad).as_py() or 0
            if count:
                values = pc.drop_null(pc.filter(cols[alias[r.field]], bad))
                examples = sorted(values.to_pylist())[:EXAMPLES]
                n, ex = out.rules[r.key]
                out.rules[r.key] = (n + count, sorted(ex + examples)[:EXAMPLES])
    return out


@dataclass
class HistogramSums:
    """What the second profile scan takes from a source (or a part): per numeric model
    column rows and Σ weight per grid step (``grid``: its first value and step), per level
    column Σ weight per level. Parts merge with :meth:`merge`."""

    grid: dict = field(default_factory=dict)     # column -> (lo, step, equal ratio?)
    rows: dict = field(default_factory=dict)     # column -> (HIST_BUCKETS + 1,)
    weight: dict = field(default_factory=dict)   # column -> (HIST_BUCKETS + 1,) or levels
    weighted: bool = False

    def merge(self, other: HistogramSums) -> HistogramSums:
        return HistogramSums(dict(self.grid),
                             {k: v + other.rows[k] for k, v in self.rows.items()},
                             {k: v + other.weight[k] for k, v in self.weight.items()},
                             self.weighted)

    def apply(self, prof: DataProfile, weight_name: str | None) -> None:
        """Put the histograms into ``prof``."""
        prof.weight_name = weight_name if self.weighted else None
        for name, (lo, step, ratio) in self.grid.items():
            fp = prof.columns[name]
            rows = self.rows[name]
            ks = np.flatnonzero(rows)
            grid = lo * np.exp(ks * step) if ratio else lo + ks * step
            fp.values = np.minimum(tidy(grid), fp.max) if len(ks) else np.zeros(0)
            fp.rows = rows[ks]
            fp.weight = self.weight[name][ks] if self.weighted else None
        if self.weighted:
            for name, weight in self.weight.items():
                if name not in self.grid:
                    prof.columns[name].weight = weight


def histogram_plan(prof: DataProfile, fields: list[Field]) -> tuple[list, list]:
    """The numeric model columns with their grid (lo, step, equal ratio?) and the level
    columns that the histograms cover."""
    numeric = []
    for f in fields:
        if f.role is None and f.kind == "numeric" and prof.columns[f.name].min is not None:
            fp = prof.columns[f.name]
            lo, hi = float(fp.min), float(fp.max)
            if geometric_grid(fp):  # steps of equal ratio in ln(x / lo)
                numeric.append((f, lo, float(np.log(hi / lo)) / HIST_BUCKETS, True))
                continue
            step = 1.0 if fp.integer and hi - lo <= HIST_BUCKETS else (hi - lo) / HIST_BUCKETS
            numeric.append((f, lo, step or 1.0, False))
    levels = [f for f in fields if f.role is None and f.kind == "levels"]
    return numeric, levels


def histogram_scan(source: Source, prof: DataProfile, fields: list[Field],
                   weight_expr: str | None, where: str | None,
                   batch_rows: int = SCAN_ROWS) -> HistogramSums:
    """The second profile scan: rows (and Σ ``weight_expr``) per grid value of every
    numeric model column and per level of every level column; needs the minimum and
    maximum (and the levels) from the first scan in ``prof``."""
    numeric, levels = histogram_plan(prof, fields)
    out = HistogramSums(weighted=weight_expr is not None)
    for f, lo, step, ratio in numeric:
        out.grid[f.name] = (lo, step, ratio)
        out.rows[f.name] = np.zeros(HIST_BUCKETS + 1)
        out.weight[f.name] = np.zeros(HIST_BUCKETS + 1)
    labels = {}
    for f in levels:
        lp = prof.columns[f.name]
        labels[f.name] = pa.array([str(v) for v in lp.labels], type=pa.string())
        if out.weighted:
            out.weight[f.name] = np.zeros(len(lp.labels))
    if not numeric and not (levels and out.weighted):
        return out
    columns = [f"CAST({f.expr} AS DOUBLE) AS h{i}" for i, (f, *_) in enumerate(numeric)]
    if out.weighted:
        columns += [f"CAST({f.expr} AS VARCHAR) AS g{i}" for i, f in enumerate(levels)]
        columns.append(f"CAST({weight_expr} AS DOUBLE) AS w")
    for batch in _scan(source, columns, where, batch_rows=batch_rows):
        cols = dict(zip(batch.schema.names, batch.columns))
        w = (np.ascontiguousarray(cols["w"].to_numpy(zero_copy_only=False), dtype=np.float64)
             if out.weighted else np.ones(batch.num_rows))
        for i, (f, lo, step, ratio) in enumerate(numeric):
            x = np.ascontiguousarray(cols[f"h{i}"].to_numpy(zero_copy_only=False),
                                     dtype=np.float64)
            _bucket_sums(x, w, lo, step, ratio, HIST_BUCKETS, out.rows[f.name],
                         out.weight[f.name])
        if out.weighted:
            for i, f in enumerate(levels):
                idx = pc.index_in(cols[f"g{i}"], value_set=labels[f.name])
                idx = idx.fill_null(-1).to_numpy(zero_copy_only=False)
                known = idx >= 0
                out.weight[f.name] += np.bincount(idx[known], weights=w[known],
                                                  minlength=len(labels[f.name]))
    return out


def run_profile(source: Source, fields: list[Field], rules: list[Rule], where: str | None,
                histograms: bool = True, weight_expr: str | None = None,
                weight_name: str | None = None) -> DataProfile:
    """Profile ``fields`` over ``source`` filtered by ``where``: the first scan
    (:func:`profile_scan`), then with ``histograms`` the value histograms
    (:func:`add_value_histograms`, Σ ``weight_expr`` per value when given)."""
    prof = profile_scan(source, fields, rules, where).profile(fields, rules)
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
    column and per level of every level column (:func:`histogram_scan`); needs the minimum
    and maximum from :func:`run_profile`."""
    histogram_scan(source, prof, fields, weight_expr, where).apply(prof, weight_name)

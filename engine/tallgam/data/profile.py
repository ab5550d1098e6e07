"""The profile pass: two aggregate queries over the filtered source.

The first returns the row count and, per used column, NULL and non-finite counts, min,
max, mean, standard deviation and whether every value is a whole number; level counts of
categorical columns; and counts with a few example values of rows that break a stated rule
(e.g. negative claim counts). The second (:func:`add_value_histograms`) counts the rows,
and sums the exposure or weights, per value of every numeric column whose distribution is
needed (knots at quantiles, reference values): values are placed on a grid of
``HIST_BUCKETS`` steps from the column's minimum to its maximum, which is exact for
whole-number columns spanning at most that many values (ages, years, bonus levels), and
one grouped query serves all columns. Memory is bounded by the grid, never by the rows.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from tallgam.data.sources import Source

HIST_BUCKETS = 10_000  # grid steps from minimum to maximum in the value histograms
MAX_LISTED_VALUES = 200  # numeric columns with at most this many values keep them listed
EXAMPLES = 5


@dataclass
class Field:
    """One thing to profile: ``expr`` is SQL over the source, ``kind`` numeric|levels."""

    key: str
    expr: str
    kind: str = "numeric"
    histogram: bool = False


@dataclass
class Rule:
    """Rows where ``condition`` (SQL over the field aliases) holds are counted as bad."""

    key: str
    field: str
    condition: str
    message: str


@dataclass
class FieldProfile:
    key: str
    kind: str
    nulls: int = 0
    nonfinite: int = 0
    min: float | None = None
    max: float | None = None
    mean: float | None = None
    sd: float | None = None
    values: np.ndarray | None = None  # histogram grid values (sorted) or level labels
    counts: np.ndarray | None = None
    weights: np.ndarray | None = None  # Σ constraint weight (exposure) per value, if any
    integer: bool = False  # every finite value is a whole number

    @property
    def distinct(self) -> int:
        return 0 if self.values is None else len(self.values)

    def weighted_median(self) -> float | None:
        """The exposure- (or weight-) weighted median of the histogram's values."""
        if self.values is None or not len(self.values):
            return None
        w = self.weights if self.weights is not None else self.counts
        cum = np.cumsum(w)
        return float(self.values[int(np.searchsorted(cum, 0.5 * cum[-1]))])

    def to_dict(self) -> dict:
        out = {"kind": self.kind, "nulls": self.nulls, "nonfinite": self.nonfinite}
        if self.kind == "numeric":
            out.update(min=self.min, max=self.max, mean=self.mean, sd=self.sd)
            if self.values is not None:
                out["distinct_rounded"] = self.distinct
                out["weighted_median"] = self.weighted_median()
                if self.distinct <= MAX_LISTED_VALUES:
                    out["values"] = self.values.tolist()
                    out["value_weights"] = (self.weights if self.weights is not None
                                            else self.counts).tolist()
        else:
            out["levels"] = {str(v): int(c) for v, c in zip(self.values, self.counts)}
        return out


@dataclass
class DataProfile:
    rows: int
    fields: dict[str, FieldProfile] = field(default_factory=dict)
    violations: dict[str, tuple[int, list, str]] = field(default_factory=dict)

    def __getitem__(self, key: str) -> FieldProfile:
        return self.fields[key]

    def to_dict(self) -> dict:
        return {"rows": self.rows, "columns": {k: f.to_dict() for k, f in self.fields.items()}}


def _alias(i: int) -> str:
    return f"f{i}"


def run_profile(source: Source, fields: list[Field], rules: list[Rule], where: str | None,
                histograms: bool = True, weight_expr: str | None = None) -> DataProfile:
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
    layout: list[tuple[str, str]] = []
    for f in fields:
        a = alias[f.key]
        aggs.append(f"count(*) - count({a})")
        layout.append((f.key, "nulls"))
        if f.kind == "numeric":
            g = f"g{a}"
            aggs += [f"count({a}) - count({g})", f"min({g})", f"max({g})", f"avg({g})",
                     f"stddev_pop({g})", f"bool_and({g} = floor({g}))"]
            layout += [(f.key, k) for k in ("nonfinite", "min", "max", "mean", "sd",
                                            "integer")]
        else:
            aggs.append(f"histogram({a})")
            layout.append((f.key, "hist"))
    for r in rules:
        cond = r.condition.format(**{k: alias[k] for k in alias})
        a = alias[r.field]
        aggs += [f"count(*) FILTER (WHERE {cond})", f"min({a}, {EXAMPLES}) FILTER (WHERE {cond})"]
        layout += [(r.key, "rule_n"), (r.key, "rule_ex")]
    where_sql = f" WHERE {where}" if where else ""
    text = (f"WITH r AS (SELECT {', '.join(inner)} FROM tallgam_source{where_sql}), "
            f"s AS (SELECT *{''.join(', ' + x for x in finite)} FROM r) "
            f"SELECT {', '.join(aggs)} FROM s")
    row = source.fetchall(text)[0]
    prof = DataProfile(rows=int(row[0]))
    for f in fields:
        prof.fields[f.key] = FieldProfile(key=f.key, kind=f.kind)
    rule_msgs = {r.key: r.message for r in rules}
    pending: dict[str, dict] = {}
    for (key, what), value in zip(layout, row[1:]):
        if what == "rule_n":
            pending[key] = {"n": int(value or 0)}
        elif what == "rule_ex":
            pending[key]["ex"] = list(value or [])
        elif what == "hist":
            _set_histogram(prof.fields[key], value or {})
        elif what == "integer":
            prof.fields[key].integer = bool(value)
        elif what in ("nulls", "nonfinite"):
            setattr(prof.fields[key], what, int(value or 0))
        else:
            setattr(prof.fields[key], what, None if value is None else float(value))
    for key, info in pending.items():
        if info["n"]:
            prof.violations[key] = (info["n"], info["ex"], rule_msgs[key])
    if histograms:
        add_value_histograms(source, prof, fields, weight_expr, where)
    return prof


def _set_histogram(fp: FieldProfile, hist: dict) -> None:
    """Level labels and their row counts, in level order."""
    keys = list(hist.keys())
    counts = np.array([hist[k] for k in keys], dtype=np.float64)
    values = np.array([str(k) for k in keys], dtype=object)
    order = level_order(values)
    fp.values = values[order]
    fp.counts = counts[order]


def level_order(labels: np.ndarray) -> np.ndarray:
    """Sort order of level labels: numerically when every label is a number, else as text."""
    try:
        nums = np.array([float(v) for v in labels])
        return np.lexsort((labels.astype(str), nums))
    except ValueError:
        return np.argsort(labels.astype(str), kind="stable")


def add_value_histograms(source: Source, prof: DataProfile, fields: list[Field],
                         weight_expr: str | None, where: str | None) -> None:
    """Rows (and Σ weight, with ``weight_expr``) per grid value of every histogram field,
    in one grouped query; needs the minimum and maximum from :func:`run_profile`."""
    hist = [f for f in fields if f.kind == "numeric" and f.histogram
            and prof.fields[f.key].min is not None]
    if not hist:
        return
    keys = [f"h{i}" for i in range(len(hist))]
    grids = []
    inner = []
    for f, k in zip(hist, keys):
        fp = prof.fields[f.key]
        lo, hi = float(fp.min), float(fp.max)
        step = 1.0 if fp.integer and hi - lo <= HIST_BUCKETS else (hi - lo) / HIST_BUCKETS
        step = step or 1.0
        grids.append((lo, step))
        x = f"CAST({f.expr} AS DOUBLE)"
        inner.append(f"CASE WHEN isfinite({x}) THEN CAST(round(({x} - {lo!r}) / {step!r}) "
                     f"AS BIGINT) END AS {k}")
    weight = f"CAST({weight_expr} AS DOUBLE)" if weight_expr else "1.0"
    where_sql = f" WHERE {where}" if where else ""
    sets = ", ".join(f"({k})" for k in keys)
    text = (f"WITH s AS (SELECT {', '.join(inner)}, {weight} AS w "
            f"FROM tallgam_source{where_sql}) "
            f"SELECT grouping_id({', '.join(keys)}) AS gid, {', '.join(keys)}, count(*), "
            f"sum(w) FROM s GROUP BY GROUPING SETS ({sets})")
    rows = source.fetchall(text)
    n = len(keys)
    per: list[dict[int, tuple[int, float]]] = [{} for _ in hist]
    for row in rows:
        gid = row[0]
        for i in range(n):
            if not (gid >> (n - 1 - i)) & 1:  # this set groups by key i
                if row[1 + i] is not None:
                    per[i][int(row[1 + i])] = (int(row[-2]), float(row[-1] or 0.0))
                break
    for i, f in enumerate(hist):
        fp = prof.fields[f.key]
        lo, step = grids[i]
        ks = np.array(sorted(per[i]), dtype=np.int64)
        fp.values = np.minimum(lo + ks * step, fp.max) if len(ks) else np.zeros(0)
        fp.counts = np.array([per[i][k][0] for k in ks], dtype=np.float64)
        if weight_expr:
            fp.weights = np.array([per[i][k][1] for k in ks], dtype=np.float64)

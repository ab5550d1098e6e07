"""A data check before scoring: new data against the training profile of a fitted model.

For the monthly job that scores a new extract with an old model. Per model input:

* numeric columns: the share of rows below and above the training range (scoring holds
  them at the boundary), and the population stability index over ten bins at the training
  deciles;
* level columns: levels not seen in training (scoring stops on them unless told to use the
  base level), with their share of rows, and the stability index over the levels (unseen
  levels pooled into one bin);
* missing values (NULL, NaN, inf) per column.

The population stability index (common practice in credit scoring; Siddiqi 2006, *Credit
Risk Scorecards*, ch. 8) is PSI = Σ_b (a_b − e_b)·ln(a_b / e_b), with e_b the training share
of bin b and a_b the new share (shares of rows, empty bins floored at ``EMPTY_SHARE``). The
usual reading: below 0.1 stable, 0.1 to 0.25 worth watching, 0.25 and above a major shift.

One grouped DuckDB query reads the new data once; memory does not grow with its rows.
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field

import numpy as np
import pyarrow as pa

from tallgam.data.inputs import model_inputs
from tallgam.data.sources import open_source, quote

PSI_WATCH = 0.1
PSI_ALERT = 0.25
BINS = 10
EMPTY_SHARE = 1e-4     # share given to an empty bin, so its logarithm is finite
OUTSIDE_SHARE = 0.01   # a column with this share of rows outside the range is flagged
MISSING, BELOW, ABOVE = -1, -2, -3


def status_of(psi: float) -> str:
    """"stable", "watch" or "alert" for a stability index (0.1 and 0.25 thresholds)."""
    if not np.isfinite(psi):
        return "n/a"
    return "alert" if psi >= PSI_ALERT else "watch" if psi >= PSI_WATCH else "stable"


def stability_index(expected: np.ndarray, actual: np.ndarray) -> float:
    """PSI of two share vectors over the same bins (each summing to 1)."""
    e = np.maximum(np.asarray(expected, dtype=np.float64), EMPTY_SHARE)
    a = np.maximum(np.asarray(actual, dtype=np.float64), EMPTY_SHARE)
    return float(np.sum((a - e) * np.log(a / e)))


@dataclass
class DataCheck:
    """The check of one data source against a model's training profile.

    ``table`` has one row per model input: column, kind, rows, missing_share, below_share,
    above_share, unseen_levels, unseen_share, psi, status. ``bins`` holds per column the
    bins with their training and new shares."""

    rows: int
    table: pa.Table
    bins: dict[str, pa.Table] = field(default_factory=dict)
    unseen_examples: dict[str, list[str]] = field(default_factory=dict)

    @property
    def worst_psi(self) -> float:
        psi = [v for v in self.table.column("psi").to_pylist() if v is not None]
        return max(psi, default=0.0)

    def flagged(self, threshold: float = PSI_WATCH, outside: float = OUTSIDE_SHARE
                ) -> list[str]:
        """Columns whose stability index reaches ``threshold``, with levels not seen in
        training, or with at least a share ``outside`` of rows outside the training range."""
        out = []
        for r in self.table.to_pylist():
            if ((r["psi"] is not None and r["psi"] >= threshold) or r["unseen_levels"]
                    or (r["below_share"] or 0) + (r["above_share"] or 0) >= outside):
                out.append(r["column"])
        return out

    def summary(self) -> str:
        lines = [f"data check: {self.rows:,} rows against the training profile",
                 f"  {'column':<22}{'kind':<9}{'missing':>9}{'outside':>9}{'unseen':>8}"
                 f"{'PSI':>9}  status"]
        for r in self.table.to_pylist():
            outside = (r["below_share"] or 0.0) + (r["above_share"] or 0.0)
            lines.append(
                f"  {r['column'][:21]:<22}{r['kind']:<9}{_pct(r['missing_share']):>9}"
                f"{_pct(outside) if r['kind'] == 'numeric' else '–':>9}"
                f"{r['unseen_levels'] if r['kind'] == 'levels' else '–':>8}"
                f"{_fixed(r['psi']):>9}  {r['status']}")
        for col, ex in self.unseen_examples.items():
            lines.append(f"  unseen levels of {col}: {', '.join(map(repr, ex))}")
        lines.append(f"  stability index: below {PSI_WATCH} stable, {PSI_WATCH} to {PSI_ALERT} "
                     f"watch, {PSI_ALERT} and above alert")
        return "\n".join(lines)

    def to_dict(self) -> dict:
        return {"rows": self.rows, "columns": self.table.to_pylist(),
                "bins": {c: t.to_pylist() for c, t in self.bins.items()},
                "unseen_examples": self.unseen_examples,
                "thresholds": {"watch": PSI_WATCH, "alert": PSI_ALERT}}

    def to_json(self) -> str:
        return json.dumps(self.to_dict(), indent=1, allow_nan=False)


def _pct(x) -> str:
    return "–" if x is None else f"{100 * x:.2f}%"


def _fixed(x) -> str:
    return "–" if x is None else f"{x:.4f}"


def _edges(values: np.ndarray, rows: np.ndarray) -> np.ndarray:
    """Interior bin edges at the row deciles of a training histogram (ties collapse)."""
    cum = np.cumsum(rows)
    probs = np.arange(1, BINS) / BINS
    idx = np.searchsorted(cum, probs * cum[-1], side="left")
    edges = np.unique(values[np.minimum(idx + 1, len(values) - 1)])
    return edges[(edges > values[0]) & (edges <= values[-1])]


def check_data(fit, data, *, where: str | None = None) -> DataCheck:
    """Compare ``data`` (any source; ``where`` a SQL filter) with ``fit``'s training
    profile (see the module docstring)."""
    profile = fit.profile
    source = open_source(data)
    owned = source is not data
    try:
        inputs = model_inputs(fit.model, source, fit.model.terms, for_prediction=True,
                              with_offset=False)
        columns = [c for c in profile.columns if c in _model_columns(fit)]
        exprs, plans = [], []
        for i, c in enumerate(columns):
            prof = profile.columns[c]
            col = quote(c)
            if prof.kind == "numeric":
                if not prof.distinct:
                    continue
                edges = _edges(prof.values, prof.rows)
                inside = " + ".join(f"CAST({col} >= {float(e)!r} AS INTEGER)"
                                    for e in edges) or "0"
                lo, hi = float(prof.min), float(prof.max)
                exprs.append(f"CASE WHEN {col} IS NULL OR NOT isfinite({col}) THEN {MISSING} "
                             f"WHEN {col} < {lo!r} THEN {BELOW} WHEN {col} > {hi!r} "
                             f"THEN {ABOVE} ELSE {inside} END AS k{i}")
                plans.append((c, prof, edges, f"k{i}"))
            else:
                exprs.append(f"{col} AS k{i}")
                plans.append((c, prof, None, f"k{i}"))
        keys = [p[3] for p in plans]
        where_sql = f" WHERE {where}" if where else ""
        text = (f"WITH s AS (SELECT {', '.join(inputs.select)} FROM tallgam_source{where_sql}), "
                f"b AS (SELECT {', '.join(exprs)} FROM s) "
                f"SELECT grouping_id({', '.join(keys)}), {', '.join(keys)}, count(*) FROM b "
                f"GROUP BY GROUPING SETS ({', '.join(f'({k})' for k in keys)})")
        rows = source.fetchall(text) if keys else []
        total = int(source.fetchall(f"SELECT count(*) FROM tallgam_source{where_sql}")[0][0])
    finally:
        if owned:
            source.close()
    counts: list[dict] = [{} for _ in plans]
    n = len(keys)
    for row in rows:
        gid = row[0]
        for i in range(n):
            if not (gid >> (n - 1 - i)) & 1:
                counts[i][row[1 + i]] = int(row[-1])
                break
    out_rows, bins, examples = [], {}, {}
    for (c, prof, edges, _), got in zip(plans, counts):
        if edges is not None:
            rec, table = _numeric_check(c, prof, edges, got, total)
        else:
            rec, table, ex = _level_check(c, prof, got, total)
            if ex:
                examples[c] = ex
        out_rows.append(rec)
        bins[c] = table
    table = pa.Table.from_pylist(out_rows, schema=pa.schema([
        ("column", pa.string()), ("kind", pa.string()), ("rows", pa.int64()),
        ("missing_share", pa.float64()), ("below_share", pa.float64()),
        ("above_share", pa.float64()), ("unseen_levels", pa.int64()),
        ("unseen_share", pa.float64()), ("psi", pa.float64()), ("status", pa.string())]))
    return DataCheck(rows=total, table=table, bins=bins, unseen_examples=examples)


def _model_columns(fit) -> set[str]:
    return {c for b in fit.bases for c in b.inputs}


def _share(x: int, total: int) -> float:
    return x / total if total else 0.0


def _numeric_check(column, prof, edges, got: dict, total: int):
    k = len(edges) + 1
    train = np.bincount(np.searchsorted(edges, prof.values, side="right"), weights=prof.rows,
                        minlength=k)
    train = train / train.sum()
    inside = np.array([got.get(j, 0) for j in range(k)], dtype=np.float64)
    below, above, missing = got.get(BELOW, 0), got.get(ABOVE, 0), got.get(MISSING, 0)
    # rows outside the range are scored at the boundary: they join the end bins
    new = inside.copy()
    new[0] += below
    new[-1] += above
    scored = new.sum()
    new_share = new / scored if scored else np.zeros(k)
    psi = stability_index(train, new_share) if scored else float("nan")
    lo = np.concatenate([[prof.min], edges])
    hi = np.concatenate([edges, [prof.max]])
    table = pa.table({"from": lo, "to": hi, "training_share": train, "new_share": new_share,
                      "contribution": (np.maximum(new_share, EMPTY_SHARE)
                                       - np.maximum(train, EMPTY_SHARE))
                      * np.log(np.maximum(new_share, EMPTY_SHARE)
                               / np.maximum(train, EMPTY_SHARE))})
    rec = {"column": column, "kind": "numeric", "rows": total,
           "missing_share": _share(missing, total), "below_share": _share(below, total),
           "above_share": _share(above, total), "unseen_levels": 0, "unseen_share": 0.0,
           "psi": psi if np.isfinite(psi) else None, "status": status_of(psi)}
    return rec, table


def _level_check(column, prof, got: dict, total: int):
    labels = [str(v) for v in prof.labels]
    known = set(labels)
    missing = got.get(None, 0)
    unseen = {k: v for k, v in got.items() if k is not None and str(k) not in known}
    train = prof.rows / prof.rows.sum()
    new = np.array([got.get(lab, 0) for lab in labels] + [sum(unseen.values())],
                   dtype=np.float64)
    scored = new.sum()
    new_share = new / scored if scored else np.zeros(len(new))
    expected = np.concatenate([train, [0.0]])
    psi = stability_index(expected, new_share) if scored else float("nan")
    table = pa.table({"level": labels + ["(unseen levels)"], "training_share": expected,
                      "new_share": new_share})
    examples = sorted(unseen, key=lambda k: -unseen[k])[:5]
    rec = {"column": column, "kind": "levels", "rows": total,
           "missing_share": _share(missing, total), "below_share": None, "above_share": None,
           "unseen_levels": len(unseen), "unseen_share": _share(sum(unseen.values()), total),
           "psi": psi if np.isfinite(psi) else None, "status": status_of(psi)}
    return rec, table, [str(e) for e in examples]

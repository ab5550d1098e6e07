"""Hold-out validation, streamed: deviance, Gini, lift, actual versus expected.

The hold-out source is scored batch by batch into a scratch Parquet file (one row per
policy: actual, expected, exposure, the rating factors), then DuckDB computes every table
with SQL — sorting by predicted rate happens inside DuckDB, which spills to disk, so memory
stays bounded whatever the number of rows. Definitions:

* actual = Σ w·y, expected = Σ w·μ (μ includes the exposure), exposure = the model's
  exposure, else its weights, else 1 per row;
* Gini from the ordered Lorenz curve (Frees, Meyers & Cummings 2011, JASA 106:1085):
  policies sorted by predicted rate μ/exposure, x = cumulative share of exposure,
  y = cumulative share of actual; the raw Gini is 1 − 2·(area under the curve),
  trapezoids over groups of tied predictions. ``gini`` is the raw Gini divided by that of
  the perfect ordering (policies sorted by their actual rate), so 1 is a perfect ranking
  and 0 none; for a 0/1 response with unit exposure it equals 2·AUC − 1;
* lift: ten bands of equal exposure by predicted rate; double lift: bands by the ratio
  of two models' predictions;
* actual versus expected by band of every rating factor: levels for level columns, ten
  bands of equal exposure for numeric ones; bands add up to the totals.
"""

from __future__ import annotations

import os
from dataclasses import dataclass, field

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from tallgam.atomic import new_scratch_file
from tallgam.data.inputs import W, Y, level_key, model_inputs
from tallgam.data.sources import connect, open_source, quote
from tallgam.errors import DataError
from tallgam.options import DEFAULT_BATCH_ROWS, RunOptions, Tuning

BANDS = 10
NOTES = """Hold-out validation tables (CSV; numbers in full)

summary.txt          the figures as printed: deviance, Gini, actual over expected, lift
lift.csv             ten bands of equal {exposure} by predicted rate (lowest first): rows,
                     {exposure}, actual, expected, actual_rate, expected_rate,
                     actual_over_expected; from_value/to_value: the predicted rates in the band
lorenz.csv           the ordered Lorenz curve: cumulative share of {exposure} (exposure_share)
                     against cumulative share of actual (actual_share), lowest rate first
double_lift.csv      (with a challenger) ten bands by the ratio of the two predictions;
                     expected_b and actual_over_expected_b are the challenger's
actual_vs_expected_<column>.csv
                     actual over expected per level, or per band of equal {exposure}
                     (band_from, band_to) of a numeric rating factor; bands add up to totals

actual = Σ weight × response; expected = Σ weight × prediction (exposure included); the
column exposure holds the {exposure} (1 per row when the model has neither exposure nor
weights).

Caution: {caution}
"""
LORENZ_POINTS = 201


@dataclass
class Validation:
    """Hold-out statistics of a model (and of a challenger, for the double lift)."""

    rows: int
    exposure: float
    actual: float
    expected: float
    deviance: float
    null_deviance: float
    gini: float               # normalised: raw Gini / Gini of the perfect ordering
    gini_raw: float           # 1 − 2·area under the ordered Lorenz curve
    lorenz: pa.Table
    lift: pa.Table
    actual_vs_expected: dict[str, pa.Table] = field(default_factory=dict)
    double_lift: pa.Table | None = None
    challenger_gini: float | None = None
    challenger_deviance: float | None = None
    exposure_name: str = "exposure"  # what ``exposure`` sums: exposure, weight or rows

    @property
    def deviance_ratio(self) -> float:
        """Hold-out deviance over that of one flat rate (below 1: the model does better)."""
        return self.deviance / self.null_deviance if self.null_deviance > 0 else np.nan

    @property
    def deviance_explained(self) -> float:
        """1 − :attr:`deviance_ratio`."""
        return 1.0 - self.deviance_ratio

    @property
    def actual_over_expected(self) -> float:
        return self.actual / self.expected if self.expected else np.nan

    def tables(self) -> dict[str, pa.Table]:
        """Every table by file name: lift, lorenz, double_lift (with a challenger) and
        actual_vs_expected_<column> per rating factor."""
        from tallgam.outputs.tables import file_stem

        named = {"lift": self.lift, "lorenz": self.lorenz}
        if self.double_lift is not None:
            named["double_lift"] = self.double_lift
        for col, table in self.actual_vs_expected.items():
            named[f"actual_vs_expected_{file_stem(col)}"] = table
        return named

    def write(self, folder) -> list[str]:
        """Write every table as CSV (numbers in full), ``summary.txt`` (the summary) and
        ``notes.txt`` (the columns explained, and the caution) into ``folder``; returns
        the paths. Each file appears whole or not at all."""
        import pyarrow.csv as pacsv

        from tallgam.atomic import make_folder, replacing, write_text
        from tallgam.outputs.formatting import CAUTION

        make_folder(folder)
        paths = []
        for name, table in self.tables().items():
            path = os.path.join(folder, f"{name}.csv")
            with replacing(path) as tmp:
                pacsv.write_csv(table, tmp)
            paths.append(path)
        for name, text in (("summary.txt", self.summary() + "\n"),
                           ("notes.txt", NOTES.format(exposure=self.exposure_name,
                                                      caution=CAUTION))):
            path = os.path.join(folder, name)
            write_text(path, text)
            paths.append(path)
        return paths

    def summary(self) -> str:
        """The hold-out figures as text for people."""
        from tallgam.outputs.formatting import fixed, number

        exposure_name = self.exposure_name
        rows = [
            ("rows", number(self.rows)),
            (exposure_name, number(self.exposure)),
            ("actual", number(self.actual)),
            ("expected", number(self.expected)),
            ("actual / expected", fixed(self.actual_over_expected, 4)),
            ("deviance", f"{number(self.deviance, 6)}, against {number(self.null_deviance, 6)} "
                         f"for one flat rate (ratio {fixed(self.deviance_ratio, 4)})"),
            ("Gini, normalised", f"{fixed(self.gini, 4)}  (1 = the best possible ordering of "
                                 "these policies)"),
            ("Gini, raw", f"{fixed(self.gini_raw, 4)}  (1 − 2 × area under the ordered "
                          "Lorenz curve)"),
        ]
        if self.challenger_gini is not None:
            rows += [("challenger deviance", number(self.challenger_deviance, 6)),
                     ("challenger Gini, normalised", fixed(self.challenger_gini, 4))]
        width = max(len(k) for k, _ in rows) + 2
        lines = ["Hold-out"] + [f"  {k:<{width}}{v}" for k, v in rows]
        equal = "numbers of rows" if exposure_name == "rows" else exposure_name
        lines += ["", f"Lift: ten bands of equal {equal} by predicted rate",
                  f"  {'band':>4}{exposure_name:>14}{'actual rate':>14}{'predicted rate':>16}"
                  f"{'actual / expected':>19}"]
        for r in self.lift.to_pylist():
            lines.append(f"  {r['band']:>4}{number(r['exposure']):>14}"
                         f"{number(r['actual_rate'], zeros=True):>14}"
                         f"{number(r['expected_rate'], zeros=True):>16}"
                         f"{fixed(r['actual_over_expected'], 3):>19}")
        return "\n".join(lines)


def _model_columns(fit) -> dict[str, str]:
    """Rating factors to band: every input column of every term, with its kind."""
    out: dict[str, str] = {}
    for b in fit.bases:
        if b.inputs:
            out.update(b.spec.input_kinds())
    return out


def _score_to_scratch(fit, source, path, challenger, challenger_source, batch_rows,
                      progress) -> dict:
    """Stream the hold-out into ``path``: actual, expected(s), exposure, weight, factors.
    Returns the streamed sums (deviance, totals)."""
    from tallgam.outputs.scoring import Scorer
    from tallgam.progress import Event, make_callback

    callback = make_callback(progress)
    fam = fit.model.family
    inputs = model_inputs(fit.model, source, fit.model.terms)  # response, weights, exposure
    extra = {"__y": inputs.select_expr(Y)}
    if inputs.has_weights:
        extra["__w"] = inputs.select_expr(W)
    if "__exposure" in inputs.exprs:
        extra["__e"] = f"CAST({inputs.exprs['__exposure']} AS DOUBLE)"
    factors = _model_columns(fit)
    for c, kind in factors.items():
        extra[f"f:{c}"] = (level_key(quote(c)) if kind == "levels"
                           else f"CAST({quote(c)} AS DOUBLE)")
    scorer = Scorer(fit, source, extra=extra)
    other = Scorer(challenger, challenger_source) if challenger is not None else None
    other_batches = other.batches(batch_rows) if other is not None else None
    sums = {"deviance": 0.0, "challenger_deviance": 0.0}
    writer = None
    done = 0
    callback(Event("start", "validation"))
    try:
        for kept, arrays in scorer.batches(batch_rows):
            n = kept.num_rows
            y = np.asarray(kept.column("__y").to_numpy(zero_copy_only=False), dtype=np.float64)
            w = (np.asarray(kept.column("__w").to_numpy(zero_copy_only=False), dtype=np.float64)
                 if "__w" in extra else np.ones(n))
            mu = arrays["response"]
            if not (np.all(np.isfinite(y)) and np.all(np.isfinite(w))):
                raise DataError("the hold-out has NULL or non-finite values in the response "
                                "or weights; filter them first")
            sums["deviance"] += float(np.sum(w * fam.unit_deviance(y, fam.clip_mu(mu))))
            e = (np.asarray(kept.column("__e").to_numpy(zero_copy_only=False), np.float64)
                 if "__e" in extra else w)
            cols = {"row": np.arange(done, done + n, dtype=np.int64), "actual": w * y,
                    "expected": w * mu, "exposure": e, "weight": w, "y": y}
            if other_batches is not None:
                _, arrays_b = next(other_batches)
                mu_b = arrays_b["response"]
                cols["expected_b"] = w * mu_b
                sums["challenger_deviance"] += float(
                    np.sum(w * challenger.model.family.unit_deviance(
                        y, challenger.model.family.clip_mu(mu_b))))
            for c in factors:
                cols[f"f:{c}"] = kept.column(f"f:{c}")
            table = pa.table(cols)
            if writer is None:
                writer = pq.ParquetWriter(path, table.schema)
            writer.write_table(table)
            done += n
            callback(Event("advance", "validation", rows=done))
    finally:
        if writer is not None:
            writer.close()
    callback(Event("end", "validation", rows=done))
    if done == 0:
        raise DataError("the hold-out data has no rows")
    scorer.report.warn()
    return sums


def validate(fit, data, *, against=None, where: str | None = None,
             batch_rows: int = DEFAULT_BATCH_ROWS, progress=False,
             scratch_dir: str | None = None, tuning: Tuning | None = None) -> Validation:
    """Hold-out statistics of ``fit`` on ``data`` (any source; only rows meeting the SQL
    condition ``where`` when given); ``against`` a second fitted model for the double
    lift. Memory is bounded; a scratch Parquet file (removed at the end) holds one row per
    hold-out row; DuckDB's working memory for the tables is ``tuning.tables_memory`` (it
    spills to disk beyond)."""
    options = RunOptions(batch_rows=batch_rows, progress=progress, tuning=tuning)
    batch_rows = options.batch_rows
    source = open_source(data, where=where)
    owned = source is not data
    # the challenger streams the same rows side by side, on a connection of its own
    second = open_source(data, where=where) if against is not None else None
    path = None
    try:
        path = new_scratch_file("holdout", ".parquet", scratch_dir)
        sums = _score_to_scratch(fit, source, path, against, second, batch_rows, progress)
        return _tables(fit, path, sums, against, options.tuning.tables_memory)
    finally:
        if path is not None and os.path.exists(path):
            os.remove(path)
        if owned:
            source.close()
        if second is not None and second is not data:
            second.close()


def holdout_view(path: str, extra: str, memory: str | None):
    """A DuckDB connection holding the view ``h``: the rows of a hold-out scratch file
    (Parquet) with the select items ``extra`` added. ``memory`` caps DuckDB's working memory
    (it spills to disk beyond). The caller closes the connection."""
    con = connect()
    if memory:
        con.execute(f"SET memory_limit = '{memory}'")
        con.execute("SET preserve_insertion_order = false")
    literal = "'" + path.replace("'", "''") + "'"
    con.execute(f"CREATE VIEW h AS SELECT *, {extra} FROM read_parquet({literal})")
    return con


def _tables(fit, path: str, sums: dict, challenger, memory: str | None) -> Validation:
    con = holdout_view(path, "expected / exposure AS rate", memory)
    try:
        return _tables_of(con, fit, sums, challenger)
    finally:
        con.close()


def _tables_of(con, fit, sums: dict, challenger) -> Validation:
    rows, exposure, actual, expected = con.execute(
        "SELECT count(*), sum(exposure), sum(actual), sum(expected) FROM h").fetchall()[0]
    null_dev = _flat_rate_deviance(fit, con, actual / exposure)
    gini_raw = ordered_gini(con, "rate")
    perfect = ordered_gini(con, "actual / exposure")
    lorenz = _lorenz(con, "rate")
    lift = bands_by(con, "rate", ["expected"])
    ave = {}
    for c, kind in _model_columns(fit).items():
        ave[c] = _actual_vs_expected(con, f'"f:{c}"', kind)
    val = Validation(rows=int(rows), exposure=float(exposure), actual=float(actual),
                     expected=float(expected), deviance=sums["deviance"],
                     null_deviance=null_dev, gini=gini_raw / perfect if perfect else np.nan,
                     gini_raw=gini_raw, lorenz=lorenz, lift=lift,
                     actual_vs_expected=ave,
                     exposure_name=("exposure" if fit.model.exposure else
                                    "weight" if fit.model.weights else "rows"))
    if challenger is not None:
        con.execute("CREATE VIEW hb AS SELECT *, expected_b / exposure AS rate_b, "
                    "expected / expected_b AS ratio FROM h")
        val.double_lift = bands_by(con, "ratio", ["expected", "expected_b"], view="hb")
        val.challenger_gini = (ordered_gini(con, "rate_b", view="hb") / perfect if perfect
                               else np.nan)
        val.challenger_deviance = sums["challenger_deviance"]
    return val


def _flat_rate_deviance(fit, con, rate: float) -> float:
    """Deviance of the flat model μ = rate × exposure (× weight-free), streamed."""
    fam = fit.model.family
    total = 0.0
    reader = con.sql("SELECT y, weight, exposure FROM h").to_arrow_reader(1_000_000)
    for batch in reader:
        y, w, e = (np.asarray(batch.column(i).to_numpy(zero_copy_only=False), np.float64)
                   for i in range(3))
        mu = rate * e / w  # per-row mean of y: expected = w·μ, flat rate per exposure
        total += float(np.sum(w * fam.unit_deviance(y, fam.clip_mu(mu))))
    return total


def _cumulative(order: str, view: str) -> str:
    return (f"WITH g AS (SELECT {order} AS key, sum(exposure) AS e, sum(actual) AS a "
            f"FROM {view} GROUP BY 1), c AS (SELECT key, e, a, "
            f"sum(e) OVER (ORDER BY key ROWS UNBOUNDED PRECEDING) AS ce, "
            f"sum(a) OVER (ORDER BY key ROWS UNBOUNDED PRECEDING) AS ca, "
            f"row_number() OVER (ORDER BY key) AS k FROM g)")


def ordered_gini(con, order: str, view: str = "h") -> float:
    """Raw Gini of the ordered Lorenz curve of ``view`` (columns ``exposure``, ``actual``)
    with policies sorted by the SQL ``order`` (see the module docstring)."""
    e_tot, a_tot = con.execute(f"SELECT sum(exposure), sum(actual) FROM {view}").fetchall()[0]
    if not a_tot or not e_tot:
        return float("nan")
    (s,) = con.execute(_cumulative(order, view) + " SELECT sum(e * (2 * ca - a)) FROM c"
                       ).fetchall()[0]
    return float(1.0 - s / (e_tot * a_tot))


def _lorenz(con, order: str, view: str = "h") -> pa.Table:
    (m,) = con.execute(f"SELECT count(DISTINCT {order}) FROM {view}").fetchall()[0]
    step = max(1, int(m) // (LORENZ_POINTS - 1))
    e_tot, a_tot = con.execute(f"SELECT sum(exposure), sum(actual) FROM {view}").fetchall()[0]
    table = con.sql(
        _cumulative(order, view) + f" SELECT ce / {e_tot!r} AS exposure_share, "
        f"ca / {a_tot or 1.0!r} AS actual_share FROM c WHERE k % {step} = 0 OR k = {int(m)} "
        "ORDER BY k").to_arrow_table()
    start = pa.table({"exposure_share": [0.0], "actual_share": [0.0]})
    return pa.concat_tables([start, table.cast(start.schema)])


def bands_by(con, order: str, expected: list[str], view: str = "h") -> pa.Table:
    """Ten bands of equal exposure by ``order``: exposure, actual and expected sums."""
    sums = ", ".join(f"sum({c}) AS {c}" for c in expected)
    rates = ", ".join(f"sum({c}) / sum(exposure) AS {c}_rate" for c in expected)
    ratios = ", ".join(f"sum(actual) / nullif(sum({c}), 0) AS actual_over_{c}"
                       for c in expected)
    text = (f"WITH s AS (SELECT *, sum(exposure) OVER (ORDER BY {order}, row "
            f"ROWS UNBOUNDED PRECEDING) - exposure AS before, sum(exposure) OVER () AS tot "
            f"FROM {view}) SELECT least(CAST(floor({BANDS} * before / tot) AS INTEGER), "
            f"{BANDS - 1}) + 1 AS band, min({order}) AS from_value, max({order}) AS to_value, "
            f"count(*) AS rows, sum(exposure) AS exposure, sum(actual) AS actual, {sums}, "
            f"sum(actual) / sum(exposure) AS actual_rate, {rates}, {ratios} "
            f"FROM s GROUP BY 1 ORDER BY 1")
    return con.sql(text).to_arrow_table()


def _actual_vs_expected(con, column: str, kind: str) -> pa.Table:
    if kind == "levels":
        text = (f"SELECT coalesce({column}, '(missing)') AS band, count(*) AS rows, "
                f"sum(exposure) AS exposure, sum(actual) AS actual, sum(expected) AS expected, "
                f"sum(actual) / nullif(sum(expected), 0) AS actual_over_expected "
                f"FROM h GROUP BY 1 ORDER BY 1")
        return con.sql(text).to_arrow_table()
    # band edges: the smallest value of each tenth of the exposure, ties kept together
    edges = [r[0] for r in con.execute(
        f"WITH s AS (SELECT {column} AS x, sum(exposure) OVER (ORDER BY {column}, row "
        f"ROWS UNBOUNDED PRECEDING) - exposure AS before, sum(exposure) OVER () AS tot "
        f"FROM h WHERE {column} IS NOT NULL) SELECT min(x) FROM s GROUP BY "
        f"least(CAST(floor({BANDS} * before / tot) AS INTEGER), {BANDS - 1}) ORDER BY 1"
    ).fetchall()]
    edges = sorted(set(edges))
    index = " + ".join(f"CAST({column} >= {e!r} AS INTEGER)" for e in edges[1:]) or "0"
    text = (f"SELECT min({column}) AS band_from, max({column}) AS band_to, count(*) AS rows, "
            f"sum(exposure) AS exposure, sum(actual) AS actual, sum(expected) AS expected, "
            f"sum(actual) / nullif(sum(expected), 0) AS actual_over_expected FROM h "
            f"GROUP BY CASE WHEN {column} IS NULL THEN NULL ELSE {index} END "
            f"ORDER BY 1 NULLS LAST")
    return con.sql(text).to_arrow_table()

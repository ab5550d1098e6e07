"""A tariff applied to data, streamed: its rates, its band values summed over training rows,
and the cost of banding measured on a hold-out.

Every pass reads the data in batches through the models' own scorers (so the smooth model's
premium is exactly what ``predict`` gives), looks each row up in the tariff's bands, and
keeps no more than a batch in memory. The hold-out pass writes one row per policy to a
scratch Parquet file and lets DuckDB compute the tables, as hold-out validation does
(:mod:`tallgam.outputs.validation`); DuckDB sorts out of core.

Measures of the cost of banding, each for the smooth model(s) and for the tariff:

* **Gini** of the ordered Lorenz curve (Frees, Meyers & Cummings 2011), normalised by the
  perfect ordering, as in validation;
* **deviance**: the model's own family for one model; for a pure premium from a frequency
  and a severity model, the Tweedie deviance of the loss rate weighted by exposure,
  Σ eᵢ·d_p(Lᵢ/eᵢ, μᵢ/eᵢ), with the power p = (α + 2)/(α + 1) of the compound
  Poisson–gamma sum whose gamma shape α = 1/φ is the severity model's (Jørgensen 1987;
  Smyth & Jørgensen 2002) when its variance function is μ², else 1.5, or as given;
* **actual / expected by band** of every banded factor, for both premiums;
* the **ratio of tariff to model premium** per policy: quantiles, a table of ranges, and the
  share of policies (and of exposure) moving by more than 5%; the double lift by that ratio.
"""

from __future__ import annotations

import os
from collections.abc import Iterator
from dataclasses import dataclass, field

import duckdb
import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from tallgam.atomic import new_scratch_file
from tallgam.data.sources import Source, open_source, quote
from tallgam.errors import DataError
from tallgam.options import RunOptions
from tallgam.outputs.bands import CellSums
from tallgam.outputs.validation import bands_by, holdout_view, ordered_gini

MOVE = 0.05                       # a policy "moves" when its premium changes by more than this
RATIO_EDGES = (0.8, 0.9, 0.95, 0.98, 1.02, 1.05, 1.1, 1.2)
QUANTILES = (0.01, 0.05, 0.25, 0.5, 0.75, 0.95, 0.99)
DEFAULT_POWER = 1.5


# ---------------------------------------------------------------------------------------
# streaming


def open_rows(data, where: str | None) -> tuple[Source, Source]:
    """(rows to read, source to close): ``data`` opened, filtered by ``where`` in DuckDB."""
    source = open_source(data)
    if not where:
        return source, source
    try:
        rel = source.relation.filter(where)
    except duckdb.Error as exc:
        if source is not data:
            source.close()
        raise DataError(f"the filter {where!r} failed on {source.label}: {exc}") from None
    return Source(rel, f"{source.label} where {where}", source.connection), source


def policy_batches(tariff, data, *, where: str | None, with_offset: bool,
                   extra: dict[str, str], batch_rows: int
                   ) -> Iterator[tuple[pa.RecordBatch, dict, dict]]:
    """Stream ``data`` through every model of the tariff side by side. Yields (the batch
    of ``extra`` columns and of every factor input ``f:<column>``, each model's scored
    arrays by role (``response``, term contributions by label), the factor inputs as
    arrays)."""
    from tallgam.outputs.scoring import Scorer

    factor_sql = {f"f:{c}": f"CAST({quote(c)} AS {'VARCHAR' if k == 'levels' else 'DOUBLE'})"
                  for c, k in tariff.columns.items()}
    opened: list[tuple[Source, object]] = []
    scorers = []
    try:
        for i, (_, fit) in enumerate(tariff.models):
            rows, owner = open_rows(data, where)
            opened.append((owner, data))
            scorers.append(Scorer(fit, rows, with_offset=with_offset,
                                  extra={**factor_sql, **extra} if i == 0 else None))
        streams = [s.batches(batch_rows, terms=True) for s in scorers]
        roles = [role for role, _ in tariff.models]
        for kept, first in streams[0]:
            scored = {roles[0]: first}
            for role, stream in zip(roles[1:], streams[1:]):
                scored[role] = next(stream)[1]
            cols = {}
            for c, k in tariff.columns.items():
                col = kept.column(f"f:{c}")
                cols[c] = col if k == "levels" else np.asarray(
                    col.to_numpy(zero_copy_only=False), dtype=np.float64)
            yield kept, scored, cols
    finally:
        for owner, given in opened:
            if owner is not given:
                owner.close()
    for s in scorers:
        s.report.warn()


def column_of(kept: pa.RecordBatch, name: str) -> np.ndarray:
    return np.asarray(kept.column(name).to_numpy(zero_copy_only=False), dtype=np.float64)


def weight_sql(fit) -> str:
    """What a row weighs: the model's exposure, else its weights, else 1."""
    exprs = fit.expressions
    for key in ("exposure", "weights"):
        if key in exprs:
            return f"CAST({exprs[key]} AS DOUBLE)"
    return "1.0"


def rated(tariff, scored: dict, cols: dict) -> tuple[np.ndarray, dict, dict]:
    """(tariff rate, each factor's tariff relativity, each factor's cell) for a batch."""
    rate = None
    rel: dict[str, np.ndarray] = {}
    cells: dict[str, np.ndarray] = {}
    for name, f in tariff.factors.items():
        if f.banded:
            cells[name] = f.cells(cols)
            rel[name] = f.relativity_of(cells[name])
        else:
            rel[name] = f.smooth_from_terms(scored)[0]
        rate = rel[name] if rate is None else rate * rel[name]
    n = len(next(iter(cols.values())))
    rate = tariff.base_rate * (rate if rate is not None else np.ones(n))
    return rate, rel, cells


def model_rate(scored: dict) -> np.ndarray:
    """The models' rate per unit of exposure: exp of every term's contribution (the
    offset left out), multiplied over the models."""
    out = None
    for arrays in scored.values():
        eta = sum(v for k, v in arrays.items() if k not in ("link", "response"))
        out = np.exp(eta) if out is None else out * np.exp(eta)
    return out


def tariff_rates(tariff, data, *, where: str | None = None, batch_rows: int = 1_000_000
                 ) -> tuple[np.ndarray, dict[str, np.ndarray]]:
    """The tariff's rate per unit of exposure and every factor's relativity, per row."""
    batch_rows = RunOptions(batch_rows=batch_rows).batch_rows
    rates, rels = [], {name: [] for name in tariff.factors}
    for _, scored, cols in policy_batches(tariff, data, where=where, with_offset=False,
                                          extra={}, batch_rows=batch_rows):
        rate, rel, _ = rated(tariff, scored, cols)
        rates.append(rate)
        for name, v in rel.items():
            rels[name].append(v)
    return joined(rates), {name: joined(v) for name, v in rels.items()}


def joined(parts: list[np.ndarray]) -> np.ndarray:
    return np.concatenate(parts) if parts else np.empty(0)


def training_sums(tariff, data, *, batch_rows: int = 1_000_000, progress=False
                  ) -> dict[str, CellSums]:
    """Every banded factor's sums per cell over the first model's training rows (its
    ``where`` applied), weighted by its exposure (or weights): the exact band values."""
    from tallgam.progress import Event, make_callback

    callback = make_callback(progress)
    batch_rows = RunOptions(batch_rows=batch_rows).batch_rows
    fit = tariff.models[0][1]
    sums = {name: CellSums(f.n_cells, f.roles) for name, f in tariff.factors.items()
            if f.banded}
    done = 0
    callback(Event("start", "tariff bands"))
    for kept, scored, cols in policy_batches(tariff, data, where=fit.model.where,
                                             with_offset=False,
                                             extra={"__w": weight_sql(fit)},
                                             batch_rows=batch_rows):
        w = column_of(kept, "__w")
        for name, s in sums.items():
            f = tariff.factors[name]
            smooth, parts = f.smooth_from_terms(scored)
            s.add(f.cells(cols), w, smooth, parts)
        done += kept.num_rows
        callback(Event("advance", "tariff bands", rows=done))
    callback(Event("end", "tariff bands", rows=done))
    if done == 0:
        raise DataError("the training data has no rows" + (f" after the filter "
                                                           f"{fit.model.where!r}"
                                                           if fit.model.where else ""))
    return sums


# ---------------------------------------------------------------------------------------
# the cost of banding


@dataclass
class BandingCost:
    """The tariff next to the smooth model(s) on hold-out data (see the module docstring).

    ``model`` and ``tariff`` hold ``expected``, ``deviance``, ``gini`` and
    ``actual_over_expected``; ``moved`` is the share of policies whose premium changes by
    more than ``threshold``, ``moved_exposure`` the share of exposure."""

    rows: int
    exposure: float
    actual: float
    deviance_measure: str
    model: dict
    tariff: dict
    moved: float
    moved_exposure: float
    moved_up: float
    moved_down: float
    ratio_bands: pa.Table
    ratio_quantiles: pa.Table
    double_lift: pa.Table
    by_band: dict[str, pa.Table] = field(default_factory=dict)
    curves: dict[str, pa.Table] = field(default_factory=dict)
    threshold: float = MOVE
    models: list[str] = field(default_factory=list)
    deviance_note: str = ""

    def table(self) -> pa.Table:
        """The cost table: each measure for the smooth model(s), the tariff, the change."""
        names = [("Gini (normalised)", "gini"), (self.deviance_measure, "deviance"),
                 ("actual / expected", "actual_over_expected"), ("expected", "expected")]
        rows = {"measure": [], "smooth model": [], "banded tariff": [], "change": []}
        for label, key in names:
            a, b = self.model[key], self.tariff[key]
            rows["measure"].append(label)
            rows["smooth model"].append(a)
            rows["banded tariff"].append(b)
            rows["change"].append(b - a)
        return pa.table(rows)

    def summary(self) -> str:
        t = self.threshold
        lines = [f"cost of banding on {self.rows:,} hold-out rows (exposure "
                 f"{self.exposure:,.6g}); models: {', '.join(self.models)}",
                 f"  {'measure':<44}{'smooth model':>16}{'banded tariff':>16}{'change':>12}"]
        for r in self.table().to_pylist():
            lines.append(f"  {r['measure'][:44]:<44}{r['smooth model']:>16.6g}"
                         f"{r['banded tariff']:>16.6g}{r['change']:>12.4g}")
        lines += [f"  deviance: {self.deviance_note}",
                  f"  premium moves by more than {100 * t:g}%: {100 * self.moved:.2f}% of "
                  f"policies ({100 * self.moved_exposure:.2f}% of exposure; "
                  f"{100 * self.moved_up:.2f}% up, {100 * self.moved_down:.2f}% down)",
                  "  ratio tariff / model premium: " + ", ".join(
                      f"{100 * q:g}% {v:.4f}" for q, v in zip(
                          self.ratio_quantiles["quantile"].to_pylist(),
                          self.ratio_quantiles["ratio"].to_pylist()))]
        return "\n".join(lines)

    def headline(self) -> dict:
        """The main figures, as the tariff's manifest records them."""
        return {"rows": self.rows, "exposure": self.exposure,
                "deviance_measure": self.deviance_measure, "deviance_note": self.deviance_note,
                "model": self.model, "tariff": self.tariff,
                "moved_share": self.moved, "moved_exposure_share": self.moved_exposure,
                "move_threshold": self.threshold}

    def named_tables(self) -> dict[str, pa.Table]:
        """Every table by file name: summary, ratio, quantiles, double lift, by band."""
        from tallgam.outputs.tables import file_stem

        out = {"summary": self.table(), "ratio": self.ratio_bands,
               "ratio_quantiles": self.ratio_quantiles, "double_lift": self.double_lift}
        out.update({f"by_band_{file_stem(name)}": t for name, t in self.by_band.items()})
        return out


def compound_power(severity) -> tuple[float, str]:
    """The Tweedie power of a compound Poisson sum of the severity model's claims: from its
    gamma shape when its variance function is μ², else the default."""
    fam = severity.model.family
    v = fam.variance(np.array([1.0, 2.0]))
    if np.isclose(v[1] / v[0], 4.0, rtol=0, atol=1e-12) and severity.scale > 0:
        alpha = 1.0 / severity.scale
        return (alpha + 2.0) / (alpha + 1.0), f"from the severity model's shape {alpha:.4g}"
    return DEFAULT_POWER, "default"


def banding_cost(tariff, data, *, where: str | None = None, actual: str | None = None,
                 power: float | None = None, batch_rows: int = 1_000_000, progress=False,
                 tuning=None, scratch_dir: str | None = None) -> BandingCost:
    """The cost of banding of ``tariff`` on hold-out ``data`` (filtered by ``where``).

    ``actual``: SQL of the actual amount per row for a pure premium (default the frequency
    response times the severity response, 0 where the frequency response is 0, i.e. the
    claim amount when the models are of counts and average claims); ``power``: the Tweedie
    power of the pure premium's deviance (default: see :func:`compound_power`)."""
    from tallgam.families import get_family
    from tallgam.progress import Event, make_callback

    options = RunOptions(batch_rows=batch_rows, progress=progress, tuning=tuning)
    callback = make_callback(progress)
    first = tariff.models[0][1]
    pure = len(tariff.models) > 1
    if pure:
        ys = [f"CAST({fit.expressions['response']} AS DOUBLE)" for _, fit in tariff.models]
        loss = actual or f"CASE WHEN {ys[0]} = 0 THEN 0.0 ELSE {ys[0]} * {ys[1]} END"
        extra = {"__y": f"CAST({loss} AS DOUBLE)", "__w": "1.0"}
        if power is None:
            power, why = compound_power(tariff.models[1][1])
        else:
            why = "given"
        family = get_family("tweedie", power=float(power))
        measure = f"Tweedie deviance, power {power:.4g}"
        note = (f"Tweedie deviance of the loss rate weighted by exposure; power {power:.4g} "
                f"({why})")
    else:
        extra = {"__y": f"CAST({first.expressions['response']} AS DOUBLE)",
                 "__w": (f"CAST({first.expressions['weights']} AS DOUBLE)"
                         if "weights" in first.expressions else "1.0")}
        family = first.model.family
        measure = f"{family.name} deviance"
        note = f"the {family.name} deviance of the model's response, as in validation"
    extra["__e"] = weight_sql(first)
    path = new_scratch_file("tariff", ".parquet", scratch_dir)
    names = [name for name, f in tariff.factors.items() if f.banded]
    dev = {"model": 0.0, "tariff": 0.0}
    writer = None
    done = 0
    callback(Event("start", "banding cost"))
    try:
        for kept, scored, cols in policy_batches(tariff, data, where=where, with_offset=True,
                                                 extra=extra, batch_rows=options.batch_rows):
            y, w, e = (column_of(kept, k) for k in ("__y", "__w", "__e"))
            if not (np.all(np.isfinite(y)) and np.all(np.isfinite(w))):
                raise DataError("the hold-out has NULL or non-finite values in the actual "
                                "amounts or weights; filter them first (where=)")
            mu = np.prod([s["response"] for s in scored.values()], axis=0)
            rate, _, cells = rated(tariff, scored, cols)
            ratio = rate / model_rate(scored)
            mu_t = mu * ratio
            for key, m in (("model", mu), ("tariff", mu_t)):
                if pure:
                    dev[key] += float(np.sum(e * family.unit_deviance(
                        y / e, family.clip_mu(m / e))))
                else:
                    dev[key] += float(np.sum(w * family.unit_deviance(y, family.clip_mu(m))))
            table = {"row": np.arange(done, done + len(y), dtype=np.int64),
                     "actual": y if pure else w * y, "expected": mu if pure else w * mu,
                     "expected_tariff": mu_t if pure else w * mu_t, "exposure": e}
            table.update({f"c:{name}": cells[name] for name in names})
            batch = pa.table(table)
            if writer is None:
                writer = pq.ParquetWriter(path, batch.schema)
            writer.write_table(batch)
            done += len(y)
            callback(Event("advance", "banding cost", rows=done))
        if writer is not None:
            writer.close()
            writer = None
        callback(Event("end", "banding cost", rows=done))
        if done == 0:
            raise DataError("the hold-out data has no rows" + (f" after the filter {where!r}"
                                                               if where else ""))
        cost = cost_tables(tariff, path, dev, measure, options.tuning.tables_memory)
        cost.deviance_note = note
        return cost
    finally:
        if writer is not None:
            writer.close()
        if os.path.exists(path):
            os.remove(path)


def cost_tables(tariff, path: str, dev: dict, measure: str, memory: str | None
                ) -> BandingCost:
    """The cost tables from the scratch file of the hold-out pass, computed by DuckDB."""
    con = holdout_view(path, "expected_tariff / expected AS ratio", memory)
    try:
        rows, exposure, actual, expected, expected_t = con.execute(
            "SELECT count(*), sum(exposure), sum(actual), sum(expected), "
            "sum(expected_tariff) FROM h").fetchall()[0]
        perfect = ordered_gini(con, "actual / exposure")

        def gini(order: str) -> float:
            return ordered_gini(con, order) / perfect if perfect else float("nan")

        model = {"expected": float(expected), "deviance": dev["model"],
                 "gini": gini("expected / exposure"),
                 "actual_over_expected": float(actual / expected) if expected else np.nan}
        tar = {"expected": float(expected_t), "deviance": dev["tariff"],
               "gini": gini("expected_tariff / exposure"),
               "actual_over_expected": float(actual / expected_t) if expected_t else np.nan}
        moved, moved_e, up, down = con.execute(
            f"SELECT avg(CAST(abs(ratio - 1) > {MOVE} AS DOUBLE)), "
            f"sum(CASE WHEN abs(ratio - 1) > {MOVE} THEN exposure ELSE 0 END) / sum(exposure), "
            f"avg(CAST(ratio > {1 + MOVE} AS DOUBLE)), avg(CAST(ratio < {1 - MOVE} AS DOUBLE)) "
            "FROM h").fetchall()[0]
        qs = con.execute(f"SELECT quantile_cont(ratio, {list(QUANTILES)}) FROM h"
                         ).fetchall()[0][0]
        quantiles = pa.table({"quantile": list(QUANTILES), "ratio": [float(v) for v in qs]})
        case = " ".join(f"WHEN ratio < {e!r} THEN {i}" for i, e in enumerate(RATIO_EDGES))
        got = dict((int(k), (int(n), float(x))) for k, n, x in con.execute(
            f"SELECT CASE {case} ELSE {len(RATIO_EDGES)} END AS k, count(*), sum(exposure) "
            "FROM h GROUP BY 1").fetchall())
        edges = (-np.inf, *RATIO_EDGES, np.inf)
        ratio_bands = pa.table({
            "ratio_from": [float(v) for v in edges[:-1]],
            "ratio_to": [float(v) for v in edges[1:]],
            "policies": [got.get(i, (0, 0.0))[0] for i in range(len(edges) - 1)],
            "share_of_policies": [got.get(i, (0, 0.0))[0] / rows for i in range(len(edges) - 1)],
            "exposure": [got.get(i, (0, 0.0))[1] for i in range(len(edges) - 1)],
        })
        double = bands_by(con, "ratio", ["expected", "expected_tariff"])
        by_band = {}
        for name, f in tariff.factors.items():
            if not f.banded:
                continue
            sums = con.sql(f'SELECT "c:{name}" AS cell, count(*) AS policies, '
                           "sum(exposure) AS exposure, sum(actual) AS actual, "
                           "sum(expected) AS expected, sum(expected_tariff) AS expected_tariff "
                           "FROM h GROUP BY 1 ORDER BY 1").to_arrow_table()
            by_band[name] = band_table(f.cell_table(), sums)
    finally:
        con.close()
    models = [f"{role}: {tariff.sources.get(role) or fit.model.response}"
              for role, fit in tariff.models]
    return BandingCost(rows=int(rows), exposure=float(exposure), actual=float(actual),
                       deviance_measure=measure, model=model, tariff=tar,
                       moved=float(moved), moved_exposure=float(moved_e), moved_up=float(up),
                       moved_down=float(down), ratio_bands=ratio_bands,
                       ratio_quantiles=quantiles, double_lift=double, by_band=by_band,
                       curves={name: c for name, f in tariff.factors.items()
                               if (c := f.curve()) is not None},
                       models=models)


def band_table(cells: pa.Table, sums: pa.Table) -> pa.Table:
    """Actual / expected per band of a factor: the factor's cells (in order, those without
    hold-out rows too) beside the hold-out sums."""
    got = {r["cell"]: r for r in sums.to_pylist()}
    out: dict[str, list] = {k: [] for k in ("band", "relativity", "training_exposure",
                                            "policies", "exposure", "actual", "expected",
                                            "expected_tariff", "actual_over_expected",
                                            "actual_over_tariff")}
    for c in cells.to_pylist():
        r = got.get(c["cell"], {})
        a, m, t = r.get("actual", 0.0), r.get("expected", 0.0), r.get("expected_tariff", 0.0)
        out["band"].append(c["band"])
        out["relativity"].append(c["relativity"])
        out["training_exposure"].append(c["training_exposure"])
        out["policies"].append(int(r.get("policies", 0)))
        out["exposure"].append(float(r.get("exposure", 0.0)))
        out["actual"].append(float(a))
        out["expected"].append(float(m))
        out["expected_tariff"].append(float(t))
        out["actual_over_expected"].append(a / m if m else None)
        out["actual_over_tariff"].append(a / t if t else None)
    if -1 in got:
        r = got[-1]
        raise DataError(f"{int(r['policies'])} hold-out row(s) fall in no band (unknown "
                        "levels or missing values)")
    return pa.table(out)

"""The demo: an invented motor book with a known truth, and the batch job run on it.

:func:`write_book` writes the book as Parquet in chunks (bounded memory at any size, the
same rows for the same seed whatever the chunking). :func:`run_demo` writes the book and
the spec files of a claim-frequency model (poisson, exposure), a banded challenger and a
claim-severity model (gamma on the average claim, claim counts as weights), fits each from
its spec file, saves the model files, writes relativity tables and HTML reports validated on
a hold-out year, builds a banded pure-premium tariff with the cost of banding on the hold-out
year, and scores the book. Both models measure region from the same base level.
The scenario is invented; nothing here describes a real portfolio.
"""

from __future__ import annotations

import os
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

REGIONS = [f"R{i:02d}" for i in range(1, 23)]
FUELS = ["petrol", "diesel", "electric"]
GROUPS = [f"G{i:03d}" for i in range(1, 501)]
CHUNK = 500_000
FILE_ROWS = 2_000_000

_rng = np.random.default_rng(20261201)
REGION_FREQ = _rng.normal(0.0, 0.15, len(REGIONS))   # log-frequency effect per region
REGION_SEV = _rng.normal(0.0, 0.08, len(REGIONS))    # log-severity effect per region
GROUP_FREQ = _rng.normal(0.0, 0.1, len(GROUPS))
FUEL_FREQ = np.array([0.0, 0.12, -0.08])
REGION_SHARE = np.linspace(2.0, 0.5, len(REGIONS)) / np.linspace(2.0, 0.5, len(REGIONS)).sum()


def true_frequency_terms(cols: dict) -> dict[str, np.ndarray]:
    """The log-frequency contributions of the invented truth (per policy-year); categorical
    factors are given as level indices (``region``, ``fuel``, ``vehicle_group``)."""
    age = cols["driver_age"]
    vage = cols["vehicle_age"]
    return {
        "driver_age": 0.9 * np.exp(-(age - 18.0) / 7.0) + 0.25 * ((age - 45.0) / 30.0) ** 2,
        "vehicle_age": -0.02 * vage + 0.15 * np.exp(-vage / 2.0),
        "bonus_level": 0.04 * cols["bonus_level"],
        "density": 0.12 * np.log(cols["density"] / 500.0),
        "region": REGION_FREQ[cols["region"]],
        "fuel": FUEL_FREQ[cols["fuel"]],
        "vehicle_group": GROUP_FREQ[cols["vehicle_group"]],
    }


def true_log_frequency(cols: dict) -> np.ndarray:
    return -2.4 + sum(true_frequency_terms(cols).values())


def true_log_severity(cols: dict) -> np.ndarray:
    age = cols["driver_age"]
    return (7.4 + 0.2 * ((age - 50.0) / 30.0) ** 2 + 0.03 * cols["vehicle_power"]
            + REGION_SEV[cols["region"]])


def _levels(indices: np.ndarray, labels: list[str]) -> pa.DictionaryArray:
    return pa.DictionaryArray.from_arrays(pa.array(indices.astype(np.int32)), pa.array(labels))


def _chunk(start: int, rows: int, seed: int) -> pa.Table:
    rng = np.random.default_rng([seed, start // CHUNK])
    age = np.clip(np.round(rng.gamma(6.0, 7.5, rows) + 18), 18, 90)
    cols = {
        "policy_id": np.arange(start, start + rows, dtype=np.int64),
        "policy_year": rng.integers(2021, 2025, rows).astype(np.int16),
        "exposure": np.where(rng.random(rows) < 0.6, 1.0, np.round(rng.uniform(0.05, 1, rows),
                                                                      3)),
        "driver_age": age,
        "vehicle_age": np.minimum(np.floor(rng.exponential(6.0, rows)), 25.0),
        "vehicle_power": rng.integers(4, 16, rows).astype(np.float64),
        "bonus_level": np.minimum(np.floor(rng.exponential(3.0, rows)), 22.0),
        "density": np.round(np.exp(rng.normal(6.0, 1.4, rows)), 1),
        "region": rng.choice(len(REGIONS), rows, p=REGION_SHARE),
        "fuel": rng.choice(len(FUELS), rows, p=[0.55, 0.38, 0.07]),
        "vehicle_group": np.minimum(rng.zipf(1.3, rows) - 1, len(GROUPS) - 1),
    }
    lam = cols["exposure"] * np.exp(true_log_frequency(cols))
    counts = rng.poisson(lam)
    shape = 2.0
    mean_sev = np.exp(true_log_severity(cols))
    amounts = np.where(counts > 0, rng.gamma(shape * np.maximum(counts, 1), mean_sev / shape), 0.0)
    out = dict(cols)
    out["region"] = _levels(cols["region"], REGIONS)
    out["fuel"] = _levels(cols["fuel"], FUELS)
    out["vehicle_group"] = _levels(cols["vehicle_group"], GROUPS)
    out["claim_count"] = counts.astype(np.int32)
    out["claim_amount"] = np.round(amounts, 2)
    return pa.table(out)


def write_book(folder, rows: int, *, seed: int = 7, progress: Callable | None = None
               ) -> list[str]:
    """Write ``rows`` invented policies under ``folder`` as Parquet files; returns paths."""
    os.makedirs(folder, exist_ok=True)
    paths = []
    writer = None
    done = 0
    try:
        while done < rows:
            n = min(CHUNK, rows - done)
            table = _chunk(done, n, seed)
            if done % FILE_ROWS == 0:
                if writer is not None:
                    writer.close()
                path = os.path.join(folder, f"part-{done // FILE_ROWS:04d}.parquet")
                writer = pq.ParquetWriter(path, table.schema)
                paths.append(path)
            writer.write_table(table, row_group_size=CHUNK)
            done += n
            if progress:
                progress(done)
    finally:
        if writer is not None:
            writer.close()
    return paths


@dataclass
class DemoResult:
    folder: str
    book: list[str]
    frequency: object
    severity: object
    scored: str
    actual_claims: float
    expected_claims: float
    reports: list[str]
    tables: list[str]
    specs: list[str]
    tariff: str = ""        # the tariff folder
    cost: object = None     # the cost of banding on the hold-out (BandingCost)


TRAIN = "policy_year <= 2023"   # the demo fits on three years and holds out the fourth
HOLDOUT = "policy_year = 2024"
BASE_REGION = "R01"  # the region with the most exposure: both models measure from it


def frequency_model(where: str | None = TRAIN):
    import tallgam as tg

    return tg.Model(
        response="claim_count", family="poisson", exposure="exposure", where=where,
        terms=[tg.spline("driver_age", size=12), tg.spline("vehicle_age", size=8),
               tg.spline("density", size=8), tg.linear("bonus_level"),
               tg.categorical("region", base=BASE_REGION), tg.categorical("fuel")])


def banded_frequency_model(where: str | None = TRAIN):
    """The challenger a pricing team might start from: straight lines and levels only."""
    import tallgam as tg

    return tg.Model(
        response="claim_count", family="poisson", exposure="exposure", where=where,
        terms=[tg.linear("driver_age"), tg.linear("vehicle_age"), tg.linear("bonus_level"),
               tg.categorical("region", base=BASE_REGION), tg.categorical("fuel")])


def severity_model(where: str | None = TRAIN):
    import tallgam as tg

    return tg.Model(
        response="claim_amount / claim_count", family="gamma", weights="claim_count",
        where=f"claim_count > 0 AND ({where})" if where else "claim_count > 0",
        terms=[tg.spline("driver_age", size=8), tg.spline("vehicle_power", size=6),
               tg.categorical("region", base=BASE_REGION)])


SPECS = (  # file name, model, what it is
    ("frequency", frequency_model, "claim frequency: poisson, log link, ln(exposure) offset"),
    ("frequency_banded", banded_frequency_model,
     "the banded challenger: straight lines and levels only"),
    ("severity", severity_model, "claim severity: gamma, log link, average claim amount "
                                 "weighted by the claim count, policies with claims"),
)


def write_specs(folder) -> list[str]:
    """Write the demo's spec files (TOML) into ``folder``, reading the book from
    ``book/*.parquet`` beside them; returns the paths. Copy them to start a model of your
    own."""
    from tallgam.atomic import write_text
    from tallgam.spec import spec_text

    paths = []
    for name, make, what in SPECS:
        path = os.path.join(folder, f"{name}.toml")
        text = spec_text(make(), data="book/*.parquet", output=f"{name}.json",
                         comment=f"The demo's {what}.\nFit it with: tallgam fit {name}.toml")
        write_text(path, text)
        paths.append(path)
    return paths


def run_demo(folder, rows: int = 1_000_000, *, seed: int = 7, progress=False,
             echo: Callable[[str], None] = lambda s: None) -> DemoResult:
    """Write the book and the spec files; fit frequency (and a banded challenger) and
    severity on 2021–2023 from their spec files; save the models; write relativity tables;
    build the pure-premium tariff and measure its cost of banding on 2024; validate on 2024
    into HTML reports; score the whole book."""
    from tallgam.data.sources import connect
    from tallgam.spec import load_spec

    folder = os.fspath(folder)
    book_dir = os.path.join(folder, "book")
    echo(f"writing an invented motor book of {rows:,} policies to {book_dir}")
    book = write_book(book_dir, rows, seed=seed)
    glob = os.path.join(book_dir, "*.parquet")
    specs = write_specs(folder)
    echo("spec files to copy from: " + ", ".join(specs))
    # exact or binned passes are chosen by each fit (binned="auto"; its notes say which)
    fits = {}
    for (name, _, what), path in zip(SPECS, specs):
        spec = load_spec(path)
        echo(f"fitting {path}: {what}")
        fit = spec.model.fit(spec.data, batch_rows=spec.batch_rows, progress=progress,
                             binned=spec.binned)
        fit.save(os.path.join(folder, spec.output))
        if name != "frequency_banded":
            echo(fit.summary())
        fits[name] = fit
    freq, banded, sev = fits["frequency"], fits["frequency_banded"], fits["severity"]
    tables = []
    for name, fit in (("frequency", freq), ("severity", sev)):
        tables += fit.relativities().write(os.path.join(folder, "tables", name))
    echo(f"relativity tables written to {os.path.join(folder, 'tables')} "
         "(notes.txt in each folder explains them)")
    tariff_dir, cost = _tariff(folder, freq, sev, glob, progress, echo)
    reports = _reports(folder, freq, banded, sev, glob, progress, echo, cost)
    scored = os.path.join(folder, "scored_frequency.parquet")
    echo(f"scoring the whole book with the frequency model into {scored}")
    freq.score(glob, scored, keep=["policy_id", "claim_count"], progress=progress)
    con = connect()  # one aggregate over the scored file: no join, bounded memory
    actual, expected = con.execute(
        "SELECT sum(claim_count), sum(prediction) FROM read_parquet(?)", [scored]).fetchall()[0]
    con.close()
    return DemoResult(folder, book, freq, sev, scored, float(actual), float(expected),
                      reports, tables, specs, tariff_dir, cost)


def _tariff(folder, freq, sev, glob, progress, echo):
    """The pure-premium tariff of the demo book (automatic bands, ±2%), with the cost of
    banding measured on the 2024 hold-out."""
    import tallgam as tg

    out = os.path.join(folder, "tariff")
    echo("building a pure-premium tariff (frequency × severity, automatic bands within ±2%)")
    tariff = tg.tariff(freq, sev, tolerance=0.02)
    echo(tariff.summary())
    cost = tariff.cost(glob, where=HOLDOUT, progress=progress)
    echo(cost.summary())
    tariff.write(out, cost=cost)
    echo(f"tariff written to {out}")
    return out, cost


def _reports(folder, freq, banded, sev, glob, progress, echo, cost=None) -> list[str]:
    try:
        import matplotlib  # noqa: F401
    except ImportError:
        echo("matplotlib is not installed: the HTML reports are skipped "
             "(pip install 'tallgam[plot]')")
        return []
    from tallgam.outputs.report import write_report

    out = [
        write_report(freq, os.path.join(folder, "report_frequency.html"), data=glob,
                     where=HOLDOUT, against=banded,
                     title="Claim frequency — demo motor book", progress=progress,
                     banding=cost),
        write_report(sev, os.path.join(folder, "report_severity.html"), data=glob,
                     where=f"claim_count > 0 AND {HOLDOUT}",
                     title="Claim severity — demo motor book", progress=progress),
    ]
    echo(f"reports validated on the hold-out ({HOLDOUT}): " + ", ".join(out))
    return out

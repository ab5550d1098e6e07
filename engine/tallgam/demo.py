"""The demo: an invented motor book with a known truth, and the batch job run on it.

:func:`write_book` writes the book as Parquet in chunks (bounded memory at any size, the
same rows for the same seed whatever the chunking). :func:`run_demo` writes the book,
fits a claim-frequency model (poisson, exposure) and a claim-severity model (gamma on the
average claim, claim counts as weights), saves both model files and scores the book.
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


TRAIN = "policy_year <= 2023"   # the demo fits on three years and holds out the fourth
HOLDOUT = "policy_year = 2024"


def frequency_model(where: str | None = TRAIN):
    import tallgam as tg

    return tg.Model(
        response="claim_count", family="poisson", exposure="exposure", where=where,
        terms=[tg.spline("driver_age", size=12), tg.spline("vehicle_age", size=8),
               tg.spline("density", size=8), tg.linear("bonus_level"),
               tg.categorical("region"), tg.categorical("fuel")])


def banded_frequency_model(where: str | None = TRAIN):
    """The challenger a pricing team might start from: straight lines and levels only."""
    import tallgam as tg

    return tg.Model(
        response="claim_count", family="poisson", exposure="exposure", where=where,
        terms=[tg.linear("driver_age"), tg.linear("vehicle_age"), tg.linear("bonus_level"),
               tg.categorical("region"), tg.categorical("fuel")])


def severity_model(where: str | None = TRAIN):
    import tallgam as tg

    return tg.Model(
        response="claim_amount / claim_count", family="gamma", weights="claim_count",
        where=f"claim_count > 0 AND ({where})" if where else "claim_count > 0",
        terms=[tg.spline("driver_age", size=8), tg.spline("vehicle_power", size=6),
               tg.categorical("region")])


def run_demo(folder, rows: int = 1_000_000, *, seed: int = 7, progress=False,
             echo: Callable[[str], None] = lambda s: None) -> DemoResult:
    """Write the book; fit frequency (and a banded challenger) and severity on 2021–2023;
    save the models; write relativity tables; validate on 2024 into HTML reports; score
    the whole book."""
    import duckdb

    import tallgam as tg

    folder = os.fspath(folder)
    book_dir = os.path.join(folder, "book")
    echo(f"writing an invented motor book of {rows:,} policies to {book_dir}")
    book = write_book(book_dir, rows, seed=seed)
    glob = os.path.join(book_dir, "*.parquet")
    quoted = "'" + glob.replace("'", "''") + "'"
    holdout = tg.sql(f"SELECT * FROM read_parquet({quoted}) WHERE {HOLDOUT}")
    # exact or binned passes are chosen by each fit (binned="auto"; its notes say which)
    options = {"progress": progress}
    echo(f"fitting the claim-frequency model on {TRAIN} (poisson, log link, exposure offset)")
    freq = frequency_model().fit(glob, **options)
    freq.save(os.path.join(folder, "frequency.json"))
    echo(freq.summary())
    echo("fitting a banded challenger (straight lines and levels only)")
    banded = banded_frequency_model().fit(glob, **options)
    banded.save(os.path.join(folder, "frequency_banded.json"))
    echo("fitting the claim-severity model (gamma, log link, claim counts as weights)")
    sev = severity_model().fit(glob, **options)
    sev.save(os.path.join(folder, "severity.json"))
    echo(sev.summary())
    tables = []
    for name, fit in (("frequency", freq), ("severity", sev)):
        tables += fit.relativities().write(os.path.join(folder, "tables", name))
    echo(f"relativity tables written to {os.path.join(folder, 'tables')}")
    reports = _reports(folder, freq, banded, sev, holdout, glob, progress, echo)
    scored = os.path.join(folder, "scored_frequency.parquet")
    echo(f"scoring the whole book with the frequency model into {scored}")
    freq.score(glob, scored, keep=["policy_id", "claim_count"], progress=progress)
    con = duckdb.connect()  # one aggregate over the scored file: no join, bounded memory
    actual, expected = con.execute(
        "SELECT sum(claim_count), sum(prediction) FROM read_parquet(?)", [scored]).fetchall()[0]
    con.close()
    return DemoResult(folder, book, freq, sev, scored, float(actual), float(expected),
                      reports, tables)


def _reports(folder, freq, banded, sev, holdout, glob, progress, echo) -> list[str]:
    try:
        import matplotlib  # noqa: F401
    except ImportError:
        echo("matplotlib is not installed: the HTML reports are skipped "
             "(pip install 'tallgam[plot]')")
        return []
    import tallgam as tg
    from tallgam.outputs.report import write_report

    quoted = "'" + glob.replace("'", "''") + "'"
    sev_holdout = tg.sql(f"SELECT * FROM read_parquet({quoted}) "
                         f"WHERE claim_count > 0 AND {HOLDOUT}")
    out = [
        write_report(freq, os.path.join(folder, "report_frequency.html"), data=holdout,
                     against=banded, title="Claim frequency — demo motor book",
                     progress=progress),
        write_report(sev, os.path.join(folder, "report_severity.html"), data=sev_holdout,
                     title="Claim severity — demo motor book", progress=progress),
    ]
    echo(f"reports validated on the {HOLDOUT.split()[0].replace('_', ' ')} 2024 hold-out: "
         + ", ".join(out))
    return out

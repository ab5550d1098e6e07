"""The fit does not depend on how the data arrive.

Batch size, thread count, source form (files, globs, hive directories, CSV, SQL, DuckDB,
Arrow, data frames) and file order change only the order of floating-point sums, so every
fit must predict the same values as the reference fit to 1e-9 relative (the design promises
~1e-10). The reference is a REML fit with two splines, a linear term and a categorical on
about 20 000 rows, read from a pandas DataFrame. Measured: every case within 2.7e-14.
"""

from __future__ import annotations

import duckdb
import numpy as np
import pandas as pd
import polars as pl
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

import tallgam as tg

N_ROWS = 20_000
RTOL = 1e-9
REGIONS = ("north", "south", "east", "west", "centre")
MODEL = tg.Model("y", terms=[tg.spline("age", size=12), tg.spline("power", size=8),
                             tg.linear("density"), tg.categorical("region")])


def _frame() -> pd.DataFrame:
    rng = np.random.default_rng(11)
    age = rng.integers(18, 90, N_ROWS).astype(float)  # integer-valued, as in pricing data
    power = rng.gamma(4.0, 20.0, N_ROWS)
    density = rng.lognormal(5.0, 1.0, N_ROWS)
    region = rng.choice(REGIONS, N_ROWS, p=[0.3, 0.25, 0.2, 0.15, 0.1])
    shift = dict(zip(REGIONS, [0.0, 0.3, -0.2, 0.5, 0.1]))
    y = (np.sin(age / 12.0) + 0.01 * power - 0.0002 * density
         + np.array([shift[r] for r in region]) + rng.normal(0.0, 0.5, N_ROWS))
    return pd.DataFrame({"age": age, "power": power, "density": density, "region": region,
                         "y": y})


@pytest.fixture(scope="module")
def frame() -> pd.DataFrame:
    return _frame()


@pytest.fixture(scope="module")
def files(tmp_path_factory, frame):
    """The frame written as: one Parquet file, 4 Parquet parts, a hive directory
    partitioned by region, a CSV file and a DuckDB database file."""
    root = tmp_path_factory.mktemp("sources")
    table = pa.Table.from_pandas(frame, preserve_index=False)
    single = root / "all.parquet"
    pq.write_table(table, single)
    parts_dir = root / "parts"
    parts_dir.mkdir()
    parts = []
    for i, chunk in enumerate(np.array_split(np.arange(N_ROWS), 4)):
        path = parts_dir / f"part-{i}.parquet"
        pq.write_table(table.take(pa.array(chunk)), path)
        parts.append(str(path))
    hive = root / "hive"
    for region in REGIONS:
        sub = hive / f"region={region}"
        sub.mkdir(parents=True)
        rows = frame[frame["region"] == region].drop(columns="region")
        pq.write_table(pa.Table.from_pandas(rows, preserve_index=False), sub / "data.parquet")
    csv = root / "all.csv"
    frame.to_csv(csv, index=False)  # shortest round-trip float text
    db = root / "book.duckdb"
    con = duckdb.connect(str(db))
    con.execute(f"CREATE TABLE book AS SELECT * FROM read_parquet('{single}')")
    con.close()
    return {"single": str(single), "parts": parts, "glob": str(parts_dir / "*.parquet"),
            "hive": str(hive), "csv": str(csv), "db": str(db)}


@pytest.fixture(scope="module")
def reference(frame):
    fit = MODEL.fit(frame)
    assert fit.converged
    return fit, fit.predict(frame)


def _assert_same(fit, frame, expected):
    got = fit.predict(frame)
    gap = np.max(np.abs(got - expected)) / np.max(np.abs(expected))
    assert gap <= RTOL, f"relative gap {gap:.3g}"


SOURCES = {
    "parquet file": lambda f, df: f["single"],
    "glob": lambda f, df: f["glob"],
    "list of files": lambda f, df: f["parts"],
    "list of files, reversed": lambda f, df: list(reversed(f["parts"])),
    "list of files, shuffled": lambda f, df: [f["parts"][i] for i in (2, 0, 3, 1)],
    "hive directory": lambda f, df: f["hive"],
    "csv": lambda f, df: f["csv"],
    "duckdb relation": lambda f, df: duckdb.connect().read_parquet(f["single"]),
    "sql": lambda f, df: tg.sql(
        f"SELECT age, power, density, region, y FROM read_parquet('{f['glob']}')"),
    "sql on a database file": lambda f, df: tg.sql("SELECT * FROM book", database=f["db"]),
    "arrow table": lambda f, df: pa.Table.from_pandas(df, preserve_index=False),
    "arrow reader": lambda f, df: pa.RecordBatchReader.from_batches(
        *_batches(pa.Table.from_pandas(df, preserve_index=False))),
    "pandas": lambda f, df: df,
    "polars": lambda f, df: pl.from_pandas(df),
}


def _batches(table: pa.Table):
    return table.schema, table.to_batches(max_chunksize=3001)


@pytest.mark.parametrize("form", list(SOURCES))
def test_every_source_form(files, frame, reference, form):
    data = SOURCES[form](files, frame)
    fit = MODEL.fit(data, batch_rows=4096)
    assert fit.rows == N_ROWS
    _assert_same(fit, frame, reference[1])
    # prediction from the same source form gives the same values too, in its row order
    if form in ("parquet file", "pandas", "polars", "arrow table", "csv"):
        again = fit.predict(SOURCES[form](files, frame))
        np.testing.assert_allclose(again, reference[1], rtol=RTOL, atol=0)


def test_hive_partition_column_is_the_one_used(files, reference):
    # the region column exists only as a partition directory name
    assert "region" not in pq.read_schema(
        f"{files['hive']}/region=north/data.parquet").names
    fit = MODEL.fit(files["hive"])
    assert fit.coefficients.to_pandas().query("term == 'categorical(region)'")[
        "name"].tolist() == sorted(REGIONS)


@pytest.mark.parametrize("factor", [1e-4, 1e3])
def test_units_of_the_response_change_nothing_but_the_scale(frame, reference, factor):
    # common practice: a change of currency or unit rescales fitted values and nothing
    # else; λ is unchanged (data fit and ∫f''² scale alike). The REML score moves by
    # n·log(factor), so this also checks that convergence does not depend on its size.
    fit = MODEL.fit(frame.assign(y=frame["y"] * factor))
    _assert_same(fit, frame, reference[1] * factor)
    for label, edf in reference[0].edf.items():
        assert fit.edf[label] == pytest.approx(edf, rel=RTOL, abs=RTOL)


@pytest.mark.parametrize("weight", [1e-6, 1e6])
def test_constant_weights_change_nothing_but_the_scale(frame, reference, weight):
    # common practice: prior weights all equal to c leave the estimates as they are;
    # Var(y) = φ/w, so the scale φ and λ (weighing against Σ w·r²) are multiplied by c
    model = tg.Model("y", terms=MODEL.terms, weights="w")
    fit = model.fit(frame.assign(w=weight))
    _assert_same(fit, frame, reference[1])
    assert fit.scale == pytest.approx(reference[0].scale * weight, rel=1e-8)
    lam, ref_lam = fit.smoothing["spline(age)"], reference[0].smoothing["spline(age)"]
    assert lam == pytest.approx(ref_lam * weight, rel=1e-8)

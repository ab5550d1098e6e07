"""The exported SQL of every term kind, evaluated by DuckDB, equals predict."""

from __future__ import annotations

import warnings

import duckdb
import numpy as np
import pandas as pd

import tallgam as tg


def test_sql_of_every_term_kind_matches_predict():
    # reference: DuckDB itself evaluating the exported expression (the warehouse route)
    rng = np.random.default_rng(3)
    n = 20000
    levels = [f"g{i}" for i in range(300)]
    df = pd.DataFrame({
        "month": rng.integers(1, 13, n).astype(float), "lon": rng.uniform(0, 1, n),
        "lat": rng.uniform(0, 1, n), "age": rng.uniform(18, 80, n),
        "fuel": rng.choice(["p", "d"], n), "grp": rng.choice(levels, n),
        "reg": rng.choice(list("ABCDE"), n), "z": rng.uniform(0.5, 2, n),
        "e": rng.uniform(0.2, 1, n)})
    eta = (0.3 * np.sin(2 * np.pi * df.month / 12) + 0.3 * np.sin(3 * df.lon) * np.cos(3 * df.lat)
           + np.where(df.fuel == "p", 0.01, -0.01) * (df.age - 50)
           + 0.1 * np.sin(df.age / 10) * df.z)
    df["y"] = rng.poisson(df.e * np.exp(-1 + eta))
    chain = {"A": ["B"], "B": ["C"], "C": ["D"], "D": ["E"], "E": []}
    model = tg.Model("y", family="poisson", exposure="e", terms=[
        tg.cyclic("month", period=12, size=6), tg.surface("lon", "lat", size=(5, 5)),
        tg.categorical("fuel"), tg.spline("age", per="fuel", size=6),
        tg.spline("age", multiplier="z", size=5, shape=None), tg.random_effect("grp"),
        tg.adjacency("reg", neighbours=chain)])
    fit = model.fit(df)
    new = df.copy()
    new.loc[:50, "month"] = 25.0        # wraps to month 1
    new.loc[50:100, "lon"] = 1.5        # beyond the training range: clamped
    new.loc[100:150, "age"] = 10.0
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        expected = fit.predict(new)
    con = duckdb.connect()
    con.register("book", new)
    got = con.execute(f"SELECT {fit.to_sql()} AS p FROM book").fetchnumpy()["p"]
    assert np.max(np.abs(got / expected - 1)) < 1e-9
    link = con.execute(f"SELECT {fit.to_sql('link', with_offset=False)} AS p FROM book"
                       ).fetchnumpy()["p"]
    np.testing.assert_allclose(link, np.log(expected / new["e"]), rtol=0, atol=1e-9)

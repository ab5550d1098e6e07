"""The command line through real subprocesses on real Parquet files."""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time

import duckdb
import numpy as np
import pandas as pd
import pytest

import tallgam as tg

pytestmark = pytest.mark.filterwarnings("ignore::tallgam.TallgamWarning")


def run(*args, cwd=None, check=True, timeout=300):
    proc = subprocess.run([sys.executable, "-m", "tallgam", *args], capture_output=True,
                          text=True, cwd=cwd, timeout=timeout)
    if check and proc.returncode != 0:
        raise AssertionError(f"exit {proc.returncode}\nstdout:\n{proc.stdout}\n"
                             f"stderr:\n{proc.stderr}")
    return proc


@pytest.fixture(scope="module")
def book(tmp_path_factory):
    """A small frequency book (synthetic truth) as two Parquet files."""
    folder = tmp_path_factory.mktemp("book")
    rng = np.random.default_rng(3)
    n = 6000
    df = pd.DataFrame({
        "policy_id": np.arange(n),
        "age": rng.integers(18, 80, n).astype(float),
        "power": rng.uniform(40, 200, n),
        "bonus": rng.integers(0, 10, n),
        "region": rng.choice(["north", "south", "east", "west"], n),
        "exposure": rng.uniform(0.2, 1.0, n),
    })
    eta = -2 + 0.5 * np.exp(-(df.age - 18) / 10) + 0.003 * (df.power - 100) + 0.05 * df.bonus
    df["claims"] = rng.poisson(df.exposure * np.exp(eta))
    df.iloc[: n // 2].to_parquet(folder / "a.parquet")
    df.iloc[n // 2:].to_parquet(folder / "b.parquet")
    spec = folder / "frequency.toml"
    spec.write_text(
        'data = "*.parquet"\nresponse = "claims"\nfamily = "poisson"\nexposure = "exposure"\n'
        'batch_rows = 1000\n\n[[term]]\nkind = "spline"\ncolumn = "age"\nsize = 8\n\n'
        '[[term]]\nkind = "spline"\ncolumn = "power"\nsize = 6\n\n'
        '[[term]]\nkind = "linear"\ncolumn = "bonus"\n\n'
        '[[term]]\nkind = "categorical"\ncolumn = "region"\n')
    return folder, df


@pytest.mark.slow
def test_fit_show_score_sql(book, tmp_path):
    folder, df = book
    model_path = tmp_path / "freq.json"
    out = run("fit", str(folder / "frequency.toml"), "-o", str(model_path), "--quiet")
    assert model_path.exists(), out.stderr
    saved = json.loads(model_path.read_text())
    assert saved["format"] == "tallgam-model" and saved["schema_version"] == 3

    shown = run("show", str(model_path)).stdout
    for text in ("age", "region", "6,000", "Training data", "qualified actuary"):
        assert text in shown
    assert "spline(" not in shown and "categorical(" not in shown

    scored = tmp_path / "scored.parquet"
    run("score", str(model_path), str(folder / "*.parquet"), "-o", str(scored),
        "--keep", "policy_id", "--terms", "--se", "--batch-rows", "1000", "--quiet")
    got = pd.read_parquet(scored)
    fit = tg.load(model_path)
    expect = fit.predict(str(folder / "*.parquet"))
    assert list(got.columns[:3]) == ["policy_id", "prediction", "link"]
    assert "term:spline(age)" in got.columns and "prediction_se" in got.columns
    np.testing.assert_allclose(got["prediction"], expect, rtol=1e-12)
    # per-term contributions add up to the linear predictor with the offset
    terms = got[[c for c in got.columns if c.startswith("term:")]].sum(axis=1)
    np.testing.assert_allclose(terms + np.log(df["exposure"]), got["link"], rtol=1e-12)

    sql = run("sql", str(model_path)).stdout
    con = duckdb.connect()
    via_sql = con.execute(f"SELECT {sql} AS p FROM read_parquet(?)",
                          [str(folder / "*.parquet")]).fetchnumpy()["p"]
    np.testing.assert_allclose(via_sql, expect, rtol=1e-9)


def test_sql_matches_predict_on_100k_rows_with_extrapolation(book, tmp_path):
    """DuckDB evaluating the exported SQL equals predict to 1e-9 relative, on rows outside
    the training range and on every level."""
    folder, _ = book
    model = tg.Model("claims", family="poisson", exposure="exposure",
                     terms=[tg.spline("age", size=8), tg.spline("power", size=6),
                            tg.linear("bonus"), tg.categorical("region")])
    fit = model.fit(str(folder / "*.parquet"))
    rng = np.random.default_rng(11)
    n = 100_000
    new = pd.DataFrame({
        "age": rng.uniform(5, 100, n),           # well beyond the 18..79 of training
        "power": rng.uniform(0, 300, n),
        "bonus": rng.integers(-3, 15, n),
        "region": rng.choice(["north", "south", "east", "west"], n),
        "exposure": rng.uniform(0.1, 2.0, n),
    })
    assert set(new.region) == {"north", "south", "east", "west"}
    with pytest.warns(tg.TallgamWarning, match="outside the training range"):
        expect = fit.predict(new)
    con = duckdb.connect()
    con.register("book", new)
    got = con.execute(f"SELECT {fit.to_sql()} AS p FROM book").fetchnumpy()["p"]
    assert np.max(np.abs(got / expect - 1)) < 1e-9


def test_scoring_larger_than_a_batch_equals_in_memory(book, tmp_path):
    folder, df = book
    fit = tg.Model("claims", family="poisson", exposure="exposure",
                   terms=[tg.spline("age", size=8), tg.categorical("region")]).fit(df)
    out = tmp_path / "s.parquet"
    report = fit.score(str(folder / "*.parquet"), out, keep=["policy_id"], batch_rows=777)
    assert report.rows == len(df)
    got = pd.read_parquet(out).sort_values("policy_id")
    np.testing.assert_allclose(got["prediction"].to_numpy(), fit.predict(df), rtol=1e-13)


@pytest.mark.slow
def test_killed_scoring_leaves_no_output(tmp_path):
    """A scoring run stopped midway (SIGTERM, then SIGKILL) leaves no output file."""
    rng = np.random.default_rng(5)
    n = 400_000
    df = pd.DataFrame({"x": rng.uniform(0, 1, n), "g": rng.choice(list("abc"), n)})
    df["y"] = np.sin(6 * df.x) + rng.normal(0, 0.3, n)
    data = tmp_path / "big.parquet"
    df.to_parquet(data)
    model_path = tmp_path / "m.json"
    tg.Model("y", terms=[tg.spline("x"), tg.categorical("g")]).fit(df).save(model_path)
    for sig in (signal.SIGTERM, signal.SIGKILL):
        out = tmp_path / f"scored-{sig}.parquet"
        proc = subprocess.Popen(
            [sys.executable, "-m", "tallgam", "score", str(model_path), str(data), "-o",
             str(out), "--se", "--terms", "--batch-rows", "2000", "--quiet"],
            stdout=subprocess.PIPE, stderr=subprocess.PIPE)
        deadline = time.time() + 120
        while time.time() < deadline and not any(
                p.name.startswith(".tallgam-score-") for p in tmp_path.iterdir()):
            time.sleep(0.02)
        assert proc.poll() is None, "scoring finished before it could be stopped"
        proc.send_signal(sig)
        proc.wait(timeout=60)
        assert not out.exists()
        if sig == signal.SIGTERM:  # a catchable stop also cleans its temporary file
            assert not any(p.name.startswith(".tallgam-score-") for p in tmp_path.iterdir())


@pytest.mark.parametrize("body, needle", [
    ('response = "claims"\nfamly = "poisson"\n', "famly"),
    ('response = "claims"\nfamily = "poison"\n', "poison"),
    ('response = "claims"\n[[term]]\nkind = "spline"\ncolumn = "agee"\n', "agee"),
    ('response = "claims"\n[[term]]\nkind = "spline"\ncolumn = "age"\nsise = 5\n', "sise"),
    ('response = "claims"\nbatch_rows = "many"\n', "batch_rows"),
    ('response = "claims"\n[[term]]\nkind = "splin"\ncolumn = "age"\n', "splin"),
])
def test_spec_errors_exit_2(book, tmp_path, body, needle):
    folder, _ = book
    spec = tmp_path / "bad.toml"
    spec.write_text(f'data = "{folder}/*.parquet"\n' + body)
    proc = run("fit", str(spec), check=False)
    assert proc.returncode == 2, proc.stderr
    assert needle in proc.stderr
    assert not (tmp_path / "bad.json").exists()


def test_spec_suggests_nearest_key(tmp_path):
    spec = tmp_path / "s.toml"
    spec.write_text('response = "y"\nexposre = "e"\n')
    proc = run("fit", str(spec), check=False)
    assert proc.returncode == 2 and "did you mean 'exposure'" in proc.stderr


def test_data_error_exit_3(tmp_path):
    df = pd.DataFrame({"y": [1.0, -2.0, 3.0, 4.0, 5.0], "x": [1.0, 2, 3, 4, 5]})
    df.to_parquet(tmp_path / "d.parquet")
    spec = tmp_path / "s.toml"
    spec.write_text('data = "d.parquet"\nresponse = "y"\nfamily = "poisson"\n'
                    '[[term]]\nkind = "linear"\ncolumn = "x"\n')
    proc = run("fit", str(spec), check=False)
    assert proc.returncode == 3 and "negative counts" in proc.stderr


def test_model_file_error_exit_5(tmp_path):
    bad = tmp_path / "m.json"
    bad.write_text(json.dumps({"format": "tallgam-model", "schema_version": 99}))
    proc = run("show", str(bad), check=False)
    assert proc.returncode == 5 and "schema version 99" in proc.stderr


@pytest.mark.slow
def test_demo_small(tmp_path):
    # what the demo prints is checked in test_reviewer_outputs.py; quiet prints nothing
    proc = run("demo", "--rows", "30000", "--dir", str(tmp_path / "demo"), "--quiet")
    assert proc.stdout == ""
    for name in ("frequency.json", "severity.json", "scored_frequency.parquet",
                 "frequency.toml", "severity.toml", "tables/frequency/notes.txt",
                 "tariff/manifest.json", "tariff/tariff.sql", "tariff/cost_summary.csv"):
        assert os.path.exists(tmp_path / "demo" / name)

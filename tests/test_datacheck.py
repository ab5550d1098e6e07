"""The data check: new data against a model's training profile (range, unseen levels,
population stability index). The stability index is PSI = Σ (a − e)·ln(a/e) over bins
(common practice in credit scoring; Siddiqi 2006, Credit Risk Scorecards), recomputed here
from the raw rows with numpy."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pyarrow.parquet as pq
import pytest

import tallgam as tg
from tallgam.cli import main
from tallgam.demo import write_book


@pytest.fixture(scope="module")
def book(tmp_path_factory):
    folder = tmp_path_factory.mktemp("checkbook")
    paths = write_book(folder / "book", 40_000, seed=3)
    df = pd.concat([pq.read_table(p).to_pandas() for p in paths], ignore_index=True)
    for c in ("region", "fuel", "vehicle_group"):
        df[c] = df[c].astype(str)
    train = df[df.policy_year <= 2023].reset_index(drop=True)
    hold = df[df.policy_year == 2024].reset_index(drop=True)
    model = tg.Model("claim_count", family="poisson", exposure="exposure",
                     terms=[tg.spline("driver_age", size=8), tg.spline("density", size=6),
                            tg.spline("vehicle_age", size=6), tg.linear("bonus_level"),
                            tg.categorical("region"), tg.categorical("fuel")])
    fit = model.fit(train)
    path = folder / "freq.json"
    fit.save(path)
    return folder, fit, train, hold, path


def _shifted(hold: pd.DataFrame) -> pd.DataFrame:
    # a year whose drivers are older and whose policies sit in denser areas
    return hold.assign(driver_age=np.minimum(hold.driver_age + 12, 99.0),
                       density=hold.density * 4.0, policy_year=2025)


def test_the_shifted_inputs_are_flagged_and_the_others_are_not(book):
    _, fit, _, hold, _ = book
    same = fit.check(hold)
    assert same.flagged() == [], same.summary()
    moved = fit.check(_shifted(hold))
    assert set(moved.flagged()) == {"driver_age", "density"}, moved.summary()
    rows = {r["column"]: r for r in moved.table.to_pylist()}
    assert rows["driver_age"]["status"] == "alert" and rows["density"]["status"] == "alert"
    assert rows["driver_age"]["above_share"] > 0.01
    for c in ("vehicle_age", "bonus_level", "region", "fuel"):
        assert rows[c]["psi"] < 0.1 and rows[c]["status"] == "stable", (c, rows[c])


def test_the_stability_index_equals_a_recount_from_the_rows(book):
    _, fit, train, hold, _ = book
    new = _shifted(hold)
    check = fit.check(new)
    bins = check.bins["driver_age"].to_pandas()
    edges = bins["from"].to_numpy()[1:]
    lo, hi = train.driver_age.min(), train.driver_age.max()
    # whole-number ages: the training histogram is exact, so a recount from rows must agree
    e = np.bincount(np.searchsorted(edges, train.driver_age, side="right"),
                    minlength=len(bins)) / len(train)
    a = np.bincount(np.searchsorted(edges, np.clip(new.driver_age, lo, hi), side="right"),
                    minlength=len(bins)) / len(new)
    e, a = np.maximum(e, 1e-4), np.maximum(a, 1e-4)
    psi = float(np.sum((a - e) * np.log(a / e)))
    row = [r for r in check.table.to_pylist() if r["column"] == "driver_age"][0]
    assert row["psi"] == pytest.approx(psi, rel=1e-12)
    np.testing.assert_allclose(bins["training_share"].sum(), 1.0, rtol=1e-12)


def test_unseen_levels_and_missing_values_are_counted(book):
    _, fit, _, hold, _ = book
    odd = hold.copy()
    odd.loc[:99, "region"] = "R99"
    odd["density"] = odd["density"].astype(float)
    odd.loc[100:149, "density"] = np.nan
    check = fit.check(odd)
    rows = {r["column"]: r for r in check.table.to_pylist()}
    assert rows["region"]["unseen_levels"] == 1
    assert rows["region"]["unseen_share"] == pytest.approx(100 / len(odd))
    assert rows["density"]["missing_share"] == pytest.approx(50 / len(odd))
    assert check.unseen_examples["region"] == ["R99"]
    assert "region" in check.flagged()


def test_the_command_line_exits_past_the_alert_level(book, tmp_path, capsys):
    _, fit, _, hold, model_path = book
    shifted = tmp_path / "shifted.parquet"
    _shifted(hold).to_parquet(shifted)
    same = tmp_path / "same.parquet"
    hold.to_parquet(same)
    out = tmp_path / "check.json"
    assert main(["check", str(model_path), str(shifted), "--alert", "0.25",
                 "-o", str(out)]) == 8
    saved = json.loads(out.read_text())
    assert {c["column"] for c in saved["columns"] if c["status"] == "alert"} == {
        "driver_age", "density"}
    assert main(["check", str(model_path), str(same), "--alert", "0.25"]) == 0
    assert main(["check", str(model_path), str(shifted), "--where",
                 "region = 'R01'", "--alert", "0.25"]) == 8
    printed = capsys.readouterr().out
    assert "data check" in printed and "PSI" in printed

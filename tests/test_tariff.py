"""The rating tariff: bands, the pure premium, the tariff folder and its SQL, the cost of
banding. The models are the demo's frequency and severity models fitted to a small demo book
(invented data; the demo's own scenario)."""

from __future__ import annotations

import itertools
import json
import os
import subprocess
import sys

import duckdb
import numpy as np
import pandas as pd
import pytest

import tallgam as tg
from tallgam import demo
from tallgam.errors import SpecError
from tallgam.outputs.bands import cuts_from_starts, fewest_bands
from tallgam.outputs.tables import relativity_rows

pytestmark = pytest.mark.filterwarnings("ignore::tallgam.TallgamWarning")

NUMERIC = ("driver_age", "vehicle_age", "density", "bonus_level", "vehicle_power")


@pytest.fixture(scope="module")
def book(tmp_path_factory):
    """The demo book (12,000 policies) with the demo's frequency and severity models
    fitted on 2021–2023, as the demo fits them."""
    folder = tmp_path_factory.mktemp("tariff_book")
    demo.write_book(folder, 12_000, seed=3)
    glob = str(folder / "*.parquet")
    freq = demo.frequency_model().fit(glob)
    sev = demo.severity_model().fit(glob)
    frame = duckdb.connect().execute(f"SELECT * FROM read_parquet('{glob}') ORDER BY policy_id"
                                     ).df()
    return glob, freq, sev, frame


def sql_rates(sql: str, glob: str) -> np.ndarray:
    con = duckdb.connect()
    out = con.execute(f"SELECT {sql} AS r FROM read_parquet('{glob}') ORDER BY policy_id"
                      ).fetchnumpy()["r"]
    return np.asarray(out, dtype=np.float64)


def rate_by_hand(folder, frame: pd.DataFrame) -> np.ndarray:
    """The tariff applied by looking each policy up in the written tables (Parquet),
    independently of the library: numeric bands closed on the left, levels by name."""
    manifest = json.loads((folder / "manifest.json").read_text())
    base = float(pd.read_csv(folder / "base.csv").set_index("quantity").loc["base_rate",
                                                                             "value"])
    assert manifest["base_rate"] == pytest.approx(base, rel=1e-15)
    rate = np.full(len(frame), base)
    for factor in manifest["factors"]:
        table = pd.read_parquet(folder / f"{factor['file']}.parquet")
        rel = np.full(len(frame), np.nan)
        for i, row in enumerate(frame.itertuples(index=False)):
            hit = np.ones(len(table), dtype=bool)
            for col, kind in factor["inputs"].items():
                x = getattr(row, col)
                if kind == "levels":
                    hit &= table[col].to_numpy() == str(x)
                else:
                    hit &= (table[f"{col}_from"].to_numpy() <= x) & (x < table[f"{col}_to"]
                                                                     .to_numpy())
            assert hit.sum() == 1, (factor["name"], row)
            rel[i] = table["relativity"].to_numpy()[hit][0]
        rate *= rel
    return rate


def test_tariff_sql_equals_tables_looked_up_by_hand(book, tmp_path):
    # rating from the tariff alone (its SQL in DuckDB) must equal the product of its tables
    # looked up by hand — the definition of a multiplicative rating tariff (common practice)
    glob, freq, sev, frame = book
    tariff = tg.tariff(freq, sev, bands={"driver_age": [21, 25, 30, 40, 50, 60, 70, 80],
                                         "region": {"north": ["R01", "R02", "R03"]}})
    tariff.write(tmp_path)
    sample = frame.iloc[::7]
    by_hand = rate_by_hand(tmp_path, sample)
    sql = (tmp_path / "tariff.sql").read_text()
    got = sql_rates(sql, glob)[::7]
    np.testing.assert_allclose(got, by_hand, rtol=1e-12, atol=0)
    np.testing.assert_allclose(tariff.rate(glob)[::7], by_hand, rtol=1e-12, atol=0)
    premium = sql_rates((tmp_path / "premium.sql").read_text(), glob)[::7]
    np.testing.assert_allclose(premium, by_hand * sample["exposure"].to_numpy(), rtol=1e-12)
    # grouped levels share one relativity; the reference band reads 1
    region = pd.read_parquet(tmp_path / "region.parquet").set_index("region")
    assert region.loc[["R01", "R02", "R03"], "relativity"].nunique() == 1
    age = pd.read_parquet(tmp_path / "driver_age.parquet")
    ref = tariff.reference["driver_age"]
    row = age[(age.driver_age_from <= ref) & (ref < age.driver_age_to)]
    assert row["relativity"].item() == pytest.approx(1.0, abs=1e-15)


def test_one_value_per_band_reproduces_the_smooth_model(book):
    # when every band holds one distinct value, the banded tariff is the smooth model:
    # cuts at every distinct value of the book, band values summed over the training rows
    glob, freq, sev, frame = book
    cuts = {c: sorted(frame[c].unique())[1:] for c in NUMERIC}
    want_freq = freq.predict(glob) / frame["exposure"].to_numpy()
    one = tg.tariff(freq, bands={c: v for c, v in cuts.items() if c != "vehicle_power"},
                    training=glob)
    np.testing.assert_allclose(sql_rates(one.to_sql(), glob), want_freq, rtol=1e-12, atol=0)
    both = tg.tariff(freq, sev, bands=cuts, training=glob)
    want = want_freq * sev.predict(glob)
    np.testing.assert_allclose(sql_rates(both.to_sql(), glob), want, rtol=1e-12, atol=0)
    # from the model file alone: whole-number columns have exact histograms, so one band
    # per histogram value is exact for them (density, continuous, stays smooth here)
    each = tg.tariff(freq, bands={"density": "none", "driver_age": "each",
                                  "vehicle_age": "each", "bonus_level": "each"})
    np.testing.assert_allclose(sql_rates(each.to_sql(), glob), want_freq, rtol=1e-12, atol=0)


def fitted_relativity(fits, column: str, x: np.ndarray) -> np.ndarray:
    """The product over the models of their terms' relativity in ``column``, each measured
    from its own reference (independent of the tariff's rebasing)."""
    out = np.ones(len(x))
    for fit in fits:
        for b in fit.bases[1:]:
            if b.inputs == (column,):
                out *= relativity_rows(fit, b.label, {column: x})["relativity"]
    return out


@pytest.mark.parametrize("roles", ["frequency", "severity", "pure premium"])
def test_automatic_bands_keep_the_fitted_relativity_within_the_tolerance(book, roles):
    # the rule of issue 16: within every band the fitted relativity stays within the
    # tolerance of the band's value, the band's value being the exposure-weighted mean of
    # the fitted relativity over the training data in the band — checked at every value
    # of the training histogram, for every numeric term of the demo models
    glob, freq, sev, _ = book
    fits = {"frequency": [freq], "severity": [sev], "pure premium": [freq, sev]}[roles]
    tolerance = 0.02
    tariff = tg.tariff(*fits, tolerance=tolerance)
    checked = 0
    for column in NUMERIC:
        if column not in tariff.factors:
            continue
        table = tariff.tables[column].to_pandas()
        prof = next(f.profile for f in fits if f.profile.has_column(column))
        x, w = prof.numeric(column).values, prof.numeric(column).mass
        r = fitted_relativity(fits, column, x)
        band = np.searchsorted(table[f"{column}_to"].to_numpy(), x, side="right")
        value = table["relativity"].to_numpy()[band]
        # the tariff measures from its reference band: one constant factor c per column,
        # found from the weighted means themselves: mean(r) over a band = c · band value
        means = np.bincount(band, weights=w * r) / np.bincount(band, weights=w)
        c = means / table["relativity"].to_numpy()
        np.testing.assert_allclose(c, c[0], rtol=1e-10)
        assert np.max(np.abs(r / (c[0] * value) - 1)) <= tolerance + 1e-12, column
        checked += 1
    assert checked == {"frequency": 4, "severity": 2, "pure premium": 5}[roles]


def test_fewest_bands_is_the_minimum_of_an_exhaustive_search():
    # exhaustive search over every partition of up to 9 points into contiguous bands
    # (definition of the rule) against the dynamic programme
    rng = np.random.default_rng(11)
    for _ in range(60):
        m = int(rng.integers(1, 10))
        w = rng.uniform(0.0, 3.0, m)
        r = np.exp(np.cumsum(rng.normal(0, 0.02, m)))
        tol, low = 0.03, float(rng.uniform(0, 4))
        best = None
        for cuts in itertools.product([0, 1], repeat=m - 1):
            starts = [0] + [i + 1 for i, c in enumerate(cuts) if c]
            ends = starts[1:] + [m]
            ok, lows = True, 0
            for a, b in zip(starts, ends):
                held = w[a:b].sum()
                mean = (w[a:b] * r[a:b]).sum() / held if held > 0 else r[a:b].mean()
                ok &= bool(np.all(np.abs(r[a:b] / mean - 1) <= tol + 1e-12))
                lows += held < low
            if ok and (best is None or (lows, len(starts)) < best):
                best = (lows, len(starts))
        starts = fewest_bands(w, r, tol, low)
        ends = list(starts[1:]) + [m]
        lows = sum(w[a:b].sum() < low for a, b in zip(starts, ends))
        assert (lows, len(starts)) == best
        # the rounded cut points split the points exactly as the chosen starts do
        values = np.sort(rng.uniform(0, 100, m)).round(3)
        cuts = cuts_from_starts(values, starts)
        np.testing.assert_array_equal(np.searchsorted(cuts, values, side="right"),
                                      np.repeat(np.arange(len(starts)),
                                                np.diff([*starts, m])))


def test_pure_premium_unbanded_equals_frequency_times_severity(book):
    # pure premium = frequency × severity (common practice): with every factor left smooth,
    # base × Π relativities must equal the two models' predictions for every policy of a
    # sample, whichever base level and reference each model chose on its own
    glob, freq, sev, frame = book
    from tallgam.outputs.tables import references

    # one model, nothing banded: the tariff's base rate is the relativity tables' own
    assert tg.tariff(freq, bands="none").base_rate == pytest.approx(
        freq.relativities().base_rate, rel=1e-12)

    # each model measures driver_age from its own exposure- or claim-weighted median
    assert references(freq)["spline(driver_age)"] != references(sev)["spline(driver_age)"]
    sample = frame.sample(2000, random_state=4)
    want = freq.predict(sample) / sample["exposure"].to_numpy() * sev.predict(sample)
    for reference in ({}, {"region": "R07", "driver_age": 35}):
        tariff = tg.tariff(freq, sev, bands="none", reference=reference)
        rels = tariff.factor_relativities(sample)
        product = tariff.base_rate * np.prod(list(rels.values()), axis=0)
        np.testing.assert_allclose(product, want, rtol=1e-9, atol=0)
        # both models measured from one point: by default the frequency model's
        region = tariff.tables["region"].to_pandas().set_index("region")
        base = reference.get("region", freq.bases[-2].base_levels()["region"])
        assert region.loc[base, "relativity"] == pytest.approx(1.0, abs=1e-15)
    assert set(tariff.factors) == {"driver_age", "vehicle_age", "density", "bonus_level",
                                   "region", "fuel", "vehicle_power"}
    np.testing.assert_allclose(sql_rates(tariff.to_sql(), glob)[sample.index], want,
                               rtol=1e-9)


def test_cost_of_banding_beside_validation(book):
    # the smooth model's figures in the cost table are the hold-out validation's (the
    # same ordered-Lorenz Gini and deviance); an exact tariff costs nothing
    glob, freq, _, _ = book
    holdout = tg.sql(f"SELECT * FROM read_parquet('{glob}') WHERE {demo.HOLDOUT}")
    val = freq.validate(holdout)
    auto = tg.tariff(freq)
    cost = auto.cost(glob, where=demo.HOLDOUT)
    assert cost.rows == val.rows
    assert cost.model["gini"] == pytest.approx(val.gini, rel=1e-12)
    assert cost.model["deviance"] == pytest.approx(val.deviance, rel=1e-12)
    assert cost.tariff["deviance"] != cost.model["deviance"]
    assert sum(cost.ratio_bands["share_of_policies"].to_pylist()) == pytest.approx(1.0)
    for name, table in cost.by_band.items():  # the bands add up to the totals
        assert sum(table["actual"].to_pylist()) == pytest.approx(cost.actual, rel=1e-12), name
        assert sum(table["expected_tariff"].to_pylist()) == pytest.approx(
            cost.tariff["expected"], rel=1e-12)
    exact = tg.tariff(freq, bands={"density": "none", "driver_age": "each",
                                   "vehicle_age": "each", "bonus_level": "each"})
    same = exact.cost(glob, where=demo.HOLDOUT)
    assert same.moved == 0.0
    assert same.tariff["gini"] == pytest.approx(same.model["gini"], abs=1e-12)
    assert same.tariff["deviance"] == pytest.approx(same.model["deviance"], rel=1e-12)


def test_pure_premium_cost_uses_the_compound_poisson_power(book):
    # Tweedie power of a compound Poisson sum of gamma claims with shape α:
    # p = (α + 2)/(α + 1) (Jørgensen 1987; Smyth & Jørgensen 2002), α = 1/φ of the gamma fit
    glob, freq, sev, frame = book
    cost = tg.tariff(freq, sev).cost(glob, where=demo.HOLDOUT)
    alpha = 1.0 / sev.scale
    assert f"power {(alpha + 2) / (alpha + 1):.4g}" in cost.deviance_measure
    hold = frame[frame.policy_year == 2024]
    assert cost.actual == pytest.approx(hold["claim_amount"].sum(), rel=1e-12)
    assert cost.model["expected"] == pytest.approx(
        np.sum(freq.predict(hold) * sev.predict(hold)), rel=1e-12)


def test_surfaces_and_per_level_curves_band_per_margin_and_per_level():
    # invented truth: a surface of two columns and one age curve per fuel level
    rng = np.random.default_rng(5)
    n = 12_000
    df = pd.DataFrame({"x1": np.round(rng.uniform(0, 10, n), 2),
                       "x2": np.round(rng.uniform(0, 5, n), 2),
                       "age": rng.integers(18, 80, n).astype(float),
                       "fuel": rng.choice(["a", "b", "c"], n, p=[.5, .3, .2]),
                       "exposure": rng.uniform(0.2, 1, n)})
    eta = (-2 + 0.3 * np.sin(df.x1 / 2) * np.cos(df.x2)
           + np.where(df.fuel == "a", 0.01, 0.02) * (df.age - 40))
    df["y"] = rng.poisson(df.exposure * np.exp(eta))
    fit = tg.Model("y", family="poisson", exposure="exposure",
                   terms=[tg.surface("x1", "x2", size=5), tg.spline("age", per="fuel", size=6),
                          tg.categorical("fuel")]).fit(df)
    tariff = tg.tariff(fit, tolerance=0.05)
    surface, curves = tariff.factors["x1 × x2"], tariff.factors["age by fuel"]
    assert len(surface.strata) == 1 and len(surface.strata[0].cuts) == 2
    assert surface.largest_deviation() <= 0.05 + 1e-12
    cuts = [tuple(st.cuts[0]) for st in curves.strata]
    assert len(cuts) == 3 and len(set(cuts)) > 1       # each level its own bands
    assert curves.largest_deviation() <= 0.05 + 1e-12
    con = duckdb.connect()
    con.register("d", df)
    got = con.execute(f"SELECT {tariff.to_sql()} AS r FROM d").fetchnumpy()["r"]
    np.testing.assert_allclose(got, tariff.rate(df), rtol=1e-12, atol=0)
    smooth = tg.tariff(fit, bands="none")
    np.testing.assert_allclose(smooth.rate(df), fit.predict(df) / df["exposure"], rtol=1e-12)


def test_level_groups_take_the_exposure_weighted_mean(book):
    # a group's relativity is the exposure-weighted mean of its levels' (issue 16)
    _, freq, _, _ = book
    groups = {"north": ["R02", "R03", "R04"]}
    grouped = tg.tariff(freq, bands={"region": groups}, reference={"region": "R05"})
    plain = tg.tariff(freq, reference={"region": "R05"})
    t = plain.tables["region"].to_pandas().set_index("region")
    mean = np.average(t.loc[groups["north"], "relativity"],
                      weights=t.loc[groups["north"], "training_exposure"])
    g = grouped.tables["region"].to_pandas().set_index("region")
    assert g.loc["R02", "relativity"] == pytest.approx(mean, rel=1e-12)
    assert g.loc["R05", "relativity"] == pytest.approx(1.0, abs=1e-15)
    assert grouped.base_rate == pytest.approx(plain.base_rate, rel=1e-12)


def test_band_specifications_and_their_errors(book, tmp_path):
    _, freq, sev, _ = book
    spec = tmp_path / "bands.toml"
    spec.write_text('[tariff]\ntolerance = 0.05\nreference = { driver_age = 40 }\n\n'
                    '[bands]\ndriver_age = [21, 25, 30, 40, 50, 60, 70, 80]\n'
                    'density = { rule = "auto", tolerance = 0.01 }\n'
                    'region = { north = ["R01", "R02"] }\n')
    tariff = tg.tariff(freq, bands=spec)
    assert tariff.spec.tolerance == 0.05 and tariff.reference["driver_age"] == 40.0
    assert tariff.factors["driver_age"].n_cells == 9
    assert tariff.factors["density"].largest_deviation() <= 0.01 + 1e-12
    # a model spec file may hold the [bands] table beside its terms: fit and tariff read it
    from tallgam.spec import load_spec

    model_spec = tmp_path / "frequency.toml"
    model_spec.write_text('response = "claim_count"\nfamily = "poisson"\n[[term]]\n'
                          'kind = "linear"\ncolumn = "bonus_level"\n\n[bands]\n'
                          'driver_age = [30, 60]\n')
    assert load_spec(model_spec).model.response == "claim_count"
    assert tg.tariff(freq, bands=model_spec).factors["driver_age"].n_cells == 3
    bad = [({"driver_ag": [30]}, "driver_age"), ({"driver_age": [40, 30]}, "increase"),
           ({"driver_age": {"north": ["R01"]}}, "numeric"), ({"region": [1, 2]}, "level"),
           ({"density": "some"}, "unknown rule"), ({"driver_age": {"cut": [1]}}, "cuts")]
    for bands, words in bad:
        with pytest.raises(SpecError, match=words):
            tg.tariff(freq, bands=bands)
    with pytest.raises(SpecError, match="log link"):
        tg.tariff(tg.Model("claim_count", terms=[tg.linear("driver_age")]).fit(
            pd.DataFrame({"claim_count": [0.0, 1, 2, 0, 1], "driver_age": [20.0, 30, 40, 50,
                                                                           60]})))


@pytest.mark.slow
def test_cli_tariff_writes_the_folder_and_the_cost(book, tmp_path):
    glob, freq, sev, _ = book
    freq.save(tmp_path / "freq.json")
    sev.save(tmp_path / "sev.json")
    (tmp_path / "bands.toml").write_text("[bands]\nvehicle_age = [1, 3, 6, 10, 15]\n")
    out = tmp_path / "tariff"
    proc = subprocess.run(
        [sys.executable, "-m", "tallgam", "tariff", str(tmp_path / "freq.json"),
         str(tmp_path / "sev.json"), "--bands", str(tmp_path / "bands.toml"), "-o", str(out),
         "--data", glob, "--where", demo.HOLDOUT, "--reference", "region=R03"],
        capture_output=True, text=True, timeout=300)
    assert proc.returncode == 0, proc.stderr
    assert "qualified actuary" in proc.stdout and "premium moves by more than 5%" in proc.stdout
    names = set(os.listdir(out))
    assert {"manifest.json", "tariff.sql", "premium.sql", "base.csv", "README.txt",
            "cost.html", "cost_summary.csv", "vehicle_age.csv", "vehicle_age.parquet",
            "region.csv"} <= names
    assert not [n for n in names if "tmp" in n]          # every file renamed into place
    manifest = json.loads((out / "manifest.json").read_text())
    assert [m["role"] for m in manifest["models"]] == ["frequency", "severity"]
    assert manifest["models"][0]["file"].endswith("freq.json")
    assert manifest["reference"]["region"] == "R03" and "qualified actuary" in \
        manifest["caution"]
    assert "cost of banding" in (out / "cost.html").read_text().lower()
    bad = subprocess.run([sys.executable, "-m", "tallgam", "tariff", str(tmp_path /
                                                                         "freq.json"),
                          "--bands", str(tmp_path / "missing.toml"), "-o", str(out)],
                         capture_output=True, text=True, timeout=300)
    assert bad.returncode == 2 and "cannot read the bands file" in bad.stderr


def test_report_holds_the_cost_of_banding_section(book):
    from tallgam.outputs.report import html_report

    glob, freq, sev, _ = book
    cost = tg.tariff(freq, sev).cost(glob, where=demo.HOLDOUT)
    html = html_report(freq, banding=cost)
    assert 'id="tariff"' in html and "moves by more than 5%" in html
    assert html.count("<img") > len(freq.bases)

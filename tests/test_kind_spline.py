"""Spline variants: one curve per level of another column, a curve times a multiplier
(varying coefficient), and removable curves (the extra penalty of Marra & Wood 2011)."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

import tallgam as tg

CURVES = {"diesel": lambda a: np.sin((a - 18.0) / 62.0 * 2 * np.pi),
          "petrol": lambda a: ((a - 49.0) / 31.0) ** 2}
FUEL_SHIFT = {"diesel": 0.5, "petrol": 0.0}


@pytest.fixture(scope="module")
def per_level():
    rng = np.random.default_rng(3)
    n = 3000
    age = rng.uniform(18.0, 80.0, n)
    fuel = rng.choice(list(CURVES), n)
    mean = np.where(fuel == "diesel", CURVES["diesel"](age) + 0.5, CURVES["petrol"](age))
    df = pd.DataFrame({"age": age, "fuel": fuel, "y": mean + rng.normal(0.0, 0.3, n)})
    model = tg.Model("y", terms=[tg.categorical("fuel", base="petrol"),
                                 tg.spline("age", per="fuel", size=8)])
    return df, model.fit(df)


def test_per_level_curves_are_recovered(per_level):
    df, fit = per_level
    assert fit.converged
    assert len(fit.smoothing["spline(age per fuel)"]) == 2  # one λ per level
    eff = fit.effect("age").to_pandas()
    assert set(eff["fuel"]) == set(CURVES)
    for level, curve in CURVES.items():
        part = eff[eff["fuel"] == level]
        rows = df["age"].to_numpy()[df["fuel"].to_numpy() == level]
        truth = curve(part["age"].to_numpy()) - curve(rows).mean()
        # measured: 0.035 (diesel, range 2.0) and 0.036 (petrol, range 1.0)
        assert np.max(np.abs(part["estimate"].to_numpy() - truth)) <= 0.08 * np.ptp(truth)
    # each curve is centred over its own level's rows (tg.spline docstring)
    terms = fit.predict(df, "terms")["spline(age per fuel)"]
    for level in CURVES:
        assert abs(terms[df["fuel"].to_numpy() == level].mean()) <= 1e-8
    # so the level term carries each level's mean: here the difference of the true means
    level_mean = {lev: FUEL_SHIFT[lev] + curve(df["age"].to_numpy()[df["fuel"] == lev]).mean()
                  for lev, curve in CURVES.items()}
    shift = fit.coefficients.to_pandas().set_index("name").loc["diesel"]
    want = level_mean["diesel"] - level_mean["petrol"]
    assert abs(shift["estimate"] - want) <= 4 * shift["std_error"]


def test_per_needs_the_level_term_too():
    with pytest.raises(tg.SpecError, match="categorical"):
        tg.Model("y", terms=[tg.spline("age", per="fuel")])


def test_per_level_unseen_at_prediction_is_an_error(per_level):
    _, fit = per_level
    with pytest.raises(tg.DataError, match="fuel"):
        fit.predict(pd.DataFrame({"age": [30.0, 40.0], "fuel": ["diesel", "electric"]}))



# ---------------------------------------------------------------------------------------
# varying coefficient (multiplier)

def coefficient_curve(x):
    return 1.0 + np.sin(2 * np.pi * x)


def test_multiplier_recovers_a_varying_coefficient():
    rng = np.random.default_rng(4)
    n = 3000
    x, z = rng.uniform(0.0, 1.0, n), rng.normal(1.0, 1.0, n)
    mean = 0.3 + coefficient_curve(x) * z
    df = pd.DataFrame({"x": x, "z": z, "y": mean + rng.normal(0.0, 0.3, n)})
    fit = tg.Model("y", terms=[tg.spline("x", multiplier="z", size=8)]).fit(df)
    assert fit.converged
    eff = fit.effect("x")  # the curve per unit of z, not centred
    est, grid = eff["estimate"].to_numpy(), eff["x"].to_numpy()
    # measured: 0.027 against a range of 2 (and a mean of 1, which centring would lose)
    assert np.max(np.abs(est - coefficient_curve(grid))) <= 0.05 * np.ptp(coefficient_curve(grid))
    assert abs(fit.intercept - 0.3) <= 0.05


def test_constant_multiplier_gives_the_ordinary_spline():
    # f(x)·1 spans the same columns as an ordinary spline plus the intercept, so the fits
    # coincide (common practice). Measured: predictions equal to 0, same λ and EDF.
    rng = np.random.default_rng(5)
    n = 2000
    x = rng.uniform(0.0, 1.0, n)
    df = pd.DataFrame({"x": x, "one": 1.0,
                       "y": 0.3 + np.sin(2 * np.pi * x) + rng.normal(0.0, 0.3, n)})
    with pytest.warns(tg.TallgamWarning, match="'one' is 1 on every row"):
        varying = tg.Model("y", terms=[tg.spline("x", multiplier="one", size=8)]).fit(df)
    ordinary = tg.Model("y", terms=[tg.spline("x", size=8)]).fit(df)
    np.testing.assert_allclose(varying.predict(df), ordinary.predict(df), rtol=0, atol=1e-8)
    assert abs(varying.edf["total"] - ordinary.edf["total"]) <= 1e-6
    assert varying.smoothing["spline(x × one)"] == pytest.approx(
        ordinary.smoothing["spline(x)"], rel=1e-6)



# ---------------------------------------------------------------------------------------
# removable curves

def orthogonal_design(seed: int) -> pd.DataFrame:
    """x and w have an effect, u none: a balanced grid where every value of u meets the
    same values of x and w, and the noise has mean zero at every value of u, so any
    centred function of u is exactly orthogonal to the response and to the other terms:
    the data hold no u effect at all, not merely a small one."""
    rng = np.random.default_rng(seed)
    nx, nu = 40, 25
    xs = (np.arange(nx) + 0.5) / nx
    ws = rng.uniform(0.0, 1.0, nx)
    x = np.concatenate([rng.permutation(xs) for _ in range(nu)])
    w = np.concatenate([rng.permutation(ws) for _ in range(nu)])
    u = np.repeat((np.arange(nu) + 0.5) / nu, nx)
    e = rng.normal(0.0, 0.5, (nu, nx))
    e = (e - e.mean(axis=1, keepdims=True)).ravel()
    return pd.DataFrame({"x": x, "u": u, "w": w, "y": np.sin(2 * np.pi * x) + 0.8 * w + e})


def test_selection_removes_a_term_without_effect_and_keeps_real_ones():
    # Marra & Wood (2011), Comput. Stat. Data Anal. 55:2372-2387: with a second penalty on
    # the null space the criterion can shrink a smooth to zero; without it the straight-line
    # part always remains (EDF ≥ 1)
    df = orthogonal_design(11)
    terms = ("x", "u", "w")
    sel = tg.Model("y", terms=[tg.spline(c, removable=True) for c in terms]).fit(df)
    plain = tg.Model("y", terms=[tg.spline(c) for c in terms]).fit(df)
    assert sel.converged and plain.converged
    # measured: u 2.5e-7 with selection, 1.0000002 without
    assert sel.edf["spline(u)"] < 0.1
    assert plain.edf["spline(u)"] >= 0.99
    assert len(sel.smoothing["spline(u)"]) == 2
    assert np.max(np.abs(sel.effect("u")["estimate"].to_numpy())) <= 1e-3
    # measured: x 7.0143 vs 7.0147, w (a straight line) 0.996 vs 1.0000002
    assert abs(sel.edf["spline(x)"] - plain.edf["spline(x)"]) <= 0.1
    assert sel.edf["spline(x)"] > 5
    assert sel.edf["spline(w)"] >= 0.9


def test_selection_shrinks_noise_terms_below_the_unpenalized_floor():
    # Marra & Wood (2011): over replicates with a truly irrelevant covariate, selection
    # takes its EDF below 1 (the floor without selection) most of the time
    # measured over seeds 0-19: below 1 in 18 of 20, below 0.1 in 10; x keeps EDF ≥ 5.6
    below, total = 0, 20
    for seed in range(total):
        rng = np.random.default_rng(seed)
        n = 600
        x, u = rng.uniform(0.0, 1.0, n), rng.uniform(0.0, 1.0, n)
        df = pd.DataFrame({"x": x, "u": u,
                           "y": np.sin(2 * np.pi * x) + rng.normal(0.0, 0.5, n)})
        fit = tg.Model("y", terms=[tg.spline("x", size=8, removable=True),
                                   tg.spline("u", size=8, removable=True)]).fit(df)
        below += fit.edf["spline(u)"] < 1.0
        assert fit.edf["spline(x)"] > 4
    assert below >= 14, below

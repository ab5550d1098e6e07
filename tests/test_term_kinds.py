"""The smooth term kinds beyond the plain spline: cyclic, surface, per-level curves,
varying coefficients, term selection and random effects.

Each check has a known answer: a property the basis must have exactly (periodic ends,
symmetry in the margins), a known truth to recover, or an outside fit to agree with.
Territory smoothing (adjacency) is in ``test_adjacency.py``; the model-file and TOML
round trips of every kind are in ``test_term_kinds_files.py``.
"""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import pytest
from scipy.interpolate import BSpline

import tallgam as tg

# ---------------------------------------------------------------------------------------
# cyclic


def month_truth(m: np.ndarray) -> np.ndarray:
    return 0.8 * np.sin(2 * np.pi * m / 12) + 0.5 * np.cos(2 * np.pi * m / 12)


def month_frame(seed: int, n: int, continuous: bool) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    if continuous:  # skewed over the period, so quantile knots are unevenly spaced
        m = 12.0 * rng.beta(1.5, 2.5, n)
    else:
        m = rng.integers(1, 13, n).astype(float)
    return pd.DataFrame({"month": m, "y": month_truth(m) + rng.normal(0.0, 0.3, n)})


def end_derivatives(fit, column: str) -> tuple[np.ndarray, np.ndarray]:
    """(value, slope, curvature) of the fitted cyclic curve at the start and at the end of
    the period, from the engine's own evaluation (predict, per term).

    Inside one knot interval a cubic spline is one cubic polynomial, so the cubic through
    four points of the first (last) interval is that polynomial exactly and its
    derivatives at the interval's outer end are exact up to rounding (common practice:
    the piecewise-polynomial structure of splines; no finite-difference truncation).
    """
    b, _ = fit.term(column)
    t = b.knots
    start, end = b.origin, b.origin + b.period
    frac = np.array([0.1, 0.3, 0.6, 0.9])

    def at(edge, width, sign):
        s = sign * frac  # local coordinate (x − edge) / width
        x = edge + width * s
        v = fit.predict(pd.DataFrame({column: x}), "terms")[b.label]
        c = np.linalg.solve(np.vander(s, 4, increasing=True), v)
        return np.array([c[0], c[1] / width, 2.0 * c[2] / width**2])

    return at(start, t[4] - t[3], +1.0), at(end, t[-4] - t[-5], -1.0)


@pytest.fixture(scope="module", params=["uniform", "quantile"])
def cyclic_fit(request):
    df = month_frame(1, 2000, continuous=True)
    model = tg.Model("y", terms=[tg.cyclic("month", period=12, size=8, origin=0.0,
                                           knots=request.param)])
    return model.fit(df), df


def test_cyclic_ends_meet_in_value_slope_and_curvature(cyclic_fit):
    # DESIGN §3: f, f' and f'' match at the ends of the period
    # measured: differences ≤ 2e-14 for both knot placements (slope 0.41 / 0.43 there)
    fit, _ = cyclic_fit
    first, last = end_derivatives(fit, "month")
    np.testing.assert_allclose(first, last, rtol=0, atol=1e-8)
    assert abs(first[1]) > 0.1  # the slope there is not trivially zero (a sine's flank)


def test_cyclic_basis_is_the_periodic_b_spline(cyclic_fit):
    # from memory (de Boor 1978, periodic splines): on the extended knot vector, the
    # coefficients of functions i and i + k equal; scipy's BSpline of that vector is the
    # analytic curve, whose derivatives at the two ends must agree
    fit, df = cyclic_fit
    b, sl = fit.term("month")
    k = b.n_raw
    beta = fit.coefficients_raw[sl]
    curve = BSpline(b.knots, beta[np.arange(k + 3) % k], 3)
    start, end = b.origin, b.origin + b.period
    for order in range(3):
        d = curve.derivative(order) if order else curve
        assert abs(d(start) - d(end)) <= 1e-8 * max(1.0, abs(d(start)))
    x = np.linspace(start, end, 97)[:-1]
    engine = fit.predict(pd.DataFrame({"month": x}), "terms")[b.label]
    np.testing.assert_allclose(engine, curve(x), rtol=0, atol=1e-12)


def test_cyclic_recovers_a_sine_over_months():
    df = month_frame(2, 1200, continuous=False)
    fit = tg.Model("y", terms=[tg.cyclic("month", period=12, size=8)]).fit(df)
    assert fit.converged
    months = np.arange(1.0, 13.0)
    est = fit.predict(pd.DataFrame({"month": months}), "terms")["cyclic(month)"]
    truth = month_truth(months) - month_truth(df["month"].to_numpy()).mean()
    # common practice: error small against the signal's range; measured 0.043 of 1.89
    assert np.max(np.abs(est - truth)) <= 0.05 * np.ptp(truth)
    # pointwise 95% bands at the twelve months cover the truth (measured: all 12)
    eff = fit.effect("month", points=12 * 8 + 1).to_pandas()
    eff = eff[np.isin(np.round(eff["month"], 9), months)]
    truth = month_truth(eff["month"].to_numpy()) - month_truth(df["month"].to_numpy()).mean()
    inside = (eff["lower"] <= truth) & (truth <= eff["upper"])
    assert len(eff) == 12 and inside.sum() >= 10


def test_cyclic_values_wrap_around_the_period():
    # tg.cyclic docstring: values outside [origin, origin + period) wrap around
    df = month_frame(3, 800, continuous=False)
    fit = tg.Model("y", terms=[tg.cyclic("month", period=12, size=6)]).fit(df)
    x = np.array([1.0, 1.5, 4.25, 7.0, 12.0, 12.99])
    base = fit.predict(pd.DataFrame({"month": x}))
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # wrapping is not clamping: no range warning
        for shift in (-24.0, -12.0, 12.0, 36.0):
            moved = fit.predict(pd.DataFrame({"month": x + shift}))
            np.testing.assert_allclose(moved, base, rtol=0, atol=1e-10)
    # origin + period is the origin again (origin defaults to the minimum, 1)
    ends = fit.predict(pd.DataFrame({"month": [1.0, 13.0]}))
    assert abs(ends[0] - ends[1]) <= 1e-10


# ---------------------------------------------------------------------------------------
# surface

def f_x(x):
    return np.sin(2 * np.pi * x)


def g_z(z):
    return 8.0 * (z - 0.5) ** 2


@pytest.fixture(scope="module")
def separable():
    rng = np.random.default_rng(2)
    n = 3000
    x, z = rng.uniform(0.0, 1.0, n), rng.uniform(0.0, 1.0, n)
    df = pd.DataFrame({"x": x, "z": z, "y": f_x(x) + g_z(z) + rng.normal(0.0, 0.3, n)})
    fits = {order: tg.Model("y", terms=[tg.surface(*order, size=(6, 6))]).fit(df)
            for order in (("x", "z"), ("z", "x"))}
    return df, fits


def test_surface_recovers_both_margins_of_a_separable_truth(separable):
    df, fits = separable
    fit = fits[("x", "z")]
    assert fit.converged
    grid = np.linspace(0.02, 0.98, 40)
    for column, other, truth in (("x", "z", f_x), ("z", "x", g_z)):
        # a margin: the surface averaged over the data's values of the other column,
        # centred; for s(x, z) = f(x) + g(z) + c it is the centred f (common practice)
        rows = pd.DataFrame({column: np.repeat(grid, len(df) // 10),
                             other: np.tile(df[other].to_numpy()[::10], len(grid))})
        s = fit.predict(rows, "terms")["surface(x, z)"].reshape(len(grid), -1).mean(axis=1)
        want = truth(grid)
        err = np.max(np.abs((s - s.mean()) - (want - want.mean())))
        # measured: 0.048 (x, range 2.0) and 0.020 (z, range 1.8)
        assert err <= 0.05 * np.ptp(want), (column, err)


def test_surface_margin_order_does_not_matter(separable):
    # the tensor product and its two penalties only permute with the margins
    # measured: predictions equal to 1.5e-14, EDF to 2e-14, λ's swapped to 5e-15 relative
    df, fits = separable
    a, b = fits[("x", "z")], fits[("z", "x")]
    np.testing.assert_allclose(a.predict(df), b.predict(df), rtol=0, atol=1e-8)
    assert abs(a.edf["total"] - b.edf["total"]) <= 1e-6
    assert abs(a.edf["surface(x, z)"] - b.edf["surface(z, x)"]) <= 1e-6
    np.testing.assert_allclose(a.smoothing["surface(x, z)"],
                               b.smoothing["surface(z, x)"][::-1], rtol=1e-4)


def test_surface_with_fixed_smoothing_per_margin_is_symmetric(separable):
    # a fixed λ per margin follows its margin when the margins swap (measured: 4e-15)
    df, _ = separable
    a = tg.Model("y", criterion="fixed",
                 terms=[tg.surface("x", "z", size=(6, 5), smoothing=(1e-3, 1e-1))]).fit(df)
    b = tg.Model("y", criterion="fixed",
                 terms=[tg.surface("z", "x", size=(5, 6), smoothing=(1e-1, 1e-3))]).fit(df)
    np.testing.assert_allclose(a.predict(df), b.predict(df), rtol=0, atol=1e-8)
    assert a.smoothing["surface(x, z)"] == [1e-3, 1e-1]


def test_surface_beats_additive_splines_on_an_interaction():
    rng = np.random.default_rng(12)
    n = 3000
    x, z = rng.uniform(0.0, 1.0, n), rng.uniform(0.0, 1.0, n)
    mean = np.sin(3 * x) * np.cos(3 * z)
    df = pd.DataFrame({"x": x, "z": z, "y": mean + rng.normal(0.0, 0.2, n)})
    surf = tg.Model("y", terms=[tg.surface("x", "z", size=(6, 6))]).fit(df)
    add = tg.Model("y", terms=[tg.spline("x"), tg.spline("z")]).fit(df)
    # measured: deviance 123 (surface) vs 231 (additive); the noise alone gives ≈ n·0.04 = 120
    assert surf.deviance < 0.9 * add.deviance
    assert surf.deviance <= 1.1 * n * 0.2**2
    err_surf = np.sqrt(np.mean((surf.predict(df) - mean) ** 2))
    err_add = np.sqrt(np.mean((add.predict(df) - mean) ** 2))
    assert err_surf < 0.5 * err_add  # root mean square error, measured 0.017 vs 0.197


# ---------------------------------------------------------------------------------------
# per-level curves

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
# term selection

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


# ---------------------------------------------------------------------------------------
# random effect

def test_random_effect_reml_matches_mixed_model():
    # reference: statsmodels MixedLM (REML) on a random-intercept model; the ridge λ of the
    # level effects is scale / σ²_b (DESIGN §3; Patterson & Thompson 1971)
    import statsmodels.formula.api as smf

    rng = np.random.default_rng(7)
    groups = 40
    sizes = rng.integers(3, 40, groups)
    labels = [f"g{i}" for i in range(groups)]
    g = np.repeat(labels, sizes)
    b = rng.normal(0.0, 0.6, groups)
    df = pd.DataFrame({"g": g, "y": 2.0 + np.repeat(b, sizes) + rng.normal(0.0, 1.0, len(g))})
    fit = tg.Model("y", terms=[tg.random_effect("g")]).fit(df)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # statsmodels' convergence chatter
        ref = smf.mixedlm("y ~ 1", df, groups=df["g"]).fit(reml=True)
    lam_ref = ref.scale / float(ref.cov_re.iloc[0, 0])
    # measured: relative difference 4e-5 in λ, 1.5e-6 in the scale
    assert fit.smoothing["random_effect(g)"] == pytest.approx(lam_ref, rel=0.01)
    assert fit.scale == pytest.approx(ref.scale, rel=1e-3)
    # the level estimates are the predicted random effects (BLUPs); measured 8e-6
    eff = fit.effect("g").to_pandas().set_index("g").loc[labels, "estimate"].to_numpy()
    blup = np.array([ref.random_effects[lab].iloc[0] for lab in labels])
    np.testing.assert_allclose(eff, blup, rtol=0, atol=1e-3)
    assert fit.intercept == pytest.approx(ref.fe_params.iloc[0], abs=1e-3)  # measured 2e-7

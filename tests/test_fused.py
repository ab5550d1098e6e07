"""The one-loop numba working model of a pass (tallgam.families.fused) gives the pass state
of the generic numpy path, which is the reference: every family with every link it offers
a fused loop for, at an iterate of a real fit, weights, offsets and estimated parameters
included."""

from __future__ import annotations

from dataclasses import replace

import numpy as np
import pandas as pd
import pytest

import tallgam as tg
from tallgam.data.sources import open_source
from tallgam.options import RunOptions
from tallgam.passes import run as passes
from tallgam.passes.run import PassPlan, working_pass
from tallgam.progress import make_callback
from tallgam.solve.pirls import prepare


def book(n: int = 20_000, seed: int = 4) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    df = pd.DataFrame({"x": rng.uniform(0, 10, n), "age": rng.integers(18, 80, n).astype(float),
                       "exposure": rng.uniform(0.05, 1.0, n), "w": rng.uniform(0.5, 2.0, n)})
    df["claims"] = rng.poisson(df.exposure * np.exp(-1.5 + 0.3 * np.sin(df.x)))
    df.loc[:5, "claims"] = [0, 1, 7, 300, 1000, 2]   # beyond the lgamma table too
    return df


@pytest.mark.parametrize("binned", [False, True])
def test_fused_poisson_pass_equals_the_generic_path(monkeypatch, binned):
    df = book()
    model = tg.Model(response="claims", family="poisson", exposure="exposure", weights="w",
                     terms=[tg.spline("x"), tg.spline("age")])
    states = {}
    real = passes.working_pass

    def spy(source, plan, *args, **kwargs):
        state = real(source, plan, *args, **kwargs)
        if plan.beta is not None and plan.beta_prev is not None and "fused" not in states:
            states["generic"] = real(source, replace(plan, fused=False))
            states["fused"] = state
        return state
    monkeypatch.setattr(passes, "working_pass", spy)
    fit = model.fit(df, batch_rows=6_000, binned=binned, scratch=False)
    assert fit.converged
    assert_same_state(states["generic"], states["fused"])


def assert_same_state(a, b) -> None:
    for name in ("dense", "cross", "diag", "rhs", "colsum"):
        x, y = getattr(a, name), getattr(b, name)
        if x.size == 0:
            continue
        np.testing.assert_allclose(y, x, rtol=0, atol=1e-11 * max(np.max(np.abs(x)), 1.0),
                                   err_msg=name)
    for key, value in a.scalars.items():
        np.testing.assert_allclose(b.scalars[key], value, rtol=1e-11, atol=1e-9, err_msg=key)


def _response(family: str, eta: np.ndarray, rng) -> np.ndarray:
    """Draws of each family around the means exp(η) (shapes chosen to be well inside the
    supports; invented data)."""
    mu = np.exp(eta)
    if family == "gaussian":
        return mu + rng.normal(0, 0.3, len(mu))
    if family == "poisson":
        return rng.poisson(mu).astype(float)
    if family == "negative_binomial":
        return rng.negative_binomial(2.0, 2.0 / (2.0 + mu)).astype(float)
    if family == "binomial":
        return (rng.random(len(mu)) < mu / (1 + mu)).astype(float)
    if family == "gamma":
        return rng.gamma(3.0, mu / 3.0)
    if family == "inverse_gaussian":
        return rng.wald(mu, 4.0)
    n = rng.poisson(mu)  # tweedie: compound Poisson–gamma
    return np.where(n > 0, rng.gamma(np.maximum(n, 1) * 2.0, 0.5), 0.0)


# every family and link with a fused loop (links.py's list of each family)
CASES = [("gaussian", "identity", {}), ("gaussian", "log", {}), ("gaussian", "inverse", {}),
         ("poisson", "log", {}), ("poisson", "identity", {}), ("poisson", "sqrt", {}),
         ("binomial", "logit", {}), ("binomial", "probit", {}), ("binomial", "cloglog", {}),
         ("gamma", "log", {}), ("gamma", "inverse", {}), ("gamma", "identity", {}),
         ("inverse_gaussian", "log", {}), ("inverse_gaussian", "inverse_squared", {}),
         ("inverse_gaussian", "inverse", {}), ("inverse_gaussian", "identity", {}),
         ("tweedie", "log", {"power": 1.4}),
         ("negative_binomial", "log", {"theta": 2.0}),
         ("negative_binomial", "identity", {"theta": 2.0}),
         ("negative_binomial", "sqrt", {}),   # θ estimated: the pass sums its score too
         ]


@pytest.mark.parametrize("family,link,params", CASES,
                         ids=[f"{f}-{k}" for f, k, _ in CASES])
def test_every_fused_loop_equals_the_numpy_path(family, link, params):
    rng = np.random.default_rng(hash((family, link)) % 2**32)
    n = 4_000
    df = pd.DataFrame({"x": rng.uniform(0, 1, n), "g": rng.choice(list("abcd"), n),
                       "w": rng.integers(1, 4, n).astype(float), "o": rng.normal(0, 0.05, n)})
    eta = 0.3 + 0.4 * np.sin(3 * df.x)
    df["y"] = _response(family, eta, rng)
    model = tg.Model("y", family=tg.get_family(family, **params), link=link, weights="w",
                     offset="o" if link in ("log", "identity") else None,
                     terms=[tg.spline("x", size=6), tg.categorical("g")])
    source = open_source(df)
    setup = prepare(model, source, RunOptions(binned=False), make_callback(False))
    fam = model.family
    assert fam.working_kernel(model.link) is not None
    # an iterate near the data: the means a plain fit reaches, on the link scale, as β
    mu = np.clip(np.exp(eta), 0.05, 0.95) if family == "binomial" else np.exp(eta)
    inner = float(np.mean(model.link.link(mu)))
    beta = np.zeros(setup.design.p)
    beta[0] = inner
    beta[1:7] = 0.05 * rng.standard_normal(6)
    plan = PassPlan(inputs=setup.inputs, design=setup.design, family=fam, link=model.link,
                    beta=beta, beta_prev=0.9 * beta, start_shift=inner, null_beta0=inner,
                    y_mean=setup.profile.role("response").mean, scale_est=0.7,
                    batch_rows=1_500, binned=None)
    generic = working_pass(source, replace(plan, fused=False))
    fused = working_pass(source, plan)
    assert fused.scalars["invalid_rows"] == generic.scalars["invalid_rows"] == 0
    assert_same_state(generic, fused)
    if fam.estimates_nuisance:
        assert generic.scalars["nuisance_info"] != 0.0
    if fam.loglik_at_three_scales:
        assert generic.scalars["loglik_lo"] != 0.0

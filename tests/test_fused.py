"""The one-loop numba working model for Poisson with the log link gives the pass state of
the generic numpy path (families.Poisson with links.Log), which is the reference."""

from __future__ import annotations

from dataclasses import replace

import numpy as np
import pandas as pd
import pytest

import tallgam as tg
from tallgam.passes import run as passes


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
    a, b = states["generic"], states["fused"]
    for name in ("dense", "cross", "diag", "rhs", "colsum"):
        x, y = getattr(a, name), getattr(b, name)
        if x.size == 0:
            continue
        np.testing.assert_allclose(y, x, rtol=0, atol=1e-12 * max(np.max(np.abs(x)), 1.0))
    for key, value in a.scalars.items():
        np.testing.assert_allclose(b.scalars[key], value, rtol=1e-11, atol=1e-9, err_msg=key)

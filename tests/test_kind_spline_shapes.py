"""Shape-constrained splines: monotone and convex/concave curves, exactly."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy.interpolate import BSpline

import tallgam as tg


def wavy(n: int = 3000, seed: int = 1) -> pd.DataFrame:
    """Synthetic truth (invented): a rising line with a wave, so an unconstrained fit
    dips in places; plus an unconstrained second term and a count response."""
    rng = np.random.default_rng(seed)
    df = pd.DataFrame({"x": rng.uniform(0, 10, n), "z": rng.uniform(0, 1, n),
                       "e": rng.uniform(0.3, 1.0, n)})
    f = 0.1 * df.x + 0.5 * np.sin(df.x)
    df["y"] = f + 0.3 * np.sin(6 * df.z) + rng.normal(0, 0.6, n)
    df["c"] = rng.poisson(df.e * np.exp(-1 + f))
    return df


@pytest.mark.parametrize("family,response,extra", [("gaussian", "y", {}),
                                                   ("poisson", "c", {"exposure": "e"})])
@pytest.mark.parametrize("shape", ["increasing", "decreasing", "convex", "concave"])
def test_curve_keeps_its_shape_on_a_fine_grid(family, response, extra, shape):
    df = wavy()
    fit = tg.Model(response, family=family, terms=[tg.spline("x", size=12, shape=shape),
                                                   tg.spline("z")], **extra).fit(df)
    assert fit.converged
    effect = fit.effect("x", points=1000)
    x = effect.column("x").to_numpy()
    est = effect.column("estimate").to_numpy()
    scale = np.ptp(est) + 1.0
    d1 = np.diff(est)
    d2 = np.diff(d1 / np.diff(x)) * np.min(np.diff(x))  # divided differences: any spacing
    tol = 1e-12 * scale  # rounding of the basis evaluation (common practice)
    if shape == "increasing":
        assert d1.min() >= -tol
    elif shape == "decreasing":
        assert d1.max() <= tol
    elif shape == "convex":
        assert d2.min() >= -tol
    else:
        assert d2.max() <= tol
    # the unconstrained fit of these data breaks every one of the shapes
    free = tg.Model(response, family=family, terms=[tg.spline("x", size=12),
                                                    tg.spline("z")], **extra).fit(df)
    e0 = free.effect("x", points=1000).column("estimate").to_numpy()
    assert np.diff(e0).min() < -1e-3 and np.diff(e0).max() > 1e-3
    assert np.diff(e0, 2).min() < -1e-6 and np.diff(e0, 2).max() > 1e-6


def test_constrained_fit_equals_an_independent_quadratic_programme():
    # Reference: scipy.optimize.lsq_linear (bounded-variable least squares) on the same
    # penalized least squares at the same fixed λ. With β_j = θ_0 + Σ_{i≤j} θ_i, the
    # coefficient differences are θ_1.., so "increasing" is θ_i ≥ 0 for i ≥ 1 (differences
    # of B-spline coefficients ≥ 0 make f' ≥ 0; de Boor 1978); the penalty enters as
    # extra rows √λ·Lᵀβ with S = LLᵀ. The spline carries the constant (no separate
    # intercept), which leaves the fitted values unchanged.
    from scipy.optimize import lsq_linear

    df = wavy(800, seed=3)
    lam = 5.0
    fit = tg.Model("y", criterion="fixed",
                   terms=[tg.spline("x", size=10, knots="uniform", smoothing=lam,
                                    shape="increasing")]).fit(df)
    basis = fit.bases[1]
    t = basis.knots
    k = len(t) - 4
    X = BSpline.design_matrix(df["x"].to_numpy(), t, 3).toarray()
    # the penalty ∫f''(x)² dx in the column's own units (see Basis.penalty_exponents)
    vals, vecs = np.linalg.eigh(np.ldexp(basis.penalties()[0], basis.penalty_exponents()[0]))
    root = vecs * np.sqrt(np.maximum(vals, 0.0))          # S = root·rootᵀ
    T = np.tril(np.ones((k, k)))                           # β = T θ
    A = np.vstack([X @ T, np.sqrt(lam) * root.T @ T])
    b = np.concatenate([df["y"].to_numpy(), np.zeros(k)])
    lower = np.r_[-np.inf, np.zeros(k - 1)]
    res = lsq_linear(A, b, bounds=(lower, np.full(k, np.inf)), tol=1e-14, method="bvls")
    assert res.success
    ref = X @ T @ res.x
    assert np.all(np.diff(T @ res.x) >= -1e-12)
    assert np.max(np.abs(fit.predict(df) - ref)) < 1e-8 * np.ptp(ref)


def test_shape_in_spec_file_and_model_file(tmp_path):
    from tallgam.spec import parse_spec

    df = wavy(1500)
    spec = parse_spec('response = "y"\n[[term]]\nkind = "spline"\ncolumn = "x"\n'
                      'shape = "increasing"\n')
    fit = spec.model.fit(df)
    fit.save(tmp_path / "m.json")
    np.testing.assert_array_equal(tg.load(tmp_path / "m.json").predict(df), fit.predict(df))
    with pytest.raises(tg.SpecError, match="shape"):
        tg.spline("x", shape="wiggly")
    with pytest.raises(tg.SpecError, match="plain spline"):
        tg.spline("x", shape="increasing", per="g")

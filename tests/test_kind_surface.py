"""The surface kind: tensor products of spline margins recover a separable truth, do not
depend on the order of their margins, and beat additive splines on an interaction."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

import tallgam as tg


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

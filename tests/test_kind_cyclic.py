"""The cyclic kind: a periodic cubic B-spline whose ends meet in value, slope and curvature
(checked against scipy's periodic B-splines), recovering a seasonal truth, wrapping values."""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import pytest
from scipy.interpolate import BSpline

import tallgam as tg


def month_truth(m: np.ndarray) -> np.ndarray:
    return 0.8 * np.sin(2 * np.pi * m / 12) + 0.5 * np.cos(2 * np.pi * m / 12)


def month_frame(seed: int, n: int, continuous: bool) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    if continuous:  # skewed over the period, so quantile knots are unevenly spaced
        m = 12.0 * rng.beta(1.5, 2.5, n)
    else:
        m = rng.integers(1, 13, n).astype(float)
    return pd.DataFrame({"month": m, "y": month_truth(m) + rng.normal(0.0, 0.3, n)})


def end_derivatives(fit, column: str) -> tuple[np.ndarray, np.ndarray]:
    """(value, slope, curvature) of the fitted cyclic curve at the start and at the end of
    the period, from the engine's own evaluation (predict, per term).

    Inside one knot interval a cubic spline is one cubic polynomial, so the cubic through
    four points of the first (last) interval is that polynomial exactly and its
    derivatives at the interval's outer end are exact up to rounding (common practice:
    the piecewise-polynomial structure of splines; no finite-difference truncation).
    """
    b, _ = fit.term(column)
    t = b.knots
    start, end = b.origin, b.origin + b.period
    frac = np.array([0.1, 0.3, 0.6, 0.9])

    def at(edge, width, sign):
        s = sign * frac  # local coordinate (x − edge) / width
        x = edge + width * s
        v = fit.predict(pd.DataFrame({column: x}), "terms")[b.label]
        c = np.linalg.solve(np.vander(s, 4, increasing=True), v)
        return np.array([c[0], c[1] / width, 2.0 * c[2] / width**2])

    return at(start, t[4] - t[3], +1.0), at(end, t[-4] - t[-5], -1.0)


@pytest.fixture(scope="module", params=["uniform", "quantile"])
def cyclic_fit(request):
    df = month_frame(1, 2000, continuous=True)
    model = tg.Model("y", terms=[tg.cyclic("month", period=12, size=8, origin=0.0,
                                           knots=request.param)])
    return model.fit(df), df


def test_cyclic_ends_meet_in_value_slope_and_curvature(cyclic_fit):
    # DESIGN §3: f, f' and f'' match at the ends of the period
    # measured: differences ≤ 2e-14 for both knot placements (slope 0.41 / 0.43 there)
    fit, _ = cyclic_fit
    first, last = end_derivatives(fit, "month")
    np.testing.assert_allclose(first, last, rtol=0, atol=1e-8)
    assert abs(first[1]) > 0.1  # the slope there is not trivially zero (a sine's flank)


def test_cyclic_basis_is_the_periodic_b_spline(cyclic_fit):
    # from memory (de Boor 1978, periodic splines): on the extended knot vector, the
    # coefficients of functions i and i + k equal; scipy's BSpline of that vector is the
    # analytic curve, whose derivatives at the two ends must agree
    fit, df = cyclic_fit
    b, sl = fit.term("month")
    k = b.n_raw
    beta = fit.coefficients_raw[sl]
    curve = BSpline(b.knots, beta[np.arange(k + 3) % k], 3)
    start, end = b.origin, b.origin + b.period
    for order in range(3):
        d = curve.derivative(order) if order else curve
        assert abs(d(start) - d(end)) <= 1e-8 * max(1.0, abs(d(start)))
    x = np.linspace(start, end, 97)[:-1]
    engine = fit.predict(pd.DataFrame({"month": x}), "terms")[b.label]
    np.testing.assert_allclose(engine, curve(x), rtol=0, atol=1e-12)


def test_cyclic_recovers_a_sine_over_months():
    df = month_frame(2, 1200, continuous=False)
    fit = tg.Model("y", terms=[tg.cyclic("month", period=12, size=8)]).fit(df)
    assert fit.converged
    months = np.arange(1.0, 13.0)
    est = fit.predict(pd.DataFrame({"month": months}), "terms")["cyclic(month)"]
    truth = month_truth(months) - month_truth(df["month"].to_numpy()).mean()
    # common practice: error small against the signal's range; measured 0.043 of 1.89
    assert np.max(np.abs(est - truth)) <= 0.05 * np.ptp(truth)
    # pointwise 95% bands at the twelve months cover the truth (measured: all 12)
    eff = fit.effect("month", points=12 * 8 + 1).to_pandas()
    eff = eff[np.isin(np.round(eff["month"], 9), months)]
    truth = month_truth(eff["month"].to_numpy()) - month_truth(df["month"].to_numpy()).mean()
    inside = (eff["lower"] <= truth) & (truth <= eff["upper"])
    assert len(eff) == 12 and inside.sum() >= 10


def test_cyclic_values_wrap_around_the_period():
    # tg.cyclic docstring: values outside [origin, origin + period) wrap around
    df = month_frame(3, 800, continuous=False)
    fit = tg.Model("y", terms=[tg.cyclic("month", period=12, size=6)]).fit(df)
    x = np.array([1.0, 1.5, 4.25, 7.0, 12.0, 12.99])
    base = fit.predict(pd.DataFrame({"month": x}))
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # wrapping is not clamping: no range warning
        for shift in (-24.0, -12.0, 12.0, 36.0):
            moved = fit.predict(pd.DataFrame({"month": x + shift}))
            np.testing.assert_allclose(moved, base, rtol=0, atol=1e-10)
    # origin + period is the origin again (origin defaults to the minimum, 1)
    ends = fit.predict(pd.DataFrame({"month": [1.0, 13.0]}))
    assert abs(ends[0] - ends[1]) <= 1e-10

"""Cubic B-spline numerics (tallgam.basis) against scipy, and their invariants."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import integrate
from scipy.interpolate import BSpline

from tallgam.terms import bsplines as bs

KNOT_SETS = {
    "uniform": bs.clamped_knots(np.linspace(0.0, 10.0, 9)[1:-1], 0.0, 10.0),
    "irregular": bs.clamped_knots(np.array([0.3, 0.31, 2.0, 7.5, 9.99]), 0.0, 10.0),
    "no interior": bs.clamped_knots(np.empty(0), -1.0, 2.0),
    "wide range": bs.clamped_knots(np.array([1e3, 5e3, 2e4]), 0.0, 1e5),
}


def _scipy_rows(knots: np.ndarray, x: np.ndarray) -> np.ndarray:
    # reference: scipy.interpolate.BSpline.design_matrix (scipy >= 1.8)
    return BSpline.design_matrix(x, knots, bs.DEGREE).toarray()


@pytest.mark.parametrize("name", list(KNOT_SETS))
def test_rows_equal_scipy_design_matrix(name):
    knots = KNOT_SETS[name]
    rng = np.random.default_rng(0)
    lo, hi = knots[0], knots[-1]
    breaks = np.unique(knots)
    x = np.concatenate([rng.uniform(lo, hi, 500), breaks])  # knots themselves included
    ours = bs.dense_matrix(knots, x)
    np.testing.assert_allclose(ours, _scipy_rows(knots, x), rtol=0, atol=1e-14)


def test_evaluate_gives_the_first_column_and_four_values():
    knots = KNOT_SETS["irregular"]
    x = np.linspace(0.0, 10.0, 101)
    first, values = bs.evaluate(knots, x)
    ref = _scipy_rows(knots, x)
    for i in range(len(x)):
        cols = np.flatnonzero(ref[i] != 0)
        assert cols.min() >= first[i] and cols.max() <= first[i] + 3
        np.testing.assert_allclose(ref[i, first[i]:first[i] + 4], values[i], atol=1e-15)


def test_values_outside_the_range_are_held_at_the_boundary():
    knots = KNOT_SETS["uniform"]
    inside = bs.dense_matrix(knots, np.array([0.0, 10.0]))
    outside = bs.dense_matrix(knots, np.array([-3.0, 25.0]))
    np.testing.assert_array_equal(outside, inside)


def _integral_of_squared_second_derivative(knots, coef) -> float:
    # reference: scipy.integrate.quad of (f'')² per knot interval (f'' is linear there)
    f2 = BSpline(knots, coef, bs.DEGREE).derivative(2)
    total = 0.0
    for a, b in zip(np.unique(knots)[:-1], np.unique(knots)[1:]):
        total += integrate.quad(lambda t: f2(t) ** 2, a, b, epsabs=0, epsrel=1e-13)[0]
    return total


@pytest.mark.parametrize("name", list(KNOT_SETS))
def test_curvature_penalty_is_the_integral_of_squared_curvature(name):
    knots = KNOT_SETS[name]
    S = bs.curvature_penalty(knots)
    size = len(knots) - bs.ORDER
    assert S.shape == (size, size)
    np.testing.assert_array_equal(S, S.T)
    rng = np.random.default_rng(1)
    for _ in range(5):
        coef = rng.normal(0.0, 1.0, size)
        exact = _integral_of_squared_second_derivative(knots, coef)
        assert coef @ S @ coef == pytest.approx(exact, rel=1e-10)


def test_curvature_penalty_vanishes_on_straight_lines():
    # common practice: the Greville abscissae are the B-spline coefficients of f(x) = x
    knots = KNOT_SETS["irregular"]
    S = bs.curvature_penalty(knots)
    greville = np.array([knots[i + 1:i + 4].mean() for i in range(len(knots) - bs.ORDER)])
    scale = np.abs(S).max() * np.abs(greville).max()
    assert np.max(np.abs(S @ np.ones(len(greville)))) <= 1e-12 * np.abs(S).max()
    assert np.max(np.abs(S @ greville)) <= 1e-12 * scale


def test_difference_penalty_is_the_sum_of_squared_second_differences():
    # reference: Eilers & Marx (1996), Statist. Sci. 11: P-spline penalty Σ (Δ²β)²
    rng = np.random.default_rng(2)
    coef = rng.normal(0.0, 1.0, 12)
    D = bs.difference_penalty(12)
    assert coef @ D @ coef == pytest.approx(np.sum(np.diff(coef, n=2) ** 2), rel=1e-13)


def test_quantile_knots_are_inside_and_increasing():
    values = np.arange(1.0, 101.0)
    knots = bs.interior_from_quantiles(values, np.ones(100), 10)
    assert len(knots) == 6
    assert np.all(np.diff(knots) > 0) and knots[0] > 1.0 and knots[-1] < 100.0
    # equally spaced quantiles of a uniform histogram are equally spaced
    np.testing.assert_allclose(np.diff(knots), np.diff(knots)[0], rtol=1e-12)


interior_sets = st.lists(st.floats(0.001, 0.999, allow_nan=False), min_size=0, max_size=12,
                         unique=True).map(sorted)


@settings(max_examples=150, deadline=None)
@given(interior=interior_sets, lo=st.floats(-1e4, 1e4), width=st.floats(1e-3, 1e5),
       u=st.lists(st.floats(0.0, 1.0), min_size=1, max_size=40))
def test_rows_sum_to_one_and_are_non_negative(interior, lo, width, u):
    # common practice: B-splines form a partition of unity and are non-negative (de Boor)
    inner = lo + width * np.asarray(interior, dtype=np.float64)
    inner = np.unique(inner[(inner > lo) & (inner < lo + width)])
    knots = bs.clamped_knots(inner, lo, lo + width)
    x = lo + width * np.asarray(u)
    first, values = bs.evaluate(knots, x)
    assert np.all(values >= -1e-15)
    np.testing.assert_allclose(values.sum(axis=1), 1.0, rtol=0, atol=1e-12)
    assert np.all((first >= 0) & (first <= len(knots) - bs.ORDER - bs.ORDER))

"""Unpenalized fits against an ordinary least-squares solve of the same design.

With the smoothing parameter at 0 the penalized normal equations are the plain normal
equations, so the fitted values must equal a least-squares solve of the dense design
matrix (B-spline columns built independently by scipy). Models of linear and categorical
terms only have no penalty at all: estimates, standard errors and standard errors of the
fitted mean must equal statsmodels' OLS/WLS.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from scipy.interpolate import BSpline

import tallgam as tg

RTOL = 1e-8
LEVEL_EFFECTS = {"A": 0.0, "B": 0.5, "C": -1.0, "D": 2.0}


def _bspline_design(x: np.ndarray, positions: np.ndarray) -> np.ndarray:
    # reference: scipy.interpolate.BSpline.design_matrix (scipy >= 1.8), clamped cubic knots
    t = np.r_[[positions[0]] * 3, positions, [positions[-1]] * 3]
    return BSpline.design_matrix(x, t, 3).toarray()


def _relative_gap(ours: np.ndarray, ref: np.ndarray) -> float:
    return float(np.max(np.abs(ours - ref)) / np.max(np.abs(ref)))


@pytest.fixture(scope="module")
def spline_data() -> pd.DataFrame:
    rng = np.random.default_rng(1)
    n = 3000
    x = rng.uniform(0.0, 5.0, n)
    z = rng.normal(2.0, 1.0, n)
    g = rng.choice(list("pqr"), n)
    y = np.sin(2 * x) + 0.4 * z + (g == "q") * 0.7 + rng.normal(0.0, 0.3, n)
    return pd.DataFrame({"x": x, "z": z, "g": g, "y": y})


@pytest.fixture(scope="module")
def linear_data() -> pd.DataFrame:
    rng = np.random.default_rng(2)
    n = 2000
    x1 = rng.normal(10.0, 3.0, n)
    x2 = rng.uniform(-1.0, 1.0, n)
    cat = rng.choice(list("ABCD"), n, p=[0.4, 0.3, 0.2, 0.1])
    w = rng.uniform(0.5, 3.0, n)
    y = (1.0 + 0.3 * x1 - 2.0 * x2 + np.array([LEVEL_EFFECTS[c] for c in cat])
         + rng.normal(0.0, 1.0, n) / np.sqrt(w))
    return pd.DataFrame({"x1": x1, "x2": x2, "cat": cat, "w": w, "y": y})


def _positions(x: np.ndarray, count: int) -> np.ndarray:
    return np.linspace(x.min(), x.max(), count)


def test_spline_at_zero_smoothing_is_least_squares(spline_data):
    # reference: numpy.linalg.lstsq on the scipy B-spline design (common practice:
    # an unpenalized regression spline is the least-squares fit of its basis)
    x, y = spline_data["x"].to_numpy(), spline_data["y"].to_numpy()
    pos = _positions(x, 6)
    model = tg.Model("y", terms=[tg.spline("x", knots=pos, smoothing=0.0)], criterion="fixed")
    fit = model.fit(spline_data)
    X = _bspline_design(x, pos)
    beta, *_ = np.linalg.lstsq(X, y, rcond=None)
    values, se = fit.predict(spline_data, se=True)
    assert _relative_gap(values, X @ beta) <= RTOL
    assert fit.edf["total"] == pytest.approx(X.shape[1], rel=1e-9)
    # common practice: Var(fitted mean) = σ̂²·diag(X(XᵀX)⁻¹Xᵀ), σ̂² = RSS/(n − p)
    n, p = X.shape
    sigma2 = np.sum((y - X @ beta) ** 2) / (n - p)
    q, _ = np.linalg.qr(X)
    ref_se = np.sqrt(sigma2 * np.sum(q * q, axis=1))
    assert np.max(np.abs(se - ref_se) / ref_se) <= RTOL


def test_mixed_terms_at_zero_smoothing_are_least_squares(spline_data):
    # reference: numpy.linalg.lstsq on [B-spline design | z | dummies of g]; the B-splines
    # sum to one, so they carry the intercept and the fitted values are unique
    df = spline_data
    x = df["x"].to_numpy()
    pos = _positions(x, 8)
    model = tg.Model("y", terms=[tg.spline("x", knots=pos, smoothing=0.0), tg.linear("z"),
                                 tg.categorical("g")], criterion="fixed")
    fit = model.fit(df)
    dummies = pd.get_dummies(df["g"], drop_first=True).to_numpy(float)
    X = np.column_stack([_bspline_design(x, pos), df["z"].to_numpy(), dummies])
    beta, *_ = np.linalg.lstsq(X, df["y"].to_numpy(), rcond=None)
    assert _relative_gap(fit.predict(df), X @ beta) <= RTOL


def _statsmodels_design(df: pd.DataFrame) -> pd.DataFrame:
    dummies = pd.get_dummies(df["cat"], drop_first=True).astype(float)  # base level "A"
    return sm.add_constant(pd.concat([df[["x1", "x2"]], dummies], axis=1))


@pytest.mark.parametrize("weighted", [False, True])
def test_linear_and_categorical_match_statsmodels(linear_data, weighted):
    # reference: statsmodels OLS / WLS (statsmodels >= 0.14): params, bse, se of the mean
    df = linear_data
    model = tg.Model("y", terms=[tg.linear("x1"), tg.linear("x2"),
                                 tg.categorical("cat", base="A")],
                     weights="w" if weighted else None)
    fit = model.fit(df)
    X = _statsmodels_design(df)
    ref = (sm.WLS(df["y"], X, weights=df["w"]) if weighted else sm.OLS(df["y"], X)).fit()

    values, se = fit.predict(df, se=True)
    assert _relative_gap(values, ref.fittedvalues.to_numpy()) <= RTOL
    se_mean = ref.get_prediction(X).se_mean
    assert np.max(np.abs(se - se_mean) / se_mean) <= RTOL

    table = fit.coefficients.to_pandas().set_index("name")
    for name in ("x1", "x2", "B", "C", "D"):
        assert table.loc[name, "estimate"] == pytest.approx(ref.params[name], rel=RTOL)
        assert table.loc[name, "std_error"] == pytest.approx(ref.bse[name], rel=RTOL)
    assert table.loc["A", "estimate"] == 0.0 and table.loc["A", "std_error"] == 0.0
    assert fit.intercept == pytest.approx(ref.params["const"], rel=RTOL)
    # the scale is the residual mean square on n − p degrees of freedom
    assert fit.scale == pytest.approx(ref.scale, rel=RTOL)
    assert fit.edf["total"] == pytest.approx(X.shape[1], rel=1e-9)

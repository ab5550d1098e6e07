"""The smoothing-parameter search finds the global optimum of GCV and REML.

Data built to have a GCV curve with two dips (issue 13): a sine-plus-trend truth with a
small faster sine on top, Gaussian noise, one smooth on 400 distinct x (knots at every x)
or two smooths on 200 distinct points each. One dip fits the fast sine (λ ≈ 0.01), the
other smooths it away (λ ≈ 1); which one is lower depends on the noise. GCV is known to
have several local minima (Wahba 1990, ch. 4); a search from one fixed start settled in the
first dip it met.

Reference: scipy's cubic smoothing spline (``scipy.interpolate.make_smoothing_spline``).
With knots at every distinct x a Gaussian single-spline fit at fixed λ is that spline (see
tests/test_smoothing_spline_reference.py). scipy returns its smoother matrix S(λ₀) when given
the identity as data; for unit weights S(λ) = (I + λK)⁻¹ (the Reinsch form, Green &
Silverman 1994, §2.1), so one eigendecomposition gives S(λ) = U diag(1/(1 + λd)) Uᵀ and the
exact trace at every λ of a dense grid; the test checks this against direct scipy calls.
GCV = n‖y − Sy‖²/(n − tr S)² (Craven & Wahba 1979). REML (Wood 2011, scale profiled out,
M₀ = 2 for the straight lines): (n − M₀)/2·log D_p + ½Σlog(1 + λd_i) − ½Σ_{d_i>0}log(λd_i),
D_p = ‖y − Sy‖² + λ·(Sy)ᵀK(Sy). Two smooths: the additive smoothing-spline fit with both
penalties is the fixed point of backfitting f₁ = S₁(y − f₂), f₂ = S₂(y − f₁) (Buja, Hastie &
Tibshirani 1989); profiling f₁ out gives (I − S₁ + λ₂K₂)f₂ = (I − S₁)y, with the constant
moved to f₁.

x sits one point per cell of a regular grid (jittered within the cell), so no two x are
closer than a fifth of a cell: near-coincident knots are a separate matter (the curvature
penalty of a B-spline basis with knots 1e-5 apart loses its smallest eigenvalues to
rounding), not the search's.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy import linalg, optimize
from scipy.interpolate import make_smoothing_spline

import tallgam as tg

LAM0 = 1e-3                                   # λ of the one smoother matrix taken from scipy
LOG_GRID = np.arange(-10.0, 5.0 + 1e-9, 0.02)  # ln λ, one smooth (x on [0, 10])


def jittered(n: int, width: float, rng) -> np.ndarray:
    """n distinct points on [0, width], one per cell of a regular grid."""
    return width * (np.arange(n) + 0.1 + 0.8 * rng.uniform(size=n)) / n


def one_smooth(seed: int, a: float, k: float, n: int = 400):
    rng = np.random.default_rng(seed)
    x = jittered(n, 10.0, rng)
    y = np.sin(x) + 0.3 * x + a * np.sin(k * x) + rng.normal(0.0, 0.4, n)
    return x, y


def two_smooths(seed: int, n: int = 200):
    rng = np.random.default_rng(seed)
    x1 = jittered(n, 10.0, rng)
    x2 = rng.permutation(jittered(n, 1.0, rng))
    y = np.sin(x1) + 0.3 * x1 + 0.15 * np.sin(8.0 * x1) + np.cos(3.0 * x2) + rng.normal(0, 0.4, n)
    return x1, x2, y


class Reinsch:
    """scipy's smoother for one covariate in Reinsch form: S(λ) = U diag(1/(1+λd)) Uᵀ."""

    def __init__(self, x: np.ndarray):
        order = np.argsort(x)
        xs = x[order]
        s0 = make_smoothing_spline(xs, np.eye(len(x)), lam=LAM0)(xs)  # smoother matrix
        s, U = np.linalg.eigh(0.5 * (s0 + s0.T))
        d = (1.0 / s - 1.0) / LAM0
        d[np.argsort(np.abs(d))[:2]] = 0.0  # the straight lines are not penalized
        self.U, self.d = U[np.argsort(order)], d  # back to the data's order

    def smoother(self, lam: float) -> np.ndarray:
        return (self.U / (1.0 + lam * self.d)) @ self.U.T

    def gcv(self, y: np.ndarray, lam: float) -> float:
        c = self.U.T @ y
        f = 1.0 / (1.0 + lam * self.d)
        r = (1.0 - f) * c
        return len(y) * float(r @ r) / (len(y) - float(np.sum(f))) ** 2

    def reml(self, y: np.ndarray, lam: float) -> float:
        c = self.U.T @ y
        f = 1.0 / (1.0 + lam * self.d)
        dp = float(np.sum(((1.0 - f) * c) ** 2) + lam * np.sum(self.d * (f * c) ** 2))
        pos = self.d > 0
        return (0.5 * (len(y) - 2) * np.log(dp) + 0.5 * np.sum(np.log1p(lam * self.d))
                - 0.5 * np.sum(np.log(lam * self.d[pos])))


class Additive:
    """Two smoothing splines fitted together (backfitting fixed point, see above)."""

    def __init__(self, x1, x2, y):
        self.s1, self.s2 = Reinsch(x1), Reinsch(x2)
        self.K2 = (self.s2.U * self.s2.d) @ self.s2.U.T
        self.y, self.n = y, len(y)

    def _solve(self, lam1, lam2):
        n, y = self.n, self.y
        S1 = self.s1.smoother(lam1)
        rest = np.eye(n) - S1
        B = rest + lam2 * self.K2 + np.ones((n, n)) / n  # B·1 = 1: pins the mean of f₂
        factor = linalg.cho_factor(B)
        f2 = linalg.cho_solve(factor, rest @ y)
        return S1, rest, factor, f2

    def fitted(self, lam1, lam2) -> np.ndarray:
        S1, rest, _, f2 = self._solve(lam1, lam2)
        return S1 @ self.y + rest @ f2

    def gcv(self, lam1, lam2) -> float:
        S1, rest, factor, f2 = self._solve(lam1, lam2)
        trace = np.trace(S1) + np.trace(linalg.cho_solve(factor, rest @ rest))
        r = self.y - S1 @ self.y - rest @ f2
        return self.n * float(r @ r) / (self.n - trace) ** 2

    def reml(self, lam1, lam2) -> float:
        _, rest, factor, f2 = self._solve(lam1, lam2)
        e = self.y - f2
        dp = float(e @ rest @ e + lam2 * f2 @ self.K2 @ f2)
        log_h = np.sum(np.log1p(lam1 * self.s1.d)) + 2 * np.sum(np.log(np.diag(factor[0])))
        log_s = (np.sum(np.log(lam1 * self.s1.d[self.s1.d > 0]))
                 + np.sum(np.log(lam2 * self.s2.d[self.s2.d > 0])))
        return 0.5 * (self.n - 3) * np.log(dp) + 0.5 * log_h - 0.5 * log_s


def local_minima(values: np.ndarray) -> list[int]:
    inner = (values[1:-1] < values[:-2]) & (values[1:-1] < values[2:])
    return list(np.flatnonzero(inner) + 1)


def refine_1d(f, grid: np.ndarray, values: np.ndarray) -> float:
    """ln λ of the minimum: bounded Brent search between the best grid point's neighbours."""
    i = int(np.argmin(values))
    res = optimize.minimize_scalar(f, bounds=(grid[max(i - 1, 0)], grid[min(i + 1, len(grid) - 1)]),
                                   method="bounded", options={"xatol": 1e-10})
    return float(res.x)


def fit_one(x, y, criterion):
    return tg.Model("y", terms=[tg.spline("x", knots=x)], criterion=criterion).fit(
        pd.DataFrame({"x": x, "y": y}))


# (a, k, seed): the global GCV minimum in the smooth dip (λ ≈ 1), where the search from the
# old fixed start stopped in the wiggly dip, and scipy's lam=None finds the global one;
# then two cases whose global minimum is the wiggly dip (λ ≈ 0.01), where scipy's own
# bounded search on λ ∈ (0, n) stops in the smooth dip (its curve is then not compared)
SMOOTH_DIP = [(0.1, 8.0, 3), (0.1, 8.0, 10), (0.15, 8.0, 5), (0.15, 8.0, 11)]
WIGGLY_DIP = [(0.15, 8.0, 2), (0.1, 8.0, 4)]


@pytest.mark.parametrize("a, k, seed", SMOOTH_DIP + WIGGLY_DIP)
def test_gcv_finds_the_global_minimum_of_a_two_dip_curve(a, k, seed):
    # reference: dense grid of scipy's make_smoothing_spline with its exact trace (above)
    # measured: λ within 1.4e-7 relative of the refined grid minimum; curves within 6.8e-7
    # of the response range of scipy's lam=None fit in the SMOOTH_DIP cases
    x, y = one_smooth(seed, a, k)
    ref = Reinsch(x)
    values = np.array([ref.gcv(y, np.exp(t)) for t in LOG_GRID])
    dips = local_minima(values)
    assert len(dips) >= 2  # the data have the two-dip curve the test is about
    lam_star = np.exp(refine_1d(lambda t: ref.gcv(y, np.exp(t)), LOG_GRID, values))
    # the Reinsch form is scipy's smoother: fitted values and trace against direct calls
    direct = make_smoothing_spline(x, y, lam=lam_star)(x)
    assert np.max(np.abs(ref.smoother(lam_star) @ y - direct)) <= 1e-7 * np.ptp(y)
    trace = np.trace(make_smoothing_spline(x, np.eye(len(x)), lam=lam_star)(x))
    assert trace == pytest.approx(np.trace(ref.smoother(lam_star)), rel=1e-8)

    fit = fit_one(x, y, "gcv")
    lam = fit.smoothing["spline(x)"]
    assert abs(lam / lam_star - 1.0) <= 0.01
    assert fit.criterion[1] == pytest.approx(ref.gcv(y, lam), rel=1e-8)
    # the search history: a sweep, then Newton; the best run is the reported optimum
    step = fit.statistics["smoothing_search"]["steps"][0]
    assert step["points"][0][0] == "sweep"
    assert step["value"] == min(run["value"] for run in step["runs"]) == fit.criterion[1]
    if (a, k, seed) in SMOOTH_DIP:
        scipy_choice = make_smoothing_spline(x, y)(x)  # scipy's own GCV choice
        assert np.max(np.abs(fit.predict(pd.DataFrame({"x": x})) - scipy_choice)) <= (
            1e-3 * np.ptp(y))


@pytest.mark.parametrize("a, k, seed", SMOOTH_DIP[:2] + WIGGLY_DIP[:1])
def test_reml_optimum_is_no_worse_than_any_grid_point(a, k, seed):
    # reference: REML of scipy's smoother (above) on the same dense grid
    # measured: tallgam's λ within 4.2e-8 of the refined grid minimum
    x, y = one_smooth(seed, a, k)
    ref = Reinsch(x)
    values = np.array([ref.reml(y, np.exp(t)) for t in LOG_GRID])
    fit = fit_one(x, y, "reml")
    lam = fit.smoothing["spline(x)"]
    assert ref.reml(y, lam) <= values.min() + 1e-9 * abs(values.min())
    lam_star = np.exp(refine_1d(lambda t: ref.reml(y, np.exp(t)), LOG_GRID, values))
    assert abs(lam / lam_star - 1.0) <= 1e-4


# two smooths: ln λ₁ (x₁ on [0, 10]) and ln λ₂ (x₂ on [0, 1]) grids
GRID_1 = np.arange(-7.0, 3.0 + 1e-9, 0.5)
GRID_2 = np.arange(-14.0, 2.0 + 1e-9, 1.0)


def grid_minima_2d(values: np.ndarray) -> list[tuple[int, int]]:
    padded = np.pad(values, 1, constant_values=np.inf)
    centre = padded[1:-1, 1:-1]
    is_min = ((centre <= padded[:-2, 1:-1]) & (centre <= padded[2:, 1:-1])
              & (centre <= padded[1:-1, :-2]) & (centre <= padded[1:-1, 2:]))
    found = [tuple(int(i) for i in idx) for idx in np.argwhere(is_min)]
    return sorted(found, key=lambda idx: values[idx])


@pytest.mark.parametrize("seed", [0, 5])
def test_gcv_of_two_smooths_finds_the_global_minimum(seed):
    # reference: dense grid of the additive smoothing-spline GCV built from scipy's smoothers
    # (above), refined by Nelder-Mead from its best local minima
    # measured: λ₁ within 1e-5, λ₂ within 2.2e-4 relative of the refined reference (GCV is
    # flat along λ₂), GCV equal to 4e-10
    x1, x2, y = two_smooths(seed)
    df = pd.DataFrame({"x1": x1, "x2": x2, "y": y})
    ref = Additive(x1, x2, y)
    # conventions: tallgam at fixed λ with knots at every x is the reference's fit
    lam_fixed = (0.5, 0.01)
    fixed = tg.Model("y", terms=[tg.spline("x1", knots=x1, smoothing=lam_fixed[0]),
                                 tg.spline("x2", knots=x2, smoothing=lam_fixed[1])],
                     criterion="fixed").fit(df)
    assert np.max(np.abs(fixed.predict(df) - ref.fitted(*lam_fixed))) <= 1e-6 * np.ptp(y)

    values = np.array([[ref.gcv(np.exp(a), np.exp(b)) for b in GRID_2] for a in GRID_1])
    assert len(local_minima(values.min(axis=1))) >= 2  # two dips in λ₁ (profile over λ₂)
    best = None
    for i, j in grid_minima_2d(values)[:2]:
        start = np.array([GRID_1[i], GRID_2[j]])
        res = optimize.minimize(lambda t: ref.gcv(*np.exp(t)), start, method="Nelder-Mead",
                                options={"xatol": 1e-9, "fatol": 1e-16, "maxfev": 3000,
                                         "initial_simplex": start + 0.5 * np.eye(3, 2, -1)})
        if best is None or res.fun < best.fun:
            best = res
    lam_star = np.exp(best.x)

    fit = tg.Model("y", terms=[tg.spline("x1", knots=x1), tg.spline("x2", knots=x2)],
                   criterion="gcv").fit(df)
    lam = np.array([fit.smoothing["spline(x1)"], fit.smoothing["spline(x2)"]])
    np.testing.assert_allclose(lam, lam_star, rtol=0.01)
    assert fit.criterion[1] <= best.fun * (1 + 1e-8)
    assert fit.criterion[1] <= values.min()


@pytest.mark.parametrize("seed", [0])
def test_reml_of_two_smooths_is_no_worse_than_any_grid_point(seed):
    # reference: REML of the additive smoothing-spline model from scipy's smoothers (above)
    x1, x2, y = two_smooths(seed)
    ref = Additive(x1, x2, y)
    values = np.array([[ref.reml(np.exp(a), np.exp(b)) for b in GRID_2] for a in GRID_1])
    fit = tg.Model("y", terms=[tg.spline("x1", knots=x1), tg.spline("x2", knots=x2)]).fit(
        pd.DataFrame({"x1": x1, "x2": x2, "y": y}))
    lam = (fit.smoothing["spline(x1)"], fit.smoothing["spline(x2)"])
    assert ref.reml(*lam) <= values.min() + 1e-9 * abs(values.min())


def test_search_history_survives_the_model_file(tmp_path):
    # common practice: what the result reports is what the model file gives back
    x, y = one_smooth(3, 0.1, 8.0)
    fit = fit_one(x, y, "gcv")
    fit.save(tmp_path / "m.json")
    back = tg.load(tmp_path / "m.json")
    assert back.statistics["smoothing_search"] == fit.statistics["smoothing_search"]
    search = fit.statistics["smoothing_search"]
    assert search["penalties"] == ["spline(x)"]
    step = search["steps"][0]
    assert step["criterion"] == "gcv" and step["evaluations"] >= len(step["points"])
    assert all(phase in ("sweep", "check") for phase, _, _ in step["points"])


# ---------------------------------------------------------------------------------------
# Newton stops on the requested tolerance


def _reml_problem():
    """A working problem with a single penalty and a pair of overlapping ones (the shape of
    a surface's margins), from random data."""
    from tallgam.solve import smoothing as sm

    rng = np.random.default_rng(0)
    n, p = 300, 20
    X = rng.normal(size=(n, p))
    beta = np.concatenate([[1.0, -0.5], np.sin(np.arange(8)), 0.2 * rng.normal(size=10)])
    y = X @ beta + rng.normal(size=n)
    d2 = np.diff(np.eye(8), 2, axis=0)
    d5 = np.diff(np.eye(5), 2, axis=0)
    blocks = [sm.PenaltyBlock(sl=slice(2, 10), matrices=[d2.T @ d2], first=0),
              sm.PenaltyBlock(sl=slice(10, 20), matrices=[
                  np.kron(d5.T @ d5, np.eye(2)),
                  np.kron(np.eye(5), np.array([[1.0, -1.0], [-1.0, 1.0]]))], first=1)]
    return sm.WorkingProblem(A=X.T @ X, u=X.T @ y, e=float(y @ y), anchor=np.zeros(p),
                             blocks=blocks, n=n, scale=None)


def _reml_value(problem, lam) -> float:
    """REML with the scale profiled out (Wood 2011): (n − M₀)/2·log D_p + ½log|H| −
    ½log|S|₊, from the solve's by-products."""
    from tallgam.solve import smoothing as sm

    s = sm.solve(problem, lam)
    m = problem.n - problem.null_dim
    return 0.5 * m * np.log(s.penalized) + 0.5 * s.log_det_H - 0.5 * s.log_det_S


@pytest.mark.parametrize("tol", [1e-4, 1e-11])
def test_reml_newton_stops_on_the_requested_tolerance(tol):
    # reference: five-point central differences of REML (Wood 2011) in log λ (common
    # practice); measured: 9e-11 at tol=1e-11, 3.4e-8 where Newton stopped on the old
    # gradient floor of 1e-7
    from tallgam.solve import smoothing as sm

    problem = _reml_problem()
    sol = sm.select(problem, "reml", [None] * 3, tol=tol)
    assert sol.converged and sol.search["runs"][-1]["stopped"] in ("gradient", "step")
    h, grad = 3e-3, []
    for e in np.eye(3):
        v = [_reml_value(problem, sol.lam * np.exp(t * h * e)) for t in (-2, -1, 1, 2)]
        grad.append((v[0] - 8 * v[1] + 8 * v[2] - v[3]) / (12 * h))
    if tol < 1e-9:
        assert np.max(np.abs(grad)) <= 2e-9
    else:  # a loose tolerance stops early: fewer Newton steps than the tight one
        tight = sm.select(problem, "reml", [None] * 3, tol=1e-11)
        assert sol.iterations < tight.iterations

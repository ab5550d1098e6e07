"""The binned data passes and the scratch copy of coded rows give the fit of the plain
streamed passes: exactly (to rounding) when every numeric input is whole-numbered, and
within a measured tolerance when continuous inputs are binned. Synthetic data with a known
truth (invented for these tests)."""

from __future__ import annotations

import os

import numpy as np
import pandas as pd
import pytest

import tallgam as tg
from tallgam.data.sources import Source
from tallgam.errors import SpecError
from tallgam.options import Tuning
from tallgam.passes import binned as discrete


def whole_number_book(n: int = 30_000, seed: int = 5) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    df = pd.DataFrame({
        "age": rng.integers(18, 90, n).astype(float),
        "bonus": rng.integers(0, 25, n).astype(float),
        "year": rng.integers(2010, 2024, n).astype(float),
        "month": rng.integers(1, 13, n).astype(float),
        "doors": rng.integers(2, 6, n).astype(float),
        "power": rng.integers(40, 200, n).astype(float),
        "seats": rng.integers(2, 9, n).astype(float),
        "fuel": rng.choice(["petrol", "diesel", "electric"], n),
        "group": rng.choice([f"g{i:03d}" for i in range(120)], n),
        "exposure": rng.uniform(0.1, 1.0, n),
    })
    group = dict(zip([f"g{i:03d}" for i in range(120)], rng.normal(0, 0.25, 120)))
    eta = (-2.0 + 0.6 * np.exp(-(df.age - 18) / 10) + 0.3 * np.sin(df.bonus / 4)
           + 0.3 * np.cos(df.power / 30) * (df.year - 2010) / 14 + df.group.map(group)
           + 0.1 * np.sin(2 * np.pi * df.month / 12) + 0.02 * (df.year - 2017)
           + df.fuel.map({"petrol": 0.0, "diesel": 0.1, "electric": -0.2}))
    df["claims"] = rng.poisson(df.exposure * np.exp(eta))
    df["amount"] = 3.0 + eta + rng.normal(0, 0.3, n)
    return df


def whole_number_model(family="poisson"):
    terms = [tg.spline("age", size=6, per="fuel"), tg.spline("bonus", size=6),
             tg.cyclic("month", period=12, size=6),
             tg.surface("power", "year", size=(5, 4)),
             tg.spline("bonus", size=5, multiplier="doors"),
             tg.linear("seats"), tg.categorical("fuel"), tg.random_effect("group")]
    if family == "poisson":
        return tg.Model(response="claims", family="poisson", exposure="exposure", terms=terms)
    return tg.Model(response="amount", family="gaussian", terms=terms)


def assert_same_fit(a, b, df, rtol, pass_slack=0):
    # the smoothing-parameter optimizer stops within its own tolerance, and a term whose
    # λ runs to infinity has a flat criterion: compare what the fits say about the data
    assert abs(a.passes - b.passes) <= pass_slack
    np.testing.assert_allclose(a.deviance, b.deviance, rtol=rtol)
    eta_a, eta_b = a.predict(df, output="link"), b.predict(df, output="link")
    np.testing.assert_allclose(eta_b, eta_a, rtol=0, atol=rtol * np.max(np.abs(eta_a)))
    # EDFs: measured up to 4e-7 relative (a 48-EDF random effect) across machines
    np.testing.assert_allclose(list(a.edf.values()), list(b.edf.values()), rtol=1e-5,
                               atol=1e-5)


@pytest.mark.parametrize("family", ["gaussian", "poisson"])
def test_whole_number_inputs_give_the_exact_pass_fit(family):
    # exact coding (code = value - minimum): only the order of summation differs
    df = whole_number_book()
    model = whole_number_model(family)
    plain = model.fit(df, batch_rows=7_000)
    coded = model.fit(df, batch_rows=7_000, binned=True)
    # measured 1e-8 to 7e-8 (optimizer tolerance); sums in another order may put the
    # convergence test a pass either side of its threshold
    assert_same_fit(plain, coded, df, 1e-6, pass_slack=1)
    assert any("exact" in n for n in coded.notes)


def test_every_pair_mode_gives_the_same_normal_equations(monkeypatch):
    # force the expanded-row modes by small cross-table limits, and compare the pass state
    # (every block of XᵀWX, XᵀWr, column sums) with the plain kernel's at perturbed
    # coefficients
    from dataclasses import replace

    from tallgam.passes import run as passes

    df = whole_number_book(8_000)
    model = whole_number_model("poisson")
    real = passes.working_pass
    seen_modes = set()
    for limit in (Tuning().cell_limit, 64, 1):
        captured = {}

        def spy(source, plan, *args, _captured=captured, **kwargs):
            if plan.beta is not None and "state" not in _captured:
                rng = np.random.default_rng(3)
                moved = replace(plan, beta_prev=None,
                                beta=plan.beta + 0.01 * rng.standard_normal(plan.beta.shape))
                _captured["state"] = (real(source, replace(moved, binned=None)),
                                      real(source, moved))
                _captured["modes"] = {p[0] for p in plan.binned.pairs}
            return real(source, plan, *args, **kwargs)
        monkeypatch.setattr(passes, "working_pass", spy)
        model.fit(df, binned=True, scratch=False, tuning=Tuning(cell_limit=limit))
        monkeypatch.setattr(passes, "working_pass", real)
        plain, coded = captured["state"]
        seen_modes |= captured["modes"]
        for name in ("dense", "cross", "diag", "rhs", "colsum"):
            a, b = getattr(plain, name), getattr(coded, name)
            np.testing.assert_allclose(b, a, rtol=0, atol=1e-10 * np.max(np.abs(a)))
        for key in plain.pairs:
            np.testing.assert_allclose(coded.pairs[key], plain.pairs[key], rtol=0,
                                       atol=1e-10 * np.max(np.abs(plain.pairs[key])))
        for key in ("deviance", "resid_ss", "weight", "loglik"):
            np.testing.assert_allclose(coded.scalars[key], plain.scalars[key], rtol=1e-12)
    assert seen_modes == {discrete.CROSS, discrete.EXPAND_B, discrete.EXPAND_BOTH}


def test_scratch_copy_gives_the_streamed_fit_and_is_removed(tmp_path, monkeypatch):
    df = whole_number_book(20_000)
    path = tmp_path / "book.parquet"
    df.to_parquet(path, index=False)
    model = whole_number_model("poisson")
    reads = []
    real = Source.batches

    def counting(self, *args, **kwargs):
        reads.append(1)
        return real(self, *args, **kwargs)
    monkeypatch.setattr(Source, "batches", counting)
    streamed = model.fit(str(path), batch_rows=6_000, binned=True, scratch=False)
    streamed_reads = len(reads)
    reads.clear()
    folder = tmp_path / "scratch"
    folder.mkdir()
    seen = []

    def watch(event):
        if event.kind == "end" and event.task.startswith("pass"):
            seen.extend(os.listdir(folder))
    cached = model.fit(str(path), batch_rows=6_000, binned=True, scratch=str(folder),
                       progress=watch)
    assert streamed_reads == streamed.passes and streamed.passes > 2
    assert len(reads) == 1                      # only the first pass read the data
    assert any(s.startswith("tallgam-scratch-") for s in seen)
    assert os.listdir(folder) == []             # removed when the fit ended
    # the same rows; the copy holds each batch sorted by its largest term's codes and
    # recomputes ln(exposure), so sums differ in the last digits only. One smoothing
    # parameter of the surface lies on a nearly flat stretch of the REML criterion, where
    # such differences move where the search stops (measured: λ 1.0e11 against 1.6e16, the
    # surface's EDF 5.8013 against 5.7996, fitted values 3e-4 apart on the link scale,
    # deviances 4e-8 apart): the fits agree to that, far inside the standard errors
    assert abs(streamed.passes - cached.passes) <= 1
    np.testing.assert_allclose(cached.deviance, streamed.deviance, rtol=1e-6)
    eta_a, eta_b = streamed.predict(df, output="link"), cached.predict(df, output="link")
    np.testing.assert_allclose(eta_b, eta_a, rtol=0, atol=1e-3 * np.max(np.abs(eta_a)))
    np.testing.assert_allclose(list(cached.edf.values()), list(streamed.edf.values()),
                               atol=0.01)


def test_scratch_copy_is_removed_when_the_fit_fails(tmp_path):
    df = whole_number_book(5_000)
    folder = tmp_path / "scratch"
    folder.mkdir()
    model = tg.Model(response="claims", family="poisson", exposure="exposure",
                     terms=[tg.spline("age")], max_iterations=2)
    with pytest.warns(tg.TallgamWarning):
        model.fit(df, binned=True, scratch=str(folder))
    assert os.listdir(folder) == []


def test_binned_continuous_inputs_stay_close_to_the_plain_fit():
    # 200 grid values per continuous column: the linear predictor moves by a small part of
    # its standard error (measured: at most 0.09 se, median 0.03 se, 0.0098 absolute;
    # with 1000 values at most 0.017 se)
    rng = np.random.default_rng(8)
    n = 40_000
    df = pd.DataFrame({"x": rng.uniform(0, 10, n), "z": rng.lognormal(0, 0.7, n),
                       "exposure": rng.uniform(0.2, 1, n)})
    df["claims"] = rng.poisson(df.exposure * np.exp(-1 + 0.4 * np.sin(df.x) + 0.2 * np.log(df.z)))
    model = tg.Model(response="claims", family="poisson", exposure="exposure",
                     terms=[tg.spline("x"), tg.spline("z")])
    plain = model.fit(df)
    coded = model.fit(df, binned=True)
    grid = df.sample(2_000, random_state=1)
    p0, se0 = plain.predict(grid, output="link", se=True)
    p1 = coded.predict(grid, output="link")
    assert np.max(np.abs(p1 - p0) / se0) < 0.2
    assert np.median(np.abs(p1 - p0) / se0) < 0.06
    assert 0 < np.max(np.abs(p1 - p0)) < 0.03
    assert any("binned to" in n for n in coded.notes)


@pytest.mark.parametrize("bad", [5, "many", 2.5])
def test_bad_binned_values_are_refused(bad):
    df = whole_number_book(1_000)
    with pytest.raises(SpecError, match="binned"):
        tg.Model(response="claims", family="poisson", exposure="exposure",
                 terms=[tg.spline("age")]).fit(df, binned=bad)


def test_spec_file_and_command_line_binned(tmp_path):
    # the spec key and the flag reach the fit: the saved model's notes name the coding
    from tallgam import cli

    df = whole_number_book(4_000)
    df.to_parquet(tmp_path / "book.parquet", index=False)
    spec = tmp_path / "model.toml"
    spec.write_text('data = "book.parquet"\nresponse = "claims"\nfamily = "poisson"\n'
                    'exposure = "exposure"\nbinned = true\n\n'
                    '[[term]]\nkind = "spline"\ncolumn = "age"\n')
    assert cli.main(["fit", str(spec), "-o", str(tmp_path / "a.json"), "--quiet"]) == 0
    assert any("exact" in n for n in tg.load(tmp_path / "a.json").notes)
    assert cli.main(["fit", str(spec), "-o", str(tmp_path / "b.json"), "--quiet",
                     "--binned", "50", "--scratch", str(tmp_path)]) == 0
    assert any("exact" in n for n in tg.load(tmp_path / "b.json").notes)
    spec.write_text(spec.read_text().replace("binned = true", "binned = false"))
    assert cli.main(["fit", str(spec), "-o", str(tmp_path / "c.json"), "--quiet"]) == 0
    assert not any("binned passes" in n for n in tg.load(tmp_path / "c.json").notes)


def test_grid_codes_equal_a_binary_search():
    # the bucketed look-up must give numpy's searchsorted over the midpoints, ties included
    rng = np.random.default_rng(0)
    for _ in range(20):
        values = np.unique(np.concatenate([rng.lognormal(0, 1, rng.integers(2, 300)), [0.0]]))
        grid = discrete.ColumnGrid("x", values, False, 0.0)
        x = np.concatenate([rng.lognormal(0, 1.2, 20_000), values, grid.mid, [-1.0, 1e9]])
        np.testing.assert_array_equal(grid.codes(x), np.searchsorted(grid.mid, x))


def test_compact_scratch_copy_gives_the_blocks_of_the_streamed_pass(tmp_path):
    # the copy keeps codes in their narrowest type, the response and weights exactly, the
    # exposure, recomputes ln(exposure), and reorders each batch by its largest term's
    # codes; a pass over it equals the streamed pass to rounding, every block
    from tallgam.data.scratch import ScratchPolicy
    from tallgam.data.scratch import prepare as prepare_scratch
    from tallgam.data.sources import open_source
    from tallgam.options import RunOptions
    from tallgam.passes.run import PassPlan, working_pass
    from tallgam.progress import make_callback
    from tallgam.solve.pirls import prepare

    df = whole_number_book(20_000)
    df["density"] = np.random.default_rng(6).lognormal(4, 1, len(df))
    model = tg.Model(response="claims", family="poisson", exposure="exposure",
                     terms=whole_number_model("poisson").terms + (tg.spline("density"),))
    source = open_source(df)
    setup = prepare(model, source, RunOptions(binned=True), make_callback(False))
    rng = np.random.default_rng(1)
    beta = 0.02 * rng.standard_normal(setup.design.p)
    beta[0] = -2.0
    plan = PassPlan(inputs=setup.inputs, design=setup.design, family=model.family,
                    link=model.link, beta=beta, beta_prev=0.9 * beta, start_shift=-2.0,
                    null_beta0=-2.0, y_mean=setup.profile.role("response").mean,
                    scale_est=1.0, batch_rows=7_000, binned=setup.binned,
                    values=setup.values)
    streamed = working_pass(source, plan)
    scratch = prepare_scratch(None, ScratchPolicy(folder=str(tmp_path)), plan, len(df))
    try:
        written = working_pass(source, plan, scratch=scratch)
        assert scratch.complete and scratch.rows == len(df)
        read = working_pass(source, plan, scratch=scratch)
        # bytes a row: each term's code in the narrowest unsigned type that holds it, one
        # for the claim count, eight for the exposure, nothing for the offset
        codes = sum(t.itemsize for _, t in scratch.codes)
        assert scratch.size == len(df) * (codes + 1 + 8)
        assert scratch.size / len(df) <= 24
    finally:
        scratch.remove()
    for state in (written, read):
        for name in ("dense", "cross", "diag", "rhs", "colsum"):
            a, b = getattr(streamed, name), getattr(state, name)
            np.testing.assert_allclose(b, a, rtol=0, atol=1e-10 * np.max(np.abs(a)),
                                       err_msg=name)
        for key in streamed.pairs:
            np.testing.assert_allclose(state.pairs[key], streamed.pairs[key], rtol=0,
                                       atol=1e-10 * np.max(np.abs(streamed.pairs[key])))
        for key in ("deviance", "resid_ss", "weight", "loglik", "pearson"):
            np.testing.assert_allclose(state.scalars[key], streamed.scalars[key], rtol=1e-10)

"""Every term kind round-trips through the JSON model file and is written the same way in a
TOML spec as through the Python API.

One small model per kind, so a failure names the kind. The model file must reproduce
predictions bit for bit (it stores raw coefficients and every basis, the neighbour graph
included, so the neighbour file is not needed any more); a spec must build the same term
objects, hence the same fit.
"""

from __future__ import annotations

import json
import os
from dataclasses import replace

import numpy as np
import pandas as pd
import pytest

import tallgam as tg
from tallgam.spec import load_spec, parse_spec

REGIONS = [f"q{i}" for i in range(6)]
CHAIN = {r: [REGIONS[j] for j in (i - 1, i + 1) if 0 <= j < len(REGIONS)]
         for i, r in enumerate(REGIONS)}


@pytest.fixture(scope="module")
def frame() -> pd.DataFrame:
    rng = np.random.default_rng(9)
    n = 1500
    df = pd.DataFrame({
        "month": rng.integers(1, 13, n).astype(float), "lon": rng.uniform(0.0, 1.0, n),
        "lat": rng.uniform(0.0, 1.0, n), "age": rng.uniform(18.0, 80.0, n),
        "fuel": rng.choice(["d", "p"], n), "z": rng.normal(1.0, 1.0, n),
        "x": rng.uniform(0.0, 1.0, n), "grp": rng.choice([f"g{i}" for i in range(12)], n),
        "region": rng.choice(REGIONS, n)})
    grp_effect = dict(zip([f"g{i}" for i in range(12)], rng.normal(0.0, 0.3, 12)))
    df["y"] = (np.sin(2 * np.pi * df["month"] / 12) + np.sin(3 * df["lon"]) * df["lat"]
               + 0.01 * df["age"] * (df["fuel"] == "d") + df["z"] * np.cos(3 * df["x"])
               + df["grp"].map(grp_effect) + 0.2 * df["region"].str[1:].astype(int)
               + rng.normal(0.0, 0.5, n))
    return df


# kind -> (Python terms, the same terms as [[term]] tables, extra top-level TOML lines)
CASES = {
    "cyclic": ([tg.cyclic("month", period=12, size=6)],
               'kind = "cyclic"\ncolumn = "month"\nperiod = 12\nsize = 6', ""),
    "surface": ([tg.surface("lon", "lat", size=(6, 5))],
                'kind = "surface"\ncolumns = ["lon", "lat"]\nsize = [6, 5]', ""),
    "surface_fixed": ([tg.surface("lon", "lat", size=(5, 5), smoothing=(1e-3, 1e-1))],
                      'kind = "surface"\ncolumns = ["lon", "lat"]\nsize = [5, 5]\n'
                      'smoothing = [1e-3, 1e-1]', 'criterion = "fixed"'),
    "per": ([tg.categorical("fuel"), tg.spline("age", per="fuel", size=6)],
            'kind = "categorical"\ncolumn = "fuel"\n\n[[term]]\nkind = "spline"\n'
            'column = "age"\nper = "fuel"\nsize = 6', ""),
    "multiplier": ([tg.spline("x", multiplier="z", size=6)],
                   'kind = "spline"\ncolumn = "x"\nmultiplier = "z"\nsize = 6', ""),
    "removable": ([tg.spline("x", removable=True),
                   tg.surface("lon", "lat", size=4, removable=True)],
                  'kind = "spline"\ncolumn = "x"\nremovable = true\n\n[[term]]\n'
                  'kind = "surface"\ncolumns = ["lon", "lat"]\nsize = 4\nremovable = true', ""),
    "random_effect": ([tg.random_effect("grp")],
                      'kind = "random_effect"\ncolumn = "grp"', ""),
    "adjacency": ([tg.adjacency("region", neighbours="nb.json")],
                  'kind = "adjacency"\ncolumn = "region"\nneighbours = "nb.json"', ""),
    "adjacency_table": ([tg.adjacency("region", neighbours=CHAIN)],
                        'kind = "adjacency"\ncolumn = "region"\nneighbours = { '
                        + ", ".join(f"{k} = {json.dumps(v)}" for k, v in CHAIN.items())
                        + " }", ""),
}


def spec_text(case: str) -> str:
    _, tables, top = CASES[case]
    return f'response = "y"\n{top}\n\n[[term]]\n{tables}\n'


@pytest.fixture(scope="module")
def workdir(tmp_path_factory):
    """A folder holding nb.json, made the working directory while fitting (the spec and
    the Python API then name the same file "nb.json")."""
    folder = tmp_path_factory.mktemp("kinds")
    (folder / "nb.json").write_text(json.dumps(CHAIN))
    return folder


@pytest.fixture(scope="module")
def fits(frame, workdir):
    out = {}
    here = os.getcwd()
    os.chdir(workdir)
    try:
        for case, (terms, _, _) in CASES.items():
            model = tg.Model("y", terms=terms,
                             criterion="fixed" if case == "surface_fixed" else "reml")
            spec = parse_spec(spec_text(case), str(workdir / "spec.toml"))
            out[case] = (model, model.fit(frame), spec.model, spec.model.fit(frame))
    finally:
        os.chdir(here)
    return out


@pytest.mark.parametrize("case", list(CASES))
def test_model_file_round_trip_predicts_identically(case, fits, frame, tmp_path):
    _, fit, _, _ = fits[case]
    assert fit.converged
    path = tmp_path / "model.json"
    fit.save(path)
    loaded = tg.load(path)  # the neighbour file is not read again: the graph is stored
    for output in ("response", "link"):
        np.testing.assert_array_equal(loaded.predict(frame, output), fit.predict(frame, output))
    v0, s0 = fit.predict(frame, se=True)
    v1, s1 = loaded.predict(frame, se=True)
    np.testing.assert_array_equal(v1, v0)
    np.testing.assert_array_equal(s1, s0)
    assert loaded.edf == fit.edf
    assert loaded.smoothing == fit.smoothing
    for b in fit.bases[1:]:
        assert loaded.effect(b.label).equals(fit.effect(b.label)), b.label
    # and the loaded model saves to the same file
    again = tmp_path / "again.json"
    loaded.save(again)
    first, second = json.loads(path.read_text()), json.loads(again.read_text())
    first.pop("provenance", None), second.pop("provenance", None)
    assert first == second


def test_stored_graph_needs_no_neighbour_file(frame, tmp_path):
    # adjacency saved with a file path: loading and scoring work after the file is gone
    folder = tmp_path / "elsewhere"
    folder.mkdir()
    (folder / "nb.json").write_text(json.dumps(CHAIN))
    model = tg.Model("y", terms=[tg.adjacency("region", neighbours=str(folder / "nb.json"))])
    fit = model.fit(frame)
    fit.save(tmp_path / "model.json")
    (folder / "nb.json").unlink()
    loaded = tg.load(tmp_path / "model.json")
    np.testing.assert_array_equal(loaded.predict(frame), fit.predict(frame))


@pytest.mark.parametrize("case", list(CASES))
def test_spec_file_gives_the_python_fit(case, fits, frame):
    model, fit, spec_model, spec_fit = fits[case]
    # a spec reads neighbour files from its own folder, so its path is absolute
    spec_terms = tuple(
        replace(t, neighbours=os.path.basename(t.neighbours))
        if isinstance(getattr(t, "neighbours", None), str) else t for t in spec_model.terms)
    assert spec_terms == model.terms
    assert replace(spec_model, terms=spec_terms) == model
    np.testing.assert_array_equal(spec_fit.predict(frame), fit.predict(frame))
    assert spec_fit.edf == fit.edf
    assert spec_fit.smoothing == fit.smoothing


def test_spec_neighbour_path_is_relative_to_the_spec(frame, tmp_path, monkeypatch):
    # the spec module documents relative paths as taken from the spec's folder
    folder = tmp_path / "project"
    folder.mkdir()
    (folder / "nb.json").write_text(json.dumps(CHAIN))
    (folder / "spec.toml").write_text(spec_text("adjacency"))
    elsewhere = tmp_path / "run"
    elsewhere.mkdir()
    monkeypatch.chdir(elsewhere)
    fit = load_spec(folder / "spec.toml").model.fit(frame)
    assert fit.converged


def test_removable_with_fixed_criterion_is_refused():
    # the removal penalty's smoothing is chosen by the criterion, so "fixed" cannot work
    with pytest.raises(tg.SpecError, match="removable adds a penalty"):
        tg.Model("y", criterion="fixed", terms=[tg.spline("x", smoothing=1.0, removable=True)])

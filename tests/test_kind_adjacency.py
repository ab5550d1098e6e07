"""Territory smoothing: ``tg.adjacency`` with a graph-Laplacian penalty Σ_{i~j} (β_i − β_j)².

The penalty's limits are known exactly: as λ → ∞ a connected graph is forced to one
common level, and as λ → 0 the term is an unpenalized factor, i.e. ``tg.categorical``.
A region without data minimises its neighbour differences alone, so it sits at the mean
of its neighbours (the conditional mean of an intrinsic Gaussian Markov random field;
Besag, York & Mollié 1991; Rue & Held 2005, ch. 3).
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

import tallgam as tg

SIDE = 4  # a 4 × 4 grid of regions, rook neighbours


def grid_graph(side: int = SIDE, prefix: str = "r") -> dict[str, list[str]]:
    names = [f"{prefix}{i}" for i in range(side * side)]
    graph = {}
    for row in range(side):
        for col in range(side):
            k = row * side + col
            graph[names[k]] = ([names[k - side]] if row > 0 else []) + (
                [names[k + side]] if row < side - 1 else []) + (
                [names[k - 1]] if col > 0 else []) + ([names[k + 1]] if col < side - 1 else [])
    return graph


GRAPH = grid_graph()


def region_frame(seed: int, n: int, regions) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    regions = list(regions)
    truth = {r: np.sin(i / 2.0) + 0.3 * (i % SIDE) for i, r in enumerate(regions)}
    reg = rng.choice(regions, n)
    return pd.DataFrame({"region": reg,
                         "y": np.array([truth[r] for r in reg]) + rng.normal(0.0, 0.5, n)})


@pytest.fixture(scope="module")
def frame() -> pd.DataFrame:
    return region_frame(5, 2000, GRAPH)


def fixed(smoothing: float, neighbours=GRAPH) -> tg.Model:
    return tg.Model("y", criterion="fixed",
                    terms=[tg.adjacency("region", neighbours=neighbours, smoothing=smoothing)])


def test_huge_smoothing_gives_one_common_level(frame):
    # λ → ∞ on a connected graph: every neighbour difference is 0 (Laplacian null space =
    # constants), and the centring puts the constant at 0. Measured: spread 4e-10.
    fit = fixed(1e12).fit(frame)
    est = fit.effect("region")["estimate"].to_numpy()
    assert len(est) == SIDE * SIDE
    assert np.ptp(est) <= 1e-6
    assert np.max(np.abs(est)) <= 1e-6
    np.testing.assert_allclose(fit.predict(frame), frame["y"].mean(), rtol=0, atol=1e-6)
    assert fit.edf["adjacency(region)"] <= 1e-6


@pytest.mark.parametrize("smoothing", [0.0, 1e-10])
def test_no_smoothing_is_the_categorical_fit(frame, smoothing):
    # λ → 0: one free level per region, the same column space as tg.categorical
    # measured: 2e-15 (λ = 0) and 3e-12 (λ = 1e-10)
    adj = fixed(smoothing).fit(frame)
    cat = tg.Model("y", terms=[tg.categorical("region")]).fit(frame)
    np.testing.assert_allclose(adj.predict(frame), cat.predict(frame), rtol=0, atol=1e-8)
    assert adj.edf["adjacency(region)"] == pytest.approx(SIDE * SIDE - 1, abs=1e-6)


@pytest.mark.parametrize("criterion", ["reml", "fixed"])
def test_region_without_data_sits_at_its_neighbours_mean(criterion):
    # a region in the graph but not in the data: only the penalty touches it, and
    # Σ_j (β_i − β_j)² is least at the mean of its neighbours (Rue & Held 2005, ch. 3)
    empty = "r5"  # inside the grid: four neighbours
    df = region_frame(6, 2000, [r for r in GRAPH if r != empty])
    model = (tg.Model("y", terms=[tg.adjacency("region", neighbours=GRAPH)])
             if criterion == "reml" else fixed(0.5))
    fit = model.fit(df)
    eff = fit.effect("region").to_pandas().set_index("region")["estimate"]
    assert empty in eff.index
    near = eff.loc[GRAPH[empty]].to_numpy()
    assert near.min() < eff[empty] < near.max()
    assert eff[empty] == pytest.approx(near.mean(), abs=1e-8)  # measured: 3e-14
    # and it can be scored
    pred = fit.predict(pd.DataFrame({"region": [empty]}), "terms")["adjacency(region)"]
    assert pred[0] == pytest.approx(eff[empty], abs=1e-12)


def test_data_region_missing_from_the_graph_is_an_error(frame):
    graph = {k: [v for v in vs if v != "r15"] for k, vs in GRAPH.items() if k != "r15"}
    with pytest.raises(tg.DataError, match="'r15'"):
        tg.Model("y", terms=[tg.adjacency("region", neighbours=graph)]).fit(frame)


def test_islands_and_separate_parts_are_named_in_a_warning(frame):
    graph = {**GRAPH, "isle": [], "north": ["south"], "south": ["north"], "far": ["away"],
             "away": []}
    rng = np.random.default_rng(9)
    extra = pd.DataFrame({"region": ["isle"] * 30 + ["north"] * 20 + ["south"] * 20,
                          "y": rng.normal(1.0, 0.5, 70)})
    df = pd.concat([frame, extra], ignore_index=True)
    with pytest.warns(tg.TallgamWarning) as record:
        fit = tg.Model("y", terms=[tg.adjacency("region", neighbours=graph)]).fit(df)
    text = " ".join(str(w.message) for w in record)
    assert "4 separate parts" in text
    for name in ("isle", "north", "south", "far", "away"):
        assert repr(name) in text, name
    assert "no data" in text  # far–away has no rows
    eff = fit.effect("region").to_pandas().set_index("region")["estimate"]
    # a part without data is held at 0 (the warning says so); measured 3e-14
    assert eff[["far", "away"]].abs().max() <= 1e-10


@pytest.mark.parametrize("codes", ["text", "integer"])
def test_neighbour_file_formats_give_the_same_fit(tmp_path, codes):
    # the same chain 1–2–3–…–8 plus an island, as a dict, a JSON file, a two-column CSV and
    # a two-column Parquet file of pairs (each pair once; an island as a pair with no
    # neighbour); region codes as text, or as integers (postcodes) in data and files
    n_regions = 8
    labels = list(range(1, n_regions + 2))  # the last one is the island
    name = (lambda i: f"t{i}") if codes == "text" else (lambda i: i)
    graph = {str(name(i)): ([str(name(i + 1))] if i < n_regions else []) for i in labels}
    pairs = [(name(i), name(i + 1)) for i in labels[:-2]] + [(name(labels[-1]), None)]
    (tmp_path / "nb.json").write_text(json.dumps(graph))
    kind = pa.string() if codes == "text" else pa.int64()
    # plain text, the island's neighbour cell empty (note: pandas' to_csv would write the
    # integer column as floats, "2.0", and those are other labels than "2")
    (tmp_path / "nb.csv").write_text("region,neighbour\n" + "".join(
        f"{a},{'' if b is None else b}\n" for a, b in pairs))
    pq.write_table(pa.table({"region": pa.array([a for a, _ in pairs], kind),
                             "neighbour": pa.array([b for _, b in pairs], kind)}),
                   tmp_path / "nb.parquet")
    rng = np.random.default_rng(10)
    reg = rng.choice(labels, 900)
    df = pd.DataFrame({"region": [name(i) for i in reg],
                       "y": np.sin(reg / 2.0) + rng.normal(0.0, 0.3, len(reg))})
    fits = {}
    for source in (graph, str(tmp_path / "nb.json"), str(tmp_path / "nb.csv"),
                   tmp_path / "nb.parquet"):
        with pytest.warns(tg.TallgamWarning, match="island"):
            fits[str(source)] = tg.Model(
                "y", terms=[tg.adjacency("region", neighbours=source)]).fit(df)
    first, *rest = fits.values()
    assert first.bases[1].levels == [str(name(i)) for i in labels]
    assert len(first.bases[1].edges) == n_regions - 1
    for other in rest:
        assert other.bases[1].levels == first.bases[1].levels
        np.testing.assert_array_equal(other.bases[1].edges, first.bases[1].edges)
        np.testing.assert_allclose(other.predict(df), first.predict(df), rtol=0, atol=1e-12)
        assert other.smoothing == pytest.approx(first.smoothing, rel=1e-12)

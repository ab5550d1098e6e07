"""The adjacency kind: territory smoothing. One coefficient per region, penalized by the
squared differences between neighbours Σ_{i~j} (β_i − β_j)² (the graph Laplacian; an
intrinsic Gaussian Markov random field, Besag, York & Mollié 1991; Rue & Held 2005).
Regions in the neighbour list but not in the data get effects smoothed from their
neighbours."""

from __future__ import annotations

import json
import os
import warnings
from collections.abc import Mapping, Sequence
from dataclasses import dataclass

import numpy as np

from tallgam.data.profile import DataProfile
from tallgam.errors import DataError, SpecError, TallgamWarning
from tallgam.terms.base import TermSpec, check_smoothing, few, natural_key, register
from tallgam.terms.levels import LevelBasis, levels_of


@dataclass(frozen=True)
class AdjacencySpec(TermSpec):
    """See :func:`adjacency`."""

    column: str
    neighbours: str | Mapping | None = None
    smoothing: float | None = None

    kind = "adjacency"
    file_options = ("neighbours",)
    extra_option_types = {"neighbours": (str, dict)}

    def __post_init__(self):
        if self.neighbours is None:
            raise SpecError(f"{self.label}: give neighbours=, a JSON file mapping each region "
                            "to its neighbours, a two-column Parquet/CSV file of pairs, or a "
                            "dict")
        if isinstance(self.neighbours, os.PathLike):
            object.__setattr__(self, "neighbours", os.fspath(self.neighbours))
        check_smoothing(self.label, self.smoothing)

    def input_kinds(self):
        return {self.column: "levels"}

    @classmethod
    def from_dict(cls, d):
        return cls(**d)

    def build(self, profile: DataProfile) -> AdjacencyBasis:
        data_levels = levels_of(profile, self.column, self.label, minimum=1)
        graph = read_neighbours(self.neighbours, self.label)
        missing = sorted(set(data_levels) - set(graph))
        if missing:
            raise DataError(
                f"{self.label}: {len(missing)} region(s) in the data are not in the neighbour "
                f"list: {few(missing)}. Add them (with an empty list for an island).")
        levels = sorted(graph, key=natural_key)
        return AdjacencyBasis(self, levels, graph_edges(graph, levels), set(data_levels))


def adjacency(column: str, *, neighbours, smoothing: float | None = None,
              title: str | None = None) -> AdjacencySpec:
    """Territory smoothing: one coefficient per region, penalized by the differences
    between neighbouring regions.

    Parameters
    ----------
    column : str
        The region column.
    neighbours : str, path or dict
        A JSON file mapping each region to the list of its neighbours, a two-column
        Parquet/CSV file of neighbour pairs, or such a dict.
    smoothing : float, optional
        A fixed λ; ``None`` lets the criterion choose.
    title : str, optional
        The name shown in summaries, charts and table headers (default: the column).

    Returns
    -------
    AdjacencySpec
    """
    return AdjacencySpec(column, neighbours=neighbours, smoothing=smoothing, title=title)


def read_neighbours(source, where: str) -> dict[str, list[str]]:
    """A symmetric neighbour mapping from a dict, a JSON file or a two-column table file."""
    if isinstance(source, Mapping):
        raw = {str(k): [str(v) for v in vs] for k, vs in source.items()}
    else:
        path = os.fspath(source)
        if not os.path.exists(path):
            raise DataError(f"{where}: the neighbour file {path!r} does not exist")
        if path.lower().endswith(".json"):
            try:
                with open(path, encoding="utf-8") as fh:
                    data = json.load(fh)
            except (OSError, json.JSONDecodeError) as exc:
                raise DataError(f"{where}: cannot read {path!r}: {exc}") from None
            if not isinstance(data, dict) or not all(isinstance(v, list) for v in data.values()):
                raise DataError(f"{where}: {path!r} must map each region to a list of regions")
            raw = {str(k): [str(v) for v in vs] for k, vs in data.items()}
        else:
            import duckdb

            reader = "read_parquet" if path.lower().endswith((".parquet", ".pq")) else "read_csv"
            try:
                rows = duckdb.connect().execute(
                    f"SELECT * FROM {reader}(?)", [path]).fetchall()
            except duckdb.Error as exc:
                raise DataError(f"{where}: cannot read {path!r}: {exc}") from None
            if rows and len(rows[0]) < 2:
                raise DataError(f"{where}: {path!r} needs two columns (region, neighbour)")
            raw = {}
            for row in rows:
                a = str(row[0])
                raw.setdefault(a, [])
                if row[1] is not None:
                    raw[a].append(str(row[1]))
    graph: dict[str, set[str]] = {k: set() for k in raw}
    for a, vs in raw.items():
        for b in vs:
            if b == a:
                continue
            graph.setdefault(b, set())
            graph[a].add(b)
            graph[b].add(a)
    return {k: sorted(v, key=natural_key) for k, v in graph.items()}


def graph_edges(graph: Mapping[str, Sequence[str]], levels: list[str]) -> np.ndarray:
    """Edges (i < j) of a neighbour mapping as an (m × 2) int array over ``levels``."""
    index = {lev: i for i, lev in enumerate(levels)}
    edges = {(min(index[a], index[b]), max(index[a], index[b]))
             for a, vs in graph.items() for b in vs}
    return np.array(sorted(edges), dtype=np.int64).reshape(-1, 2)


class AdjacencyBasis(LevelBasis):
    """Region effects penalized by Σ_{neighbours i~j} (β_i − β_j)² (graph Laplacian)."""

    def __init__(self, spec: AdjacencySpec, levels: list[str], edges: np.ndarray,
                 data_levels: set[str] | None = None, counts: list[int] | None = None):
        super().__init__(spec, levels, counts)
        self.edges = np.asarray(edges, dtype=np.int64).reshape(-1, 2)
        from scipy.sparse import coo_matrix
        from scipy.sparse.csgraph import connected_components

        k = self.n_raw
        adj = coo_matrix((np.ones(len(self.edges)), (self.edges[:, 0], self.edges[:, 1])),
                         shape=(k, k))
        self.n_parts, self.part = connected_components(adj, directed=False)
        degree = np.bincount(self.edges.ravel(), minlength=k)
        self.islands = [self.levels[i] for i in np.flatnonzero(degree == 0)]
        if data_levels is not None:
            has_data = np.array([lev in data_levels for lev in self.levels])
            self.empty_parts = [p for p in range(self.n_parts)
                                if not has_data[self.part == p].any()]
            if self.n_parts > 1 or self.islands:
                sizes = np.bincount(self.part)
                order = np.argsort(-sizes, kind="stable")
                apart = [f"[{few([self.levels[i] for i in np.flatnonzero(self.part == p)], 4)}]"
                         for p in order[1:6]]
                warnings.warn(TallgamWarning(
                    f"{self.label}: the neighbour graph has {self.n_parts} separate parts "
                    f"(sizes {', '.join(str(s) for s in sorted(sizes, reverse=True)[:8])}"
                    f"{', ...' if len(sizes) > 8 else ''}); each part keeps its own level"
                    + (f"; apart from the largest part: {', '.join(apart)}"
                       f"{', ...' if self.n_parts > 6 else ''}" if apart else "")
                    + (f"; {len(self.islands)} island(s) without neighbours are not smoothed"
                       f" ({few(self.islands, 5)})" if self.islands else "")
                    + (f"; {len(self.empty_parts)} part(s) have no data and are held at 0"
                       if self.empty_parts else "")), stacklevel=3)
        else:
            self.empty_parts = []

    def penalties(self):
        k = self.n_raw
        lap = np.zeros((k, k))
        i, j = self.edges[:, 0], self.edges[:, 1]
        np.add.at(lap, (i, i), 1.0)
        np.add.at(lap, (j, j), 1.0)
        np.add.at(lap, (i, j), -1.0)
        np.add.at(lap, (j, i), -1.0)
        return [lap]

    def constraint(self, colsum):
        rows = [np.asarray(colsum, dtype=np.float64)]
        for p in self.empty_parts:  # no data can place these parts: hold their mean at 0
            rows.append((self.part == p).astype(np.float64))
        c = np.array(rows)
        q, r = np.linalg.qr(c.T / np.linalg.norm(c, axis=1), mode="complete")
        return q[:, len(rows):]

    def to_dict(self):
        return {**super().to_dict(), "edges": self.edges.tolist(),
                "empty_parts": [int(p) for p in self.empty_parts]}

    @classmethod
    def from_dict(cls, spec, d):
        b = cls(spec, d["levels"], np.asarray(d["edges"]), None, d.get("counts"))
        b.empty_parts = [int(p) for p in d.get("empty_parts", [])]
        return b


register(AdjacencySpec, AdjacencyBasis)

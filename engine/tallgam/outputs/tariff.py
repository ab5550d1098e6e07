"""A rating tariff from fitted models: banded factors, one base rate, and its own SQL.

A tariff turns the smooth fit of one log-link model — or of a frequency and a severity
model, multiplied into a pure premium — into what rating engines and rate manuals take:

    rate per unit of exposure = base rate × Π_factors relativity(factor's band),

*Factors.* Terms with the same input columns form one factor (``spline(driver_age)`` of the
frequency model and ``spline(driver_age)`` of the severity model make the factor
``driver_age``); its fitted relativity is the product of its terms' relativities,
exp(f(x) − f(reference)). Numeric inputs are banded (:mod:`tallgam.outputs.bands`); level
inputs keep their levels, or share one value per group of levels. Surfaces are banded on
each margin into cells; per-level curves get bands per level.

*Band values.* A band's relativity is the exposure-weighted mean of the fitted relativity
over the training data in the band: by default from the model file's training histograms
(exact for whole-number columns; for factors of several inputs the exposure of a cell is
the product of the margins' shares, as the file holds no joint histogram); with
``training=`` the training rows themselves are streamed once, and every band's exposure,
mean and range are exact. A band without training data takes the fitted relativity at its
lower edge, held inside the training range.

*Reference point and base rate.* Both models are measured from one reference point: the
first model's base levels and exposure-weighted medians unless given (``reference=``), so
the severity model is rebased for the user. Each factor's relativities are then divided by
the value of the band holding the reference point, which therefore reads 1, and the base rate
takes up the product of those divisors: the rate of every policy is unchanged by it.

The tariff is written as a folder (:meth:`Tariff.write`): one CSV and one Parquet table per
factor, the base rate, a JSON manifest (models, bands, reference point, tolerances), a
DuckDB SQL expression rating a policy from the tariff alone, and the cautions. The cost of
banding on a hold-out is measured by :meth:`Tariff.cost` (:mod:`tallgam.outputs.banding_cost`).

Outputs support, and do not replace, review by a qualified actuary; the use of rating factors
is governed by local law and regulation.
"""

from __future__ import annotations

import hashlib
import json
import os
from dataclasses import dataclass, field
from itertools import product

import numpy as np
import pyarrow as pa

from tallgam.errors import SpecError, TallgamWarning
from tallgam.outputs import bands as bandlib
from tallgam.outputs.bands import BandRule, BandSpec, CellSums, band_spec, fewest_bands
from tallgam.outputs.report import CAUTION
from tallgam.outputs.tables import file_stem, references, relativity_rows, training_weight
from tallgam.terms import sqltext
from tallgam.terms.base import GRID_POINTS, level_codes

FORMAT = "tallgam-tariff"
FORMAT_VERSION = 1
MARGIN_VALUES = 200   # histogram values per margin when a factor has several numeric inputs
FLAT_BANDS = 16       # more bands than this are looked up by a balanced tree in SQL
BAND_RULE_TEXT = ("a band's relativity is the exposure-weighted mean of the fitted relativity "
                  "over the training data in the band; a band without training data takes "
                  "the fitted relativity at its lower edge, held inside the training range")


@dataclass
class Component:
    """One model's term inside a factor: ``ref`` is the term's value (link scale) at the
    tariff's reference point, so its relativity is exp(f(x) − ref)."""

    role: str
    fit: object
    label: str
    ref: float


@dataclass
class Stratum:
    """The cells of a factor for one level (or group of levels) of its level inputs:
    ``key`` the level or group per level input, ``members`` the level tuples it rates,
    ``cuts`` per numeric input its interior cut points, ``offset`` its first cell id."""

    key: tuple[str, ...]
    members: list[tuple[str, ...]]
    cuts: list[np.ndarray]
    offset: int = 0

    @property
    def shape(self) -> tuple[int, ...]:
        return tuple(len(c) + 1 for c in self.cuts)

    @property
    def size(self) -> int:
        return int(np.prod(self.shape)) if self.cuts else 1


class Factor:
    """A rating factor: the terms of one input set, its bands and their relativities.

    ``kinds`` holds the inputs, level inputs first; ``banded`` is False when a numeric
    input's rule is ``"none"`` (the factor keeps its smooth relativity). After
    :meth:`finish`, ``relativity``, ``exposure``, ``fitted_min``/``fitted_max`` and
    ``per_model`` hold one value per cell (cells of all strata, in order)."""

    def __init__(self, name: str, kinds: dict[str, str], components: list[Component],
                 levels: dict[str, list[str]], point: dict):
        self.name = name
        self.point = {c: point.get(c) for c in kinds}   # the tariff's reference point
        self.kinds = kinds
        self.components = components
        self.levels = levels                   # level input → its levels
        self.level_index = {c: {lv: i for i, lv in enumerate(v)} for c, v in levels.items()}
        self.level_inputs = [c for c, k in kinds.items() if k == "levels"]
        self.numeric_inputs = [c for c, k in kinds.items() if k == "numeric"]
        self.rules: dict[str, BandRule] = {}
        self.groups: dict[str, dict[str, str]] = {}
        self.banded = True
        self.strata: list[Stratum] = []
        self.stratum_map = np.zeros(1, dtype=np.int64)
        self.weighted_by = ""
        self.low_limit = 0.0
        self.ranges: dict[str, tuple[float, float]] = {}
        self.scale = 1.0
        self.scale_per_model: dict[str, float] = {}
        self.relativity = np.zeros(0)
        self.exposure = np.zeros(0)
        self.fitted_min = np.zeros(0)
        self.fitted_max = np.zeros(0)
        self.per_model: dict[str, np.ndarray] = {}
        self.unbanded_table: pa.Table | None = None
        self.statistics_from = "training histograms"

    # ------------------------------------------------------------------ identity
    @property
    def roles(self) -> list[str]:
        return list(dict.fromkeys(c.role for c in self.components))

    @property
    def stem(self) -> str:
        return file_stem(self.name)

    @property
    def n_cells(self) -> int:
        return sum(s.size for s in self.strata)

    # ------------------------------------------------------------------ fitted relativity
    def smooth(self, grid: dict) -> tuple[np.ndarray, dict[str, np.ndarray]]:
        """The fitted relativity exp(Σ f(x) − ref) at the inputs ``grid`` (numeric columns
        as arrays, level columns as lists of labels), and each model's own part."""
        logs: dict[str, np.ndarray] = {}
        for c in self.components:
            b, _ = c.fit.term(c.label)
            sub = {k: grid[k] for k in b.inputs}
            est = relativity_rows(c.fit, c.label, sub, {c.label: self.point})["estimate"]
            logs[c.role] = logs.get(c.role, 0.0) + est - c.ref
        parts = {role: np.exp(v) for role, v in logs.items()}
        return np.exp(sum(logs.values())), parts

    def smooth_from_terms(self, terms: dict[str, dict[str, np.ndarray]]
                          ) -> tuple[np.ndarray, dict[str, np.ndarray]]:
        """The same from scored term contributions: ``terms[role][label]`` (link scale)."""
        logs: dict[str, np.ndarray] = {}
        for c in self.components:
            logs[c.role] = logs.get(c.role, 0.0) + terms[c.role][c.label] - c.ref
        return np.exp(sum(logs.values())), {r: np.exp(v) for r, v in logs.items()}

    # ------------------------------------------------------------------ bands
    def set_strata(self, spec: BandSpec) -> None:
        """Strata from the level inputs and their groups (one per group or lone level)."""
        for col in self.level_inputs:
            self.groups[col] = spec.group_of(col)
            known = set(self.levels[col])
            unknown = sorted(set(self.groups[col]) - known)
            if unknown:
                raise SpecError(f"bands: {col!r} has no level(s) {unknown[:5]} (levels are "
                                f"{', '.join(self.levels[col][:8])}...)")
            for name, members in spec.groups.get(col, {}).items():
                if name in known and name not in members:
                    raise SpecError(f"bands: the group name {name!r} of {col!r} is also a "
                                    "level outside that group; rename the group")
        keyed: dict[tuple, list[tuple]] = {}
        for t in product(*(self.levels[c] for c in self.level_inputs)):
            key = tuple(self.groups[c].get(lv, lv) for c, lv in zip(self.level_inputs, t))
            keyed.setdefault(key, []).append(t)
        self.strata = [Stratum(k, m, []) for k, m in keyed.items()]
        sizes = [len(self.levels[c]) for c in self.level_inputs]
        self.stratum_map = np.full(int(np.prod(sizes)) if sizes else 1, -1, dtype=np.int64)
        for s, st in enumerate(self.strata):
            for t in st.members:
                idx = [self.level_index[c][lv] for c, lv in zip(self.level_inputs, t)]
                self.stratum_map[np.ravel_multi_index(idx, sizes) if sizes else 0] = s

    def choose_bands(self, spec: BandSpec, grid: dict, weight: np.ndarray, rel: np.ndarray,
                     low_limit: float) -> None:
        """Cut points of every numeric input in every stratum (see
        :mod:`tallgam.outputs.bands`). ``grid``: the training points as a product grid —
        ``weight`` and ``rel`` have shape (level tuples, values of each numeric input)."""
        k = len(self.numeric_inputs)
        tuples = list(product(*(self.levels[c] for c in self.level_inputs)))
        row = {t: i for i, t in enumerate(tuples)}
        for st in self.strata:
            members = [row[t] for t in st.members]
            w = weight[members]                      # (members, m1, ..., mk)
            r = rel[members]
            wsum = np.sum(w, axis=0)
            # the stratum's curve: exposure-weighted over its member levels
            rs = np.where(wsum > 0, np.sum(w * r, axis=0) / np.where(wsum > 0, wsum, 1.0),
                          np.mean(r, axis=0))
            st.cuts = []
            for d, col in enumerate(self.numeric_inputs):
                rule = self.rules[col]
                values = grid[col]
                if rule.method == "cuts":
                    st.cuts.append(np.asarray(rule.cuts, dtype=np.float64))
                elif rule.method == "each":
                    st.cuts.append(np.asarray(values[1:], dtype=np.float64))
                else:
                    tol = rule.tolerance if rule.tolerance is not None else spec.tolerance
                    low = rule.min_exposure if rule.min_exposure is not None else low_limit
                    margin_w = np.sum(np.moveaxis(wsum, d, 0).reshape(len(values), -1), axis=1)
                    if k == 1:
                        starts = fewest_bands(margin_w, rs, tol, low)
                    else:  # each margin keeps its spread within (1 + tol)^(1/k)
                        curves = np.moveaxis(rs, d, 0).reshape(len(values), -1)
                        starts = fewest_bands(margin_w, curves, (1.0 + tol) ** (1.0 / k) - 1.0,
                                              low)
                    st.cuts.append(bandlib.cuts_from_starts(values, starts))
            auto = [self.rules[c].method == "auto" for c in self.numeric_inputs]
            if k > 1 and all(auto):
                tol = min(self.rules[c].tolerance if self.rules[c].tolerance is not None
                          else spec.tolerance for c in self.numeric_inputs)
                st.cuts = bandlib.coarsened([grid[c] for c in self.numeric_inputs], st.cuts,
                                            wsum, rs, tol)
        offset = 0
        for st in self.strata:
            st.offset = offset
            offset += st.size

    def cells(self, cols: dict) -> np.ndarray:
        """Cell id (n,) of every row of ``cols`` (numeric columns as float arrays, level
        columns as Arrow or Python strings); −1 for unknown levels or missing values."""
        n = len(cols[next(iter(self.kinds))])
        if self.level_inputs:
            sizes = [len(self.levels[c]) for c in self.level_inputs]
            codes = [level_codes(cols[c], pa.array(self.levels[c], type=pa.string()))
                     for c in self.level_inputs]
            known = np.all([c >= 0 for c in codes], axis=0)
            flat = np.ravel_multi_index([np.maximum(c, 0) for c in codes], sizes)
            stratum = np.where(known, self.stratum_map[flat], -1)
        else:
            stratum = np.zeros(n, dtype=np.int64)
        if not self.numeric_inputs:
            offsets = np.array([st.offset for st in self.strata], dtype=np.int64)
            return np.where(stratum >= 0, offsets[np.maximum(stratum, 0)], -1)
        xs = [np.asarray(cols[c], dtype=np.float64) for c in self.numeric_inputs]
        stratum = np.where(np.all([np.isfinite(x) for x in xs], axis=0), stratum, -1)
        out = np.full(n, -1, dtype=np.int64)
        order = np.argsort(stratum, kind="stable")      # rows grouped by stratum
        bounds = np.searchsorted(stratum[order], np.arange(len(self.strata) + 1))
        for s, st in enumerate(self.strata):
            rows = order[bounds[s]:bounds[s + 1]]
            if len(rows):
                idx = [np.searchsorted(c, x[rows], side="right") for c, x in zip(st.cuts, xs)]
                out[rows] = st.offset + np.ravel_multi_index(idx, st.shape)
        return out

    def relativity_of(self, cells: np.ndarray) -> np.ndarray:
        """The tariff relativity of cells (NaN for −1)."""
        out = np.full(len(cells), np.nan)
        ok = cells >= 0
        out[ok] = self.relativity[cells[ok]]
        return out

    def lower_corners(self, cells: np.ndarray) -> dict:
        """Inputs at the lower corner of each cell (level inputs: its first member level),
        numeric values held inside the training range."""
        grid: dict = {c: [] for c in self.kinds}
        offsets = np.array([st.offset for st in self.strata])
        for cell in cells:
            st = self.strata[int(np.searchsorted(offsets, cell, side="right")) - 1]
            for c, lv in zip(self.level_inputs, st.members[0]):
                grid[c].append(lv)
            idx = np.unravel_index(cell - st.offset, st.shape) if st.cuts else ()
            for c, cuts, i in zip(self.numeric_inputs, st.cuts, idx):
                lo, hi = self.ranges[c]
                edge = cuts[i - 1] if i > 0 else lo
                grid[c].append(min(max(float(edge), lo), hi))
        return {c: (v if self.kinds[c] == "levels" else np.asarray(v, dtype=np.float64))
                for c, v in grid.items()}

    def finish(self, sums: CellSums, low_limit: float) -> None:
        """Band values from the summed training data: exposure-weighted means, the fitted
        relativity at the lower edge of empty cells, then divided by the reference cell."""
        self.scale, self.scale_per_model = 1.0, {}
        self.exposure = sums.weight.copy()
        mean, held = sums.means()
        self.fitted_min, self.fitted_max = sums.low.copy(), sums.high.copy()
        self.per_model = {r: m for r, m in sums.model_means().items()}
        empty = np.flatnonzero(~held)
        if len(empty):
            at, parts = self.smooth(self.lower_corners(empty))
            mean[empty] = at
            self.fitted_min[empty] = at
            self.fitted_max[empty] = at
            for r, v in parts.items():
                self.per_model[r][empty] = v
        self.relativity = mean
        self.low_limit = low_limit
        ref_cell = self.reference_cell()
        if ref_cell is not None:
            self.scale = float(mean[ref_cell])
            self.scale_per_model = {r: float(v[ref_cell]) for r, v in self.per_model.items()}
        self.relativity = mean / self.scale
        self.fitted_min = self.fitted_min / self.scale
        self.fitted_max = self.fitted_max / self.scale
        self.per_model = {r: v / self.scale_per_model.get(r, 1.0)
                          for r, v in self.per_model.items()}

    def reference_cell(self) -> int | None:
        """The cell holding the reference point, or None (a level input measured from the
        average level has no reference cell)."""
        point = self.point
        if any(v is None for v in point.values()):
            return None
        cols = {c: ([str(v)] if self.kinds[c] == "levels" else np.array([float(v)]))
                for c, v in point.items()}
        cell = int(self.cells(cols)[0])
        if cell < 0:
            raise SpecError(f"{self.name}: the reference point {point} is not a known level")
        return cell

    # ------------------------------------------------------------------ outputs
    def table(self) -> pa.Table:
        """One row per level (or level tuple) and band: see the docs' column list."""
        if not self.banded:
            return self.unbanded_table
        cols: dict[str, list] = {}
        for c in self.level_inputs:
            cols[c] = []
            if self.groups.get(c):
                cols[f"{c}_group"] = []
        for c in self.numeric_inputs:
            cols[f"{c}_from"], cols[f"{c}_to"] = [], []
        names = ["band", "relativity", "training_exposure", "low_exposure", "fitted_min",
                 "fitted_max"] + [f"relativity_{r}" for r in self.per_model
                                  if len(self.per_model) > 1]
        for n in names:
            cols[n] = []
        for st in self.strata:
            for t in st.members:
                for flat in range(st.size):
                    cell = st.offset + flat
                    idx = np.unravel_index(flat, st.shape) if st.cuts else ()
                    for c, lv, g in zip(self.level_inputs, t, st.key):
                        cols[c].append(lv)
                        if f"{c}_group" in cols:
                            cols[f"{c}_group"].append(g)
                    labels = list(st.key)
                    for c, cuts, i in zip(self.numeric_inputs, st.cuts, idx):
                        lo = float(cuts[i - 1]) if i > 0 else -np.inf
                        hi = float(cuts[i]) if i < len(cuts) else np.inf
                        cols[f"{c}_from"].append(lo)
                        cols[f"{c}_to"].append(hi)
                        labels.append(band_label(lo, hi))
                    cols["band"].append(" · ".join(labels))
                    cols["relativity"].append(float(self.relativity[cell]))
                    cols["training_exposure"].append(float(self.exposure[cell]))
                    cols["low_exposure"].append(bool(self.exposure[cell] < self.low_limit))
                    cols["fitted_min"].append(float(self.fitted_min[cell]))
                    cols["fitted_max"].append(float(self.fitted_max[cell]))
                    for r in self.per_model:
                        if f"relativity_{r}" in cols:
                            cols[f"relativity_{r}"].append(float(self.per_model[r][cell]))
        return pa.table(cols)

    def cell_table(self) -> pa.Table:
        """One row per cell (a grouped band once): ``cell``, ``band``, ``training_exposure``,
        ``relativity`` — what the cost of banding is tabulated by."""
        labels = []
        for st in self.strata:
            for flat in range(st.size):
                idx = np.unravel_index(flat, st.shape) if st.cuts else ()
                parts = list(st.key)
                for cuts, i in zip(st.cuts, idx):
                    parts.append(band_label(float(cuts[i - 1]) if i > 0 else -np.inf,
                                            float(cuts[i]) if i < len(cuts) else np.inf))
                labels.append(" · ".join(parts))
        return pa.table({"cell": np.arange(self.n_cells, dtype=np.int64), "band": labels,
                         "training_exposure": self.exposure, "relativity": self.relativity})

    def sql(self) -> str:
        """DuckDB SQL of the factor's relativity for one row (NULL for unknown levels)."""
        if not self.banded:
            parts = []
            for c in self.components:
                b, sl = c.fit.term(c.label)
                parts.append(b.sql(c.fit.coefficients_raw[sl]))
            ref = sum(c.ref for c in self.components)
            return f"exp(({' + '.join(parts)}) - {sqltext.num(ref)})"
        stratum_of = {t: s for s, st in enumerate(self.strata) for t in st.members}
        leaves: dict[int, str] = {}     # a group's members share one expression

        def over_levels(depth: int, prefix: tuple, tuples: list[tuple]) -> str:
            if depth == len(self.level_inputs):
                s = stratum_of[prefix]
                if s not in leaves:
                    leaves[s] = self._numeric_sql(self.strata[s], 0, ())
                return leaves[s]
            col = self.level_inputs[depth]
            by_level: dict[str, list[tuple]] = {}
            for t in tuples:
                by_level.setdefault(t[depth], []).append(t)
            labels = [lv for lv in self.levels[col] if lv in by_level]
            return sqltext.levels_case(col, labels, [over_levels(depth + 1, (*prefix, lv),
                                                                 by_level[lv])
                                                    for lv in labels], "NULL")

        return over_levels(0, (), list(stratum_of))

    def _numeric_sql(self, st: Stratum, d: int, idx: tuple) -> str:
        if d == len(self.numeric_inputs):
            flat = int(np.ravel_multi_index(idx, st.shape)) if idx else 0
            return sqltext.num(self.relativity[st.offset + flat])
        x = sqltext.column(self.numeric_inputs[d])
        leaves = [self._numeric_sql(st, d + 1, (*idx, i)) for i in range(st.shape[d])]
        return f"(CASE WHEN {x} IS NULL THEN NULL ELSE {choose_sql(x, st.cuts[d], leaves)} END)"

    def describe(self) -> dict:
        """The factor as the manifest records it."""
        out = {"name": self.name, "file": self.stem, "inputs": self.kinds,
               "terms": {c.role: c.label for c in self.components},
               "banded": self.banded, "weighted_by": self.weighted_by,
               "statistics_from": self.statistics_from}
        if self.numeric_inputs:
            out["bands"] = {c: self.rules[c].describe() for c in self.numeric_inputs}
        if any(self.groups.values()):
            out["groups"] = {c: g for c, g in self.groups.items() if g}
        if self.banded:
            out.update(cells=self.n_cells, low_exposure_limit=self.low_limit,
                       low_exposure_cells=int(np.sum(self.exposure < self.low_limit)),
                       reference_divisor=self.scale,
                       largest_deviation=self.largest_deviation())
        return out

    def curve(self) -> pa.Table | None:
        """For a banded factor of one numeric input: at every training value, the fitted
        relativity (measured like the bands, from the reference band) and the tariff's."""
        if not self.banded or self.level_inputs or len(self.numeric_inputs) != 1:
            return None
        c = self.numeric_inputs[0]
        p = self.components[0].fit.profile.numeric(c)
        x = np.asarray(p.values, dtype=np.float64)
        return pa.table({"value": x, "fitted": self.smooth({c: x})[0] / self.scale,
                         "tariff": self.relativity_of(self.cells({c: x})),
                         "training_exposure": np.asarray(p.mass, dtype=np.float64)})

    def largest_deviation(self) -> float:
        """max over bands of |fitted / band value − 1| (what the tolerance bounds)."""
        if not self.banded or not len(self.relativity):
            return 0.0
        hi = np.max(self.fitted_max / self.relativity - 1.0)
        lo = np.max(1.0 - self.fitted_min / self.relativity)
        return float(max(hi, lo, 0.0))


def band_label(lo: float, hi: float) -> str:
    """A readable band: ``[21, 25)``, ``< 21``, ``≥ 80`` or ``all``."""
    if np.isinf(lo) and np.isinf(hi):
        return "all"
    if np.isinf(lo):
        return f"< {hi:g}"
    if np.isinf(hi):
        return f"≥ {lo:g}"
    return f"[{lo:g}, {hi:g})"


def choose_sql(x: str, cuts: np.ndarray, leaves: list[str]) -> str:
    """SQL picking ``leaves[i]`` for x in band i (bands closed on the left at ``cuts``): a
    CASE for a few bands, a balanced tree of comparisons for many."""
    if len(leaves) == 1:
        return leaves[0]
    if len(leaves) <= FLAT_BANDS:
        whens = " ".join(f"WHEN {x} < {sqltext.num(c)} THEN {leaf}"
                         for c, leaf in zip(cuts, leaves[:-1]))
        return f"(CASE {whens} ELSE {leaves[-1]} END)"
    mid = len(leaves) // 2
    return (f"(CASE WHEN {x} < {sqltext.num(cuts[mid - 1])} THEN "
            f"{choose_sql(x, cuts[:mid - 1], leaves[:mid])} ELSE "
            f"{choose_sql(x, cuts[mid:], leaves[mid:])} END)")


# ---------------------------------------------------------------------------------------
# the tariff


@dataclass
class Tariff:
    """A banded rating tariff (see the module docstring). Build one with :func:`tariff`."""

    models: list[tuple[str, object]]          # (role, fit), the first giving the exposure
    sources: dict[str, str | None]            # role → model file, when read from one
    base_links: dict[str, float]              # role → link-scale value at the reference
    reference: dict                           # column → reference value (None: average)
    factors: dict[str, Factor] = field(default_factory=dict)
    spec: BandSpec = field(default_factory=BandSpec)

    @property
    def base_rate(self) -> float:
        """The rate per unit of exposure at the reference point (every factor's reference
        band), which every relativity multiplies."""
        return float(np.exp(sum(self.base_links.values()))
                     * np.prod([f.scale for f in self.factors.values()]))

    @property
    def columns(self) -> dict[str, str]:
        """Every rating factor's input column and its kind."""
        out: dict[str, str] = {}
        for f in self.factors.values():
            out.update(f.kinds)
        return out

    @property
    def tables(self) -> dict[str, pa.Table]:
        """One table per factor (see :meth:`Factor.table`)."""
        return {name: f.table() for name, f in self.factors.items()}

    @property
    def exposure_sql(self) -> str | None:
        """The first model's exposure, as SQL (None without one)."""
        return self.models[0][1].expressions.get("exposure")

    def to_sql(self, *, premium: bool = False) -> str:
        """One DuckDB SQL expression rating a row from the tariff alone: the rate per unit
        of exposure, or with ``premium=True`` the rate times the exposure."""
        parts = [sqltext.num(self.base_rate)] + [f.sql() for f in self.factors.values()]
        rate = "(" + "\n * ".join(parts) + ")"
        if not premium:
            return rate
        if self.exposure_sql is None:
            raise SpecError("the first model has no exposure; the premium is the rate")
        return f"({rate} * CAST({self.exposure_sql} AS DOUBLE))"

    def rate(self, data, *, where: str | None = None, batch_rows: int = 1_000_000
             ) -> np.ndarray:
        """The tariff's rate per unit of exposure for every row of ``data``, in row order."""
        from tallgam.outputs.banding_cost import tariff_rates

        return tariff_rates(self, data, where=where, batch_rows=batch_rows)[0]

    def factor_relativities(self, data, *, where: str | None = None,
                            batch_rows: int = 1_000_000) -> dict[str, np.ndarray]:
        """Every factor's tariff relativity for every row of ``data`` (row order)."""
        from tallgam.outputs.banding_cost import tariff_rates

        return tariff_rates(self, data, where=where, batch_rows=batch_rows)[1]

    def cost(self, data, *, where: str | None = None, actual: str | None = None,
             power: float | None = None, batch_rows: int = 1_000_000, progress=False,
             tuning=None):
        """The cost of banding on hold-out ``data``: Gini, deviance and actual/expected by
        band of the tariff next to the smooth model's, and the spread of the ratio of
        tariff to model premium (see :mod:`tallgam.outputs.banding_cost`)."""
        from tallgam.outputs.banding_cost import banding_cost

        return banding_cost(self, data, where=where, actual=actual, power=power,
                            batch_rows=batch_rows, progress=progress, tuning=tuning)

    # ------------------------------------------------------------------ text and files
    def summary(self) -> str:
        """A plain-text account: models, base rate, factors and their bands."""
        roles = ", ".join(f"{r} ({fit.model.family.name} of {fit.model.response})"
                          for r, fit in self.models)
        lines = [f"tallgam tariff · {roles}",
                 f"  base rate {self.base_rate:.6g} per unit of exposure at the reference point",
                 f"  tolerance ±{100 * self.spec.tolerance:g}% for automatic bands",
                 "", f"  {'factor':<28}{'bands':>7}{'low exp.':>10}{'max dev.':>10}  range"]
        for f in self.factors.values():
            if not f.banded:
                lines.append(f"  {f.name:<28}{'smooth':>7}")
                continue
            low = int(np.sum(f.exposure < f.low_limit))
            lines.append(f"  {f.name:<28}{f.n_cells:>7}{low:>10}"
                         f"{100 * f.largest_deviation():>9.2f}%  "
                         f"{np.min(f.relativity):.4g} – {np.max(f.relativity):.4g}")
        return "\n".join(lines)

    def manifest(self) -> dict:
        """What the tariff folder's ``manifest.json`` holds."""
        from tallgam.version import __version__

        models = []
        for role, fit in self.models:
            m = fit.model
            models.append({
                "role": role, "file": self.sources.get(role), "family": m.family.name,
                "link": m.link.name, "response": m.response, "exposure": m.exposure,
                "weights": m.weights, "where": m.where, "rows": fit.statistics["rows"],
                "fitted_at": fit.provenance.get("fitted_at"),
                "coefficients_sha256": hashlib.sha256(
                    np.ascontiguousarray(fit.coefficients_raw).tobytes()).hexdigest(),
                "base_rate_at_reference": float(np.exp(self.base_links[role])),
            })
        return {
            "format": FORMAT, "format_version": FORMAT_VERSION,
            "tallgam_version": __version__,
            "caution": CAUTION,
            "models": models,
            "rating": "rate per unit of exposure = base_rate × product of the factors' "
                      "relativities; premium = rate × exposure",
            "base_rate": self.base_rate,
            "exposure": self.exposure_sql,
            "reference": self.reference,
            "band_value": BAND_RULE_TEXT,
            "tolerance": self.spec.tolerance,
            "min_exposure": (self.spec.min_exposure if self.spec.min_exposure is not None
                             else f"{bandlib.MIN_EXPOSURE_SHARE:.0%} of each factor's "
                                  "training exposure"),
            "factors": [f.describe() for f in self.factors.values()],
            "files": {"sql": "tariff.sql", "premium_sql": "premium.sql"
                      if self.exposure_sql else None, "base": "base.csv"},
        }

    def write(self, folder, *, cost=None) -> list[str]:
        """Write the tariff folder (each file atomically); with ``cost`` (from
        :meth:`cost`) also the cost tables and the page ``cost.html``. Returns the paths."""
        import pyarrow.csv as pacsv
        import pyarrow.parquet as pq

        from tallgam.atomic import make_folder

        folder = make_folder(folder)
        earlier = written_before(folder)
        paths = []

        def put(name: str, payload) -> None:
            path = os.path.join(folder, name)
            write_output(path, payload)
            paths.append(path)

        for f in self.factors.values():
            table = f.table()
            put(f"{f.stem}.csv", table_bytes(table, pacsv.write_csv).decode("utf-8"))
            put(f"{f.stem}.parquet", table_bytes(table, pq.write_table))
        base = ["quantity,value", f"base_rate,{self.base_rate!r}"]
        base += [f"base_rate {r} at reference,{np.exp(v)!r}" for r, v in self.base_links.items()
                 if len(self.base_links) > 1]
        base += [f"reference {c},{v}" for c, v in self.reference.items()]
        put("base.csv", "\n".join(base) + "\n")
        put("tariff.sql", self.to_sql() + "\n")
        if self.exposure_sql:
            put("premium.sql", self.to_sql(premium=True) + "\n")
        manifest = self.manifest()
        if cost is not None:
            manifest["cost"] = cost.headline()
            for name, table in cost.named_tables().items():
                put(f"cost_{name}.csv", table_bytes(table, pacsv.write_csv).decode("utf-8"))
            page = cost_page(cost)
            if page is not None:
                put("cost.html", page)
        put("README.txt", readme_text(self))
        manifest["written"] = sorted(os.path.basename(p) for p in paths)
        put("manifest.json", json.dumps(clean_json(manifest), indent=1, allow_nan=False) + "\n")
        for name in earlier - set(manifest["written"]):  # an earlier tariff's, not rewritten
            if os.path.isfile(os.path.join(folder, name)):
                os.remove(os.path.join(folder, name))
        return paths


def written_before(folder: str) -> set[str]:
    """The files an earlier tariff wrote into ``folder`` (from its manifest), if any."""
    try:
        with open(os.path.join(folder, "manifest.json"), encoding="utf-8") as fh:
            old = json.load(fh)
    except (OSError, ValueError):
        return set()
    if not isinstance(old, dict) or old.get("format") != FORMAT:
        return set()
    return {os.path.basename(str(n)) for n in old.get("written", [])}


def cost_page(cost) -> str | None:
    """The HTML page of the cost of banding, or None (with a warning) without matplotlib."""
    import warnings

    try:
        import matplotlib  # noqa: F401
    except ImportError:
        warnings.warn(TallgamWarning("matplotlib is not installed: cost.html was not written "
                                     "(pip install 'tallgam[plot]'); the cost tables were"),
                      stacklevel=3)
        return None
    from tallgam.outputs.report import banding_page

    return banding_page(cost)


def readme_text(t: Tariff) -> str:
    """A short guide to the folder, with the cautions."""
    lines = [
        "tallgam tariff", "",
        f"Caution. {CAUTION}", "",
        "rate per unit of exposure = base rate × product of the factors' relativities;",
        "premium = rate × exposure. tariff.sql rates a row in DuckDB from the tariff alone"
        + (", premium.sql includes the exposure." if t.exposure_sql else "."),
        f"The base rate is {t.base_rate!r} (base.csv).", "",
        f"Band values: {BAND_RULE_TEXT}.",
        "Numeric bands are closed on the left: a row with x = from belongs to the band; the",
        "first and last bands extend to −inf and +inf. low_exposure marks bands with less",
        "training exposure than the tariff's minimum (manifest.json).", "",
        "Factors (one CSV and one Parquet table each):",
    ]
    for f in t.factors.values():
        kind = "smooth (not banded)" if not f.banded else f"{f.n_cells} bands"
        lines.append(f"  {f.stem}: {f.name}, {kind}")
    return "\n".join(lines) + "\n"


def table_bytes(table: pa.Table, writer) -> bytes:
    """A table written by ``writer`` (pyarrow CSV or Parquet) into memory."""
    buf = pa.BufferOutputStream()
    writer(table, buf)
    return buf.getvalue().to_pybytes()


def write_output(path: str, payload: str | bytes) -> None:
    """The one place tariff files are written: atomically (see :mod:`tallgam.atomic`)."""
    from tallgam.atomic import replacing, write_text

    if not isinstance(payload, bytes):
        write_text(path, payload)
        return
    with replacing(path) as tmp, open(tmp, "wb") as fh:
        fh.write(payload)


def clean_json(obj):
    """Numbers and containers JSON can hold (non-finite numbers as strings)."""
    if isinstance(obj, dict):
        return {str(k): clean_json(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [clean_json(v) for v in obj]
    if isinstance(obj, np.generic):
        obj = obj.item()
    if isinstance(obj, float) and not np.isfinite(obj):
        return str(obj)
    return obj


# ---------------------------------------------------------------------------------------
# building


def tariff(model, severity=None, *, bands=None, tolerance: float | None = None,
           min_exposure: float | None = None, reference: dict | None = None,
           training=None, batch_rows: int = 1_000_000, progress=False) -> Tariff:
    """A banded rating tariff from a log-link model, or the pure premium of a frequency
    ``model`` and a ``severity`` model.

    Parameters
    ----------
    model : FitResult or path of a model file
        The only model, or the frequency model (its exposure is the tariff's).
    severity : FitResult or path, optional
        A severity model; the tariff is then frequency × severity.
    bands : dict, path of a TOML file, or "auto" / "each" / "none", optional
        How to band each factor (see :mod:`tallgam.outputs.bands`); default automatic bands.
    tolerance : float, optional
        Automatic bands keep the fitted relativity within this share of the band's value
        (default 0.02, or the bands file's).
    min_exposure : float, optional
        Training exposure a band should hold (default 1% of the training exposure); bands
        below it are avoided where the tolerance allows, and flagged.
    reference : dict, optional
        Reference value per column (numeric value or level); default the first model's base
        levels and exposure-weighted medians.
    training : data source, optional
        The first model's training data (its ``where`` applies): band exposures and values
        are then summed over the training rows exactly, not read from the histograms.

    Returns
    -------
    Tariff
    """
    from tallgam.model import load

    given = [(r, m) for r, m in (("model", model), ("severity", severity)) if m is not None]
    if severity is not None:
        given[0] = ("frequency", model)
    fits, sources = [], {}
    for role, m in given:
        if isinstance(m, (str, os.PathLike)):
            sources[role] = os.fspath(m)
            m = load(m)
        else:
            sources[role] = None
        if not m.model.link.multiplicative:
            raise SpecError(f"the {role} model has the {m.model.link.name} link; a tariff "
                            "multiplies relativities, which needs the log link")
        fits.append((role, m))
    spec = band_spec(bands, tolerance=tolerance, min_exposure=min_exposure,
                     reference=reference)
    kinds = model_columns(fits)
    spec.check_columns(kinds)
    point = reference_point(fits, kinds, spec.reference)
    out = Tariff(models=fits, sources=sources, base_links={}, reference=point, spec=spec)
    for role, fit in fits:
        if "offset" in fit.expressions:
            import warnings

            warnings.warn(TallgamWarning(
                f"the {role} model has an offset ({fit.expressions['offset']}); the tariff's "
                "rate leaves it out, like the exposure"), stacklevel=2)
        out.base_links[role] = float(fit.coefficients_raw[fit.design.slices[0]][0])
        for b in fit.bases[1:]:
            key = frozenset(b.inputs)
            name = next((f.name for f in out.factors.values() if frozenset(f.kinds) == key),
                        None)
            comp = Component(role, fit, b.label, term_reference(fit, b.label, point))
            out.base_links[role] += comp.ref
            if name is None:
                factor_kinds = {c: k for c, k in b.spec.input_kinds().items() if k == "levels"}
                factor_kinds.update({c: k for c, k in b.spec.input_kinds().items()
                                     if k == "numeric"})
                name = b.inputs[0] if len(b.inputs) == 1 else b.title
                levels = {c: list(b.level_sets().get(c, [])) for c in factor_kinds
                          if factor_kinds[c] == "levels"}
                out.factors[name] = Factor(name, factor_kinds, [comp], levels, point)
            else:
                out.factors[name].components.append(comp)
    for f in out.factors.values():
        check_levels(f)
        prepare(f, spec)
    if training is not None:
        from tallgam.outputs.banding_cost import training_sums

        sums = training_sums(out, training, batch_rows=batch_rows, progress=progress)
        for name, s in sums.items():
            f = out.factors[name]
            f.statistics_from = "training data"
            f.finish(s, f.low_limit)
    return out


def model_columns(fits) -> dict[str, str]:
    """Every term input of the models, with its kind (SpecError when they disagree)."""
    kinds: dict[str, str] = {}
    for _, fit in fits:
        for b in fit.bases[1:]:
            for c, k in b.spec.input_kinds().items():
                if kinds.setdefault(c, k) != k:
                    raise SpecError(f"{c!r} is numeric in one model and a level column in the "
                                    "other; a tariff needs one kind per column")
    return kinds


def reference_point(fits, kinds: dict[str, str], given: dict) -> dict:
    """One reference value per column: the given ones, else the first model's (base
    levels, exposure-weighted medians), else the second's."""
    point: dict = {}
    for _, fit in reversed(fits):
        for ref in references(fit).values():
            point.update(ref)
    for c, v in given.items():
        if kinds[c] == "numeric":
            try:
                point[c] = float(v)
            except (TypeError, ValueError):
                raise SpecError(f"reference: {c!r} is numeric; give a number, got "
                                f"{v!r}") from None
        else:
            point[c] = str(v)
    return {c: point.get(c) for c in kinds}


def term_reference(fit, label: str, point: dict) -> float:
    """A term's link-scale value at the reference point (0 when a level input is measured
    from the average level)."""
    b, _ = fit.term(label)
    grid = {c: point.get(c) for c in b.inputs}
    if any(v is None for v in grid.values()):
        return 0.0
    kinds = b.spec.input_kinds()
    for c, k in kinds.items():
        if k == "levels" and str(grid[c]) not in b.level_sets().get(c, []):
            raise SpecError(f"reference: {grid[c]!r} is not a level of {c!r} in the {label} "
                            "term")
    cols = {c: ([str(grid[c])] if k == "levels" else np.array([float(grid[c])]))
            for c, k in kinds.items()}
    return float(relativity_rows(fit, label, cols, {label: grid})["estimate"][0])


def check_levels(f: Factor) -> None:
    """Every model of a factor must know every level the factor rates."""
    for c in f.level_inputs:
        for comp in f.components[1:]:
            b, _ = comp.fit.term(comp.label)
            known = set(b.level_sets().get(c, []))
            missing = [lv for lv in f.levels[c] if lv not in known]
            if missing:
                raise SpecError(
                    f"{f.name}: the {comp.role} model has no value for {len(missing)} level(s) "
                    f"of {c!r} that the {f.components[0].role} model rates (e.g. "
                    f"{missing[:5]}); both models of a pure premium need the same levels")


def factor_points(f: Factor) -> tuple[dict, np.ndarray, tuple[int, ...]]:
    """The training points of a factor as a product grid, from its first model's
    histograms: axes (level tuples, numeric values...), the weight of every point (product
    of the margins' shares for several inputs) and the grid's shape."""
    prof = f.components[0].fit.profile
    limit = MARGIN_VALUES if len(f.numeric_inputs) > 1 else None
    axes: dict = {}
    weights = []
    tuples = list(product(*(f.levels[c] for c in f.level_inputs)))
    lw = np.ones(len(tuples))
    total = None
    for i, c in enumerate(f.level_inputs):
        mass = prof.levels(c).mass_of(f.levels[c])
        total = float(np.sum(mass)) if total is None else total
        lw = lw * mass[[f.level_index[c][t[i]] for t in tuples]]
    weights.append(lw)
    for c in f.numeric_inputs:
        p = prof.numeric(c)
        p = p.compact(limit) if limit else p
        axes[c] = np.asarray(p.values, dtype=np.float64)
        f.ranges[c] = (float(p.min), float(p.max))
        total = float(np.sum(p.mass)) if total is None else total
        weights.append(np.asarray(p.mass, dtype=np.float64))
    shape = (len(tuples), *(len(axes[c]) for c in f.numeric_inputs))
    w = weights[0].reshape(-1, *([1] * len(f.numeric_inputs)))
    for d, m in enumerate(weights[1:]):
        w = w * m.reshape([1] + [-1 if j == d else 1 for j in range(len(f.numeric_inputs))])
    inputs = len(f.level_inputs) + len(f.numeric_inputs)
    if inputs > 1 and total:
        w = w / total ** (inputs - 1)
    axes["__tuples"] = tuples
    return axes, np.broadcast_to(w, shape).copy(), shape


def flat_points(f: Factor, axes: dict, shape: tuple[int, ...]) -> dict:
    """The product grid's points as columns (level inputs as lists)."""
    idx = np.indices(shape).reshape(len(shape), -1)
    cols: dict = {}
    tuples = axes["__tuples"]
    for i, c in enumerate(f.level_inputs):
        cols[c] = [tuples[k][i] for k in idx[0]]
    for d, c in enumerate(f.numeric_inputs):
        cols[c] = axes[c][idx[d + 1]]
    return cols


def prepare(f: Factor, spec: BandSpec) -> None:
    """Rules, strata, bands and (from the histograms) band values of a factor."""
    prof = f.components[0].fit.profile
    f.weighted_by = (f"the {f.components[0].role} model's training "
                     f"{prof.weight_name or 'rows'}")
    f.rules = {c: spec.rule(c) for c in f.numeric_inputs}
    f.banded = not any(r.method == "none" for r in f.rules.values())
    axes, weight, shape = factor_points(f)
    total = float(np.sum(weight))
    own = [r.min_exposure for r in f.rules.values() if r.min_exposure is not None]
    low = own[0] if own else (spec.min_exposure if spec.min_exposure is not None
                              else bandlib.MIN_EXPOSURE_SHARE * total)
    f.low_limit = low
    if not f.banded:
        b, _ = f.components[0].fit.term(f.components[0].label)
        grid = b.effect_grid(GRID_POINTS, prof)
        grid = {c: grid[c] for c in f.kinds}
        r, per = f.smooth(grid)
        table = {c: (pa.array(v, type=pa.string()) if isinstance(v, list) else v)
                 for c, v in grid.items()}
        table["relativity"] = r
        share = training_weight(prof, grid)
        if share is not None:
            table["training_exposure"] = share
        if len(per) > 1:
            table.update({f"relativity_{role}": v for role, v in per.items()})
        f.unbanded_table = pa.table(table)
        return
    cols = flat_points(f, axes, shape)
    rel, parts = f.smooth(cols)
    f.set_strata(spec)
    f.choose_bands(spec, axes, weight, rel.reshape(shape), low)
    sums = CellSums(f.n_cells, f.roles)
    sums.add(f.cells(cols), weight.ravel(), rel, parts)
    f.finish(sums, low)



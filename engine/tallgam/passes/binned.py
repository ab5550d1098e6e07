"""Binned data passes: covariate discretization, the passes on small tables of distinct
design rows.

Every term reads its row of the design from a few input columns. When each numeric input
takes a modest number of values, a term's row is one of a small table of distinct rows,
and a data row needs only one integer per term: its *code* into that table (Lang et al.
2014; Wood, Li, Shaddick & Augustin 2017). A pass then sums weights into cross-tables of
codes and multiplies the tables in afterwards:

    X_aᵀ W X_b = X̄_aᵀ C_ab X̄_b,   C_ab[j, k] = Σ wᵢ [code_a(i) = j][code_b(i) = k],

so a row costs one addition per pair of terms instead of one multiply-add per pair of
non-zeros, and the linear predictor is one table look-up per term.

* A numeric column of whole numbers spanning at most ``tuning.exact_span`` values is coded
  *exactly* (code = value − minimum): the fit is the exact-pass fit, up to rounding.
  Ages, years, bonus levels and counts are like this.
* Other numeric columns are *binned*: every value is replaced by the nearest of ``points``
  grid values (the distinct profile values if there are that few, else half of them at
  quantiles of the profile histogram and half evenly spread from minimum to maximum, so
  no gap exceeds twice the range over ``points``). The largest move of a value is
  reported per column; predictions, scoring and SQL export use the exact values.
* Level columns are coded by their levels; a term of several inputs (a surface, a curve
  per level, a curve times a multiplier) is coded by the combination of its inputs' codes.

A pair of terms whose cross-table would be large (``tuning.cell_limit`` cells) is summed with one
side's design row expanded instead (as many multiply-adds as that row has non-zeros), or
both (as the exact kernel does). The result is the same :class:`PassState`.
"""

from __future__ import annotations

import functools
import hashlib
from dataclasses import dataclass

import numpy as np

from tallgam.data.profile import DataProfile
from tallgam.errors import DataError, SpecError
from tallgam.options import DEFAULT_BIN_POINTS, MIN_BIN_POINTS, Tuning
from tallgam.passes import kernels
from tallgam.passes.design import Design
from tallgam.passes.state import SCALARS, PassState, ScalarSums, ordered_sum

CROSS, EXPAND_B, EXPAND_BOTH = 0, 1, 2


@dataclass
class ColumnGrid:
    """How one numeric column is coded: ``values`` (m,) the grid; exact or binned."""

    column: str
    values: np.ndarray
    exact: bool
    largest_move: float    # the largest |x − grid value| a row can see (0 when exact)

    def __post_init__(self):
        v = self.values
        self.mid = 0.5 * (v[1:] + v[:-1])
        buckets = 64 * len(v)
        span = float(v[-1] - v[0]) or 1.0
        self.scale = buckets / span
        starts = v[0] + np.arange(buckets) / self.scale
        self.lut = np.searchsorted(self.mid, starts).astype(np.int64)

    def codes(self, x: np.ndarray) -> np.ndarray:
        x = np.ascontiguousarray(x, dtype=np.float64)
        if self.exact:
            out = np.empty(len(x), dtype=np.int32)
            bad = kernels.whole_codes(x, float(self.values[0]), len(self.values), out)
            if bad:
                raise DataError(f"column {self.column!r} has {bad} value(s) in this batch "
                                f"outside the range its profile found ({self.values[0]:g} to "
                                f"{self.values[-1]:g}); the data changed during the fit: "
                                "fit again on a stable copy")
            return out
        out = np.empty(len(x), dtype=np.int32)
        kernels.grid_codes(x, self.mid, float(self.values[0]), self.scale, self.lut, out)
        return out

    def describe(self) -> str:
        if self.exact:
            return f"{self.column}: exact ({len(self.values)} whole values)"
        return (f"{self.column}: binned to {len(self.values)} values "
                f"(largest move {self.largest_move:.4g})")


def column_grid(column: str, profile: DataProfile, points: int, exact_span: int
                ) -> ColumnGrid:
    """The grid of a numeric column from its profile: exact when it holds whole numbers
    spanning at most ``exact_span`` values, else ``points`` values."""
    fp = profile.numeric(column)
    lo, hi = float(fp.min), float(fp.max)
    if fp.integer and hi - lo + 1 <= exact_span:
        return ColumnGrid(column, np.arange(lo, hi + 1.0), True, 0.0)
    if fp.values is not None and 0 < len(fp.values) <= points:
        values = np.unique(np.concatenate([fp.values.astype(np.float64), [lo, hi]]))
    elif fp.values is not None and len(fp.values):
        weight = fp.rows.astype(np.float64)
        cum = np.cumsum(weight) - 0.5 * weight
        half = points // 2   # quantiles where the rows are, an even spread for the tails
        q = np.interp(np.linspace(0, 1, half) * cum[-1], cum, fp.values)
        values = np.unique(np.concatenate([q, np.linspace(lo, hi, points - half)]))
    else:
        values = np.linspace(lo, hi, points)
    values = values[(values >= lo) & (values <= hi)]
    gaps = np.diff(values)
    move = float(0.5 * gaps.max()) if len(gaps) else 0.0
    # profile values are rounded to a few digits: a row may sit up to one rounding step off
    return ColumnGrid(column, values, False, move)


def _span(profile: DataProfile, column: str) -> int | None:
    """The number of whole values a whole-number column spans (None: not whole numbers)."""
    fp = profile.numeric(column)
    return int(fp.max - fp.min) + 1 if fp.integer else None


@dataclass
class Factor:
    """One term coded into a table of distinct design rows."""

    label: str
    start: int           # first raw coefficient
    n_raw: int
    m: int               # table rows (codes 0..m-1)
    level_term: bool     # a level term: the table is the identity
    table_idx: np.ndarray  # (m, width) raw column of each non-zero
    table_val: np.ndarray  # (m, width)

    def matrix(self) -> np.ndarray:
        """X̄ (m × n_raw): the table as a dense matrix."""
        out = np.zeros((self.m, self.n_raw))
        rows = np.repeat(np.arange(self.m), self.table_idx.shape[1])
        np.add.at(out, (rows, self.table_idx.ravel() - self.start), self.table_val.ravel())
        return out


class BinnedDesign:
    """A :class:`~tallgam.passes.design.Design` with every term coded into a table.

    Same interface as :class:`~tallgam.passes.design.Design` for a data pass
    (:meth:`read`, :meth:`pass_coefficients`, :meth:`predict`, :meth:`accumulator`)."""

    def __init__(self, design: Design, profile: DataProfile, points: int = DEFAULT_BIN_POINTS,
                 tuning: Tuning | None = None):
        if int(points) < MIN_BIN_POINTS:
            raise SpecError(f"binned passes need at least {MIN_BIN_POINTS} grid values per "
                            f"column, got {points}")
        tuning = tuning or Tuning()
        self.tuning = tuning
        self.design = design
        self.points = int(points)
        # one grid per (column, resolution): a column in a single-input term keeps the full
        # resolution; the inputs of a surface share tuning.table_rows table rows
        self.grids: dict[tuple[str, int, int], ColumnGrid] = {}
        self._grid_of: dict[tuple[str, str], tuple[str, int, int]] = {}
        for b in design.bases:
            numeric = [c for c, kind in self._inputs(b) if kind == "numeric"]
            plan = {c: (self.points, max(tuning.exact_span, self.points)) for c in numeric}
            if len(numeric) > 1:  # whole-number inputs stay exact if their table fits
                spans = {c: _span(profile, c) for c in numeric}
                exact = [c for c in numeric if spans[c] is not None]
                if np.prod([spans[c] for c in exact]) > tuning.table_rows:
                    exact = []
                room = tuning.table_rows / max(1, np.prod([spans[c] for c in exact]))
                binned = len(numeric) - len(exact)
                cap = max(MIN_BIN_POINTS, int(room ** (1.0 / max(binned, 1)) + 1e-9))
                plan = {c: (spans[c], spans[c]) if c in exact else (min(self.points, cap), 0)
                        for c in numeric}
            for c in numeric:
                points, span = plan[c]
                key = (c, points, span)
                if key not in self.grids:
                    self.grids[key] = column_grid(c, profile, points, span)
                self._grid_of[(b.label, c)] = key
        self.factors: list[Factor] = []
        for b, col0 in zip(design.dense_terms, design.dense_starts):
            self.factors.append(self._dense_factor(b, col0))
        for b, off in zip(design.level_terms, design.level_offsets):
            k = b.n_raw
            self.factors.append(Factor(b.label, design.pd + off, k, k, True,
                                       (design.pd + off + np.arange(k, dtype=np.int32))[:, None],
                                       np.ones((k, 1))))
        self._layout()

    # ------------------------------------------------------------------ coding
    def _inputs(self, b) -> list[tuple[str, str]]:
        return list(b.spec.input_kinds().items())

    def _dense_factor(self, b, col0: int) -> Factor:
        import pyarrow as pa

        inputs = self._inputs(b)
        sizes = []
        axes = []
        for c, kind in inputs:
            if kind == "numeric":
                axes.append(self.grids[self._grid_of[(b.label, c)]].values)
            else:
                axes.append(np.arange(len(b.level_sets()[c])))
            sizes.append(len(axes[-1]))
        m = int(np.prod(sizes)) if sizes else 1
        if m > np.iinfo(np.int32).max:
            raise SpecError(f"the term {b.label} has too many value combinations to "
                            "bin; lower the grid size given as binned=")
        mesh = np.meshgrid(*axes, indexing="ij") if axes else []
        cols = {}
        for (c, kind), grid in zip(inputs, mesh):
            flat = grid.ravel()
            cols[c] = (flat.astype(np.float64) if kind == "numeric"
                       else pa.array([b.level_sets()[c][i] for i in flat.astype(np.int64)],
                                     type=pa.string()))
        idx = np.empty((m, b.width), dtype=np.int32)
        val = np.empty((m, b.width), dtype=np.float64)
        b.encode(cols, idx, val, col0)
        return Factor(b.label, col0, b.n_raw, m, False, idx, val)

    def codes(self, cols: dict) -> np.ndarray:
        """Codes (F × n, uint16 or int32) of a batch's rows, one row per term (dense terms
        first)."""
        n = len(next(iter(cols.values()))) if cols else 0
        out = np.empty((len(self.factors), n), dtype=self.code_dtype)
        col_codes = {key: g.codes(cols[key[0]]) for key, g in self.grids.items()}
        f = 0
        for b in self.design.dense_terms:
            code = None
            for c, kind in self._inputs(b):
                if kind == "numeric":
                    key = self._grid_of[(b.label, c)]
                    size, part = len(self.grids[key].values), col_codes[key]
                else:
                    part = b.input_codes(cols, c)
                    _no_unknown(part, c)
                    size = len(b.level_sets()[c])
                code = part if code is None else code.astype(np.int64) * size + part
            out[f] = 0 if code is None else code
            f += 1
        for b in self.design.level_terms:
            lv = b.codes(cols)
            _no_unknown(lv, b.inputs[0])
            out[f] = lv
            f += 1
        return out

    @property
    def narrow_dtypes(self) -> list[np.dtype]:
        """Per term the narrowest unsigned type that holds its codes (for storage)."""
        out = []
        for f in self.factors:
            for t in (np.uint8, np.uint16, np.uint32):
                if f.m - 1 <= np.iinfo(t).max:
                    out.append(np.dtype(t))
                    break
        return out

    # ------------------------------------------------------------------ layout
    def _layout(self) -> None:
        F = len(self.factors)
        ms = [f.m for f in self.factors]
        self.code_dtype = (np.dtype(np.uint16) if max(ms, default=1) <= np.iinfo(np.uint16).max
                           else np.dtype(np.int32))
        self.vec_off = np.concatenate([[0], np.cumsum(ms)]).astype(np.int64)
        width = max(f.table_idx.shape[1] for f in self.factors)
        self.tab_off = self.vec_off[:-1].copy()
        total = int(self.vec_off[-1])
        self.tab_idx = np.zeros((total, width), dtype=np.int32)
        self.tab_val = np.zeros((total, width))
        for f, off in zip(self.factors, self.tab_off):
            w = f.table_idx.shape[1]
            self.tab_idx[off:off + f.m, :w] = f.table_idx
            self.tab_val[off:off + f.m, :w] = f.table_val
        self.tab_width = np.array([f.table_idx.shape[1] for f in self.factors], dtype=np.int64)
        self.f_start = np.array([f.start for f in self.factors], dtype=np.int64)
        pairs = []   # (mode, code side a, other side b, cells offset, stride)
        cells = 0
        for a in range(F):
            for b in range(a + 1, F):
                if self.factors[a].m == 1 or self.factors[b].m == 1:
                    continue  # a constant term (the intercept): from the per-code sums
                mode, ca, cb, size = self._pair_plan(a, b)
                stride = (self.factors[cb].m if mode == CROSS
                          else self.factors[cb].n_raw)
                pairs.append((mode, ca, cb, cells, stride))
                cells += size
        self.pairs = pairs
        self.cells = cells
        # stored rows are written in the order of the largest term's codes: the pairs with
        # that term then meet its table rows one after another
        big = int(np.argmax(ms)) if ms else 0
        self.sort_key = big if ms and ms[big] > 256 else None
        arr = np.array(pairs, dtype=np.int64).reshape(-1, 5)
        self.pair_mode, self.pair_a, self.pair_b = arr[:, 0].copy(), arr[:, 1].copy(), \
            arr[:, 2].copy()
        self.pair_off, self.pair_stride = arr[:, 3].copy(), arr[:, 4].copy()
        self._matrices: dict[int, np.ndarray] = {}

    def _pair_plan(self, a: int, b: int) -> tuple[int, int, int, int]:
        """How a pair of terms is summed: (mode, code side, other side, cells). The least
        work per row among the ways whose table fits ``tuning.cell_limit`` cells (so it
        stays in a core's cache while the rows stream past); when none fits, the smallest
        table. Two level terms always get a cross-table (the dense stage keeps it anyway)."""
        fa, fb = self.factors[a], self.factors[b]
        wa, wb = fa.table_idx.shape[1], fb.table_idx.shape[1]
        if fa.level_term and fb.level_term:
            return CROSS, a, b, fa.m * fb.m
        ways = [(1, fa.m * fb.m, CROSS, a, b)]
        if not fb.level_term:
            ways.append((wb, fa.m * fb.n_raw, EXPAND_B, a, b))
        if not fa.level_term:
            ways.append((wa, fb.m * fa.n_raw, EXPAND_B, b, a))
        if not (fa.level_term or fb.level_term):
            ways.append((wa * wb, fa.n_raw * fb.n_raw, EXPAND_BOTH, a, b))
        fits = [w for w in ways if w[1] <= self.tuning.cell_limit]
        work, size, mode, ca, cb = (min(fits) if fits
                                    else min(ways, key=lambda w: (w[1], w[0])))
        return mode, ca, cb, size

    def matrix(self, f: int) -> np.ndarray:
        if f not in self._matrices:
            self._matrices[f] = self.factors[f].matrix()
        return self._matrices[f]

    def __getstate__(self):  # tables are rebuilt cheaply; the dense matrices are not shipped
        state = dict(self.__dict__)
        state["_matrices"] = {}
        return state

    @functools.cached_property
    def fingerprint(self) -> str:
        """Identifies the coding (grids, levels, tables), e.g. to reuse cached codes."""
        h = hashlib.sha1()
        for g in self.grids.values():
            h.update(g.column.encode())
            h.update(g.values.tobytes())
        for f in self.factors:
            h.update(f.label.encode())
            h.update(f.table_idx.tobytes())
            h.update(f.table_val.tobytes())
        return h.hexdigest()

    def notes(self) -> list[str]:
        binned = [g.describe() for g in self.grids.values()]
        return ["binned passes: " + "; ".join(binned)] if binned else []

    def coarseness(self) -> dict[str, float]:
        """Per binned (not exactly coded) column, the largest move of a value as a share of
        the knot interval it lies in, over the terms that read the column: how much a row's
        design can change by binning (a cubic B-spline changes by at most about half this
        share of its height)."""
        out: dict[str, float] = {}
        for b in self.design.bases:
            for c, _kind in self._inputs(b):
                key = self._grid_of.get((b.label, c))
                if key is None or self.grids[key].exact:
                    continue
                v = self.grids[key].values
                knots = b.knots_along(c)
                if knots is None or len(knots) < 2 or len(v) < 2:
                    share = 0.0
                else:
                    mids = 0.5 * (v[1:] + v[:-1])
                    j = np.clip(np.searchsorted(knots, mids) - 1, 0, len(knots) - 2)
                    share = float(np.max(0.5 * np.diff(v) / np.diff(knots)[j]))
                out[c] = max(out.get(c, 0.0), share)
        return out

    @property
    def exact(self) -> bool:
        """True when every numeric input is coded exactly (the passes are exact)."""
        return all(g.exact for g in self.grids.values())


    # ------------------------------------------------------------------ pass interface
    def read(self, cols: dict):
        """A batch's rows as one block of codes (F × n)."""
        codes = self.codes(cols)
        yield slice(0, codes.shape[1]), codes

    def order(self, codes: np.ndarray) -> np.ndarray | None:
        """The order in which to keep a block's rows (by the largest term's codes, so that
        its pairs meet their table rows one after another), or None."""
        if self.sort_key is None or codes.shape[1] < 2:
            return None
        return np.argsort(codes[self.sort_key], kind="stable")

    def reordered(self, codes: np.ndarray, order: np.ndarray) -> np.ndarray:
        """A block's codes with its rows in ``order``."""
        return np.take(codes, order, axis=1)

    def pass_coefficients(self, beta: np.ndarray) -> np.ndarray:
        """Each term's value per code, flat (Σ m): X̄_f β_f."""
        out = np.empty(int(self.vec_off[-1]))
        for f, fac in enumerate(self.factors):
            b = beta[fac.start:fac.start + fac.n_raw]
            lo = self.vec_off[f]
            out[lo:lo + fac.m] = b if fac.level_term else self.matrix(f) @ b
        return out

    def predict(self, codes: np.ndarray, coef: np.ndarray, out: np.ndarray) -> None:
        kernels.binned_predictor(codes, coef, self.vec_off, out)

    def accumulator(self, threads: int, blas_width: int = 0) -> BinnedAccumulator:
        return BinnedAccumulator(self, threads)


def choose_passes(design: Design, profile: DataProfile, tuning: Tuning,
                  points: int | None) -> tuple[BinnedDesign | None, str]:
    """Binned or exact passes for a fit, and why. ``points`` None chooses: exact below
    ``tuning.binned_from_rows`` rows; binned when every numeric input is coded exactly
    (they are then exact too, and faster), or when rounding the continuous inputs to
    ``DEFAULT_BIN_POINTS`` (then up to ``tuning.max_bin_points``) grid values moves no
    value by more than ``tuning.bin_move_share`` of the knot interval it lies in; exact
    otherwise. A given number of points (binned=True or a number) is obeyed."""
    if points is not None:
        binned = BinnedDesign(design, profile, points, tuning)
        return binned, f"binned passes (asked for): {_coding(binned)}"
    rows = profile.rows
    if rows < tuning.binned_from_rows:
        return None, (f"exact passes, chosen automatically: {rows:,} rows (binned passes are "
                      f"chosen from {tuning.binned_from_rows:,})")
    n = DEFAULT_BIN_POINTS
    worst: tuple[str, float] = ("", 0.0)
    while True:
        binned = BinnedDesign(design, profile, n, tuning)
        if binned.exact:
            return binned, ("binned passes, chosen automatically: every numeric input takes "
                            "whole values, coded exactly (the passes are exact)")
        share = binned.coarseness()
        worst = max(share.items(), key=lambda kv: kv[1])
        if worst[1] <= tuning.bin_move_share:
            return binned, (f"binned passes, chosen automatically: {rows:,} rows; "
                            f"{_coding(binned)}; no value moves by more than "
                            f"{100 * worst[1]:.1f}% of its knot interval (bound "
                            f"{100 * tuning.bin_move_share:.0f}%)")
        if 2 * n > tuning.max_bin_points:
            break
        n *= 2
    return None, (f"exact passes, chosen automatically: binning {worst[0]!r} to {n} values "
                  f"would move values by up to {100 * worst[1]:.0f}% of a knot interval "
                  f"(bound {100 * tuning.bin_move_share:.0f}%)")


def _coding(binned: BinnedDesign) -> str:
    exact = [g.column for g in binned.grids.values() if g.exact]
    rounded = [f"{g.column} ({len(g.values)} values)" for g in binned.grids.values()
               if not g.exact]
    parts = []
    if exact:
        parts.append("exact: " + ", ".join(dict.fromkeys(exact)))
    if rounded:
        parts.append("rounded: " + ", ".join(rounded))
    return "; ".join(parts) if parts else "level inputs only"


def _no_unknown(codes: np.ndarray, column: str) -> None:
    if codes.size and codes.min() < 0:
        raise DataError(f"column {column!r} has {int(np.count_nonzero(codes < 0))} row(s) in "
                        "this batch with a level its profile did not find; the data changed "
                        "during the fit: fit again on a stable copy")


class BinnedAccumulator(ScalarSums):
    """Per-thread cross-tables for one pass; :meth:`finish` turns them into a PassState."""

    def __init__(self, dd: BinnedDesign, threads: int):
        self.dd = dd
        self.cells = np.zeros((threads, dd.cells))
        self.vec = np.zeros((threads, 3, int(dd.vec_off[-1])))
        self.scalars = dict.fromkeys(SCALARS, 0.0)

    def add(self, codes: np.ndarray, w: np.ndarray, r: np.ndarray, wc: np.ndarray) -> None:
        dd = self.dd
        kernels.accumulate_binned(codes, w, r, wc, dd.vec_off, dd.pair_mode, dd.pair_a,
                                    dd.pair_b, dd.pair_off, dd.pair_stride, dd.f_start,
                                    dd.tab_off, dd.tab_idx, dd.tab_val, dd.tab_width,
                                    self.cells, self.vec)


    def finish(self) -> PassState:
        dd = self.dd
        design = dd.design
        cells = ordered_sum(self.cells)
        vec = ordered_sum(self.vec)
        counts, sums, csums = vec
        pd = design.pd
        state = PassState.zeros(pd, design.level_sizes)
        n_dense = len(design.dense_terms)

        def per_code(f, v):
            lo = dd.vec_off[f]
            return v[lo:lo + dd.factors[f].m]

        def left(f, M):   # X̄_fᵀ M
            return M if dd.factors[f].level_term else dd.matrix(f).T @ M

        def put(a, b, block):  # block: raw columns of a × raw columns of b, a < b
            fa, fb = dd.factors[a], dd.factors[b]
            if a < n_dense and b < n_dense:
                state.dense[fa.start:fa.start + fa.n_raw, fb.start:fb.start + fb.n_raw] = block
                state.dense[fb.start:fb.start + fb.n_raw, fa.start:fa.start + fa.n_raw] = \
                    block.T
            elif b >= n_dense and a < n_dense:
                lb = fb.start - pd
                state.cross[lb:lb + fb.n_raw, fa.start:fa.start + fa.n_raw] = block.T
            else:
                state.pairs[(a - n_dense, b - n_dense)][...] = block

        F = len(dd.factors)
        for f, fac in enumerate(dd.factors):
            c = per_code(f, counts)
            if fac.level_term:
                lo = fac.start - pd
                state.diag[lo:lo + fac.n_raw] = c
            else:
                X = dd.matrix(f)
                state.dense[fac.start:fac.start + fac.n_raw,
                            fac.start:fac.start + fac.n_raw] = X.T @ (c[:, None] * X)
            state.rhs[fac.start:fac.start + fac.n_raw] = left(f, per_code(f, sums))
            state.colsum[fac.start:fac.start + fac.n_raw] = left(f, per_code(f, csums))
        for a in range(F):   # pairs with a constant term (the intercept): per-code counts
            for b in range(a + 1, F):
                fa, fb = dd.factors[a], dd.factors[b]
                if fa.m == 1 or fb.m == 1:
                    C = (per_code(b, counts)[None, :] if fa.m == 1
                         else per_code(a, counts)[:, None])
                    put(a, b, left(a, left(b, C.T).T))
        for mode, a, b, off, _ in dd.pairs:
            fa, fb = dd.factors[a], dd.factors[b]
            if mode == CROSS:
                C = cells[off:off + fa.m * fb.m].reshape(fa.m, fb.m)
                block = left(a, left(b, C.T).T)
            elif mode == EXPAND_B:
                H = cells[off:off + fa.m * fb.n_raw].reshape(fa.m, fb.n_raw)
                block = left(a, H)
            else:
                block = cells[off:off + fa.n_raw * fb.n_raw].reshape(fa.n_raw, fb.n_raw)
            if a < b:
                put(a, b, block)
            else:
                put(b, a, block.T)
        state.scalars = dict(self.scalars)
        return state


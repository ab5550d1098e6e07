"""The partial state of a data pass: additive sufficient statistics of the working model.

Everything the dense stage needs from the rows is a sum over rows, so partial states from
threads, batches, files or cluster workers combine with :meth:`PassState.merge` (a plain
sum). Matrices are kept in blocks so that level terms with many levels never need a dense
p × p array: the level block of XᵀWX is diagonal for one level term (a row hits one level).

All quantities are taken at the *anchor* β (the coefficients the pass was run with), in
residual form: with rᵢ = zᵢ − (ηᵢ − oᵢ) = (yᵢ − μᵢ) g'(μᵢ),

    A = XᵀWX,   u = XᵀW r,   e = rᵀW r,

so the working-model fit at any β is e − 2(β−β_a)ᵀu + (β−β_a)ᵀA(β−β_a), which avoids the
cancellation of forming zᵀWz for responses with a large mean.
"""

from __future__ import annotations

import functools
from dataclasses import dataclass, field, fields

import numpy as np

from tallgam.passes import kernels

SCALARS = (
    "rows",           # number of rows
    "weight",         # Σ prior weights
    "resid_ss",       # e = Σ W r²  (working model, at the anchor)
    "deviance",       # Σ w d(y, μ) at the anchor
    "pearson",        # Σ w (y − μ)² / V(μ) at the anchor
    "response_ss",    # Σ w (y − μ)² on the response scale
    "centred_ss",     # Σ w (y − c)², c the profile mean of the response
    "centred_sum",    # Σ w (y − c), to correct the above to the weighted mean
    "log_weight",     # Σ log w (gaussian log-likelihood)
    "loglik",         # Σ log f(yᵢ; μᵢ, φ/wᵢ) at the anchor, φ from the previous pass
    "null_deviance",  # Σ w d(y, μ₀) of the intercept-and-offset model at its anchor
    "null_weight",    # Σ W₀ of the null model's working weights
    "null_score",     # Σ W₀ r₀ of the null model's working residuals
    "loglik_lo",      # the log-likelihood at φ·e^(−δ) and φ·e^(+δ), to interpolate it
    "loglik_hi",      # to the final scale estimate (families whose density needs φ)
    "nuisance_score",  # d loglik / d log θ of a family's extra parameter (e.g. NB θ)
    "nuisance_info",  # its second derivative
    "invalid_rows",   # rows whose mean falls outside the family's range at the anchor
    "max_eta_change",  # max |η − η_previous| over rows (merged by max, not by sum)
)
MAX_SCALARS = frozenset({"max_eta_change"})
DENSE_ROWS = 4096  # rows made dense at a time for BLAS (a few MB)


@dataclass
class PassState:
    """Sums over rows for one working model. Shapes: pd dense columns, L level columns."""

    dense: np.ndarray          # (pd, pd) XᵀWX of the dense group, symmetric
    cross: np.ndarray          # (L, pd) level × dense
    diag: np.ndarray           # (L,) level block diagonal
    pairs: dict = field(default_factory=dict)  # (k, l) -> (L_k, L_l) between level terms
    rhs: np.ndarray = None     # (pd + L,) XᵀW r
    colsum: np.ndarray = None  # (pd + L,) Σ wc x (constraint weights: exposure or weight)
    scalars: dict = field(default_factory=dict)

    @classmethod
    def zeros(cls, pd: int, level_sizes: list[int]) -> PassState:
        L = sum(level_sizes)
        pairs = {}
        for a in range(len(level_sizes)):
            for b in range(a + 1, len(level_sizes)):
                pairs[(a, b)] = np.zeros((level_sizes[a], level_sizes[b]))
        return cls(dense=np.zeros((pd, pd)), cross=np.zeros((L, pd)), diag=np.zeros(L),
                   pairs=pairs, rhs=np.zeros(pd + L), colsum=np.zeros(pd + L),
                   scalars=dict.fromkeys(SCALARS, 0.0))

    def merge(self, other: PassState) -> PassState:
        """The sum of two partial states (a new object; neither input changes)."""
        out = {}
        for f in fields(self):
            a, b = getattr(self, f.name), getattr(other, f.name)
            if f.name == "scalars":
                out[f.name] = {k: (max(a[k], b[k]) if k in MAX_SCALARS else a[k] + b[k])
                               for k in a}
            elif isinstance(a, dict):
                out[f.name] = {k: a[k] + b[k] for k in a}
            else:
                out[f.name] = a + b
        return PassState(**out)

    @property
    def pd(self) -> int:
        return self.dense.shape[0]

    def gram(self, level_offsets: list[int], level_sizes: list[int],
             skip: int | None = None) -> np.ndarray:
        """The full (p × p) XᵀWX assembled from the blocks (for moderate p).

        With ``skip`` (the index of a level term) that term's rows and columns are left
        out: the result is (p − L_skip) square, in raw order without them.
        """
        pd = self.pd
        keep = [t for t in range(len(level_sizes)) if t != skip]
        offsets = _kept_offsets(level_sizes, skip)
        rows = _level_rows(level_offsets, level_sizes, keep)
        L = len(rows)
        out = np.zeros((pd + L, pd + L))
        out[:pd, :pd] = self.dense
        out[pd:, :pd] = self.cross[rows] if skip is not None else self.cross
        out[:pd, pd:] = out[pd:, :pd].T
        out[pd + np.arange(L), pd + np.arange(L)] = self.diag[rows]
        for (a, b), block in self.pairs.items():
            if skip in (a, b):
                continue
            ra = slice(pd + offsets[a], pd + offsets[a] + level_sizes[a])
            rb = slice(pd + offsets[b], pd + offsets[b] + level_sizes[b])
            out[ra, rb] = block
            out[rb, ra] = block.T
        return out

    def level_block(self, term: int, level_offsets: list[int], level_sizes: list[int]
                    ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """One level term's part of the normal equations, for eliminating it: its diagonal
        d (L,), its cross products with every other raw column C (L × (p − L), in the
        column order of ``gram(..., skip=term)``) and its right-hand side (L,)."""
        pd = self.pd
        rows = np.arange(level_offsets[term], level_offsets[term] + level_sizes[term])
        offsets = _kept_offsets(level_sizes, term)
        kept_levels = sum(level_sizes) - level_sizes[term]
        C = np.zeros((len(rows), pd + kept_levels))
        C[:, :pd] = self.cross[rows]
        for (a, b), block in self.pairs.items():
            if a == term:
                C[:, pd + offsets[b]:pd + offsets[b] + level_sizes[b]] = block
            elif b == term:
                C[:, pd + offsets[a]:pd + offsets[a] + level_sizes[a]] = block.T
        return self.diag[rows].copy(), C, self.rhs[pd + rows].copy()

    def to_dict(self) -> dict:
        """Plain arrays and numbers (for shipping between processes)."""
        d = {f.name: getattr(self, f.name) for f in fields(self)}
        d["pairs"] = {f"{a},{b}": v for (a, b), v in self.pairs.items()}
        return d


class ScalarSums:
    """The pass's scalar sums (:data:`SCALARS`), shared by every accumulator."""

    scalars: dict

    def add_scalars(self, **values: float) -> None:
        for k, v in values.items():
            if k in MAX_SCALARS:
                self.scalars[k] = max(self.scalars[k], float(v))
            else:
                self.scalars[k] += float(v)


class Accumulator(ScalarSums):
    """Per-thread accumulators for one pass; :meth:`finish` reduces them in thread order."""

    def __init__(self, pd: int, level_sizes: list[int], threads: int, blas_width: int = 4):
        L = sum(level_sizes)
        self.blas_width = blas_width
        self.rows_buffer = None
        self.gram = None
        self.level_sizes = level_sizes
        self.level_offsets = np.concatenate([[0], np.cumsum(level_sizes)[:-1]]).astype(np.int32)
        self.threads = threads
        self.dense = np.zeros((threads, pd, pd))
        self.cross = np.zeros((threads, L, pd))
        self.diag = np.zeros((threads, L))
        self.rhs_d = np.zeros((threads, pd))
        self.rhs_l = np.zeros((threads, L))
        self.col_d = np.zeros((threads, pd))
        self.col_l = np.zeros((threads, L))
        self.pairs = PassState.zeros(0, level_sizes).pairs
        self.scalars = dict.fromkeys(SCALARS, 0.0)

    def add(self, enc, w: np.ndarray, r: np.ndarray, wc: np.ndarray) -> None:
        """Add a block of encoded rows with working weights w, residuals r, constraint
        weights wc (all shape (n,); wc of length 0 when the column sums are not needed).

        The dense group's XᵀWX comes from BLAS on the rows made dense (√w·x, in blocks of
        ``DENSE_ROWS``) when the group is narrow enough for that to pay (pd ≤
        ``BLAS_WIDTH``·q), else from the sparse kernel."""
        blas = self.use_blas(enc.idx.shape[1])
        kernels.accumulate(enc.idx, enc.val, enc.lev, w, r, wc, self.dense, self.cross,
                           self.diag, self.rhs_d, self.rhs_l, self.col_d, self.col_l,
                           not blas)
        if blas:
            self._dense_by_blas(enc, w)
        for (a, b), out in self.pairs.items():
            kernels.accumulate_level_pair(enc.lev[:, a], enc.lev[:, b], self.level_offsets[a],
                                          self.level_offsets[b], w, out)

    def use_blas(self, q: int) -> bool:
        pd = self.dense.shape[1]
        return self.blas_width > 0 and 0 < pd <= self.blas_width * q

    def _dense_by_blas(self, enc, w: np.ndarray) -> None:
        from scipy.linalg.blas import dsyrk

        n = enc.idx.shape[0]
        pd = self.dense.shape[1]
        if self.rows_buffer is None:
            self.rows_buffer = np.empty((DENSE_ROWS, pd))
            self.gram = np.zeros((pd, pd), order="F")
        sw = np.sqrt(w)
        # one BLAS thread: these products are small, and BLAS threads spinning beside
        # numba's and other processes' made a pass 10-50 times slower (docs/performance.md)
        with blas_controller().limit(limits=1, user_api="blas"):
            for s in range(0, n, DENSE_ROWS):
                e = min(n, s + DENSE_ROWS)
                kernels.dense_rows(enc.idx[s:e], enc.val[s:e], sw[s:e], self.rows_buffer)
                # rows_buffer[:k].T is a Fortran-ordered pd × k matrix: Gram += X̃ᵀX̃
                self.gram = dsyrk(1.0, self.rows_buffer[:e - s].T, beta=1.0, c=self.gram,
                                  trans=0, lower=0, overwrite_c=1)

    def finish(self) -> PassState:
        dense = ordered_sum(self.dense)
        if self.gram is not None:
            dense += np.triu(self.gram)
        dense = dense + np.triu(dense, 1).T
        return PassState(
            dense=dense, cross=ordered_sum(self.cross), diag=ordered_sum(self.diag),
            pairs=self.pairs,
            rhs=np.concatenate([ordered_sum(self.rhs_d), ordered_sum(self.rhs_l)]),
            colsum=np.concatenate([ordered_sum(self.col_d), ordered_sum(self.col_l)]),
            scalars=dict(self.scalars))


def _kept_offsets(level_sizes: list[int], skip: int | None) -> dict[int, int]:
    """First column (within the level group) of every level term once ``skip`` is left out."""
    out, off = {}, 0
    for t, size in enumerate(level_sizes):
        if t != skip:
            out[t] = off
            off += size
    return out


def _level_rows(level_offsets: list[int], level_sizes: list[int], keep: list[int]
                ) -> np.ndarray:
    parts = [np.arange(level_offsets[t], level_offsets[t] + level_sizes[t]) for t in keep]
    return np.concatenate(parts) if parts else np.zeros(0, dtype=np.int64)


@functools.cache
def blas_controller():
    """The process's thread pools (threadpoolctl), found once: limiting them is then cheap."""
    from threadpoolctl import ThreadpoolController

    return ThreadpoolController()


def ordered_sum(per_thread: np.ndarray) -> np.ndarray:
    out = per_thread[0].copy()
    for t in range(1, per_thread.shape[0]):
        out += per_thread[t]
    return out

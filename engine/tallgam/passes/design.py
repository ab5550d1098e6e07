"""The design layout: where every term's coefficients live and how a batch is encoded.

Raw coefficients are ordered dense group first (intercept, splines, linear terms: columns
``0 .. pd-1``), then the level group (categoricals: ``pd .. pd+L-1``). A batch is encoded
block by block (``CHUNK_ROWS`` rows at a time, to bound the scratch memory) into the
sparse-row form the kernels read (see :mod:`tallgam.kernels`).
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass

import numpy as np
import pyarrow as pa

from tallgam.passes import kernels
from tallgam.terms.base import Basis

CHUNK_ROWS = 65_536


@dataclass
class Encoded:
    """One block of rows in kernel form: idx/val (n × q) dense non-zeros, lev (n × m)."""

    idx: np.ndarray
    val: np.ndarray
    lev: np.ndarray

    @property
    def rows(self) -> int:
        return self.idx.shape[0]


class Design:
    """Column layout of a list of bases (the intercept first)."""

    def __init__(self, bases: list[Basis]):
        self.bases = bases
        self.dense_terms = [b for b in bases if b.group == "dense"]
        self.level_terms = [b for b in bases if b.group == "levels"]
        self.pd = sum(b.n_raw for b in self.dense_terms)
        self.pl = sum(b.n_raw for b in self.level_terms)
        self.p = self.pd + self.pl
        self.q = sum(b.width for b in self.dense_terms)
        self.m = len(self.level_terms)
        self.slices: list[slice] = []  # raw coefficient range of each basis, in bases order
        self.level_offsets: list[int] = []
        d_off, l_off = 0, 0
        for b in bases:
            if b.group == "dense":
                self.slices.append(slice(d_off, d_off + b.n_raw))
                d_off += b.n_raw
            else:
                self.slices.append(slice(self.pd + l_off, self.pd + l_off + b.n_raw))
                self.level_offsets.append(l_off)
                l_off += b.n_raw

    @property
    def level_sizes(self) -> list[int]:
        """Levels of every level term, in order."""
        return [b.n_raw for b in self.level_terms]

    @property
    def dense_starts(self) -> list[int]:
        return [self.slices[i].start for i, b in enumerate(self.bases) if b.group == "dense"]

    @property
    def inputs(self) -> list[str]:
        """Distinct input columns, in first-use order."""
        seen: dict[str, None] = {}
        for b in self.bases:
            for c in b.inputs:
                seen.setdefault(c, None)
        return list(seen)

    def blocks(self, cols: dict) -> Iterator[tuple[slice, Encoded]]:
        """Encode the columns of one batch in blocks of at most CHUNK_ROWS rows."""
        n = _rows(cols)
        codes = []
        for b, off in zip(self.level_terms, self.level_offsets):
            c = b.codes(cols)
            codes.append(np.where(c >= 0, c + off, -1).astype(np.int32))
        for start in range(0, n, CHUNK_ROWS):
            stop = min(n, start + CHUNK_ROWS)
            part = {k: (v[start:stop] if isinstance(v, np.ndarray) else v) for k, v in cols.items()}
            yield slice(start, stop), self._encode_block(part, codes, start, stop)

    # the interface a data pass uses (shared with tallgam.passes.binned.BinnedDesign)
    def read(self, cols: dict) -> Iterator[tuple[slice, Encoded]]:
        """A batch's rows in the blocks the kernels take."""
        return self.blocks(cols)

    def order(self, enc: Encoded) -> None:
        """Rows keep their order (see :meth:`tallgam.passes.binned.BinnedDesign.order`)."""
        return None

    def pass_coefficients(self, beta: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """β split for the kernels: dense group, level group."""
        return (np.ascontiguousarray(beta[:self.pd]), np.ascontiguousarray(beta[self.pd:]))

    def predict(self, enc: Encoded, coef, out: np.ndarray) -> None:
        """out += X β for one block (``coef`` from :meth:`pass_coefficients`)."""
        kernels.linear_predictor(enc.idx, enc.val, enc.lev, coef[0], coef[1], out)

    def accumulator(self, threads: int, blas_width: int = 4):
        from tallgam.passes.state import Accumulator

        return Accumulator(self.pd, self.level_sizes, threads, blas_width)

    def _encode_block(self, cols, codes, start, stop) -> Encoded:
        n = stop - start
        idx = np.empty((n, self.q), dtype=np.int32)
        val = np.empty((n, self.q), dtype=np.float64)
        slot = 0
        for b, col0 in zip(self.dense_terms, self.dense_starts):
            b.encode(cols, idx[:, slot:slot + b.width], val[:, slot:slot + b.width], col0)
            slot += b.width
        lev = np.empty((n, self.m), dtype=np.int32)
        for k, c in enumerate(codes):
            lev[:, k] = c[start:stop]
        return Encoded(idx, val, lev)


def _rows(cols: dict) -> int:
    for v in cols.values():
        return len(v)
    return 0


def batch_columns(batch: pa.RecordBatch, level_names: set[str]) -> dict:
    """Arrow batch → dict of float64 numpy arrays (numeric) and Arrow arrays (levels)."""
    out = {}
    for name, col in zip(batch.schema.names, batch.columns):
        if name in level_names:
            out[name] = col
        else:
            out[name] = np.ascontiguousarray(
                col.to_numpy(zero_copy_only=False), dtype=np.float64)
    return out

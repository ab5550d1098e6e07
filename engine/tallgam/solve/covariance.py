"""The Bayesian covariance of the raw coefficients, dense or with one term kept structured.

A fit whose largest random effect was eliminated in the dense stage (see
:mod:`tallgam.dense`) never forms the L × L covariance of that term's levels. What
prediction and inference need is smaller: a row of data touches one level of the term, so
xᵀVx takes that level's variance and its covariances with the other ("kept") columns only.
:class:`Covariance` holds

* ``dense`` (k × k): the covariance of the kept raw columns ``kept`` (k of them, sorted);
* for the eliminated term (raw columns ``eliminated_columns``, L of them): ``diag`` (L,), the
  variances of its levels, and ``cross`` (L × k), their covariances with the kept columns.

Without an eliminated term ``dense`` is the whole p × p matrix. Covariances between two
levels of the eliminated term are not kept; a quantity that needs them raises.
"""

from __future__ import annotations

import base64

import numpy as np

from tallgam.errors import SpecError
from tallgam.passes import kernels


class Covariance:
    """Covariance of the p raw coefficients (raw order: dense group, then levels)."""

    def __init__(self, dense: np.ndarray, eliminated_columns: slice | None = None,
                 diag: np.ndarray | None = None, cross: np.ndarray | None = None):
        self.dense = np.asarray(dense, dtype=np.float64)
        if self.dense.ndim != 2 or self.dense.shape[0] != self.dense.shape[1]:
            raise ValueError(f"a covariance must be square, not of shape {self.dense.shape}")
        self.eliminated_columns = eliminated_columns
        if eliminated_columns is None:
            self.p = self.dense.shape[0]
            self.kept = np.arange(self.p)
            self.diag = self.cross = None
            return
        self.diag = np.asarray(diag, dtype=np.float64)
        self.cross = np.asarray(cross, dtype=np.float64)
        size = eliminated_columns.stop - eliminated_columns.start
        self.p = self.dense.shape[0] + size
        self.kept = np.concatenate([np.arange(eliminated_columns.start),
                                    np.arange(eliminated_columns.stop, self.p)])
        if self.diag.shape != (size,) or self.cross.shape != (size, len(self.kept)):
            raise ValueError(f"the eliminated term has {size} levels and {len(self.kept)} "
                             f"kept columns, but diag {self.diag.shape} and cross "
                             f"{self.cross.shape}")

    @property
    def structured(self) -> bool:
        return self.eliminated_columns is not None

    @property
    def shape(self) -> tuple[int, int]:
        return (self.p, self.p)

    def matrix(self) -> np.ndarray:
        """The p × p array (only when no term is eliminated)."""
        if self.structured:
            n = self.eliminated_columns.stop - self.eliminated_columns.start
            raise SpecError(f"the covariance of this fit is kept in structured form: its "
                            f"random effect with {n} levels was eliminated, and only the "
                            "variances of its levels and their covariances with the other "
                            "coefficients are stored (see fit.covariance)")
        return self.dense

    def diagonal(self) -> np.ndarray:
        """Variances of the p raw coefficients."""
        out = np.zeros(self.p)
        out[self.kept] = np.diag(self.dense)
        if self.structured:
            out[self.eliminated_columns] = self.diag
        return out

    def block(self, sl: slice) -> np.ndarray:
        """The dense covariance of the raw columns ``sl`` (a term's own block)."""
        if not self.structured:
            return self.dense[sl, sl]
        e = self.eliminated_columns
        if sl.start < e.stop and e.start < sl.stop:
            self.matrix()  # raises: the eliminated term has no dense block
        a = int(np.searchsorted(self.kept, sl.start))
        return self.dense[a:a + sl.stop - sl.start, a:a + sl.stop - sl.start]

    def term_variances(self, sl: slice, X: np.ndarray) -> np.ndarray:
        """diag(X V_sl Xᵀ) (n,) for rows X (n × |sl|) of the term with raw columns ``sl``.
        For the eliminated term the rows may have one non-zero each (a level's indicator)."""
        if self.structured and sl == self.eliminated_columns:
            nonzero = X != 0
            if np.any(np.count_nonzero(nonzero, axis=1) > 1):
                self.matrix()
            return np.sum(X * X * self.diag[None, :], axis=1)
        return np.einsum("ij,jk,ik->i", X, self.block(sl), X)

    def contrast_variance(self, a: np.ndarray) -> float:
        """aᵀVa for a contrast ``a`` (p,) of the raw coefficients; one that touches the
        eliminated term's levels may weight a single level only."""
        a = np.asarray(a, dtype=np.float64)
        out = float(a[self.kept] @ self.dense @ a[self.kept])
        if self.structured:
            ae = a[self.eliminated_columns]
            if np.count_nonzero(ae) > 1:
                self.matrix()  # raises: covariances between its levels are not kept
            out += float(ae @ (self.diag * ae)) + 2.0 * float(ae @ self.cross @ a[self.kept])
        return out

    def row_variances(self, enc, pd: int, out: np.ndarray) -> None:
        """out[i] = xᵢᵀVxᵢ for an encoded block of rows (see :mod:`tallgam.kernels`)."""
        if not self.structured:
            kernels.quadratic_form_rows(enc.idx, enc.val, enc.lev, pd, self.dense, out)
            return
        position = np.full(self.p, -1, dtype=np.int64)
        position[self.kept] = np.arange(len(self.kept))
        kernels.quadratic_form_rows_eliminated(
            enc.idx, enc.val, enc.lev, pd, position, self.dense, self.eliminated_columns.start,
            self.diag, self.cross, out)

    # ------------------------------------------------------------------ model file
    def to_dict(self) -> dict:
        out = {"dense": encode_array(self.dense), "eliminated": None}
        if self.structured:
            e = self.eliminated_columns
            out["eliminated"] = {"columns": [e.start, e.stop],
                                 "diag": encode_array(self.diag),
                                 "cross": encode_array(self.cross)}
        return out

    @classmethod
    def from_dict(cls, d: dict) -> Covariance:
        e = d.get("eliminated")
        if e is None:
            return cls(decode_array(d["dense"]))
        start, stop = (int(v) for v in e["columns"])
        return cls(decode_array(d["dense"]), slice(start, stop), decode_array(e["diag"]),
                   decode_array(e["cross"]))


def encode_array(a: np.ndarray) -> dict:
    """A float64 array as {"dtype", "shape", "base64"} (little-endian bytes: exact)."""
    a = np.ascontiguousarray(a, dtype="<f8")
    return {"dtype": "float64", "shape": list(a.shape),
            "base64": base64.b64encode(a.tobytes()).decode("ascii")}


def decode_array(d: dict) -> np.ndarray:
    """Inverse of :func:`encode_array`; ValueError when the parts do not agree."""
    if not isinstance(d, dict) or d.get("dtype") != "float64":
        raise ValueError("an array must be {'dtype': 'float64', 'shape': [...], 'base64': ...}")
    shape = tuple(int(s) for s in d["shape"])
    raw = base64.b64decode(d["base64"], validate=True)
    if len(raw) != 8 * int(np.prod(shape)):
        raise ValueError(f"an array of shape {list(shape)} holds {len(raw)} bytes")
    return np.frombuffer(raw, dtype="<f8").astype(np.float64).reshape(shape)

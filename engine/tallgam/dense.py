"""The dense stage's bookkeeping: identifiability constraints and the working problem.

Raw coefficients β (as the kernels see them) and free coefficients γ are linked by
β = Zγ with Z block diagonal, one block per term: a sum-to-zero null space for smooths
(Σᵢ wᵢ f(xᵢ) = 0 over the training rows, w the constraint weights), the base level
dropped for categoricals, identity elsewhere; a penalized term's free coordinates are
then turned to the eigenvectors of its penalty, null space first (:func:`penalty_coordinates`).
The constraint is fixed from the column sums of the first data pass and kept for every
later pass.
"""

from __future__ import annotations

import numpy as np
from scipy import linalg

from .design import Design
from .errors import FitError
from .smoothing import PenaltyBlock, WorkingProblem, null_eigenvalues
from .state import PassState


class Constraints:
    """Z and the penalties in free coordinates, for one design."""

    def __init__(self, design: Design, colsum: np.ndarray):
        self.design = design
        zs, penalties = [], []
        for b, sl in zip(design.bases, design.slices):
            z, mats = penalty_coordinates(b.constraint(colsum[sl]), b.penalties())
            if b.selection and mats:  # Marra & Wood (2011): penalize the null space too
                null = np.all(sum(np.abs(m) for m in mats) == 0, axis=0)
                if null.any():
                    mats = mats + [np.diag(null.astype(np.float64))]
            zs.append(z)
            penalties.append(mats)
        self.Z = linalg.block_diag(*zs) if zs else np.zeros((0, 0))
        # block_diag follows bases order; raw order is dense group first, then levels
        order = np.concatenate([np.arange(sl.start, sl.stop) for sl in design.slices])
        Z = np.zeros_like(self.Z)
        Z[order, :] = self.Z
        self.Z = Z
        self.free_slices: list[slice] = []
        off = 0
        for z in zs:
            self.free_slices.append(slice(off, off + z.shape[1]))
            off += z.shape[1]
        self.n_free = off
        self.blocks: list[PenaltyBlock] = []
        self.fixed: list[float | None] = []
        self.penalty_owner: list[int] = []  # basis index of every penalty
        first = 0
        for j, (b, mats, fsl) in enumerate(zip(design.bases, penalties, self.free_slices)):
            if not mats:
                continue
            self.blocks.append(PenaltyBlock(sl=fsl, matrices=mats, first=first))
            fixed = b.fixed_smoothing()
            self.fixed.extend(fixed + [None] * (len(mats) - len(fixed)))
            self.penalty_owner.extend([j] * len(mats))
            first += len(mats)

    def to_free(self, beta: np.ndarray) -> np.ndarray:
        return self.Z.T @ beta

    def to_raw(self, gamma: np.ndarray) -> np.ndarray:
        return self.Z @ gamma

    def raw_covariance(self, cov_free: np.ndarray) -> np.ndarray:
        return self.Z @ cov_free @ self.Z.T

    def problem(self, state: PassState, anchor_beta: np.ndarray, scale: float | None
                ) -> WorkingProblem:
        d = self.design
        gram = state.gram(_level_offsets(d), [b.n_raw for b in d.levels])
        A = self.Z.T @ gram @ self.Z
        u = self.Z.T @ state.rhs
        return WorkingProblem(A=0.5 * (A + A.T), u=u, e=state.scalars["resid_ss"],
                              anchor=self.to_free(anchor_beta), blocks=self.blocks,
                              n=state.scalars["rows"], scale=scale)

    def check_identifiable(self, problem: WorkingProblem) -> None:
        """FitError naming the terms involved when some coefficients are undetermined
        even with every penalty switched on (collinear columns, empty levels)."""
        A = problem.A
        S = np.zeros_like(A)
        for blk in self.blocks:
            a = np.linalg.norm(A[blk.sl, blk.sl]) or 1.0
            for m in blk.matrices:
                S[blk.sl, blk.sl] += m * (a / (np.linalg.norm(m) or 1.0))
        M = A + S
        d = np.sqrt(np.abs(np.diag(M)))
        bad_cols = np.flatnonzero(d == 0)
        d[d == 0] = 1.0
        vals, vecs = np.linalg.eigh(M / d[:, None] / d[None, :])
        null = vecs[:, vals < 1e-11 * max(vals.max(), 1e-300)]
        involved = set(int(np.argmax(np.abs(v))) for v in null.T) | set(bad_cols.tolist())
        if not involved:
            return
        names = sorted({self.design.bases[self._basis_of(i)].label for i in involved})
        raise FitError(
            f"{len(null.T) or len(bad_cols)} coefficient combination(s) cannot be determined "
            f"from the data, involving {', '.join(names)}: the columns are collinear with "
            "other terms or a level has no rows. Remove or merge the terms named.")

    def _basis_of(self, free_index: int) -> int:
        for j, sl in enumerate(self.free_slices):
            if sl.start <= free_index < sl.stop:
                return j
        return 0


def penalty_coordinates(z: np.ndarray, penalties: list[np.ndarray]
                        ) -> tuple[np.ndarray, list[np.ndarray]]:
    """Turn a term's free coordinates to the eigenvectors of its total penalty, null space
    first, and give its penalties in them with exact zeros on the null space.

    Returns (z·V, [Vᵀ(zᵀS_k z)V]). In raw coordinates a penalty's null space is only null
    to rounding, eps·‖S‖; times a large λ that error swamps the data term along the null
    space (a nearly straight smooth: its λ heads for the bound) and makes D_p, the REML
    score and its gradient noise. With the null space split off exactly, H = A + S_λ
    keeps A alone there, and the Jacobi-scaled factorisation stays accurate for any λ.
    """
    if not penalties:
        return z, []
    mats = [z.T @ s @ z for s in penalties]
    total = sum(m / max(np.abs(m).max(), 1e-300) for m in mats)
    vals, vecs = np.linalg.eigh(0.5 * (total + total.T))  # ascending: null space first
    k = int(np.sum(null_eigenvalues(vals)))
    rng = vecs[:, k:]
    out = []
    for m in mats:
        r = rng.T @ m @ rng
        r = np.diag(np.diag(r)) if len(mats) == 1 else 0.5 * (r + r.T)
        full = np.zeros_like(m)
        full[k:, k:] = r
        out.append(full)
    return z @ vecs, out


def _level_offsets(d: Design) -> list[int]:
    return list(d.level_offsets)


def require_positive_weight(state: PassState) -> None:
    if state.scalars["rows"] <= 0:
        raise FitError("no rows reached the fit (check the where filter)")

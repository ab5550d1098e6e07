"""The dense stage's bookkeeping: identifiability constraints and the working problem.

Raw coefficients β (as the kernels see them) and free coefficients γ are linked by
β = Zγ with Z block diagonal, one block per term: a sum-to-zero null space for smooths
(Σᵢ wᵢ f(xᵢ) = 0 over the training rows, w the constraint weights), the base level
dropped for categoricals, identity elsewhere; a penalized term's free coordinates are
then turned to the eigenvectors of its penalty, null space first (:func:`penalty_coordinates`).
The constraint is fixed from the column sums of the first data pass and kept for every
later pass. A random effect with many levels is left out of Z and eliminated from the
working problem by its Schur complement (see :mod:`tallgam.smoothing`).
"""

from __future__ import annotations

import numpy as np
from scipy import linalg

from tallgam.errors import FitError, OutOfMemoryError
from tallgam.options import Tuning
from tallgam.passes.design import Design
from tallgam.passes.state import PassState
from tallgam.solve.covariance import Covariance
from tallgam.solve.smoothing import (
    EliminatedBlock,
    PenaltyBlock,
    Solution,
    WorkingProblem,
    null_eigenvalues,
)


class Constraints:
    """Z and the penalties in free coordinates, for one design.

    The largest random effect with at least ``eliminate_from`` levels (None: the default
    of :class:`tallgam.options.Tuning`; 0: never) is *eliminated*: its free coefficients are
    its raw ones (Z_e = I, penalty λ·I), they come last in free coordinates and its λ last, and the
    working problem carries it as an :class:`EliminatedBlock`, so nothing of size L × L is
    formed. ``Z`` then maps the ``kept`` raw columns to the kept free ones. GCV and UBRE
    work on the full problem, so only REML and fixed smoothing eliminate.
    """

    def __init__(self, design: Design, colsum: np.ndarray, criterion: str = "reml",
                 eliminate_from: int | None = None):
        self.design = design
        if eliminate_from is None:
            eliminate_from = Tuning().eliminate_levels
        self.eliminated_term = (_eliminated_basis(design, eliminate_from)
                           if criterion in ("reml", "fixed") else None)
        kept_bases = [j for j in range(len(design.bases)) if j != self.eliminated_term]
        zs, penalties = {}, {}
        for j in kept_bases:
            b, sl = design.bases[j], design.slices[j]
            z, mats = penalty_coordinates(b.constraint(colsum[sl]), b.penalties())
            if b.removable and mats:  # Marra & Wood (2011): penalize the null space too
                null = np.all(sum(np.abs(m) for m in mats) == 0, axis=0)
                if null.any():
                    mats = mats + [np.diag(null.astype(np.float64))]
            zs[j] = z
            penalties[j] = mats
        # block_diag follows bases order; raw order is dense group first, then levels
        order = np.concatenate([np.arange(design.slices[j].start, design.slices[j].stop)
                                for j in kept_bases]).astype(np.int64)
        self.kept = np.sort(order)
        Z = np.zeros((len(order), sum(z.shape[1] for z in zs.values())))
        Z[np.searchsorted(self.kept, order), :] = (
            linalg.block_diag(*zs.values()) if zs else np.zeros((0, 0)))
        self.Z = Z
        self.free_slices: list[slice] = [slice(0, 0)] * len(design.bases)
        off = 0
        for j in kept_bases:
            self.free_slices[j] = slice(off, off + zs[j].shape[1])
            off += zs[j].shape[1]
        self.n_kept = off
        if self.eliminated_term is not None:
            size = design.bases[self.eliminated_term].n_raw
            self.free_slices[self.eliminated_term] = slice(off, off + size)
            off += size
        self.n_free = off
        self.blocks: list[PenaltyBlock] = []
        self.fixed: list[float | None] = []  # given λ, in the internal units of penalties
        self.penalty_owner: list[int] = []  # basis index of every penalty
        self.penalty_exponents: list[int] = []  # user-unit λ = 2**e × internal λ
        first = 0
        for j in kept_bases:
            b, mats = design.bases[j], penalties[j]
            if not mats:
                continue
            self.blocks.append(PenaltyBlock(sl=self.free_slices[j], matrices=mats, first=first))
            exps = b.penalty_exponents()
            exps = exps + [0] * (len(mats) - len(exps))   # e.g. a removable term's extra one
            fixed = b.fixed_smoothing()
            fixed = fixed + [None] * (len(mats) - len(fixed))
            self.fixed.extend(None if v is None else float(np.ldexp(v, e))
                              for v, e in zip(fixed, exps))
            self.penalty_exponents.extend(exps)
            self.penalty_owner.extend([j] * len(mats))
            first += len(mats)
        if self.eliminated_term is not None:
            # its penalties() would be an L × L identity: only its fixed λ is asked for
            self.fixed.extend(design.bases[self.eliminated_term].fixed_smoothing())
            self.penalty_exponents.append(0)
            self.penalty_owner.append(self.eliminated_term)
        from tallgam.solve.shapes import ShapeConstraints

        self.shapes = ShapeConstraints(self)

    def user_smoothing(self, lam) -> list[float]:
        """λ as users read them (see :meth:`tallgam.terms.base.Basis.penalty_exponents`),
        from the internal ones; beyond double precision they show as 0 or inf."""
        with np.errstate(over="ignore", under="ignore"):
            return [float(np.ldexp(v, -e)) for v, e in zip(lam, self.penalty_exponents)]

    @property
    def eliminated_columns(self) -> slice | None:
        """Raw columns of the eliminated term (None when nothing is eliminated)."""
        return None if self.eliminated_term is None else self.design.slices[self.eliminated_term]

    def to_free(self, beta: np.ndarray) -> np.ndarray:
        if self.eliminated_term is None:
            return self.Z.T @ beta
        return np.concatenate([self.Z.T @ beta[self.kept], beta[self.eliminated_columns]])

    def to_raw(self, gamma: np.ndarray) -> np.ndarray:
        if self.eliminated_term is None:
            return self.Z @ gamma
        beta = np.zeros(self.design.p)
        beta[self.kept] = self.Z @ gamma[:self.n_kept]
        beta[self.eliminated_columns] = gamma[self.n_kept:]
        return beta

    def covariance(self, sol: Solution, scale: float) -> Covariance:
        """The Bayesian covariance φ·ZH⁻¹Zᵀ of the raw coefficients; with an eliminated
        term only its diagonal and its cross block with the kept columns."""
        kept = self.Z @ (sol.H_inv * scale) @ self.Z.T
        if self.eliminated_term is None:
            return Covariance(kept)
        inv = sol.eliminated_inverse  # H⁻¹_ek = −GM⁻¹, and Z_e = I
        return Covariance(kept, eliminated_columns=self.eliminated_columns,
                          diag=scale * inv.diagonal(), cross=-scale * (inv.GMi @ self.Z.T))

    def penalty_value(self, lam, beta: np.ndarray) -> float:
        """βᵀS_λβ, formed block by block in free coordinates, where each single penalty is
        diagonal: a sum of non-negative terms, accurate even when λ is near its bound (the
        same product in raw coordinates cancels to a few digits)."""
        if lam is None or len(lam) == 0:
            return 0.0
        gamma = self.to_free(beta)
        total = 0.0
        for blk in self.blocks:
            g = gamma[blk.sl]
            for j, m in enumerate(blk.matrices):
                total += lam[blk.first + j] * float(g @ m @ g)
        if self.eliminated_term is not None:
            g = gamma[self.n_kept:]
            total += lam[-1] * float(g @ g)
        return total

    def problem(self, state: PassState, anchor_beta: np.ndarray, scale: float | None
                ) -> WorkingProblem:
        """The working model of a pass in free coordinates. The pass ran at
        ``anchor_beta``; when that lies outside the constrained space (the start from a fit
        to a sample of the rows, whose constraints differ a little), the model is moved to
        its projection Z Zᵀβ, exactly: the part δ outside adds Aδ to the right-hand side."""
        d = self.design
        offsets, sizes = list(d.level_offsets), d.level_sizes
        anchor = self.to_free(anchor_beta)
        delta = anchor_beta - self.to_raw(anchor)
        moved = bool(np.any(delta != 0.0))
        if self.eliminated_term is None:
            gram = state.gram(offsets, sizes)
            rhs, e = state.rhs, state.scalars["resid_ss"]
            if moved:
                g = gram @ delta
                rhs, e = rhs + g, e + 2.0 * float(delta @ state.rhs) + float(delta @ g)
            A = self.Z.T @ gram @ self.Z
            return WorkingProblem(A=0.5 * (A + A.T), u=self.Z.T @ rhs, e=e, anchor=anchor,
                                  blocks=self.blocks, n=state.scalars["rows"], scale=scale)
        term = d.level_terms.index(d.bases[self.eliminated_term])
        gram = state.gram(offsets, sizes, skip=term)
        diag, cross, rhs_e = state.level_block(term, offsets, sizes)
        rhs, e = state.rhs[self.kept], state.scalars["resid_ss"]
        if moved:  # δ is zero on the eliminated term (its Z is the identity)
            dk = delta[self.kept]
            g = gram @ dk
            ce = cross @ dk
            e = e + 2.0 * float(dk @ rhs) + float(dk @ g)
            rhs, rhs_e = rhs + g, rhs_e + ce
        A = self.Z.T @ gram @ self.Z
        block = EliminatedBlock(d=diag, C=cross @ self.Z, u=rhs_e, anchor=anchor[self.n_kept:],
                                index=len(self.fixed) - 1)
        return WorkingProblem(A=0.5 * (A + A.T), u=self.Z.T @ rhs, e=e,
                              anchor=anchor[:self.n_kept], blocks=self.blocks,
                              n=state.scalars["rows"], scale=scale, eliminated_block=block)

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
        el = problem.eliminated_block
        if el is not None:  # its ridge makes it determined: check the Schur complement
            h = el.d + (np.linalg.norm(el.d) or 1.0) / np.sqrt(el.size)
            M = M - el.C.T @ (el.C / h[:, None])
        d = np.sqrt(np.abs(np.diag(M)))
        bad_cols = np.flatnonzero(d == 0)
        d[d == 0] = 1.0
        vals, vecs = np.linalg.eigh(M / d[:, None] / d[None, :])
        null = vecs[:, vals < 1e-11 * max(vals.max(), 1e-300)]
        involved = set(bad_cols.tolist())
        for v in null.T:  # every coefficient that carries a real share of the combination
            involved |= set(np.flatnonzero(np.abs(v) > 0.1 * np.abs(v).max()).tolist())
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


def _eliminated_basis(design: Design, eliminate_from: int | None) -> int | None:
    """Index of the largest random effect with at least ``eliminate_from`` levels."""
    if not eliminate_from:
        return None
    sizes = {j: b.n_raw for j, b in enumerate(design.bases)
             if b.eliminable and b.n_raw >= eliminate_from}
    return max(sizes, key=sizes.get) if sizes else None


def planned_bytes(design: Design, criterion: str, tuning: Tuning, threads: int) -> dict:
    """Bytes a fit of ``design`` will hold, by part: the per-thread accumulators of a data
    pass (dense block, level-by-dense cross products, level pairs) and the dense stage
    (about eight p_k × p_k arrays for the kept coefficients p_k: the working matrix, its
    factor and inverse, the constraint, eigenvectors and the covariance)."""
    pd = design.pd
    sizes = design.level_sizes
    L = sum(sizes)
    pairs = sum(a * b for i, a in enumerate(sizes) for b in sizes[i + 1:])
    eliminated = (_eliminated_basis(design, tuning.eliminate_levels)
                  if criterion in ("reml", "fixed") else None)
    kept = design.p - (design.bases[eliminated].n_raw if eliminated is not None else 0)
    elim_bytes = 0
    if eliminated is not None:   # its cross products with the kept columns, a few copies
        elim_bytes = 4 * 8 * design.bases[eliminated].n_raw * kept
    return {"passes": 8 * threads * (pd * pd + L * pd + pairs + 4 * (pd + L)),
            "dense stage": 8 * 8 * kept * kept + elim_bytes}


def check_memory(design: Design, criterion: str, tuning: Tuning, threads: int) -> None:
    """OutOfMemoryError, before any data pass, when the model's normal equations and dense
    stage would not fit in ``tuning.memory_bytes()``; the message names the largest terms
    and what to do."""
    need = planned_bytes(design, criterion, tuning, threads)
    limit = tuning.memory_bytes()
    total = sum(need.values())
    if total <= limit:
        return
    big = sorted(design.bases[1:], key=lambda b: -b.n_raw)[:3]
    named = ", ".join(f"{b.label} ({b.n_raw:,} coefficients)" for b in big)
    advice = []
    if any(b.group == "levels" and not b.eliminable for b in big):
        advice.append("give a level column with many levels as tg.random_effect (its block is "
                      "eliminated: memory grows with its levels, not their square) or group "
                      "its levels in SQL")
    if any(b.group == "dense" for b in big):
        advice.append("lower the size of large smooth terms")
    advice.append("use fewer threads" if need["passes"] > need["dense stage"] else
                  "or raise tuning memory_limit on a machine with more memory")
    parts = ", ".join(f"{k} {v / 2**30:,.1f} GiB" for k, v in need.items())
    raise OutOfMemoryError(
        f"the model has {design.p:,} coefficients and would need about "
        f"{total / 2**30:,.1f} GiB ({parts}), more than the {limit / 2**30:,.1f} GiB it may "
        f"use; the largest terms: {named}. " + "; ".join(advice) + ".")

"""Shape constraints (a monotone or convex spline) imposed in the dense stage.

A term with a shape offers linear inequalities Cβ ≥ 0 on its raw coefficients
(:meth:`tallgam.terms.base.Basis.shape_rows`). They are imposed on the penalized working
model by the asymmetric penalty of Bollaerts, Eilers & van Mechelen (2006):
κ·Σ v_j (C γ)_j² with v_j = 1 where the constraint is broken, re-solved until the set of
broken constraints settles. Here κ → ∞ is taken exactly (the set found is imposed as
equalities, an H-metric projection of the unconstrained solution), so the fitted curve keeps
its shape on any grid, not just approximately. The smoothing parameters are those chosen
without the constraint; inference (covariance, EDF) is conditional on the active
constraints. Everything acts on coefficients only, so it costs no data pass.
"""

from __future__ import annotations

import numpy as np

from tallgam.solve.smoothing import Solution, WorkingProblem

MAX_ROUNDS = 200


class ShapeConstraints:
    """The shape inequalities of a design, in free coordinates of the kept block."""

    def __init__(self, constraints):
        design = constraints.design
        self.rows: list[np.ndarray] = []
        for j, b in enumerate(design.bases):
            rows = b.shape_rows()
            if rows is None:
                continue
            raw = design.slices[j]
            free = constraints.free_slices[j]
            z = constraints.Z[np.searchsorted(constraints.kept, np.arange(raw.start, raw.stop)),
                              free]
            block = rows @ z
            c = np.zeros((block.shape[0], constraints.n_kept))
            c[:, free] = block
            self.rows.append(c)
        self.C = np.vstack(self.rows) if self.rows else np.zeros((0, constraints.n_kept))

    def __bool__(self) -> bool:
        return bool(len(self.C))

    def apply(self, sol: Solution, problem: WorkingProblem, *, keep_gamma: bool = False
              ) -> Solution:
        """The constrained solution (``keep_gamma``: γ already satisfies the shape; only
        project the covariance and EDF on its active constraints)."""
        C = self.C
        Hi = sol.H_inv
        P = Hi @ C.T                                   # H⁻¹Cᵀ on the kept block (p_k × m)
        Q = C @ P                                      # C H⁻¹ Cᵀ (m × m)
        gamma = sol.gamma
        kept = slice(0, problem.A.shape[0])
        tol = 1e-10 * max(1.0, float(np.max(np.abs(C @ gamma[kept]), initial=0.0)))
        if keep_gamma:
            active = np.flatnonzero(C @ gamma[kept] <= tol)
        else:
            active = self._active_set(C @ gamma[kept], Q)
            if len(active):
                g = _solve_psd(Q[np.ix_(active, active)], (C @ gamma[kept])[active])
                gamma = gamma.copy()
                gamma[kept] = gamma[kept] - P[:, active] @ g
                if sol.eliminated_inverse is not None:  # rows of H⁻¹Cᵀ there: H⁻¹_ek C_kᵀ = −G·P
                    gamma[problem.A.shape[0]:] += sol.eliminated_inverse.G @ (P[:, active] @ g)
        if not len(active):
            return sol
        return _project(sol, problem, gamma, P[:, active], Q[np.ix_(active, active)])

    @staticmethod
    def _active_set(slack: np.ndarray, Q: np.ndarray) -> np.ndarray:
        """Constraints to hold as equalities: grow from the broken ones (the asymmetric
        penalty's weights) until the projected solution breaks none and every multiplier
        is non-negative."""
        active: list[int] = sorted(np.flatnonzero(slack < 0).tolist())
        for _ in range(MAX_ROUNDS):
            if not active:
                return np.array([], dtype=int)
            a = np.array(active)
            mult = _solve_psd(Q[np.ix_(a, a)], slack[a])   # ≥ 0 at a KKT point
            new_slack = slack - Q[:, a] @ mult
            broken = [i for i in np.flatnonzero(new_slack < -1e-12 * (1 + np.abs(slack).max()))
                      if i not in active]
            if broken:
                active = sorted(set(active) | {int(np.argmin(new_slack))})
                continue
            if np.any(mult > 1e-14 * (1 + np.abs(mult).max())):
                # a positive value is a negative multiplier: that constraint would hold by
                # itself, so the most positive one leaves the active set
                active = [i for i in active if i != int(a[np.argmax(mult)])]
                continue
            return a
        return np.array(active, dtype=int)


def _solve_psd(Q: np.ndarray, r: np.ndarray) -> np.ndarray:
    ridge = 1e-13 * max(float(np.trace(Q)), 1e-300)
    return np.linalg.solve(Q + ridge * np.eye(len(Q)), r)


def _project(sol: Solution, problem: WorkingProblem, gamma: np.ndarray, P: np.ndarray,
             Q: np.ndarray) -> Solution:
    """H⁻¹ and EDF conditional on the active constraints: H⁻¹ − H⁻¹C_Wᵀ(C_W H⁻¹ C_Wᵀ)⁻¹C_W H⁻¹,
    and the working deviance at the constrained γ."""
    from dataclasses import replace

    Gi = np.linalg.pinv(Q, rcond=1e-12, hermitian=True)
    PG = P @ Gi
    H_inv = sol.H_inv - PG @ P.T
    A = problem.A
    AP = A @ P
    elim = sol.eliminated_inverse
    new_elim = elim
    if elim is not None:
        Pe = -elim.G @ P           # rows of H⁻¹Cᵀ for the eliminated block: H⁻¹_ek C_kᵀ
        # H⁻¹_ek = −GM⁻¹ becomes −GM⁻¹ − P_e G⁻¹ P_kᵀ
        GMi = elim.GMi + (Pe @ Gi) @ P.T
        spread = elim.spread - np.sum((Pe @ Gi) * Pe, axis=1)
        new_elim = replace(elim, GMi=GMi, spread=spread)
        AP = AP + problem.eliminated_block.C.T @ Pe
    edf = sol.edf.copy()
    k = A.shape[0]
    edf[:k] -= np.sum(PG * AP, axis=1)
    if elim is not None:
        edf[k:] -= np.sum((Pe @ Gi) * (problem.eliminated_block.C @ P
                                       + problem.eliminated_block.d[:, None] * Pe), axis=1)
    delta = gamma[:k] - problem.anchor
    dev = float(problem.e - 2.0 * delta @ problem.u + delta @ A @ delta)
    pen = float(gamma[:k] @ problem.penalty(sol.lam) @ gamma[:k])
    if elim is not None:
        block = problem.eliminated_block
        de = gamma[k:] - block.anchor
        dev += float(-2.0 * de @ block.u + 2.0 * de @ block.C @ delta + np.sum(block.d * de * de))
        pen += float(sol.lam[block.index] * gamma[k:] @ gamma[k:])
    return replace(sol, gamma=gamma, H_inv=0.5 * (H_inv + H_inv.T), edf=edf,
                   deviance=max(dev, 0.0), penalized=max(dev, 0.0) + pen,
                   eliminated_inverse=new_elim)

"""Smoothing-parameter selection and the penalized solve: the dense stage's numerics.

Works on a :class:`WorkingProblem`, the working model reduced to p × p quantities in
constrained coordinates (no rows). For smoothing parameters λ (ρ = log λ):

    H = A + S_λ,  S_λ = Σ λ_k S_k,  γ̂ = H⁻¹(Aγ_a + u),  δ = γ̂ − γ_a,
    D = e − 2δᵀu + δᵀAδ,   D_p = D + γ̂ᵀS_λγ̂,   τ = tr(H⁻¹A).

Criteria (all minimised):

* REML (Patterson & Thompson 1971; Wood 2011, JRSS-B 73(1)), scale φ profiled out
  when unknown: (n−M₀)/2·log D_p + ½log|H| − ½log|S_λ|₊; with φ known:
  D_p/(2φ) + ½log|H| − ½log|S_λ|₊ (constants added back in the reported value).
* GCV (Craven & Wahba 1979): n·D / (n − γτ)².
* UBRE / Mallows' Cp (known scale): D/n − φ + 2γτφ/n.

ρ is found by Newton's method with analytic gradients (derivatives from the envelope
theorem for D_p, and ∂log|H|/∂ρ_k = λ_k tr(H⁻¹S_k)) and a Hessian from central
differences of the gradient, on an eigen-modified Hessian with step control, so the
optimum is found to near machine precision and is reproducible. log|S_λ|₊ is taken block
by block (one block per term), which keeps it stable when the λ of different terms differ
by many orders of magnitude.

A ridge-penalized block with many levels (a random effect: every row hits one of its
levels, so its block of A is diagonal) can be *eliminated*: with h = d + λ_e its diagonal,
C = A_ek its cross products with the other ("kept") coefficients and
M = H_kk − Cᵀdiag(1/h)C the Schur complement,

    γ_k = M⁻¹(b_k − Cᵀ(b_e/h)),  γ_e = (b_e − Cγ_k)/h,  log|H| = Σ log h + log|M|,
    H⁻¹ = [[M⁻¹, −M⁻¹Gᵀ], [−GM⁻¹, diag(1/h) + GM⁻¹Gᵀ]],  G = diag(1/h)C,

so every quantity the criteria need costs O(L·p_k²) for L levels and p_k kept
coefficients, and no L × L array is formed.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from scipy import linalg

from tallgam.errors import FitError

RHO_BOUND = 30.0  # |log relative λ| limit: e^30 ≈ 1e13 is "a straight line" in practice


def null_eigenvalues(vals: np.ndarray) -> np.ndarray:
    """Which eigenvalues of a penalty are zero: those within rounding of the largest
    (10·k·eps relative, k the matrix size). A fixed ratio such as 1e-10 would count the
    smallest true eigenvalues of a basis with many close knots as zeros."""
    if not vals.size:
        return np.zeros(0, dtype=bool)
    return vals <= vals.max() * 10.0 * len(vals) * np.finfo(np.float64).eps


@dataclass
class PenaltyBlock:
    """The penalties of one term, on coefficients ``sl`` (constrained coordinates).

    Penalties whose supports do not overlap (one penalty; one per level of a per-level
    curve; a selection penalty beside the curvature one) have the closed form
    log|λS|₊ = rank·log λ + log|S|₊. Overlapping ones (the margins of a surface) are
    grouped and their log-determinant is taken by an eigendecomposition on the group's
    range space.
    """

    sl: slice
    matrices: list[np.ndarray]          # each (k × k), k = sl.stop - sl.start
    first: int                          # index of its first penalty in the global list
    rank: int = 0

    def __post_init__(self):
        k = len(self.matrices)
        support = [np.any(m != 0, axis=0) for m in self.matrices]
        # group penalties whose supports overlap (union-find on a handful of items)
        group = list(range(k))
        for i in range(k):
            for j in range(i + 1, k):
                if np.any(support[i] & support[j]):
                    gi, gj = group[i], group[j]
                    group = [gi if g == gj else g for g in group]
        self.groups: list[list[int]] = [[i for i in range(k) if group[i] == g]
                                        for g in dict.fromkeys(group)]
        self._closed: dict[int, tuple[int, float]] = {}  # penalty -> (rank, log|S|₊)
        self._general: list[tuple[list[int], list[np.ndarray]]] = []
        self.rank = 0
        for members in self.groups:
            if len(members) == 1:
                m = self.matrices[members[0]]
                vals = np.linalg.eigvalsh(0.5 * (m + m.T))
                pos = vals[~null_eigenvalues(vals)] if vals.size else vals
                self._closed[members[0]] = (len(pos), float(np.sum(np.log(pos))))
                self.rank += len(pos)
            else:
                mats = [self.matrices[i] for i in members]
                total = sum(m / max(np.abs(m).max(), 1e-300) for m in mats)
                vals, vecs = np.linalg.eigh(0.5 * (total + total.T))
                basis = vecs[:, ~null_eigenvalues(vals)]
                self._general.append((members, [basis.T @ m @ basis for m in mats]))
                self.rank += basis.shape[1]

    def logdet(self, lam: np.ndarray) -> tuple[float, np.ndarray, np.ndarray]:
        """log|Σλ_k S_k|₊ over this block, with its gradient and Hessian in log λ_k."""
        k = len(self.matrices)
        lam_b = lam[self.first:self.first + k]
        value = 0.0
        grad = np.zeros(k)
        hess = np.zeros((k, k))
        for i, (rank, const) in self._closed.items():
            value += rank * np.log(max(lam_b[i], 1e-300)) + const
            grad[i] = rank
        for members, reduced in self._general:
            m = sum(lam_b[i] * r for i, r in zip(members, reduced))
            vals, vecs = np.linalg.eigh(0.5 * (m + m.T))
            vals = np.maximum(vals, 1e-300)
            inv = (vecs / vals) @ vecs.T
            value += float(np.sum(np.log(vals)))
            prods = [inv @ r for r in reduced]
            for a, i in enumerate(members):
                t = lam_b[i] * np.trace(prods[a])
                grad[i] = t
                hess[i, i] += t
                for b, j in enumerate(members):
                    hess[i, j] -= lam_b[i] * lam_b[j] * np.sum(prods[a] * prods[b].T)
        return value, grad, hess


@dataclass
class EliminatedBlock:
    """A block of L coefficients with a diagonal data block and penalty λ_e·I, solved by
    its Schur complement (see the module docstring). In free coordinates it comes after
    the kept coefficients, and its smoothing parameter after the kept penalties.

    d (L,) = diag(A_ee), C (L × p_k) = A_ek, u (L,) and anchor (L,) its parts of u and γ_a.
    """

    d: np.ndarray
    C: np.ndarray
    u: np.ndarray
    anchor: np.ndarray
    index: int  # of its smoothing parameter in λ: the last one

    @property
    def size(self) -> int:
        return len(self.d)

    def logdet(self, lam: np.ndarray) -> tuple[float, float]:
        """log|λ_e I|₊ = L·log λ_e and its derivative in log λ_e (the second is zero)."""
        return self.size * float(np.log(max(lam[self.index], 1e-300))), float(self.size)


@dataclass
class WorkingProblem:
    """The working model in constrained coordinates.

    A (p × p) = ZᵀXᵀWXZ, u (p,) = ZᵀXᵀW r, e = rᵀWr, all at the anchor γ_a (p,);
    ``blocks`` lists every term's penalties; ``n`` is the number of rows. With
    ``eliminated``, A, u, anchor and blocks cover the kept coefficients only (p = p_k).
    """

    A: np.ndarray
    u: np.ndarray
    e: float
    anchor: np.ndarray
    blocks: list[PenaltyBlock]
    n: float
    scale: float | None = None  # known φ; None when it must be estimated
    eliminated: EliminatedBlock | None = None

    @property
    def n_penalties(self) -> int:
        return sum(len(b.matrices) for b in self.blocks) + (self.eliminated is not None)

    @property
    def null_dim(self) -> int:
        return self.A.shape[0] - sum(b.rank for b in self.blocks)

    def penalty(self, lam: np.ndarray) -> np.ndarray:
        s = np.zeros_like(self.A)
        for b in self.blocks:
            for j, m in enumerate(b.matrices):
                s[b.sl, b.sl] += lam[b.first + j] * m
        return s

    def penalty_list(self) -> list[tuple[slice, np.ndarray]]:
        return [(b.sl, m) for b in self.blocks for m in b.matrices]


@dataclass
class Solution:
    """The penalized fit at given λ, with what inference needs."""

    lam: np.ndarray
    gamma: np.ndarray         # (p,) all free coefficients, eliminated ones last
    H_inv: np.ndarray         # (p_k × p_k) the kept block of H⁻¹ (all of it when p_k = p)
    deviance: float           # working-model D
    penalized: float          # D_p
    edf: np.ndarray           # diag(H⁻¹A) per coefficient
    log_det_H: float
    log_det_S: float
    criterion: float = np.nan
    criterion_name: str = "fixed"
    iterations: int = 0
    converged: bool = True
    notes: list[str] = field(default_factory=list)
    eliminated: EliminatedInverse | None = None


@dataclass
class EliminatedInverse:
    """The rest of H⁻¹ when a block is eliminated: h (L,) = d + λ_e, G (L × p_k) =
    diag(1/h)C and GM⁻¹ (L × p_k), so H⁻¹_ek = −GM⁻¹ and H⁻¹_ee = diag(1/h) + GM⁻¹Gᵀ,
    whose diagonal is 1/h + ``spread``, spread (L,) = diag(GM⁻¹Gᵀ)."""

    h: np.ndarray
    G: np.ndarray
    GMi: np.ndarray
    spread: np.ndarray = None

    def __post_init__(self):
        if self.spread is None:
            self.spread = np.einsum("ij,ij->i", self.GMi, self.G)

    def diagonal(self) -> np.ndarray:
        """diag(H⁻¹_ee) (L,)."""
        return 1.0 / self.h + self.spread


def factor(H: np.ndarray) -> tuple[np.ndarray, float]:
    """(H⁻¹, log|H|) by a Jacobi-scaled Cholesky; FitError if H is not positive definite."""
    d = np.sqrt(np.abs(np.diag(H)))
    d[d == 0] = 1.0
    Hs = H / d[:, None] / d[None, :]
    try:
        c = linalg.cholesky(Hs, lower=True, check_finite=False)
    except linalg.LinAlgError as exc:
        raise np.linalg.LinAlgError("penalized Hessian is not positive definite") from exc
    if np.min(np.abs(np.diag(c))) < 1e-7:  # condition number ≳ 1e14: numerically singular
        raise np.linalg.LinAlgError("penalized Hessian is numerically singular")
    inv_s = linalg.cho_solve((c, True), np.eye(len(H)), check_finite=False)
    H_inv = inv_s / d[:, None] / d[None, :]
    log_det = 2.0 * np.sum(np.log(np.diag(c))) + 2.0 * np.sum(np.log(d))
    return 0.5 * (H_inv + H_inv.T), float(log_det)


def solve(problem: WorkingProblem, lam: np.ndarray) -> Solution:
    """γ̂ and its by-products at fixed λ (length = number of penalties)."""
    A, u = problem.A, problem.u
    S = problem.penalty(lam)
    log_det_S = sum(blk.logdet(lam)[0] for blk in problem.blocks)
    if problem.eliminated is not None:
        return _solve_eliminated(problem, lam, S, log_det_S)
    H_inv, log_det_H = factor(A + S)
    b = A @ problem.anchor + u
    gamma = H_inv @ b
    delta = gamma - problem.anchor
    dev = float(problem.e - 2.0 * delta @ u + delta @ A @ delta)
    dev = max(dev, 0.0)
    pen = float(gamma @ S @ gamma)
    edf = np.einsum("ij,ji->i", H_inv, A)
    return Solution(lam=lam, gamma=gamma, H_inv=H_inv, deviance=dev, penalized=dev + pen,
                    edf=edf, log_det_H=log_det_H, log_det_S=log_det_S)


def _solve_eliminated(problem: WorkingProblem, lam: np.ndarray, S: np.ndarray,
                      log_det_S: float) -> Solution:
    """:func:`solve` with the eliminated block taken out by its Schur complement:
    O(L·p_k²) time and O(L·p_k) memory (see the module docstring)."""
    A, u, el = problem.A, problem.u, problem.eliminated
    lam_e = lam[el.index]
    h = el.d + lam_e
    G = el.C / h[:, None]
    Ms = A - el.C.T @ G                      # Schur complement of the data part
    M_inv, log_det_M = factor(0.5 * (Ms + Ms.T) + S)
    a_k, a_e = problem.anchor, el.anchor
    b_k = A @ a_k + el.C.T @ a_e + u
    b_e = el.C @ a_k + el.d * a_e + el.u
    g_k = M_inv @ (b_k - G.T @ b_e)
    g_e = (b_e - el.C @ g_k) / h
    dk, de = g_k - a_k, g_e - a_e
    quad = dk @ A @ dk + 2.0 * de @ (el.C @ dk) + de @ (el.d * de)
    dev = max(float(problem.e - 2.0 * (dk @ u + de @ el.u) + quad), 0.0)
    pen = float(g_k @ S @ g_k) + lam_e * float(g_e @ g_e)
    GMi = G @ M_inv
    r = np.einsum("ij,ij->i", GMi, el.C)     # diag(GM⁻¹Cᵀ) = h·diag(GM⁻¹Gᵀ)
    # diag(H⁻¹A): kept M⁻¹(A_kk − CᵀG); eliminated (d − λ_e·diag(GM⁻¹Cᵀ))/h
    edf = np.concatenate([np.einsum("ij,ji->i", M_inv, Ms), (el.d - lam_e * r) / h])
    return Solution(lam=lam, gamma=np.concatenate([g_k, g_e]), H_inv=M_inv, deviance=dev,
                    penalized=dev + pen, edf=edf,
                    log_det_H=log_det_M + float(np.sum(np.log(h))),
                    log_det_S=log_det_S + el.logdet(lam)[0],
                    eliminated=EliminatedInverse(h=h, G=G, GMi=GMi, spread=r / h))


class _Criterion:
    """Value and gradient of a selection criterion as a function of the free log λ."""

    def __init__(self, problem: WorkingProblem, name: str, base_lam: np.ndarray,
                 free: np.ndarray, gamma_factor: float):
        self.p = problem
        self.name = name
        self.base = base_lam       # λ = base · exp(ρ) for free entries, base for fixed ones
        self.free = free
        self.gf = gamma_factor
        self.scale = problem.scale
        if name == "ubre" and self.scale is None:
            raise FitError("UBRE needs a known scale; use criterion='gcv' or 'reml'")
        if name != "reml" and problem.eliminated is not None:
            raise FitError(f"{name.upper()} works on the full problem; eliminate no block")

    def lam(self, rho: np.ndarray) -> np.ndarray:
        lam = self.base.copy()
        lam[self.free] = self.base[self.free] * np.exp(rho)
        return lam

    def __call__(self, rho: np.ndarray) -> tuple[float, np.ndarray, Solution]:
        prob = self.p
        lam = self.lam(rho)
        sol = solve(prob, lam)
        g, Hi = sol.gamma, sol.H_inv
        n = prob.n
        k_all = prob.n_penalties
        grad = np.zeros(k_all)
        if self.name == "reml":
            value, grad, hess = self._reml(sol, lam)
            sol.criterion, sol.criterion_name = float(value), self.name
            self.last_hessian = hess[np.ix_(self.free, self.free)]
            return float(value), grad[self.free], sol
        else:
            tau = float(np.sum(sol.edf))
            S = prob.penalty(lam)
            SHi = S @ Hi
            dev = sol.deviance
            denom = n - self.gf * tau
            if denom <= 0:
                return np.inf, grad[self.free], sol
            if self.name == "gcv":
                value = n * dev / denom ** 2
            else:
                value = dev / n - self.scale + 2.0 * self.gf * tau * self.scale / n
            HiA = Hi @ prob.A
            for j, (sl, m) in enumerate(prob.penalty_list()):
                d_dev = 2.0 * lam[j] * (g @ SHi[:, sl]) @ (m @ g[sl])
                d_tau = -lam[j] * np.sum(Hi[:, sl] @ m * HiA[sl, :].T)
                if self.name == "gcv":
                    grad[j] = n * d_dev / denom ** 2 + 2 * n * dev * self.gf * d_tau / denom ** 3
                else:
                    grad[j] = d_dev / n + 2.0 * self.gf * self.scale * d_tau / n
        sol.criterion = float(value)
        sol.criterion_name = self.name
        self.last_hessian = None
        return float(value), grad[self.free], sol

    def _reml(self, sol: Solution, lam: np.ndarray):
        """REML value, gradient and exact Hessian in ρ = log λ (Wood 2011, §3–4):
        ∂D_p/∂ρ_j = λ_j γ̂ᵀS_jγ̂ (envelope theorem), ∂γ̂/∂ρ_j = −λ_j H⁻¹S_jγ̂,
        ∂log|H|/∂ρ_j = λ_j tr(H⁻¹S_j), ∂²log|H| = δ_ij λ_j tr(H⁻¹S_j) − λ_iλ_j tr(H⁻¹S_iH⁻¹S_j).
        """
        prob = self.p
        g, Hi = sol.gamma, sol.H_inv
        pens = prob.penalty_list()
        k = prob.n_penalties
        n, m0 = prob.n, prob.null_dim
        ld_val = 0.0
        ld_grad = np.zeros(k)
        ld_hess = np.zeros((k, k))
        for blk in prob.blocks:
            v, gr, he = blk.logdet(lam)
            r = slice(blk.first, blk.first + len(blk.matrices))
            ld_val += v
            ld_grad[r] = gr
            ld_hess[r, r] = he
        sg = [m @ g[sl] for sl, m in pens]                        # S_j γ̂ on its block
        dp1 = np.zeros(k)
        tr1 = np.zeros(k)
        dp1[:len(pens)] = [lam[j] * g[sl] @ sg[j] for j, (sl, _) in enumerate(pens)]
        tr1[:len(pens)] = [lam[j] * np.sum(Hi[sl, sl] * m) for j, (sl, m) in enumerate(pens)]
        if prob.eliminated is not None:
            ld_val += prob.eliminated.logdet(lam)[0]
            ld_grad[-1] = prob.eliminated.logdet(lam)[1]
            dp1[-1], tr1[-1] = _eliminated_first(sol, lam)
        dp2 = np.diag(dp1)
        tr2 = np.diag(tr1)
        if prob.eliminated is not None:
            _eliminated_second(sol, lam, pens, sg, dp2, tr2)
        for i, (sli, mi) in enumerate(pens):
            for j in range(i, len(pens)):
                slj, mj = pens[j]
                cross = Hi[sli, slj]
                q = lam[i] * lam[j] * float(sg[i] @ cross @ sg[j])
                t = lam[i] * lam[j] * float(np.sum((mi @ cross) * (mj @ cross.T).T))
                dp2[i, j] -= 2.0 * q
                tr2[i, j] -= t
                if j != i:
                    dp2[j, i] -= 2.0 * q
                    tr2[j, i] -= t
        if self.scale is None:
            nm = n - m0
            dp = max(sol.penalized, 1e-300)
            value = 0.5 * nm * (1.0 + np.log(2 * np.pi * dp / nm))
            grad = 0.5 * nm * dp1 / dp
            hess = 0.5 * nm * (dp2 / dp - np.outer(dp1, dp1) / dp ** 2)
        else:
            phi = self.scale
            value = sol.penalized / (2 * phi) + 0.5 * (n - m0) * np.log(2 * np.pi * phi)
            grad = dp1 / (2 * phi)
            hess = dp2 / (2 * phi)
        value += 0.5 * sol.log_det_H - 0.5 * ld_val
        grad = grad + 0.5 * tr1 - 0.5 * ld_grad
        hess = hess + 0.5 * tr2 - 0.5 * ld_hess
        return value, grad, 0.5 * (hess + hess.T)

    def unit(self, value: float) -> float:
        """Factor that makes gradient and Hessian unit-free and independent of the number of
        rows, for the convergence test and the Newton step's safeguards: REML is a
        log-likelihood, whose derivatives by log λ are of the order of effective degrees of
        freedom whatever n and the response's units; GCV and UBRE are mean squared errors,
        so n/value (GCV) or n/φ (UBRE) brings them to the same footing."""
        if self.name == "reml":
            return 1.0
        if self.name == "gcv":
            return self.p.n / max(abs(value), 1e-300)
        return self.p.n / self.scale


def _eliminated_first(sol: Solution, lam: np.ndarray) -> tuple[float, float]:
    """λ_e γ_eᵀγ_e and λ_e tr(H⁻¹_ee) = λ_e(Σ1/h + tr(M⁻¹GᵀG)): the eliminated block's
    entries of the first derivatives of D_p and log|H|."""
    inv = sol.eliminated
    lam_e = lam[-1]
    g_e = sol.gamma[len(sol.gamma) - len(inv.h):]
    return lam_e * float(g_e @ g_e), lam_e * float(np.sum(inv.diagonal()))


def _eliminated_second(sol: Solution, lam: np.ndarray, pens: list, sg: list,
                       dp2: np.ndarray, tr2: np.ndarray) -> None:
    """Subtract the eliminated block's row and column (index −1) of the second-derivative
    terms 2λ_iλ_e (S_iγ̂)ᵀH⁻¹(S_eγ̂) and λ_iλ_e tr(H⁻¹S_iH⁻¹S_e) from ``dp2``/``tr2``,
    which hold the diagonal terms already; the kept-kept entries are added by the caller.

    With S_e = I on the block: H⁻¹_ke = −M⁻¹Gᵀ gives (S_iγ̂)ᵀH⁻¹_ke γ_e = −(S_iγ̂)ᵀ(M⁻¹Gᵀγ_e)
    and tr(H⁻¹S_iH⁻¹S_e) = tr(S_i·P), P = M⁻¹GᵀGM⁻¹ = (GM⁻¹)ᵀ(GM⁻¹); with
    H⁻¹_ee = diag(1/h) + GM⁻¹Gᵀ, γ_eᵀH⁻¹_ee γ_e = Σγ_e²/h + wᵀM⁻¹w (w = Gᵀγ_e) and
    tr(H⁻¹_ee²) = Σ1/h² + 2Σ spread/h + tr(P·GᵀG).
    """
    inv, Mi = sol.eliminated, sol.H_inv
    h, G = inv.h, inv.G
    lam_e = lam[-1]
    g_e = sol.gamma[len(sol.gamma) - len(h):]
    P = inv.GMi.T @ inv.GMi
    w = G.T @ g_e
    Miw = Mi @ w
    dp2[-1, -1] -= 2.0 * lam_e ** 2 * (float(g_e @ (g_e / h)) + float(w @ Miw))
    tr2[-1, -1] -= lam_e ** 2 * (float(np.sum(1.0 / h ** 2)) + 2.0 * float(np.sum(inv.spread / h))
                                 + float(np.sum(P * (G.T @ G))))
    for i, (sl, m) in enumerate(pens):
        q = -lam[i] * lam_e * float(sg[i] @ Miw[sl])
        t = lam[i] * lam_e * float(np.sum(m * P[sl, sl]))
        dp2[i, -1] -= 2.0 * q
        dp2[-1, i] -= 2.0 * q
        tr2[i, -1] -= t
        tr2[-1, i] -= t


def select(problem: WorkingProblem, criterion: str, fixed: list[float | None],
           start: np.ndarray | None = None, gamma_factor: float = 1.0,
           tol: float = 1e-9, max_iter: int = 100) -> Solution:
    """Choose the free smoothing parameters by minimising ``criterion``.

    ``fixed[k]`` is a given λ_k or None (to be chosen); with ``criterion="fixed"`` every
    λ must be given. ``start`` is a starting log relative λ for all penalties (e.g. the
    previous PIRLS step's). Returns the :class:`Solution` at the optimum.
    """
    base = relative_scale(problem)
    free = np.array([f is None for f in fixed], dtype=bool)
    for j, f in enumerate(fixed):
        if f is not None:
            base[j] = float(f)
    if criterion == "fixed" or not free.any():
        if free.any():
            raise FitError("criterion 'fixed' needs a smoothing value on every smooth term")
        sol = _safe_solve(problem, base)
        return sol
    crit = _Criterion(problem, criterion, base, free, gamma_factor)
    rho = np.zeros(int(free.sum())) if start is None else np.clip(start[free], -RHO_BOUND,
                                                                     RHO_BOUND)
    value, grad, sol = _evaluate(crit, rho)
    converged = False
    it = 0
    for it in range(1, max_iter + 1):  # noqa: B007
        unit = crit.unit(value)  # the step's safeguards work on the unit-free criterion
        hess = crit.last_hessian if crit.last_hessian is not None else _fd_hessian(
            crit, rho, grad)
        step = _newton_step(hess * unit, grad * unit, rho)
        if step is None:
            converged = True
            break
        accepted = False
        # a REML value holds n/2·log(φ): its rounding grows with n, and near the optimum a
        # Newton step gains less than that, so rises below the rounding level are allowed
        noise = 1e-13 * (1.0 + abs(value))
        for _ in range(30):
            trial = np.clip(rho + step, -RHO_BOUND, RHO_BOUND)
            t_value, t_grad, t_sol = _evaluate(crit, trial)
            if t_value <= value + 1e-4 * min(0.0, float(grad @ (trial - rho))) + noise:
                accepted = True
                break
            step *= 0.5
        if not accepted:
            converged = _is_stationary(grad * unit, rho, tol)
            break
        change = abs(value - t_value)
        rho, value, grad, sol = trial, t_value, t_grad, t_sol
        if _is_stationary(grad * crit.unit(value), rho, tol) or (
                change <= tol * (1.0 + abs(value)) and np.max(np.abs(step)) < 1e-6):
            converged = True
            break
    sol.iterations = it
    sol.converged = converged
    if not converged:
        sol.notes.append(f"{criterion} optimisation stopped after {it} Newton steps")
    return sol


def _evaluate(crit: _Criterion, rho: np.ndarray):
    try:
        return crit(rho)
    except np.linalg.LinAlgError:
        return np.inf, np.zeros_like(rho), None


def _safe_solve(problem: WorkingProblem, lam: np.ndarray) -> Solution:
    try:
        return solve(problem, lam)
    except np.linalg.LinAlgError as exc:
        raise FitError(
            "the penalized normal equations are singular at the given smoothing: some "
            "coefficients are not determined by the data (collinear columns, or a spline with "
            "smoothing 0 and knot intervals without data). Use positive smoothing or fewer "
            "knots.") from exc


def _is_stationary(grad, rho, tol) -> bool:
    """True when the unit-free gradient (see :meth:`_Criterion.unit`) is zero to ``tol``,
    except where a bound stops the way downhill. Not relative to the criterion's value: a
    REML value grows with n, and a tolerance relative to it would stop far from the optimum
    on large data."""
    at_lo = (rho <= -RHO_BOUND + 1e-9) & (grad > 0)
    at_hi = (rho >= RHO_BOUND - 1e-9) & (grad < 0)
    g = np.where(at_lo | at_hi, 0.0, grad)
    return bool(np.max(np.abs(g), initial=0.0) <= max(tol, 1e-7))


def _fd_hessian(crit: _Criterion, rho: np.ndarray, grad: np.ndarray, h: float = 1e-4):
    k = len(rho)
    hess = np.zeros((k, k))
    for j in range(k):
        e = np.zeros(k)
        e[j] = h
        gp = crit(rho + e)[1]
        gm = crit(rho - e)[1]
        hess[:, j] = (gp - gm) / (2 * h)
    return 0.5 * (hess + hess.T)


def _newton_step(hess, grad, rho, max_step: float = 5.0):
    """Newton step on the eigen-modified (positive definite) Hessian, with directions
    pinned at a bound removed; None when nothing can move."""
    movable = ~(((rho <= -RHO_BOUND + 1e-9) & (grad > 0)) | ((rho >= RHO_BOUND - 1e-9)
                                                             & (grad < 0)))
    if not movable.any():
        return None
    hm = hess[np.ix_(movable, movable)]
    vals, vecs = np.linalg.eigh(hm)
    floor = max(np.max(np.abs(vals)) * 1e-7, 1e-8)
    vals = np.maximum(np.abs(vals), floor)
    step = np.zeros_like(rho)
    step[movable] = -(vecs / vals) @ (vecs.T @ grad[movable])
    biggest = np.max(np.abs(step))
    if biggest > max_step:
        step *= max_step / biggest
    return step


def relative_scale(problem: WorkingProblem) -> np.ndarray:
    """λ_k that make penalty k as large as the data term on its block (ρ = 0 start)."""
    out = []
    for blk in problem.blocks:
        a = np.linalg.norm(problem.A[blk.sl, blk.sl])
        for m in blk.matrices:
            s = np.linalg.norm(m)
            out.append(a / s if s > 0 and a > 0 else 1.0)
    el = problem.eliminated
    if el is not None:  # A_ee = diag(d), S_e = I
        a = np.linalg.norm(el.d)
        out.append(a / np.sqrt(el.size) if a > 0 else 1.0)
    return np.array(out, dtype=np.float64)

"""Smoothing-parameter selection and the penalized solve: the dense stage's numerics.

Works on a :class:`WorkingProblem`, the working model reduced to p × p quantities in
constrained coordinates (no rows). For smoothing parameters λ (ρ = log λ):

    H = A + S_λ,  S_λ = Σ λ_k S_k,  γ̂ = H⁻¹(Aγ_a + u),  δ = γ̂ − γ_a,
    D = e − 2δᵀu + δᵀAδ,   D_p = D + γ̂ᵀS_λγ̂,   τ = tr(H⁻¹A).

Criteria (all minimised):

* REML (Patterson & Thompson 1971; Wood 2011, JRSS-B 73(1)), scale φ profiled out
  when unknown: (n−M₀)/2·log D_p + ½log|H| − ½log|S_λ|₊; with φ known:
  D_p/(2φ) + ½log|H| − ½log|S_λ|₊ (constants added back in the reported value).
* GCV (Craven & Wahba 1979): n·D / (n − γτ)² (infinite below one residual degree of
  freedom, where a fit with a coefficient per data point interpolates).
* UBRE / Mallows' Cp (known scale): D/n − φ + 2γτφ/n.

The search (:func:`select`) is global first, local second. On the first PIRLS step a
coarse sweep of each log λ (a full grid for two or three free λ, coordinate sweeps for
more; :class:`_Search`) finds the criterion's basins — GCV can have several (Wahba 1990,
ch. 4) — and Newton starts from the best local minima of the sweep; later steps start from
the previous step's λ. Every optimum is checked against its neighbours one sweep step away
along each log λ, and Newton restarts from a neighbour that beats it. Sweep points are
valued by a light solve (Cholesky, no H⁻¹). The history (points tried, Newton runs, which
start won) is kept on the :class:`Solution`. Newton uses analytic gradients (derivatives
from the envelope theorem for D_p, and ∂log|H|/∂ρ_k = λ_k tr(H⁻¹S_k)), the exact REML
Hessian or central differences of the gradient (GCV, UBRE), on an eigen-modified Hessian
with step control, and stops when the unit-free gradient is below the requested tolerance
(or where the criterion's rounding hides any further gain), so the optimum is found to near
machine precision and is reproducible. log|S_λ|₊ is taken block by block (one block per
term), and overlapping penalties of one term by a split on the dominant penalty's range,
which keeps it stable when the λ differ by many orders of magnitude.

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
            v, inv, turned = _group_logdet([lam_b[i] for i in members], reduced)
            value += v
            prods = [inv @ r for r in turned]
            for a, i in enumerate(members):
                t = lam_b[i] * np.trace(prods[a])
                grad[i] = t
                hess[i, i] += t
                for b, j in enumerate(members):
                    hess[i, j] -= lam_b[i] * lam_b[j] * np.sum(prods[a] * prods[b].T)
        return value, grad, hess


def _group_logdet(lams: list[float], mats: list[np.ndarray]
                  ) -> tuple[float, np.ndarray, list[np.ndarray]]:
    """log|m| for m = Σ λ_i·mats_i, positive definite, when the λ_i may differ by many
    orders of magnitude (the margins of a surface); with m⁻¹ and the mats in the
    coordinates m⁻¹ is given in (derivatives are traces of products of the two).

    One eigendecomposition of m loses the eigenvalues that only the small λ_i make: they
    drown in the rounding of the large ones, and log|m| is then off by whole units, which
    would mislead the smoothing search. So m is turned to the range R and null space N of
    the dominant penalty (in the spirit of Wood 2011, appendix B), where that penalty is
    exactly zero outside the R block: log|m| = log|m_RR| + log|C| with
    C = m_NN − m_NRm_RR⁻¹m_RN, m_NN and m_RN holding only the other penalties; both pieces
    are well scaled, and m⁻¹ is their block inverse."""
    scaled = [lam * m for lam, m in zip(lams, mats)]
    top = int(np.argmax([np.abs(m).max() for m in scaled]))
    vals, vecs = np.linalg.eigh(0.5 * (mats[top] + mats[top].T))
    on = ~null_eigenvalues(vals)
    if on.all():
        value, inv = _spd_logdet(sum(scaled))
        return value, inv, mats
    order = np.concatenate([np.flatnonzero(on), np.flatnonzero(~on)])
    T = vecs[:, order]
    k = int(on.sum())
    turned = [T.T @ m @ T for m in mats]
    turned[top] = np.diag(np.where(np.arange(len(order)) < k, vals[order], 0.0))
    rest = sum(lam * m for i, (lam, m) in enumerate(zip(lams, turned)) if i != top)
    m_rr = lams[top] * turned[top][:k, :k] + rest[:k, :k]
    ld_a, a_inv = _spd_logdet(m_rr)
    X = a_inv @ rest[:k, k:]
    ld_c, c_inv = _spd_logdet(rest[k:, k:] - rest[:k, k:].T @ X)
    XC = X @ c_inv
    inv = np.block([[a_inv + XC @ X.T, -XC], [-XC.T, c_inv]])
    return ld_a + ld_c, 0.5 * (inv + inv.T), turned


def _spd_logdet(m: np.ndarray) -> tuple[float, np.ndarray]:
    """(log|m|, m⁻¹) by an eigendecomposition (eigenvalues floored at 1e-300)."""
    vals, vecs = np.linalg.eigh(0.5 * (m + m.T))
    vals = np.maximum(vals, 1e-300)
    return float(np.sum(np.log(vals))), (vecs / vals) @ vecs.T


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
    ``eliminated_block``, A, u, anchor and blocks cover the kept coefficients only (p = p_k).
    """

    A: np.ndarray
    u: np.ndarray
    e: float
    anchor: np.ndarray
    blocks: list[PenaltyBlock]
    n: float
    scale: float | None = None  # known φ; None when it must be estimated
    eliminated_block: EliminatedBlock | None = None

    @property
    def n_penalties(self) -> int:
        return sum(len(b.matrices) for b in self.blocks) + (self.eliminated_block is not None)

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
    H_inv: np.ndarray | None  # (p_k × p_k) the kept block of H⁻¹ (all of it when p_k = p)
    deviance: float           # working-model D
    penalized: float          # D_p
    edf: np.ndarray | None    # diag(H⁻¹A) per coefficient
    log_det_H: float
    log_det_S: float
    criterion: float = np.nan
    criterion_name: str = "fixed"
    iterations: int = 0
    converged: bool = True
    notes: list[str] = field(default_factory=list)
    eliminated_inverse: EliminatedInverse | None = None
    search: dict | None = None  # history of the smoothing search (:func:`select`), JSON types
    trace: float | None = None  # τ = tr(H⁻¹A) when ``edf`` was not formed (light solve)

    @property
    def tau(self) -> float:
        """τ = tr(H⁻¹A), the total effective degrees of freedom."""
        return float(np.sum(self.edf)) if self.edf is not None else float(self.trace)


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


class ScaledCholesky:
    """H = D·L·Lᵀ·D with D = diag(√|H_ii|) (Jacobi scaling) and L lower triangular;
    LinAlgError if H is not numerically positive definite."""

    def __init__(self, H: np.ndarray):
        d = np.sqrt(np.abs(np.diag(H)))
        d[d == 0] = 1.0
        try:
            c = linalg.cholesky(H / d[:, None] / d[None, :], lower=True, check_finite=False)
        except linalg.LinAlgError as exc:
            raise np.linalg.LinAlgError("penalized Hessian is not positive definite") from exc
        if np.min(np.abs(np.diag(c))) < 1e-7:  # condition number ≳ 1e14: numerically singular
            raise np.linalg.LinAlgError("penalized Hessian is numerically singular")
        self.d, self.c = d, c
        self.log_det = float(2.0 * np.sum(np.log(np.diag(c))) + 2.0 * np.sum(np.log(d)))

    def solve(self, b: np.ndarray) -> np.ndarray:
        """H⁻¹b."""
        d = self.d if b.ndim == 1 else self.d[:, None]
        return linalg.cho_solve((self.c, True), b / d, check_finite=False) / d

    def inverse(self) -> np.ndarray:
        """H⁻¹ (symmetrised)."""
        inv = linalg.cho_solve((self.c, True), np.eye(len(self.d)), check_finite=False)
        inv = inv / self.d[:, None] / self.d[None, :]
        return 0.5 * (inv + inv.T)

    def trace_with(self, blocks: list[tuple[slice, np.ndarray]]) -> float:
        """tr(H⁻¹S) for S block diagonal, given as (slice, block) pairs, from L⁻¹ alone
        (H⁻¹_bb = D_b⁻¹(L⁻¹_{:,b})ᵀL⁻¹_{:,b}D_b⁻¹): a third of the cost of H⁻¹."""
        li, info = linalg.lapack.dtrtri(self.c, lower=1)
        if info != 0:
            raise np.linalg.LinAlgError("penalized Hessian is numerically singular")
        total = 0.0
        for sl, m in blocks:
            cols = li[:, sl] / self.d[sl]
            total += float(np.sum((cols.T @ cols) * m))
        return total


def solve(problem: WorkingProblem, lam: np.ndarray, *, full: bool = True,
          trace: bool = True) -> Solution:
    """γ̂ and its by-products at fixed λ (length = number of penalties).

    With ``full=False`` only what a criterion's value needs: γ̂, D, D_p, log|H|, log|S|₊
    and (``trace``) τ = tr(H⁻¹A) = p − tr(H⁻¹S_λ); ``H_inv`` and ``edf`` are then None.
    """
    A, u = problem.A, problem.u
    S = problem.penalty(lam)
    log_det_S = sum(blk.logdet(lam)[0] for blk in problem.blocks)
    if problem.eliminated_block is not None:
        return _solve_eliminated(problem, lam, S, log_det_S, full)
    chol = ScaledCholesky(A + S)
    b = A @ problem.anchor + u
    gamma = chol.solve(b)
    delta = gamma - problem.anchor
    dev = float(problem.e - 2.0 * delta @ u + delta @ A @ delta)
    dev = max(dev, 0.0)
    pen = float(gamma @ S @ gamma)
    sol = Solution(lam=lam, gamma=gamma, H_inv=None, deviance=dev, penalized=dev + pen,
                   edf=None, log_det_H=chol.log_det, log_det_S=log_det_S)
    if full:
        sol.H_inv = chol.inverse()
        sol.edf = np.einsum("ij,ji->i", sol.H_inv, A)
    elif trace:
        blocks = [(blk.sl, S[blk.sl, blk.sl]) for blk in problem.blocks]
        sol.trace = len(gamma) - chol.trace_with(blocks)
    return sol


def _solve_eliminated(problem: WorkingProblem, lam: np.ndarray, S: np.ndarray,
                      log_det_S: float, full: bool = True) -> Solution:
    """:func:`solve` with the eliminated block taken out by its Schur complement:
    O(L·p_k²) time and O(L·p_k) memory (see the module docstring)."""
    A, u, el = problem.A, problem.u, problem.eliminated_block
    lam_e = lam[el.index]
    h = el.d + lam_e
    G = el.C / h[:, None]
    Ms = A - el.C.T @ G                      # Schur complement of the data part
    chol = ScaledCholesky(0.5 * (Ms + Ms.T) + S)
    a_k, a_e = problem.anchor, el.anchor
    b_k = A @ a_k + el.C.T @ a_e + u
    b_e = el.C @ a_k + el.d * a_e + el.u
    g_k = chol.solve(b_k - G.T @ b_e)
    g_e = (b_e - el.C @ g_k) / h
    dk, de = g_k - a_k, g_e - a_e
    quad = dk @ A @ dk + 2.0 * de @ (el.C @ dk) + de @ (el.d * de)
    dev = max(float(problem.e - 2.0 * (dk @ u + de @ el.u) + quad), 0.0)
    pen = float(g_k @ S @ g_k) + lam_e * float(g_e @ g_e)
    sol = Solution(lam=lam, gamma=np.concatenate([g_k, g_e]), H_inv=None, deviance=dev,
                   penalized=dev + pen, edf=None,
                   log_det_H=chol.log_det + float(np.sum(np.log(h))),
                   log_det_S=log_det_S + el.logdet(lam)[0])
    if not full:
        return sol
    M_inv = chol.inverse()
    GMi = G @ M_inv
    r = np.einsum("ij,ij->i", GMi, el.C)     # diag(GM⁻¹Cᵀ) = h·diag(GM⁻¹Gᵀ)
    # diag(H⁻¹A): kept M⁻¹(A_kk − CᵀG); eliminated (d − λ_e·diag(GM⁻¹Cᵀ))/h
    sol.H_inv = M_inv
    sol.edf = np.concatenate([np.einsum("ij,ji->i", M_inv, Ms), (el.d - lam_e * r) / h])
    sol.eliminated_inverse = EliminatedInverse(h=h, G=G, GMi=GMi, spread=r / h)
    return sol


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
        self.evaluations = 0       # penalized solves so far (each costs one factorisation)
        if name == "ubre" and self.scale is None:
            raise FitError("UBRE needs a known scale; use criterion='gcv' or 'reml'")
        if name != "reml" and problem.eliminated_block is not None:
            raise FitError(f"{name.upper()} works on the full problem; eliminate no block")

    def lam(self, rho: np.ndarray) -> np.ndarray:
        lam = self.base.copy()
        lam[self.free] = self.base[self.free] * np.exp(rho)
        return lam

    def value(self, rho: np.ndarray, full: bool = True) -> tuple[float, Solution | None]:
        """The criterion alone (no derivatives): inf where H is not positive definite.
        ``full=False`` skips H⁻¹ and the EDF (a light solve, for sweeps and line searches)."""
        self.evaluations += 1
        try:
            sol = solve(self.p, self.lam(rho), full=full, trace=self.name != "reml")
        except np.linalg.LinAlgError:
            return np.inf, None
        value = self._value(sol)
        sol.criterion, sol.criterion_name = value, self.name
        return value, sol

    def _value(self, sol: Solution) -> float:
        prob = self.p
        n = prob.n
        if self.name == "reml":
            m0 = prob.null_dim
            if self.scale is None:
                nm = n - m0
                dp = max(sol.penalized, 1e-300)
                value = 0.5 * nm * (1.0 + np.log(2 * np.pi * dp / nm))
            else:
                phi = self.scale
                value = sol.penalized / (2 * phi) + 0.5 * (n - m0) * np.log(2 * np.pi * phi)
            return float(value + 0.5 * sol.log_det_H - 0.5 * sol.log_det_S)
        tau = sol.tau
        if self.name == "gcv":
            # below one residual degree of freedom the fit interpolates: D and n − γτ are
            # both rounding, and their ratio means nothing
            if n - tau < 1.0 or n - self.gf * tau <= 0:
                return np.inf
            return float(n * sol.deviance / (n - self.gf * tau) ** 2)
        return float(sol.deviance / n - self.scale + 2.0 * self.gf * tau * self.scale / n)

    def __call__(self, rho: np.ndarray) -> tuple[float, np.ndarray, Solution]:
        """Value, gradient in the free ρ and the solution; the Hessian (exact for REML,
        None otherwise) is left in ``last_hessian``."""
        value, sol = self.value(rho)
        if sol is None:
            raise np.linalg.LinAlgError("penalized Hessian is not positive definite")
        grad = self.gradient(sol)
        return value, grad, sol

    def gradient(self, sol: Solution) -> np.ndarray:
        """Gradient in the free ρ at a solution from :meth:`value`."""
        prob = self.p
        lam = sol.lam
        if self.name == "reml":
            grad, hess = self._reml(sol, lam)
            self.last_hessian = hess[np.ix_(self.free, self.free)]
            return grad[self.free]
        g, Hi = sol.gamma, sol.H_inv
        n = prob.n
        grad = np.zeros(prob.n_penalties)
        tau = float(np.sum(sol.edf))
        SHi = prob.penalty(lam) @ Hi
        dev = sol.deviance
        denom = n - self.gf * tau
        if denom > 0:
            HiA = Hi @ prob.A
            for j, (sl, m) in enumerate(prob.penalty_list()):
                d_dev = 2.0 * lam[j] * (g @ SHi[:, sl]) @ (m @ g[sl])
                d_tau = -lam[j] * np.sum(Hi[:, sl] @ m * HiA[sl, :].T)
                if self.name == "gcv":
                    grad[j] = n * d_dev / denom ** 2 + 2 * n * dev * self.gf * d_tau / denom ** 3
                else:
                    grad[j] = d_dev / n + 2.0 * self.gf * self.scale * d_tau / n
        self.last_hessian = None
        return grad[self.free]

    def _reml(self, sol: Solution, lam: np.ndarray):
        """REML gradient and exact Hessian in ρ = log λ (Wood 2011, §3–4):
        ∂D_p/∂ρ_j = λ_j γ̂ᵀS_jγ̂ (envelope theorem), ∂γ̂/∂ρ_j = −λ_j H⁻¹S_jγ̂,
        ∂log|H|/∂ρ_j = λ_j tr(H⁻¹S_j), ∂²log|H| = δ_ij λ_j tr(H⁻¹S_j) − λ_iλ_j tr(H⁻¹S_iH⁻¹S_j).
        """
        prob = self.p
        g, Hi = sol.gamma, sol.H_inv
        pens = prob.penalty_list()
        k = prob.n_penalties
        n, m0 = prob.n, prob.null_dim
        ld_grad = np.zeros(k)
        ld_hess = np.zeros((k, k))
        for blk in prob.blocks:
            _, gr, he = blk.logdet(lam)
            r = slice(blk.first, blk.first + len(blk.matrices))
            ld_grad[r] = gr
            ld_hess[r, r] = he
        sg = [m @ g[sl] for sl, m in pens]                        # S_j γ̂ on its block
        dp1 = np.zeros(k)
        tr1 = np.zeros(k)
        dp1[:len(pens)] = [lam[j] * g[sl] @ sg[j] for j, (sl, _) in enumerate(pens)]
        tr1[:len(pens)] = [lam[j] * np.sum(Hi[sl, sl] * m) for j, (sl, m) in enumerate(pens)]
        if prob.eliminated_block is not None:
            ld_grad[-1] = prob.eliminated_block.logdet(lam)[1]
            dp1[-1], tr1[-1] = _eliminated_first(sol, lam)
        dp2 = np.diag(dp1)
        tr2 = np.diag(tr1)
        if prob.eliminated_block is not None:
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
            grad = 0.5 * nm * dp1 / dp
            hess = 0.5 * nm * (dp2 / dp - np.outer(dp1, dp1) / dp ** 2)
        else:
            grad = dp1 / (2 * self.scale)
            hess = dp2 / (2 * self.scale)
        grad = grad + 0.5 * tr1 - 0.5 * ld_grad
        hess = hess + 0.5 * tr2 - 0.5 * ld_hess
        return grad, 0.5 * (hess + hess.T)

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
    inv = sol.eliminated_inverse
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
    inv, Mi = sol.eliminated_inverse, sol.H_inv
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
           tol: float = 1e-9, max_iter: int = 100, sweep: bool | None = None) -> Solution:
    """Choose the free smoothing parameters by minimising ``criterion``.

    ``fixed[k]`` is a given λ_k or None (to be chosen); with ``criterion="fixed"`` every
    λ must be given. ``start`` is a starting log relative λ for all penalties (e.g. the
    previous PIRLS step's). ``sweep`` (default: when there is no ``start``) first sweeps
    the criterion over a coarse grid of log λ and starts Newton from its best local minima
    (see :class:`_Search`); every optimum is then checked against its neighbours one sweep
    step away along each log λ, and Newton restarts from a neighbour that is better. Newton
    stops when the unit-free gradient is below ``tol`` (or where the criterion's rounding
    hides any further gain). Returns the :class:`Solution` at the optimum, with the search
    history in ``Solution.search``.
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
    search = _Search(crit)
    if sweep is None:
        sweep = start is None
    if sweep:
        starts = search.sweep(_sweep_axes(problem, base, free))
    else:
        rho = np.zeros(int(free.sum())) if start is None else start[free]
        starts = [("previous" if start is not None else "default",
                   np.clip(rho, -RHO_BOUND, RHO_BOUND))]
    best = None
    for label, rho in starts:
        run = _newton(crit, rho, tol, max_iter, label)
        search.runs.append(run)
        if best is None or run.value < best.value:
            best = run
    if best.sol is None and not sweep:  # the given start is singular: search afresh
        for label, rho in search.sweep(_sweep_axes(problem, base, free)):
            run = _newton(crit, rho, tol, max_iter, label)
            search.runs.append(run)
            if run.value < best.value:
                best = run
    for _ in range(RESTARTS):
        better = search.better_neighbour(best)
        if better is None:
            break
        run = _newton(crit, better, tol, max_iter, "neighbour")
        search.runs.append(run)
        # a gain below NEIGHBOUR_GAIN is a flat stretch of the criterion, not another
        # optimum: moving there only makes λ wander from one PIRLS pass to the next
        if not run.value < best.value - NEIGHBOUR_GAIN * (1.0 + abs(best.value)):
            break
        best = run
    if best.sol is None:
        _safe_solve(problem, crit.lam(best.rho))  # raises the actionable error
    sol = best.sol
    sol.iterations = sum(r.iterations for r in search.runs)
    sol.converged = best.converged
    if not best.converged:
        sol.notes.append(f"{criterion} optimisation stopped after {best.iterations} Newton "
                         f"steps ({best.stopped})")
    sol.search = search.record(best)
    return sol


def smoothing_uncertainty(problem: WorkingProblem, sol: Solution,
                          fixed: list[float | None]) -> np.ndarray | None:
    """J·V_ρ·Jᵀ (p_k × p_k, kept free coordinates): the first-order covariance that the
    uncertainty of REML-chosen log λ adds to γ̂ (Kass & Steffey 1989; Wood, Pya & Säfken
    2016, JASA 111:1548–1563, §3.1). V_ρ is the inverse of the REML Hessian in the free ρ
    at ``sol.lam`` (directions with curvature below 1e-6 of the largest are left out: a λ
    at its bound or not determined, where γ̂ no longer moves with it), and
    J = ∂γ̂/∂ρ with columns −λ_k H⁻¹S_kγ̂ (for an eliminated block, S_e = I on its
    coefficients, which enter the kept rows through H⁻¹_ke = −M⁻¹Gᵀ). ``problem`` must
    carry the scale the selection used (known φ, or None). None when no λ is free."""
    free = np.array([f is None for f in fixed], dtype=bool)
    if not free.any():
        return None
    crit = _Criterion(problem, "reml", np.asarray(sol.lam, dtype=np.float64), free, 1.0)
    try:
        _, _, at = crit(np.zeros(int(free.sum())))
    except np.linalg.LinAlgError:
        return None
    vals, vecs = np.linalg.eigh(crit.last_hessian)
    keep = vals > 1e-6 * max(float(vals.max(initial=0.0)), 0.0)
    if not keep.any():
        return None
    V_rho = (vecs[:, keep] / vals[keep]) @ vecs[:, keep].T
    k = problem.A.shape[0]
    columns = []
    for j, (sl, m) in enumerate(problem.penalty_list()):
        sg = np.zeros(k)
        sg[sl] = m @ at.gamma[sl]
        columns.append(-at.lam[j] * (at.H_inv @ sg))
    if problem.eliminated_block is not None:
        g_e = at.gamma[k:]
        columns.append(at.lam[-1] * (at.H_inv @ (at.eliminated_inverse.G.T @ g_e)))
    J = np.column_stack(columns)[:, free]
    return J @ V_rho @ J.T


SWEEP_STEP = 1.0   # spacing of the sweep and of the neighbour check, in log λ (a factor e)
AXIS_POINTS = 30   # most points along one log λ (a wider range gets a wider spacing)
GRID_POINTS = {2: 13, 3: 7}  # points per axis of the full grid for two or three free λ
STARTS = 3         # Newton starts from at most this many local minima of the sweep
START_MARGIN = 5.0  # ... those within this much (unit-free criterion) of the best one
RESTARTS = 3       # restarts from a better neighbour of the optimum
NEIGHBOUR_GAIN = 1e-8  # a neighbour's optimum must be better by this share to be taken
CYCLES = 3         # coordinate sweeps (four or more free λ) until nothing moves
ROUNDING = 1e-11   # relative rounding of a criterion value (sums of n logs and log-determinants)


@dataclass
class _NewtonRun:
    """One Newton run of :func:`select`: where it started and where it stopped, and why
    (``"gradient"``: below the tolerance; ``"rounding"``: no gain the criterion's rounding
    can resolve; ``"bound"``: held at the λ limits; ``"step"``: negligible step and change;
    ``"no progress"``, ``"iterations"``, ``"singular"``: not converged)."""

    start: str
    rho0: np.ndarray
    rho: np.ndarray
    value: float
    sol: Solution | None
    iterations: int
    stopped: str

    @property
    def converged(self) -> bool:
        return self.stopped in ("gradient", "rounding", "bound", "step")


def _newton(crit: _Criterion, rho: np.ndarray, tol: float, max_iter: int,
            label: str) -> _NewtonRun:
    """Newton's method on ρ from ``rho``, with a backtracking line search."""
    rho0 = np.asarray(rho, dtype=np.float64).copy()
    value, sol = crit.value(rho0)
    if sol is None:
        return _NewtonRun(label, rho0, rho0, np.inf, None, 0, "singular")
    rho = rho0
    grad = crit.gradient(sol)
    it = 0
    while True:
        unit = crit.unit(value)  # the step's safeguards work on the unit-free criterion
        if _is_stationary(grad * unit, rho, tol):
            stopped = "gradient"
            break
        if it >= max_iter:
            stopped = "iterations"
            break
        it += 1
        exact = crit.last_hessian is not None
        hess = crit.last_hessian if exact else _fd_hessian(crit, rho)
        # REML's Hessian is analytic: its small eigenvalues are real (λ's far out on a
        # flat criterion), and a high floor there would throttle Newton to a crawl
        step = _newton_step(hess * unit, grad * unit, rho, 1e-10 if exact else 1e-7)
        if step is None:
            stopped = "bound"
            break
        gain = -float(grad @ step)  # first-order decrease of the full step (≥ 0)
        # a REML value holds n/2·log(φ): its rounding grows with n, and near the optimum a
        # Newton step gains less than that, so rises below the rounding level are allowed
        noise = 1e-13 * (1.0 + abs(value))
        accepted = False
        for _ in range(30):
            trial = np.clip(rho + step, -RHO_BOUND, RHO_BOUND)
            t_value = crit.value(trial, full=False)[0]
            if t_value <= value + 1e-4 * min(0.0, float(grad @ (trial - rho))) + noise:
                accepted = True
                break
            step *= 0.5
            if -float(grad @ step) <= noise:  # what is left to gain is below rounding
                break
        t_value, t_sol = crit.value(trial) if accepted else (np.inf, None)
        if t_sol is None:
            stopped = "rounding" if gain <= ROUNDING * (1.0 + abs(value)) else "no progress"
            break
        change = abs(value - t_value)
        rho, value, sol = trial, t_value, t_sol
        grad = crit.gradient(sol)
        if change <= tol * (1.0 + abs(value)) and np.max(np.abs(step)) < 1e-6:
            stopped = "step"
            break
    return _NewtonRun(label, rho0, rho, value, sol, it, stopped)


class _Search:
    """The global part of :func:`select`, all in the dense stage, with its history.

    The sweep runs over a grid of ρ per free λ that spans the λ where that penalty goes
    from negligible to dominant (:func:`_sweep_axes`, spacing ≤ :data:`SWEEP_STEP`):

    * one free λ: every grid point;
    * two or three: a full grid of :data:`GRID_POINTS` per axis, then from each of its
      best local minima one coordinate sweep at the fine spacing within a grid cell;
    * four or more: coordinate sweeps (each λ in turn over its grid, the others held)
      until a cycle moves nothing, at most :data:`CYCLES`; later cycles within ±3 steps.

    Newton starts from up to :data:`STARTS` local minima of the sweep (best first).
    A criterion with two dips (GCV is known to have them, Wahba 1990 §4) thus starts
    Newton in each basin the sweep can see, and the better optimum wins.
    """

    def __init__(self, crit: _Criterion):
        self.crit = crit
        self.points: list[tuple[str, np.ndarray, float]] = []
        self.runs: list[_NewtonRun] = []

    def evaluate(self, rho: np.ndarray, phase: str) -> float:
        value = self.crit.value(rho, full=False)[0]
        self.points.append((phase, np.array(rho, dtype=np.float64), float(value)))
        return value

    def sweep(self, axes: list[np.ndarray]) -> list[tuple[str, np.ndarray]]:
        k = len(axes)
        if k >= 4:
            rho = np.array([float(np.clip(0.0, ax[0], ax[-1])) for ax in axes])
            rho, _ = self.coordinate_sweeps(rho, self.evaluate(rho, "sweep"), axes)
            return [("sweep", rho)]
        coarse = axes if k == 1 else [np.linspace(ax[0], ax[-1], min(len(ax), GRID_POINTS[k]))
                                      for ax in axes]
        shape = tuple(len(ax) for ax in coarse)
        values = np.empty(shape)
        for index in np.ndindex(*shape):
            values[index] = self.evaluate(np.array([ax[i] for ax, i in zip(coarse, index)]),
                                          "sweep")
        starts = []
        minima = _local_minima(values)
        if minima:  # basins clearly worse than the best one are not worth a Newton run
            best = values[minima[0]]
            unit = self.crit.unit(best)
            minima = [i for i in minima if (values[i] - best) * unit <= START_MARGIN]
        for rank, index in enumerate(minima[:STARTS]):
            rho = np.array([ax[i] for ax, i in zip(coarse, index)])
            if k > 1:  # refine within a grid cell at the fine spacing
                width = max(ax[1] - ax[0] for ax in coarse if len(ax) > 1)
                rho = self.coordinate_cycle(rho, values[index], axes, width)[0]
            starts.append((f"sweep minimum {rank + 1}", rho))
        if not starts:  # nothing finite: start where the old fixed start was
            starts.append(("default", np.array([float(np.clip(0.0, ax[0], ax[-1]))
                                                for ax in axes])))
        return starts

    def coordinate_cycle(self, rho: np.ndarray, value: float, axes: list[np.ndarray],
                         window: float | None) -> tuple[np.ndarray, float, bool]:
        """Each free ρ in turn over its axis points (those within ``window`` of the current
        value, or all), the others held; moves to the best point found."""
        moved = False
        for j, ax in enumerate(axes):
            near = ax if window is None else ax[np.abs(ax - rho[j]) <= window + 1e-12]
            for x in near:
                if abs(x - rho[j]) < 1e-12:
                    continue
                trial = rho.copy()
                trial[j] = x
                v = self.evaluate(trial, "sweep")
                if v < value:
                    rho, value, moved = trial, v, True
        return rho, value, moved

    def coordinate_sweeps(self, rho: np.ndarray, value: float, axes: list[np.ndarray]):
        window = None
        for _ in range(CYCLES):
            rho, value, moved = self.coordinate_cycle(rho, value, axes, window)
            if not moved:
                break
            window = 3.0 * SWEEP_STEP
        return rho, value

    def better_neighbour(self, run: _NewtonRun) -> np.ndarray | None:
        """The best point one sweep step from the optimum along each ρ, if it beats the
        optimum by more than the criterion's rounding; None otherwise."""
        if run.sol is None:
            return None
        found, found_value = None, run.value - ROUNDING * (1.0 + abs(run.value))
        for j in range(len(run.rho)):
            for sign in (-1.0, 1.0):
                trial = run.rho.copy()
                trial[j] += sign * SWEEP_STEP
                if abs(trial[j]) > RHO_BOUND:
                    continue
                v = self.evaluate(trial, "check")
                if v < found_value:
                    found, found_value = trial, v
        return found

    def record(self, best: _NewtonRun) -> dict:
        """The history as plain JSON types: every sweep and check point (log λ of the free
        penalties, criterion value), every Newton run, which start won."""
        crit = self.crit
        offset = np.log(crit.base[crit.free])

        def log_lam(rho):
            return [round(float(v), 6) for v in offset + rho]

        return {
            "criterion": crit.name,
            "evaluations": int(crit.evaluations),
            "points": [[phase, log_lam(rho), value] for phase, rho, value in self.points],
            "runs": [{"start": r.start, "from": log_lam(r.rho0), "to": log_lam(r.rho),
                      "value": float(r.value), "iterations": int(r.iterations),
                      "stopped": r.stopped} for r in self.runs],
            "won": best.start,
            "value": float(best.value),
            "log_smoothing": log_lam(best.rho),
        }


def _local_minima(values: np.ndarray) -> list[tuple[int, ...]]:
    """Indices of the finite grid points no larger than any axis neighbour, best first."""
    finite = np.isfinite(values)
    is_min = finite.copy()
    for axis in range(values.ndim):
        padded = np.pad(np.where(finite, values, np.inf), [(1, 1) if a == axis else (0, 0)
                                                          for a in range(values.ndim)],
                        constant_values=np.inf)
        lo = np.take(padded, range(0, values.shape[axis]), axis=axis)
        hi = np.take(padded, range(2, values.shape[axis] + 2), axis=axis)
        is_min &= (values <= lo) & (values <= hi)
    found = [tuple(int(i) for i in idx) for idx in np.argwhere(is_min)]
    return sorted(found, key=lambda idx: values[idx])


def _sweep_axes(problem: WorkingProblem, base: np.ndarray, free: np.ndarray
                ) -> list[np.ndarray]:
    """Sweep grid of ρ = log(λ/base) per free penalty, spacing ≤ SWEEP_STEP, at most
    AXIS_POINTS points: λ from 0.1/max μ_i (the penalty negligible on every coefficient of
    its term) to 10/min μ_i (dominant on every penalized one), μ_i = S_ii/A_ii the ratio of
    penalty to data on each free coefficient (in free coordinates a single penalty is
    diagonal, so μ_i are its eigenvalues relative to the data's weight there)."""
    spans = []
    for blk in problem.blocks:
        a = np.diag(problem.A)[blk.sl]
        for m in blk.matrices:
            spans.append(_span(np.diag(m), a))
    if problem.eliminated_block is not None:  # S_e = I, A_ee = diag(d)
        spans.append(_span(np.ones(problem.eliminated_block.size), problem.eliminated_block.d))
    axes = []
    for j in np.flatnonzero(free):
        lo, hi = np.log(np.asarray(spans[j]) / base[j])
        if not (np.isfinite(lo) and np.isfinite(hi)):
            lo, hi = -5.0, 5.0
        lo, hi = np.clip([lo, max(hi, lo + 2 * SWEEP_STEP)], -RHO_BOUND, RHO_BOUND)
        count = min(AXIS_POINTS, int(np.ceil((hi - lo) / SWEEP_STEP)) + 1)
        axes.append(np.linspace(lo, hi, max(count, 3)))
    return axes


def _span(s: np.ndarray, a: np.ndarray) -> tuple[float, float]:
    """(0.1/max μ, 10/min μ) for μ = s/a over coefficients with data and penalty."""
    use = (s > 0) & (a > 1e-8 * max(float(a.max(initial=0.0)), 1e-300))
    if not use.any():
        return np.nan, np.nan
    mu = s[use] / a[use]
    return 0.1 / float(mu.max()), 10.0 / float(mu.min())


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
    return bool(np.max(np.abs(g), initial=0.0) <= tol)


def _fd_hessian(crit: _Criterion, rho: np.ndarray, h: float = 1e-4):
    k = len(rho)
    hess = np.zeros((k, k))
    for j in range(k):
        e = np.zeros(k)
        e[j] = h
        gp = crit(rho + e)[1]
        gm = crit(rho - e)[1]
        hess[:, j] = (gp - gm) / (2 * h)
    return 0.5 * (hess + hess.T)


def _newton_step(hess, grad, rho, floor: float = 1e-7, max_step: float = 5.0):
    """Newton step on the eigen-modified (positive definite) Hessian, with directions
    pinned at a bound removed; None when nothing can move."""
    movable = ~(((rho <= -RHO_BOUND + 1e-9) & (grad > 0)) | ((rho >= RHO_BOUND - 1e-9)
                                                             & (grad < 0)))
    if not movable.any():
        return None
    hm = hess[np.ix_(movable, movable)]
    vals, vecs = np.linalg.eigh(hm)
    floor = max(np.max(np.abs(vals)) * floor, 1e-14)
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
    el = problem.eliminated_block
    if el is not None:  # A_ee = diag(d), S_e = I
        a = np.linalg.norm(el.d)
        out.append(a / np.sqrt(el.size) if a > 0 else 1.0)
    return np.array(out, dtype=np.float64)

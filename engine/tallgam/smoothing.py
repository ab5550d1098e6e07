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
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from scipy import linalg

from .errors import FitError

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
class WorkingProblem:
    """The working model in constrained coordinates.

    A (p × p) = ZᵀXᵀWXZ, u (p,) = ZᵀXᵀW r, e = rᵀWr, all at the anchor γ_a (p,);
    ``blocks`` lists every term's penalties; ``n`` is the number of rows.
    """

    A: np.ndarray
    u: np.ndarray
    e: float
    anchor: np.ndarray
    blocks: list[PenaltyBlock]
    n: float
    scale: float | None = None  # known φ; None when it must be estimated

    @property
    def n_penalties(self) -> int:
        return sum(len(b.matrices) for b in self.blocks)

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
    gamma: np.ndarray
    H_inv: np.ndarray
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
    H_inv, log_det_H = factor(A + S)
    b = A @ problem.anchor + u
    gamma = H_inv @ b
    delta = gamma - problem.anchor
    dev = float(problem.e - 2.0 * delta @ u + delta @ A @ delta)
    dev = max(dev, 0.0)
    pen = float(gamma @ S @ gamma)
    log_det_S = sum(blk.logdet(lam)[0] for blk in problem.blocks)
    edf = np.einsum("ij,ji->i", H_inv, A)
    return Solution(lam=lam, gamma=gamma, H_inv=H_inv, deviance=dev, penalized=dev + pen,
                    edf=edf, log_det_H=log_det_H, log_det_S=log_det_S)


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
        k = len(pens)
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
        dp1 = np.array([lam[j] * g[sl] @ sg[j] for j, (sl, _) in enumerate(pens)])
        tr1 = np.array([lam[j] * np.sum(Hi[sl, sl] * m) for j, (sl, m) in enumerate(pens)])
        dp2 = np.diag(dp1)
        tr2 = np.diag(tr1)
        for i, (sli, mi) in enumerate(pens):
            for j in range(i, k):
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


def select(problem: WorkingProblem, criterion: str, fixed: list[float | None],
           start: np.ndarray | None = None, gamma_factor: float = 1.0,
           tol: float = 1e-9, max_iter: int = 100) -> Solution:
    """Choose the free smoothing parameters by minimising ``criterion``.

    ``fixed[k]`` is a given λ_k or None (to be chosen); with ``criterion="fixed"`` every
    λ must be given. ``start`` is a starting log relative λ for all penalties (e.g. the
    previous PIRLS step's). Returns the :class:`Solution` at the optimum.
    """
    base = _relative_scale(problem)
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


def _relative_scale(problem: WorkingProblem) -> np.ndarray:
    """λ_k that make penalty k as large as the data term on its block (ρ = 0 start)."""
    out = []
    for blk in problem.blocks:
        a = np.linalg.norm(problem.A[blk.sl, blk.sl])
        for m in blk.matrices:
            s = np.linalg.norm(m)
            out.append(a / s if s > 0 and a > 0 else 1.0)
    return np.array(out, dtype=np.float64)

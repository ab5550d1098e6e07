"""Tests of whether each term is needed, from the dense stage's final quantities.

Every term but the intercept gets a Wald-type test of "the term is zero", computed at the
end of the fit from γ̂, H⁻¹ = (A + S_λ)⁻¹, A = ZᵀXᵀWXZ and the scale φ (no data pass):

* **Unpenalized terms** (linear, categorical): the usual Wald statistic
  T = γ̂_jᵀV_j⁻¹γ̂_j, V_j = φ(H⁻¹)_jj, on all q_j coefficients of the term (for a
  categorical: every level but the base, i.e. all levels equal). Reference: χ²_q when the
  scale is known; when it is estimated, T/q against F(q, n − τ) with τ the model's EDF
  (the F form of the same test, exact for a Gaussian linear model).
* **Penalized terms** (smooths, random effects): the test of Wood (2013, Biometrika
  100(1):221–228). With f̂_j = X_jβ̂_j the term's values at the data and R_j a square root
  of the term's block of the weighted cross-product A_jj = R_jᵀR_j, the statistic is
  T = f̂ᵀV_f^{r−}f̂ = (R_jγ̂_j)ᵀ(R_jV_jR_jᵀ)^{r−}(R_jγ̂_j): the covariance inverted only on
  its r leading eigen-directions, because the penalty shrinks the rest to noise and a full
  inverse would make the test far too eager. The rank r — the reported reference degrees
  of freedom ``df`` — is τ₁ = tr(2F − F²)_jj, F = H⁻¹A, the alternative EDF of the term
  (Wood 2013; from memory), at least 1. A fractional r = k + ν is handled as in Wood
  (2013, §3; from memory): the first k − 1 eigen-directions enter fully and the k-th and
  (k+1)-th through the 2 × 2 block D^{−1/2}BD^{−1/2}, B = [[1, ρ], [ρ, ν]],
  ρ = √(ν(1−ν)/2), so that T moves continuously with r and, under the null, is
  Σ_{i<k} χ²₁ + b₊χ²₁ + b₋χ²₁ with b± = ((1 + ν) ± √(1 − ν²))/2 the eigenvalues of B
  (mean r and variance 2r, as χ²_r). Reference: that weighted sum of χ²₁ (known scale), or
  its ratio to χ²_{n−τ}/(n − τ) (estimated scale; the F form).
  The metric R_j comes from the working weights (A_jj = Z_jᵀX_jᵀWX_jZ_j), which for unit
  weights is the paper's X_jᵀX_j; the statistic does not depend on which square root.
  With REML, V_j is the Bayesian covariance φ(H⁻¹)_jj plus the part the uncertainty of the
  chosen log λ adds (:func:`tallgam.solve.smoothing.smoothing_uncertainty`; Wood, Pya &
  Säfken 2016): without it p-values under the null are too small, because λ is chosen from
  the same data (measured: Kolmogorov–Smirnov distance 0.1 from uniform over a few hundred
  simulated null fits, against 0.03–0.05 with it).

Tail probabilities: equal weights from scipy's χ² and F distributions; a pair of weights
with a known scale by integrating the closed-form density of aX₁ + bX₂ (:func:`pair_tail`);
the F form of a pair by Imhof's (1961, Biometrika 48:419–426) inversion formula, and below
1e-5, where its quadrature error would dominate, by the saddlepoint approximation of Kuonen
(1999, Biometrika 86:929–935); with more than 1e5 residual degrees of freedom the F form's
χ² limit.

A random effect eliminated in the dense stage (its L × L covariance is never formed) is
reported without a test.
"""

from __future__ import annotations

import numpy as np
from scipy import integrate, optimize, special, stats

from tallgam.solve.smoothing import Solution, null_eigenvalues

IMHOF_FLOOR = 1e-5  # below this the saddlepoint approximation gives the tail probability
CHI2_FROM = 1e5     # residual df beyond which the F form's χ² limit is used (error ~ 1/df)


def term_tests(labels: list[str], free_slices: list[slice], penalized: list[bool],
               sol: Solution, A: np.ndarray, scale: float, scale_known: bool,
               rows: float, eliminated: int | None = None,
               uncertainty: np.ndarray | None = None) -> list[dict]:
    """One dict per term but the first (the intercept): ``term``, ``test``,
    ``statistic``, ``df`` (reference degrees of freedom), ``residual_df`` (the F form's
    denominator; None with a known scale), ``reference`` (``"chi2"`` or ``"F"``),
    ``p_value``, ``edf`` and ``note``.

    ``sol`` is the final solution (γ̂, the kept block of H⁻¹, EDF per free coefficient),
    ``A`` (p_k × p_k) the kept block of the working cross-product in free coordinates,
    ``eliminated`` the index of a term eliminated in the dense stage, ``uncertainty``
    (p_k × p_k) the covariance added by the uncertainty of the chosen smoothing parameters
    (:func:`tallgam.solve.smoothing.smoothing_uncertainty`), used for penalized terms."""
    tau = float(np.sum(sol.edf))
    residual_df = None if scale_known else max(float(rows) - tau, 1.0)
    reference = "chi2" if scale_known else "F"
    ff = _ff_diagonal(sol, A)
    out = []
    for j in range(1, len(labels)):
        sl = free_slices[j]
        edf = float(np.sum(sol.edf[sl]))
        row = {"term": labels[j], "edf": edf, "residual_df": residual_df,
               "reference": reference, "note": ""}
        if j == eliminated:
            row.update(test="none", statistic=None, df=None, p_value=None,
                       note="not computed: the term's levels were eliminated in the dense "
                            "stage, so their joint covariance was not formed")
        elif sl.stop == sl.start:
            row.update(test="none", statistic=None, df=None, p_value=None,
                       note="no free coefficients")
        elif penalized[j]:
            rank = 2.0 * edf - float(np.sum(ff[sl]))
            V = scale * sol.H_inv[sl, sl]
            if uncertainty is not None:
                V = V + uncertainty[sl, sl]
                row["note"] = "covariance includes the smoothing-parameter uncertainty"
            stat, df, weights = _smooth_wald(sol.gamma[sl], V, A[sl, sl], rank)
            row.update(test="wald_truncated", statistic=stat, df=df,
                       p_value=_p_value(stat, weights, residual_df))
        else:
            stat, q = _wald(sol.gamma[sl], scale * sol.H_inv[sl, sl])
            row.update(test="wald", statistic=stat, df=float(q),
                       p_value=_p_value(stat, np.ones(q), residual_df))
        out.append(row)
    return out


def _wald(gamma: np.ndarray, V: np.ndarray) -> tuple[float, int]:
    """γᵀV⁻¹γ on V's numerical rank (eigen pseudo-inverse), and that rank."""
    vals, vecs = np.linalg.eigh(0.5 * (V + V.T))
    keep = vals > vals.max() * len(vals) * np.finfo(np.float64).eps
    z = vecs[:, keep].T @ gamma
    return float(np.sum(z * z / vals[keep])), int(keep.sum())


def _smooth_wald(gamma: np.ndarray, V: np.ndarray, A_jj: np.ndarray, rank: float
                 ) -> tuple[float, float, np.ndarray]:
    """Wood's (2013) rank-truncated statistic: (T, r, weights of the χ²₁ in its null
    distribution)."""
    alpha, q = np.linalg.eigh(0.5 * (A_jj + A_jj.T))
    on = ~null_eigenvalues(alpha) & (alpha > 0)
    R = np.sqrt(alpha[on])[:, None] * q[:, on].T          # A_jj = RᵀR on its range
    M = R @ V @ R.T
    d, U = np.linalg.eigh(0.5 * (M + M.T))
    d, U = d[::-1], U[:, ::-1]                               # leading directions first
    available = int(np.sum(d > d.max() * len(d) * np.finfo(np.float64).eps)) if d.size else 0
    if available == 0:
        return 0.0, 0.0, np.zeros(0)
    r = float(np.clip(rank, 1.0, available))
    k = int(np.floor(r))
    nu = r - k
    if k >= available:
        k, nu = available, 0.0
    z = (U.T @ (R @ gamma)) / np.sqrt(np.maximum(d, 1e-300))  # standardised, N(0, I) at null
    stat = float(np.sum(z[:k - 1] ** 2))
    if nu > 0:
        rho = np.sqrt(nu * (1.0 - nu) / 2.0)
        pair = z[k - 1:k + 1]
        stat += float(pair @ np.array([[1.0, rho], [rho, nu]]) @ pair)
        root = np.sqrt(1.0 - nu * nu)
        weights = np.concatenate([np.ones(k - 1), [(1 + nu + root) / 2, (1 + nu - root) / 2]])
    else:
        stat += float(z[k - 1] ** 2)
        weights = np.ones(k)
    return stat, r, weights


def _ff_diagonal(sol: Solution, A: np.ndarray) -> np.ndarray:
    """diag(F²) over the kept free coefficients, F = H⁻¹A of the whole problem.

    Without an eliminated block F = H⁻¹A. With one (kept k, eliminated e; G = diag(1/h)C,
    M the Schur complement, see :mod:`tallgam.solve.smoothing`): F_kk = M⁻¹(A − CᵀG),
    F_ke = M⁻¹Cᵀdiag(λ_e/h), F_ek = G(I − F_kk), so
    (F²)_kk = F_kk² + M⁻¹Cᵀdiag(λ_e/h²)C(I − F_kk)."""
    Hi = sol.H_inv
    inv = sol.eliminated_inverse
    if inv is None:
        F = Hi @ A
        return np.einsum("ij,ji->i", F, F)
    lam_e = float(sol.lam[-1])  # the eliminated block's λ comes last
    C = inv.G * inv.h[:, None]
    F = Hi @ (A - C.T @ inv.G)
    W = C.T @ (C * (lam_e / inv.h ** 2)[:, None])
    second = Hi @ W @ (np.eye(len(A)) - F)
    return np.einsum("ij,ji->i", F, F) + np.diag(second)


def _p_value(stat: float, weights: np.ndarray, residual_df: float | None) -> float:
    """P(Σ w_iχ²₁ > stat) (known scale) or P(Σ w_iχ²₁ > stat·χ²_ν/ν), ν = residual_df.
    ``weights`` are ones, or ones and a pair (b₊, b₋) from a fractional rank."""
    if not len(weights) or not np.isfinite(stat):
        return float("nan")
    q = len(weights)
    if np.allclose(weights, 1.0):
        if residual_df is None:
            return float(stats.chi2.sf(stat, q))
        return float(stats.f.sf(stat / q, q, residual_df))
    if residual_df is None or residual_df > CHI2_FROM:
        return pair_tail(q - 2, float(weights[-2]), float(weights[-1]), stat)
    return tail_probability(np.append(weights, -stat / residual_df),
                            np.append(np.ones(q), residual_df), 0.0)


def pair_tail(m: int, a: float, b: float, x: float) -> float:
    """P(χ²_m + aX₁ + bX₂ > x), X₁, X₂ independent χ²₁, a ≥ b > 0.

    Y = aX₁ + bX₂ has the density e^(−y(a+b)/(4ab))·I₀(y(a−b)/(4ab)) / (2√(ab)) for y > 0
    (the sum of two independent gamma(½) variables of different scales; for a = b it is the
    χ²₂ density scaled by a), so P = ∫₀ˣ f_Y(y)·P(χ²_m > x − y) dy + ∫ₓ^∞ f_Y(y) dy:
    integrals of positive functions, accurate far into the tail."""
    a, b = max(a, b), min(a, b)
    rate, arg = 1.0 / (2.0 * a), (a - b) / (4.0 * a * b)
    norm = 1.0 / (2.0 * np.sqrt(a * b))

    def density(y: float) -> float:  # I₀(z)e^(−z) = i0e(z): no overflow
        return norm * np.exp(-rate * y) * special.i0e(arg * y)

    kink = [min(b, x)] if 0 < b < x else None
    tail, _ = integrate.quad(density, max(x, 0.0), np.inf, epsabs=0.0, epsrel=1e-10,
                             limit=200)
    if m == 0 or x <= 0:
        return float(min(tail, 1.0))
    body, _ = integrate.quad(lambda y: density(y) * stats.chi2.sf(x - y, m), 0.0, x,
                             epsabs=0.0, epsrel=1e-10, limit=200, points=kink)
    return float(min(body + tail, 1.0))


def tail_probability(weights: np.ndarray, dofs: np.ndarray, x: float) -> float:
    """P(Σ w_i χ²_{h_i} > x) for independent central χ² variables with degrees of freedom
    h_i > 0 and real weights w_i (some may be negative).

    Imhof (1961): P = ½ + (1/π)∫₀^∞ sin θ(u) / (u ρ(u)) du with
    θ(u) = ½Σ h_i arctan(w_i u) − ½xu and ρ(u) = Π(1 + w_i²u²)^{h_i/4}; where that is
    below :data:`IMHOF_FLOOR`, the Lugannani–Rice saddlepoint approximation (Kuonen 1999).
    """
    w = np.asarray(weights, dtype=np.float64)
    h = np.asarray(dofs, dtype=np.float64)
    keep = w != 0
    w, h = w[keep], h[keep]
    if not len(w):
        return float(x < 0)
    p = _imhof(w, h, float(x))
    if p < IMHOF_FLOOR:
        p = _saddlepoint(w, h, float(x), p)
    return float(np.clip(p, 0.0, 1.0))


def _imhof(w: np.ndarray, h: np.ndarray, x: float) -> float:
    def integrand(u: float) -> float:
        if u == 0.0:  # the limit of sin θ(u)/u
            return 0.5 * (float(np.sum(h * w)) - x)
        theta = 0.5 * float(np.sum(h * np.arctan(w * u))) - 0.5 * x * u
        log_rho = 0.25 * float(np.sum(h * np.log1p((w * u) ** 2)))
        return np.sin(theta) * np.exp(-log_rho) / u

    total, _ = integrate.quad(integrand, 0.0, np.inf, limit=1000, epsabs=1e-15, epsrel=1e-11)
    return 0.5 + total / np.pi


def _saddlepoint(w: np.ndarray, h: np.ndarray, x: float, fallback: float) -> float:
    """Lugannani–Rice: P(Q > x) ≈ 1 − Φ(ŵ) + φ(ŵ)(1/v̂ − 1/ŵ), with the cumulant generating
    function K(t) = −½Σh_i log(1 − 2w_it), K'(t̂) = x, ŵ = sign(t̂)√(2(t̂x − K(t̂))),
    v̂ = t̂√K''(t̂) (Kuonen 1999)."""
    hi = 0.5 / w.max() if np.any(w > 0) else np.inf
    lo = 0.5 / w.min() if np.any(w < 0) else -np.inf
    if not np.isfinite(hi):  # no positive weight: Q ≤ 0 < x has probability 0
        return 0.0

    def k1(t):
        return float(np.sum(h * w / (1.0 - 2.0 * w * t))) - x

    # K' rises from −∞ (or its value at lo) to +∞ at hi; bracket its root on (lo, hi)
    span = hi - (lo if np.isfinite(lo) else hi - 1.0)
    a = lo + 1e-12 * span if np.isfinite(lo) else -1.0
    while not np.isfinite(lo) and k1(a) > 0:
        a = 2.0 * a - 1.0
    b = hi - 1e-15 * max(abs(hi), 1.0)
    try:
        t = optimize.brentq(k1, a, b, xtol=1e-300, rtol=4 * np.finfo(np.float64).eps,
                            maxiter=500)
    except ValueError:
        return fallback
    base = 1.0 - 2.0 * w * t
    K = -0.5 * float(np.sum(h * np.log(base)))
    K2 = float(np.sum(2.0 * h * w * w / base ** 2))
    r = np.sign(t) * np.sqrt(max(2.0 * (t * x - K), 0.0))
    v = t * np.sqrt(K2)
    if abs(r) < 1e-8 or v == 0.0:
        return fallback
    return float(stats.norm.sf(r) + stats.norm.pdf(r) * (1.0 / v - 1.0 / r))

"""Log-density of the Tweedie compound Poisson–gamma distribution, 1 < p < 2.

Series evaluation after P. K. Dunn & G. K. Smyth (2005), "Series evaluation of Tweedie
exponential dispersion model densities", *Statistics and Computing* 15:267–280.

For y > 0 the density is

    f(y; μ, φ) = (1/y) · Σ_{j≥1} W_j · exp{(y θ − κ(θ)) / φ},
    θ = μ^(1−p) / (1−p),   κ(θ) = μ^(2−p) / (2−p),
    W_j = z^j / (j! Γ(a j)),   a = (2−p)/(p−1),   z = y^a / ((p−1)^a φ^(1+a) (2−p)),

and P(Y = 0) = exp(−μ^(2−p) / (φ (2−p))). The terms W_j peak near
j_max = y^(2−p) / (φ (2−p)); only the terms within a relative tolerance of the peak are
summed, on the log scale.

Each summand T_j = W_j · exp{(y θ − κ)/φ} / y is the Poisson(j; λ) × Gamma(y; a j, s)
term of the compound representation, λ = μ^(2−p)/(φ(2−p)), s = φ(p−1)μ^(p−1). Written
with Stirling's series and the deviance bd0(x, m) = x log(x/m) + m − x,

    log T_j = ½ log a − log(2π y) − δ(j) − δ(a j) − bd0(j, λ) − bd0(a j, y/s),

where δ is the Stirling remainder of log Γ(x+1). Unlike the direct form, this never
subtracts quantities of size j log j, so it keeps full precision when j_max is huge
(large y, small φ, p near 1). The deviance/Stirling split follows C. Loader (2000),
"Fast and accurate computation of binomial probabilities".
"""

from __future__ import annotations

import math
import warnings

import numba
import numpy as np

__all__ = ["tweedie_logpdf"]

# Terms smaller than this fraction of the peak term are dropped.
_LOG_TOL = math.log(1e-17)
# Cap on the number of series terms per observation. Reached only when
# (p−1)·j_max exceeds ~3e9 (e.g. y ~ 1e10 with φ ~ 1e-5).
_MAX_TERMS = 1_000_000
_HALF_LOG_2PI = 0.5 * math.log(2.0 * math.pi)
# Arrays at least this long are evaluated on all threads.
_PARALLEL_MIN = 20_000


def tweedie_logpdf(y, mu, phi, power) -> np.ndarray:
    """Elementwise log-density of the Tweedie distribution with 1 < power < 2.

    Parameters
    ----------
    y : array_like
        Response, y >= 0. ``y == 0`` gives the log of the point mass P(Y = 0).
    mu : array_like
        Mean, > 0.
    phi : array_like
        Dispersion, > 0, with Var(Y) = phi · mu**power. Per-row values (phi / w) allowed.
    power : float
        Variance power, strictly between 1 and 2.

    Returns
    -------
    ndarray of float with the broadcast shape of ``y``, ``mu``, ``phi``: ``-inf`` where
    y < 0 or y == inf; ``nan`` where y is nan or mu or phi is not positive and finite.
    """
    p = float(power)
    if not 1.0 < p < 2.0:
        raise ValueError(f"power must lie strictly between 1 and 2, got {power}")
    y, mu, phi = np.broadcast_arrays(
        np.asarray(y, dtype=float), np.asarray(mu, dtype=float), np.asarray(phi, dtype=float)
    )
    out = np.full(y.shape, np.nan)
    ok = (mu > 0) & np.isfinite(mu) & (phi > 0) & np.isfinite(phi)

    out[ok & ((y < 0) | (y == np.inf))] = -np.inf

    zero = ok & (y == 0)
    out[zero] = -(mu[zero] ** (2 - p)) / (phi[zero] * (2 - p))

    pos = ok & (y > 0) & np.isfinite(y)
    if np.any(pos):
        vals, truncated = _logpdf_positive(y[pos], mu[pos], phi[pos], p)
        out[pos] = vals
        if truncated:
            warnings.warn(
                f"Tweedie series truncated to {_MAX_TERMS} terms for {truncated} value(s); "
                "density may be underestimated",
                RuntimeWarning,
                stacklevel=2,
            )
    return out


def _logpdf_positive(y, mu, phi, p):
    """log f(y) for y > 0 (1-d arrays), and the number of truncated series."""
    # Starting the thread pool costs far more than a short array takes serially.
    kernel = _logpdf_parallel if y.size >= _PARALLEL_MIN else _logpdf_serial
    return kernel(y, mu, phi, p)


@numba.njit(cache=True, parallel=True)
def _logpdf_parallel(y, mu, phi, p):
    n = y.shape[0]
    out = np.empty(n)
    truncated = np.zeros(n, dtype=np.int64)
    for i in numba.prange(n):
        out[i], truncated[i] = _logpdf_one(y[i], mu[i], phi[i], p)
    return out, truncated.sum()


@numba.njit(cache=True)
def _logpdf_serial(y, mu, phi, p):
    n = y.shape[0]
    out = np.empty(n)
    truncated = 0
    for i in range(n):
        out[i], t = _logpdf_one(y[i], mu[i], phi[i], p)
        truncated += t
    return out, truncated


@numba.njit(cache=True)
def _logpdf_one(y, mu, phi, p):
    """(log f(y), 1 if the series hit the term cap else 0) for one y > 0."""
    a = (2 - p) / (p - 1)
    lam = mu ** (2 - p) / (phi * (2 - p))
    u = y / (phi * (p - 1) * mu ** (p - 1))
    const = 0.5 * math.log(a) - 2.0 * _HALF_LOG_2PI - math.log(y)
    j_max = math.exp((2 - p) * math.log(y) - math.log(phi) - math.log(2 - p))
    # float64 holds every integer up to 2**53 exactly.
    j0 = min(max(np.rint(j_max), 1.0), 2.0**52)
    # Log-sum-exp relative to the largest term seen so far. log T_j is concave in j
    # (log Γ is convex): walking away from the peak, once a term is below the tolerance
    # all further ones are too.
    peak = _log_term(j0, a, const, lam, u)
    total = 1.0
    truncated = 0
    for step in (1.0, -1.0):
        j = j0 + step
        while j >= 1.0:
            if abs(j - j0) > _MAX_TERMS // 2:
                truncated = 1
                break
            t = _log_term(j, a, const, lam, u)
            if t < peak + _LOG_TOL:
                break
            if t > peak:
                total = total * math.exp(peak - t) + 1.0
                peak = t
            else:
                total += math.exp(t - peak)
            j += step
    return peak + math.log(total), truncated


@numba.njit(cache=True)
def _log_term(j, a, const, lam, u):
    """log T_j (see module docstring); ``const`` = ½ log a − log(2π y)."""
    aj = a * j
    return const - _stirlerr(j) - _stirlerr(aj) - _bd0(j, lam) - _bd0(aj, u)


@numba.njit(cache=True)
def _stirlerr(x):
    """δ(x) = log Γ(x+1) − [(x + ½) log x − x + ½ log 2π], for x > 0."""
    if x <= 15.0:
        return math.lgamma(x + 1.0) - (x + 0.5) * math.log(x) + x - _HALF_LOG_2PI
    # Asymptotic series; the first omitted term is below 2e-16 for x > 15.
    r = 1.0 / x
    r2 = r * r
    return r * (1 / 12 - r2 * (1 / 360 - r2 * (1 / 1260 - r2 * (1 / 1680 - r2 / 1188))))


@numba.njit(cache=True)
def _bd0(x, m):
    """x log(x/m) + m − x for x, m > 0, without cancellation when x ≈ m."""
    d = x - m
    if abs(d) >= 0.1 * (x + m):
        return x * math.log(x / m) + m - x
    # Series in v = (x−m)/(x+m): bd0 = (x−m) v + 2x Σ_{k≥1} v^(2k+1)/(2k+1).
    v = d / (x + m)
    v2 = v * v
    s = d * v
    ej = 2.0 * x * v
    for k in range(1, 30):
        ej *= v2
        s_new = s + ej / (2 * k + 1)
        if s_new == s:
            break
        s = s_new
    return s

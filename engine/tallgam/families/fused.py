"""The working model of a data pass in one numba loop, for every family and link.

A pass needs, per row, the mean μ = g⁻¹(η), the working weight w·(dμ/dη)²/V(μ), the working
residual (y − μ)/(dμ/dη), and sums: deviance, Pearson statistic, log-likelihood, the
intercept-and-offset model's IRLS step, a family parameter's score. In numpy that is some
thirty passes over arrays; here it is one loop (:func:`working_loop`), compiled once and
cached, that takes the link and the family's formulas as small integer codes.

A family offers its loop with :meth:`~tallgam.families.base.Family.working_kernel`, which
returns a :class:`FusedKernel` naming its formulas (:data:`POWER`, :data:`BINOMIAL`,
:data:`NEGATIVE_BINOMIAL`) and parameters; the link gives its code (:data:`LINK_CODES`). A
family defined elsewhere needs none: without a fused loop its pass takes the numpy path,
which is the reference the loop is tested against (tests/test_fused.py).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numba
import numpy as np

from tallgam.families.base import EPS_MU

#: the sums a pass takes from the working model, in the order the loop returns them
FUSED_SUMS = ("invalid_rows", "weight", "resid_ss", "deviance", "pearson", "response_ss",
              "centred_ss", "centred_sum", "log_weight", "loglik", "loglik_lo", "loglik_hi",
              "null_deviance", "null_weight", "null_score", "nuisance_score",
              "nuisance_info", "bad")

LINK_CODES = {"identity": 0, "log": 1, "logit": 2, "probit": 3, "cloglog": 4, "inverse": 5,
              "inverse_squared": 6, "sqrt": 7}

# variance, deviance and log-likelihood formulas
POWER = 0              # V = μ^p: gaussian p = 0, poisson 1, gamma 2, inverse gaussian 3,
#                        tweedie 1 < p < 2
BINOMIAL = 1           # V = μ(1 − μ)
NEGATIVE_BINOMIAL = 2  # V = μ + μ²/θ

# what the log-likelihood sum holds
LL_NONE = 0            # not evaluated in a pass (0)
LL_AT_ONE = 1          # at φ = 1 (scale known)
LL_THREE_SCALES = 2    # at φ·e^(−δ), φ, φ·e^(+δ) (loglik_lo, loglik, loglik_hi)

_SQRT_2PI = math.sqrt(2.0 * math.pi)
#: log Γ(k + 1) for the counts most rows hold
LGAMMA_TABLE = np.array([math.lgamma(k + 1.0) for k in range(256)])


@dataclass(frozen=True)
class FusedKernel:
    """A family's fused loop with one link: call it as
    ``kernel(fitted, o, y, w, null_eta, y_mean, scales, wz, r)`` to fill the working
    weights ``wz`` and residuals ``r`` (n,) from η − o = ``fitted`` and get the sums of
    :data:`FUSED_SUMS` (a tuple). ``scales`` (3,) are φ·e^(−δ), φ, φ·e^(+δ)."""

    link: int
    formula: int
    power: float = 0.0          # p of the power variance
    theta: float = 1.0          # θ of the negative binomial
    floor: float = -math.inf    # the mean space (floor, ceiling), open
    ceiling: float = math.inf
    loglik: int = LL_NONE
    nuisance: bool = False      # sum the score and information of log θ

    def __call__(self, fitted, o, y, w, null_eta, y_mean, scales, wz, r) -> tuple:
        return working_loop(fitted, o, y, w, float(null_eta), float(y_mean),
                            np.asarray(scales, dtype=np.float64), self.link, self.formula,
                            self.power, self.theta, self.floor, self.ceiling, self.loglik,
                            self.nuisance, LGAMMA_TABLE, wz, r)


def kernel_for(family, link, formula: int, **params) -> FusedKernel | None:
    """The :class:`FusedKernel` of ``family`` with ``link`` (None when the link has no
    fused form): the mean space and the log-likelihood mode come from the family."""
    code = LINK_CODES.get(link.name)
    if code is None:
        return None
    if family.scale_known:
        ll = LL_AT_ONE
    elif family.loglik_at_three_scales:
        ll = LL_THREE_SCALES
    else:
        ll = LL_NONE
    lo = -math.inf if family.mean_floor is None else float(family.mean_floor)
    hi = math.inf if family.mean_ceiling is None else float(family.mean_ceiling)
    return FusedKernel(code, formula, floor=lo, ceiling=hi, loglik=ll,
                       nuisance=family.estimates_nuisance, **params)


# ------------------------------------------------------------------------------ links

@numba.njit(cache=True)
def link_inverse(code, eta):
    """μ = g⁻¹(η) as :mod:`tallgam.families.links` computes it."""
    if code == 0:
        return eta
    if code == 1:
        return math.exp(min(eta, 700.0))
    if code == 2:
        return 1.0 / (1.0 + math.exp(-eta))
    if code == 3:
        return 0.5 * math.erfc(-eta / math.sqrt(2.0))
    if code == 4:
        return -math.expm1(-math.exp(min(eta, 700.0)))
    if code == 5:
        return 1.0 / eta
    if code == 6:
        return 1.0 / math.sqrt(eta) if eta >= 0.0 else math.nan
    return eta * eta


@numba.njit(cache=True)
def link_derivative(code, eta):
    """dμ/dη as :mod:`tallgam.families.links` computes it."""
    if code == 0:
        return 1.0
    if code == 1:
        return math.exp(min(eta, 700.0))
    if code == 2:
        p = link_inverse(2, eta)
        return max(p * (1.0 - p), 1e-300)
    if code == 3:
        return max(math.exp(-0.5 * eta * eta) / _SQRT_2PI, 1e-300)
    if code == 4:
        e = min(eta, 700.0)
        return max(math.exp(e - math.exp(e)), 1e-300)
    if code == 5:
        return -1.0 / (eta * eta)
    if code == 6:
        return -0.5 * eta ** -1.5 if eta >= 0.0 else math.nan
    return 2.0 * eta


# ------------------------------------------------------------------------------ families

@numba.njit(cache=True)
def _xlogy(x, y):
    return 0.0 if x == 0.0 else x * math.log(y)


@numba.njit(cache=True)
def _xlogx_ratio(y, mu):
    """y·log(y/μ) as xlogy(y, y) − xlogy(y, μ)."""
    return _xlogy(y, y) - _xlogy(y, mu)


@numba.njit(cache=True)
def variance(formula, mu, p, theta):
    if formula == POWER:
        if p == 0.0:
            return 1.0
        if p == 1.0:
            return mu
        if p == 2.0:
            return mu * mu
        if p == 3.0:
            return mu ** 3
        return mu ** p
    if formula == BINOMIAL:
        return mu * (1.0 - mu)
    return mu + mu * mu / theta


@numba.njit(cache=True)
def unit_deviance(formula, y, mu, p, theta):
    if formula == POWER:
        if p == 0.0:
            return (y - mu) ** 2
        if p == 1.0:
            return 2.0 * (_xlogx_ratio(y, mu) - (y - mu))
        if p == 2.0:
            return 2.0 * (-math.log(y / mu) + (y - mu) / mu)
        if p == 3.0:
            return (y - mu) ** 2 / (y * mu * mu)
        return 2.0 * (y ** (2.0 - p) / ((1.0 - p) * (2.0 - p))
                      - y * mu ** (1.0 - p) / (1.0 - p) + mu ** (2.0 - p) / (2.0 - p))
    if formula == BINOMIAL:
        return 2.0 * (_xlogx_ratio(y, mu) + _xlogx_ratio(1.0 - y, 1.0 - mu))
    t = theta
    return 2.0 * (_xlogx_ratio(y, mu) - (y + t) * math.log((y + t) / (mu + t)))


@numba.njit(cache=True)
def _lgamma1(y, table):
    """log Γ(y + 1), from ``table`` for small whole numbers."""
    k = int(y)
    if k == y and 0 <= k < table.shape[0]:
        return table[k]
    return math.lgamma(y + 1.0)


@numba.njit(cache=True)
def row_loglik(formula, y, mu, w, scale, p, theta, table):
    """log f(y; μ, φ/w), the family's density (the prior weight included)."""
    if formula == POWER:
        if p == 1.0:
            return w * (_xlogy(y, mu) - mu - _lgamma1(y, table))
        if p == 2.0:
            shape = w / scale
            return (_xlogy(shape, shape * y / mu) - shape * y / mu - math.log(y)
                    - math.lgamma(shape))
        if p == 3.0:
            return -0.5 * (math.log(2.0 * math.pi * scale * y ** 3 / w)
                           + w * (y - mu) ** 2 / (scale * y * mu * mu))
        return 0.0
    if formula == BINOMIAL:
        k = w * y
        return (math.lgamma(w + 1.0) - math.lgamma(k + 1.0) - math.lgamma(w - k + 1.0)
                + _xlogy(k, mu) + _xlogy(w - k, 1.0 - mu))
    t = theta
    return w * (math.lgamma(y + t) - math.lgamma(t) - _lgamma1(y, table)
                + t * math.log(t / (t + mu)) + _xlogy(y, mu / (t + mu)))


@numba.njit(cache=True)
def theta_score(y, mu, t):
    """(d/dθ, d²/dθ²) of the negative binomial log-density per row, y a whole number:
    ψ(y+θ) − ψ(θ) = Σ_{k<y} 1/(θ+k) and ψ′(y+θ) − ψ′(θ) = −Σ_{k<y} 1/(θ+k)²."""
    d1 = 0.0
    d2 = 0.0
    for k in range(int(y)):
        inv = 1.0 / (t + k)
        d1 += inv
        d2 -= inv * inv
    tm = t + mu
    g = d1 + math.log(t) + 1.0 - math.log(tm) - (y + t) / tm
    h = d2 + 1.0 / t - 2.0 / tm + (y + t) / (tm * tm)
    return g, h


@numba.njit(cache=True)
def _clip(mu, floor, ceiling):
    if mu < floor + EPS_MU:
        return floor + EPS_MU
    if mu > ceiling - EPS_MU:
        return ceiling - EPS_MU
    return mu


@numba.njit(cache=True, parallel=True)
def working_loop(fitted, o, y, w, null_eta, y_mean, scales, link, formula, p, theta, floor,
                 ceiling, ll_mode, nuisance, table, wz, r):
    """Fill ``wz``, ``r`` (n,) and return the sums of :data:`FUSED_SUMS`; equal to the
    numpy path of :func:`tallgam.passes.run.working_pass` to rounding."""
    n = y.shape[0]
    invalid = 0.0
    weight = 0.0
    resid_ss = 0.0
    deviance = 0.0
    pearson = 0.0
    response_ss = 0.0
    centred_ss = 0.0
    centred_sum = 0.0
    log_weight = 0.0
    loglik = 0.0
    loglik_lo = 0.0
    loglik_hi = 0.0
    null_dev = 0.0
    null_w = 0.0
    null_score = 0.0
    score = 0.0
    info = 0.0
    bad = 0.0
    for i in numba.prange(n):
        eta = fitted[i] + o[i]
        raw = link_inverse(link, eta)
        if not (math.isfinite(raw) and raw > floor and raw < ceiling):
            invalid += 1.0
        mu = _clip(raw, floor, ceiling)
        d = link_derivative(link, eta)
        var = variance(formula, mu, p, theta)
        wi = w[i]
        yi = y[i]
        wzi = wi * d * d / var
        e = yi - mu
        ri = e / d
        if not (math.isfinite(wzi) and math.isfinite(ri)):
            bad += 1.0
        wz[i] = wzi
        r[i] = ri
        weight += wi
        resid_ss += wzi * ri * ri
        deviance += wi * unit_deviance(formula, yi, mu, p, theta)
        pearson += wi * e * e / var
        response_ss += wi * e * e
        c = yi - y_mean
        centred_ss += wi * c * c
        centred_sum += wi * c
        log_weight += math.log(wi)
        if ll_mode == LL_AT_ONE:
            loglik += row_loglik(formula, yi, mu, wi, 1.0, p, theta, table)
        elif ll_mode == LL_THREE_SCALES:
            loglik_lo += row_loglik(formula, yi, mu, wi, scales[0], p, theta,
                                     table)
            loglik += row_loglik(formula, yi, mu, wi, scales[1], p, theta,
                                     table)
            loglik_hi += row_loglik(formula, yi, mu, wi, scales[2], p, theta,
                                     table)
        if nuisance:
            g, h = theta_score(yi, mu, theta)
            score += wi * g
            info += wi * h
        eta0 = o[i] + null_eta
        mu0 = _clip(link_inverse(link, eta0), floor, ceiling)
        d0 = link_derivative(link, eta0)
        w0 = wi * d0 * d0 / variance(formula, mu0, p, theta)
        null_dev += wi * unit_deviance(formula, yi, mu0, p, theta)
        null_w += w0
        null_score += w0 * (yi - mu0) / d0
    info = theta * theta * info + theta * score
    score = theta * score
    return (invalid, weight, resid_ss, deviance, pearson, response_ss, centred_ss,
            centred_sum, log_weight, loglik, loglik_lo, loglik_hi, null_dev, null_w,
            null_score, score, info, bad)

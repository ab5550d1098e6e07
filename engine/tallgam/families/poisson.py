"""The poisson family: counts, V(μ) = μ, φ = 1; with the log link its working model runs in
one fused numba loop."""

from __future__ import annotations

import math

import numba
import numpy as np
from scipy import special

from tallgam.families.base import EPS_MU, Family, xlogy_ratio

LGAMMA_TABLE = np.array([math.lgamma(k + 1.0) for k in range(256)])
COUNT_RULES = (
    ("{y} < 0", "negative counts"),
    ("{y} <> floor({y})", "non-integer counts"),
)


class Poisson(Family):
    name = "poisson"
    default_link = "log"
    links = ("log", "identity", "sqrt")
    scale_known = True
    mean_floor = 0.0
    response_rules = COUNT_RULES

    def variance(self, mu):
        return mu

    def unit_deviance(self, y, mu):
        return 2.0 * (xlogy_ratio(y, mu) - (y - mu))

    def loglik(self, y, mu, w, scale):
        return float(np.sum(w * (special.xlogy(y, mu) - mu - special.gammaln(y + 1.0))))

    def start_mu(self, y, w):
        return y + 0.1

    def working_kernel(self, link):
        if link.name != "log":
            return None
        return _poisson_log


def _poisson_log(fitted, o, y, w, null_eta, y_mean, wz, r):
    return poisson_log_working(fitted, o, y, w, null_eta, y_mean, LGAMMA_TABLE, wz, r)


@numba.njit(cache=True)
def _lgamma1(y, table):
    k = int(y)
    if k == y and 0 <= k < table.shape[0]:
        return table[k]
    return math.lgamma(y + 1.0)


@numba.njit(cache=True, parallel=True)
def poisson_log_working(fitted, o, y, w, null_eta, y_mean, table, wz, r):
    """Fill wz, r (working weights and residuals) from η − o = ``fitted`` and return the
    pass's sums: (invalid_rows, weight, resid_ss, deviance, pearson, response_ss,
    centred_ss, centred_sum, log_weight, loglik, null_deviance, null_weight, null_score,
    bad), ``bad`` counting rows whose weight or residual is not finite. Equal to the numpy
    path of :func:`tallgam.passes.run.working_pass` to rounding."""
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
    null_dev = 0.0
    null_w = 0.0
    null_score = 0.0
    bad = 0.0
    for i in numba.prange(n):
        eta = fitted[i] + o[i]
        d = math.exp(min(eta, 700.0))
        if not (math.isfinite(d) and d > 0.0):
            invalid += 1.0
        mu = max(d, EPS_MU)
        wi = w[i]
        yi = y[i]
        wzi = wi * d * d / mu
        ri = (yi - mu) / d
        if not (math.isfinite(wzi) and math.isfinite(ri)):
            bad += 1.0
        wz[i] = wzi
        r[i] = ri
        lmu = math.log(mu)
        ylogy = yi * math.log(yi) if yi > 0.0 else 0.0
        ylogmu = yi * lmu if yi != 0.0 else 0.0
        e = yi - mu
        weight += wi
        resid_ss += wzi * ri * ri
        deviance += wi * 2.0 * ((ylogy - ylogmu) - e)
        pearson += wi * e * e / mu
        response_ss += wi * e * e
        c = yi - y_mean
        centred_ss += wi * c * c
        centred_sum += wi * c
        log_weight += math.log(wi)
        loglik += wi * (ylogmu - mu - _lgamma1(yi, table))
        eta0 = o[i] + null_eta
        d0 = math.exp(min(eta0, 700.0))
        mu0 = max(d0, EPS_MU)
        w0 = wi * d0 * d0 / mu0
        ylogmu0 = yi * math.log(mu0) if yi != 0.0 else 0.0
        null_dev += wi * 2.0 * ((ylogy - ylogmu0) - (yi - mu0))
        null_w += w0
        null_score += w0 * (yi - mu0) / d0
    return (invalid, weight, resid_ss, deviance, pearson, response_ss, centred_ss,
            centred_sum, log_weight, loglik, null_dev, null_w, null_score, bad)

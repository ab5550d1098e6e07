"""The negative binomial family: over-dispersed counts, V(μ) = μ + μ²/θ, with θ given or
estimated by maximum likelihood between data passes."""

from __future__ import annotations

import numpy as np
from scipy import special

from tallgam.errors import SpecError
from tallgam.families import fused
from tallgam.families.base import Family, xlogy_ratio
from tallgam.families.poisson import COUNT_RULES


class NegativeBinomial(Family):
    """Negative binomial with V(μ) = μ + μ²/θ.

    ``theta`` fixed, or ``None`` to estimate it by maximum likelihood alongside the
    coefficients: one Newton step on log θ after every data pass (the score and information
    are sums over rows, accumulated in the pass).
    """

    name = "negative_binomial"
    default_link = "log"
    links = ("log", "identity", "sqrt")
    scale_known = True
    mean_floor = 0.0
    response_rules = COUNT_RULES

    def __init__(self, theta: float | None = None, *, _estimate: bool | None = None):
        self.estimate = theta is None if _estimate is None else _estimate
        theta = 1.0 if theta is None else float(theta)
        if not theta > 0:
            raise SpecError(f"negative_binomial theta must be positive, got {theta}")
        self.theta = theta

    def params(self):
        return {"theta": None if self.estimate else self.theta}

    @property
    def estimates_nuisance(self) -> bool:
        return self.estimate

    def fitted_params(self):
        return {"theta": self.theta}

    def nuisance_sums(self, y, mu, w):
        t = self.theta
        tm = t + mu
        g = (special.digamma(y + t) - special.digamma(t) + np.log(t) + 1.0 - np.log(tm)
             - (y + t) / tm)
        h = (special.polygamma(1, y + t) - special.polygamma(1, t) + 1.0 / t - 2.0 / tm
             + (y + t) / (tm * tm))
        score = t * float(np.sum(w * g))            # d loglik / d log θ
        info = t * t * float(np.sum(w * h)) + score  # d² loglik / d (log θ)²
        return score, info

    def with_nuisance(self, score, info):
        if info < 0:
            step = -score / info
        else:  # not concave here: move uphill by a bounded amount
            step = np.sign(score)
        step = float(np.clip(step, -2.0, 2.0))
        theta = float(np.clip(self.theta * np.exp(step), 1e-8, 1e8))
        return NegativeBinomial(theta, _estimate=self.estimate)

    def started_at(self, params):
        theta = params.get("theta")
        if self.estimate and isinstance(theta, (int, float)) and theta > 0:
            return NegativeBinomial(float(theta), _estimate=True)
        return self

    def nuisance_moved(self, other):
        return abs(np.log(other.theta / self.theta)) > 1e-10

    def variance(self, mu):
        return mu + mu * mu / self.theta

    def unit_deviance(self, y, mu):
        t = self.theta
        return 2.0 * (xlogy_ratio(y, mu) - (y + t) * np.log((y + t) / (mu + t)))

    def loglik(self, y, mu, w, scale):
        t = self.theta
        ll = (special.gammaln(y + t) - special.gammaln(t) - special.gammaln(y + 1)
              + t * np.log(t / (t + mu)) + special.xlogy(y, mu / (t + mu)))
        return float(np.sum(w * ll))

    def start_mu(self, y, w):
        return y + 0.1

    def working_kernel(self, link):
        return fused.kernel_for(self, link, fused.NEGATIVE_BINOMIAL, theta=self.theta)

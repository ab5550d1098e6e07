"""The poisson family: counts, V(μ) = μ, φ = 1."""

from __future__ import annotations

import numpy as np
from scipy import special

from tallgam.families import fused
from tallgam.families.base import Family, xlogy_ratio

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
        return fused.kernel_for(self, link, fused.POWER, power=1.0)

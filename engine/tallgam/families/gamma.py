"""The gamma family: positive amounts (claim severity), V(μ) = μ², unknown scale."""

from __future__ import annotations

import numpy as np
from scipy import special

from tallgam.families import fused
from tallgam.families.base import Family


class Gamma(Family):
    name = "gamma"
    default_link = "log"
    links = ("log", "inverse", "identity")
    mean_floor = 0.0
    response_rules = (("{y} <= 0", "non-positive values"),)

    def variance(self, mu):
        return mu * mu

    def unit_deviance(self, y, mu):
        return 2.0 * (-np.log(y / mu) + (y - mu) / mu)

    def loglik(self, y, mu, w, scale):
        shape = w / scale
        return float(np.sum(
            special.xlogy(shape, shape * y / mu) - shape * y / mu - np.log(y)
            - special.gammaln(shape)))

    def working_kernel(self, link):
        return fused.kernel_for(self, link, fused.POWER, power=2.0)

"""The inverse gaussian family: positive amounts with a heavier tail, V(μ) = μ³."""

from __future__ import annotations

import numpy as np

from tallgam.families import fused
from tallgam.families.base import Family


class InverseGaussian(Family):
    name = "inverse_gaussian"
    default_link = "log"
    links = ("log", "inverse_squared", "inverse", "identity")
    mean_floor = 0.0
    response_rules = (("{y} <= 0", "non-positive values"),)

    def variance(self, mu):
        return mu ** 3

    def unit_deviance(self, y, mu):
        return (y - mu) ** 2 / (y * mu * mu)

    def loglik(self, y, mu, w, scale):
        return float(-0.5 * np.sum(
            np.log(2 * np.pi * scale * y ** 3 / w) + w * (y - mu) ** 2 / (scale * y * mu * mu)))

    def working_kernel(self, link):
        return fused.kernel_for(self, link, fused.POWER, power=3.0)

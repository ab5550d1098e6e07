"""The gaussian family: V(μ) = 1, unknown scale; with the identity link one pass is exact."""

from __future__ import annotations

import numpy as np

from tallgam.families import fused
from tallgam.families.base import Family


class Gaussian(Family):
    name = "gaussian"
    default_link = "identity"
    links = ("identity", "log", "inverse")
    variance_explained = True

    def variance(self, mu):
        return np.ones_like(mu)

    def unit_deviance(self, y, mu):
        return (y - mu) ** 2

    def loglik(self, y, mu, w, scale):
        return float(-0.5 * np.sum(w * (y - mu) ** 2 / scale + np.log(2 * np.pi * scale / w)))

    def exact_with(self, link):
        return link.name == "identity"

    @property
    def loglik_at_three_scales(self) -> bool:
        return False  # closed form in the deviance and the scale

    def final_loglik(self, sums, deviance, scale, scale_pass, step):
        n = sums["rows"]
        return float(-0.5 * (deviance / scale + n * np.log(2 * np.pi * scale)
                             - sums["log_weight"]))

    def working_kernel(self, link):
        return fused.kernel_for(self, link, fused.POWER, power=0.0)

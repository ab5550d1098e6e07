"""The binomial family: a 0/1 outcome, or a proportion with the number of trials as prior
weights; V(μ) = μ(1 − μ), φ = 1."""

from __future__ import annotations

import numpy as np
from scipy import special

from tallgam.families import fused
from tallgam.families.base import Family, xlogy_ratio


class Binomial(Family):
    """Response a 0/1 outcome or a proportion; prior weights are the numbers of trials."""

    name = "binomial"
    default_link = "logit"
    links = ("logit", "probit", "cloglog")
    scale_known = True
    mean_floor = 0.0
    mean_ceiling = 1.0
    response_rules = (("{y} < 0 OR {y} > 1", "proportions outside [0, 1]"),)

    def rules(self, weights_given):
        if weights_given:
            return self.response_rules
        return self.response_rules + (
            ("{y} > 0 AND {y} < 1", "proportions between 0 and 1 but no numbers of trials "
             "(give them as weights, or use a 0/1 response)"),)

    def variance(self, mu):
        return mu * (1.0 - mu)

    def unit_deviance(self, y, mu):
        return 2.0 * (xlogy_ratio(y, mu) + xlogy_ratio(1.0 - y, 1.0 - mu))

    def loglik(self, y, mu, w, scale):
        k = w * y
        comb = special.gammaln(w + 1) - special.gammaln(k + 1) - special.gammaln(w - k + 1)
        return float(np.sum(comb + special.xlogy(k, mu) + special.xlogy(w - k, 1.0 - mu)))

    def start_mu(self, y, w):
        return (w * y + 0.5) / (w + 1.0)

    def start_mean(self, y_mean):
        return float(np.clip(y_mean, 0.01, 0.99))

    def working_kernel(self, link):
        return fused.kernel_for(self, link, fused.BINOMIAL)

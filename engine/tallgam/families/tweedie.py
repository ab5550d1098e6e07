"""The Tweedie family, 1 < power < 2: compound Poisson–gamma, exact zeros and positive
amounts (pure premium). V(μ) = μ^p; the power is given, or chosen by maximising the
profile log-likelihood (series density of Dunn & Smyth 2005,
:mod:`tallgam.families.tweedie_density`)."""

from __future__ import annotations

import numpy as np

from tallgam.errors import SpecError
from tallgam.families import fused
from tallgam.families.base import Family, Profiled


class Tweedie(Family):
    """Compound Poisson–gamma, 1 < power < 2.

    ``power`` is a number in (1, 2), or ``"profile"`` (or a list of candidate powers) to
    choose it by profile likelihood: the power maximising the log-likelihood of the fitted
    model over (1, 2), found by a bounded one-dimensional search started from the
    candidates.
    """

    name = "tweedie"
    default_link = "log"
    links = ("log",)
    mean_floor = 0.0
    response_rules = (("{y} < 0", "negative values"),)
    loglik_in_pass = False  # the series density costs ~1 µs a row: evaluated once, at the end
    PROFILE_GRID = (1.1, 1.3, 1.5, 1.7, 1.9)
    LOWER, UPPER = 1.01, 1.99

    def __init__(self, power: float | str | list = 1.5):
        self.grid: tuple[float, ...] | None = None
        if isinstance(power, str):
            if power != "profile":
                raise SpecError(f"tweedie power must be a number in (1, 2) or 'profile', "
                                f"got {power!r}")
            self.grid = self.PROFILE_GRID
            power = 1.5
        elif isinstance(power, (list, tuple)):
            self.grid = tuple(sorted(float(p) for p in power))
            if len(self.grid) < 2:
                raise SpecError("give at least two tweedie powers to choose from")
            power = self.grid[len(self.grid) // 2]
        for p in (self.grid or ()) + (float(power),):
            if not 1.0 < p < 2.0:
                raise SpecError(f"tweedie power must lie strictly between 1 and 2, got {p}")
        self.power = float(power)

    def params(self):
        if self.grid is not None:
            return {"power": "profile" if self.grid == self.PROFILE_GRID else list(self.grid)}
        return {"power": self.power}

    def fitted_params(self):
        return {"power": self.power}

    def profiled(self):
        if self.grid is None:
            return None
        return Profiled("power", min(self.LOWER, self.grid[0]), max(self.UPPER, self.grid[-1]),
                        self.grid)

    def at(self, value):
        out = Tweedie(float(value))
        out.chosen_by_profile = True
        return out

    def variance(self, mu):
        return mu ** self.power

    def unit_deviance(self, y, mu):
        p = self.power
        return 2.0 * (np.power(y, 2 - p) / ((1 - p) * (2 - p))
                      - y * np.power(mu, 1 - p) / (1 - p) + np.power(mu, 2 - p) / (2 - p))

    def loglik(self, y, mu, w, scale):
        from tallgam.families.tweedie_density import tweedie_logpdf

        return float(np.sum(tweedie_logpdf(y, mu, scale / w, self.power)))

    def start_mu(self, y, w):
        return y + 0.1

    def working_kernel(self, link):
        return fused.kernel_for(self, link, fused.POWER, power=self.power)

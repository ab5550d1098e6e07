"""Exponential-family distributions: variance, deviance, log-likelihood, support.

Definitions follow McCullagh & Nelder (1989), *Generalized Linear Models*, 2nd ed.:
the unit deviance d(y, μ) with D = Σ wᵢ d(yᵢ, μᵢ), the variance function V(μ) with
Var(y) = φ V(μ) / w. A family is paired with a link (:mod:`tallgam.links`) by the model;
the family only names its default and the links it accepts.
"""

from __future__ import annotations

import numpy as np
from scipy import special

from tallgam.errors import SpecError, nearest
from tallgam.families.links import Link, get_link

_EPS = 1e-10


def _xlogy_ratio(y: np.ndarray, mu: np.ndarray) -> np.ndarray:
    """y·log(y/μ), taken as 0 where y == 0."""
    return special.xlogy(y, y) - special.xlogy(y, mu)


class Family:
    """Base class. Subclasses set the class attributes and the numerical methods."""

    name = "family"
    default_link = "identity"
    links: tuple[str, ...] = ()
    scale_known = False  # True: φ = 1 (poisson, binomial, negative binomial)
    loglik_in_pass = True  # False: too costly per row to evaluate in every data pass
    response_rules: tuple[tuple[str, str], ...] = ()  # (SQL condition on {y}, message)

    def variance(self, mu: np.ndarray) -> np.ndarray:
        raise NotImplementedError

    def unit_deviance(self, y: np.ndarray, mu: np.ndarray) -> np.ndarray:
        raise NotImplementedError

    def loglik(self, y: np.ndarray, mu: np.ndarray, w: np.ndarray, scale: float) -> float:
        """Σ log f(yᵢ; μᵢ, φ/wᵢ) (a number, not per row)."""
        raise NotImplementedError

    def clip_mu(self, mu: np.ndarray) -> np.ndarray:
        """Keep μ inside the family's open mean space (guards PIRLS steps)."""
        return mu

    def working_kernel(self, link: Link):
        """A numba function computing a pass's working model in one loop with ``link``
        (signature of :func:`tallgam.passes.kernels.poisson_log_working`), or None: numpy path."""
        return None

    def valid_mu(self, mu: np.ndarray) -> np.ndarray:
        """Which means lie in the family's mean space (a PIRLS step leaving it is halved)."""
        return np.isfinite(mu)

    def deviance(self, y: np.ndarray, mu: np.ndarray, w: np.ndarray | None = None) -> float:
        d = self.unit_deviance(y, mu)
        return float(np.sum(d if w is None else w * d))

    def check_link(self, link: Link) -> None:
        if self.links and link.name not in self.links:
            raise SpecError(
                f"the {link.name!r} link is not available for the {self.name} family; "
                f"use one of {', '.join(self.links)}"
            )

    @property
    def estimates_nuisance(self) -> bool:
        """True when the family has an extra parameter estimated between passes."""
        return False

    def nuisance_sums(self, y, mu, w) -> tuple[float, float]:
        """(score, information) of the extra parameter on the log scale, summed over rows."""
        return 0.0, 0.0

    def with_nuisance(self, score: float, info: float) -> Family:
        """The family after one Newton step of its extra parameter (itself if none)."""
        return self

    def params(self) -> dict:
        return {}

    def fitted_params(self) -> dict:
        """The parameter values in use (estimated ones filled in)."""
        return self.params()

    def to_dict(self) -> dict:
        return {"name": self.name, **self.params()}

    def __repr__(self) -> str:
        args = ", ".join(f"{k}={v!r}" for k, v in self.params().items())
        return f"{self.name}({args})"

    def __eq__(self, other) -> bool:
        return type(self) is type(other) and self.params() == other.params()

    def __hash__(self) -> int:
        return hash((self.name, tuple(self.params().items())))


class Gaussian(Family):
    name = "gaussian"
    default_link = "identity"
    links = ("identity", "log", "inverse")

    def variance(self, mu):
        return np.ones_like(mu)

    def unit_deviance(self, y, mu):
        return (y - mu) ** 2

    def loglik(self, y, mu, w, scale):
        return float(-0.5 * np.sum(w * (y - mu) ** 2 / scale + np.log(2 * np.pi * scale / w)))


class Poisson(Family):
    name = "poisson"
    default_link = "log"
    links = ("log", "identity", "sqrt")
    scale_known = True
    response_rules = (
        ("{y} < 0", "negative counts"),
        ("{y} <> floor({y})", "non-integer counts"),
    )

    def variance(self, mu):
        return mu

    def unit_deviance(self, y, mu):
        return 2.0 * (_xlogy_ratio(y, mu) - (y - mu))

    def loglik(self, y, mu, w, scale):
        return float(np.sum(w * (special.xlogy(y, mu) - mu - special.gammaln(y + 1.0))))

    def clip_mu(self, mu):
        return np.maximum(mu, _EPS)

    def valid_mu(self, mu):
        return np.isfinite(mu) & (mu > 0)

    def working_kernel(self, link):
        from tallgam.passes import kernels

        return kernels.poisson_log_working if link.name == "log" else None


class Binomial(Family):
    """Response a 0/1 outcome or a proportion; prior weights are the numbers of trials."""

    name = "binomial"
    default_link = "logit"
    links = ("logit", "probit", "cloglog")
    scale_known = True
    response_rules = (("{y} < 0 OR {y} > 1", "proportions outside [0, 1]"),)

    def variance(self, mu):
        return mu * (1.0 - mu)

    def unit_deviance(self, y, mu):
        return 2.0 * (_xlogy_ratio(y, mu) + _xlogy_ratio(1.0 - y, 1.0 - mu))

    def loglik(self, y, mu, w, scale):
        k = w * y
        comb = special.gammaln(w + 1) - special.gammaln(k + 1) - special.gammaln(w - k + 1)
        return float(np.sum(comb + special.xlogy(k, mu) + special.xlogy(w - k, 1.0 - mu)))

    def clip_mu(self, mu):
        return np.clip(mu, _EPS, 1.0 - _EPS)

    def valid_mu(self, mu):
        return np.isfinite(mu) & (mu > 0) & (mu < 1)


class Gamma(Family):
    name = "gamma"
    default_link = "log"
    links = ("log", "inverse", "identity")
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

    def clip_mu(self, mu):
        return np.maximum(mu, _EPS)

    def valid_mu(self, mu):
        return np.isfinite(mu) & (mu > 0)


class InverseGaussian(Family):
    name = "inverse_gaussian"
    default_link = "log"
    links = ("log", "inverse_squared", "inverse", "identity")
    response_rules = (("{y} <= 0", "non-positive values"),)

    def variance(self, mu):
        return mu ** 3

    def unit_deviance(self, y, mu):
        return (y - mu) ** 2 / (y * mu * mu)

    def loglik(self, y, mu, w, scale):
        return float(-0.5 * np.sum(
            np.log(2 * np.pi * scale * y ** 3 / w) + w * (y - mu) ** 2 / (scale * y * mu * mu)))

    def clip_mu(self, mu):
        return np.maximum(mu, _EPS)

    def valid_mu(self, mu):
        return np.isfinite(mu) & (mu > 0)


class Tweedie(Family):
    """Compound Poisson–gamma, 1 < power < 2: exact zeros and positive amounts.

    ``power`` is a number in (1, 2), or ``"profile"`` (or a list of candidate powers) to
    choose it by profile likelihood: the model is fitted at each candidate and the power
    with the highest log-likelihood (series density, Dunn & Smyth 2005) is kept.
    """

    name = "tweedie"
    default_link = "log"
    links = ("log",)
    response_rules = (("{y} < 0", "negative values"),)
    loglik_in_pass = False  # the series density costs ~1 µs a row: evaluated once, at the end
    PROFILE_GRID = (1.1, 1.2, 1.3, 1.4, 1.5, 1.6, 1.7, 1.8, 1.9)

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

    def at_power(self, power: float) -> Tweedie:
        return Tweedie(power)

    def variance(self, mu):
        return mu ** self.power

    def unit_deviance(self, y, mu):
        p = self.power
        return 2.0 * (np.power(y, 2 - p) / ((1 - p) * (2 - p))
                      - y * np.power(mu, 1 - p) / (1 - p) + np.power(mu, 2 - p) / (2 - p))

    def loglik(self, y, mu, w, scale):
        from tallgam.families.tweedie_density import tweedie_logpdf

        return float(np.sum(tweedie_logpdf(y, mu, scale / w, self.power)))

    def clip_mu(self, mu):
        return np.maximum(mu, _EPS)

    def valid_mu(self, mu):
        return np.isfinite(mu) & (mu > 0)


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
    response_rules = Poisson.response_rules

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

    def variance(self, mu):
        return mu + mu * mu / self.theta

    def unit_deviance(self, y, mu):
        t = self.theta
        return 2.0 * (_xlogy_ratio(y, mu) - (y + t) * np.log((y + t) / (mu + t)))

    def loglik(self, y, mu, w, scale):
        t = self.theta
        ll = (special.gammaln(y + t) - special.gammaln(t) - special.gammaln(y + 1)
              + t * np.log(t / (t + mu)) + special.xlogy(y, mu / (t + mu)))
        return float(np.sum(w * ll))

    def clip_mu(self, mu):
        return np.maximum(mu, _EPS)

    def valid_mu(self, mu):
        return np.isfinite(mu) & (mu > 0)


FAMILIES: dict[str, type[Family]] = {
    cls.name: cls
    for cls in (Gaussian, Poisson, Binomial, Gamma, InverseGaussian, Tweedie, NegativeBinomial)
}


def get_family(family: str | Family, **params) -> Family:
    """A family object from a name ('poisson', 'tweedie', ...) or a Family instance."""
    if isinstance(family, Family):
        return family
    key = str(family).lower().replace("-", "_").replace(" ", "_")
    if key not in FAMILIES:
        raise SpecError(f"unknown family {family!r}{nearest(key, FAMILIES)}; choose one of "
                        f"{', '.join(FAMILIES)}")
    return FAMILIES[key](**params)


def family_from_dict(d: dict) -> Family:
    d = dict(d)
    return get_family(d.pop("name"), **d)


def resolve(family: str | Family, link: str | Link | None) -> tuple[Family, Link]:
    """The (family, link) pair of a model, checking the link suits the family."""
    fam = get_family(family)
    lnk = get_link(link if link is not None else fam.default_link)
    fam.check_link(lnk)
    return fam, lnk

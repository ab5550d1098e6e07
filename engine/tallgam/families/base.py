"""What every family offers: the distribution's functions, and everything the iteration
driver asks of it, so no code outside the families tests which family it is.

Definitions follow McCullagh & Nelder (1989), *Generalized Linear Models*, 2nd ed.: the
unit deviance d(y, μ) with D = Σ wᵢ d(yᵢ, μᵢ), the variance function V(μ) with
Var(y) = φ V(μ) / w. A family is paired with a link (:mod:`tallgam.families.links`) by the
model; the family names its default link and the links it accepts.

Beyond the distribution a family offers: starting means (:meth:`Family.start_mu`), its
mean space (``mean_floor``/``mean_ceiling``: :meth:`Family.clip_mu`,
:meth:`Family.valid_mu`), whether one pass is exact (:meth:`Family.exact_with`), a fused
numba working-model loop (:meth:`Family.working_kernel`), a nuisance parameter estimated
between passes (:meth:`Family.with_nuisance`), a parameter chosen by profile likelihood
(:meth:`Family.profiled`), the parameters AIC counts, and how its log-likelihood is
obtained at the end of a fit (:meth:`Family.final_loglik`).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import special

from tallgam.errors import SpecError
from tallgam.families.links import Link

EPS_MU = 1e-10   # distance kept from the boundary of the mean space


def xlogy_ratio(y: np.ndarray, mu: np.ndarray) -> np.ndarray:
    """y·log(y/μ), taken as 0 where y == 0."""
    return special.xlogy(y, y) - special.xlogy(y, mu)


@dataclass(frozen=True)
class Profiled:
    """A family parameter chosen by maximising the profile log-likelihood over
    [``lower``, ``upper``], starting from the ``candidates``."""

    name: str
    lower: float
    upper: float
    candidates: tuple[float, ...]


class Family:
    """Base class. Subclasses set the class attributes and the numerical methods."""

    name = "family"
    default_link = "identity"
    links: tuple[str, ...] = ()
    scale_known = False      # True: φ = 1 (poisson, binomial, negative binomial)
    loglik_in_pass = True    # False: too costly per row to evaluate in every data pass
    mean_floor: float | None = None    # the mean space is (floor, ceiling), open
    mean_ceiling: float | None = None
    response_rules: tuple[tuple[str, str], ...] = ()  # (SQL condition on {y}, message)
    chosen_by_profile = False  # set on the family :meth:`at` returns: a profiled value
    variance_explained = False  # True: R² (share of variance accounted for) means something

    # ------------------------------------------------------------------ distribution
    def variance(self, mu: np.ndarray) -> np.ndarray:
        raise NotImplementedError

    def unit_deviance(self, y: np.ndarray, mu: np.ndarray) -> np.ndarray:
        raise NotImplementedError

    def loglik(self, y: np.ndarray, mu: np.ndarray, w: np.ndarray, scale: float) -> float:
        """Σ log f(yᵢ; μᵢ, φ/wᵢ) (a number, not per row)."""
        raise NotImplementedError

    def deviance(self, y: np.ndarray, mu: np.ndarray, w: np.ndarray | None = None) -> float:
        d = self.unit_deviance(y, mu)
        return float(np.sum(d if w is None else w * d))

    def rules(self, weights_given: bool) -> tuple[tuple[str, str], ...]:
        """Rules the response must follow, as (SQL condition on ``{y}`` that marks a bad
        row, what is wrong); ``weights_given`` says whether the model has prior weights."""
        return self.response_rules

    # ------------------------------------------------------------------ mean space
    def clip_mu(self, mu: np.ndarray) -> np.ndarray:
        """Keep μ inside the family's open mean space (guards PIRLS steps)."""
        if self.mean_floor is not None or self.mean_ceiling is not None:
            lo = -np.inf if self.mean_floor is None else self.mean_floor + EPS_MU
            hi = np.inf if self.mean_ceiling is None else self.mean_ceiling - EPS_MU
            return np.clip(mu, lo, hi)
        return mu

    def valid_mu(self, mu: np.ndarray) -> np.ndarray:
        """Which means lie in the family's mean space (a PIRLS step leaving it is halved)."""
        ok = np.isfinite(mu)
        if self.mean_floor is not None:
            ok &= mu > self.mean_floor
        if self.mean_ceiling is not None:
            ok &= mu < self.mean_ceiling
        return ok

    # ------------------------------------------------------------------ PIRLS
    def start_mu(self, y: np.ndarray, w: np.ndarray) -> np.ndarray:
        """Per-row starting means from the response (McCullagh & Nelder 1989, §2.5: μ₀
        from y, nudged inside the mean space)."""
        return self.clip_mu(np.array(y, dtype=np.float64, copy=True))

    def start_mean(self, y_mean: float) -> float:
        """A starting mean for the whole data from the response's mean."""
        return float(self.clip_mu(np.array([y_mean]))[0])

    def exact_with(self, link: Link) -> bool:
        """True when the working model with ``link`` is the model itself, so one data pass
        gives the exact normal equations (gaussian with the identity link)."""
        return False

    def working_kernel(self, link: Link):
        """A function computing a pass's working model in one numba loop with ``link``:
        ``fn(fitted, o, y, w, null_eta, y_mean, wz, r) -> sums`` (see
        :data:`tallgam.passes.run.FUSED_SUMS`), or None for the numpy path."""
        return None

    # ------------------------------------------------------------------ extra parameters
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

    def nuisance_moved(self, other: Family) -> bool:
        """True when ``other`` (after :meth:`with_nuisance`) differs from this one enough to
        make deviances of the two incomparable."""
        return False

    def started_at(self, params: dict) -> Family:
        """This family with its estimated parameters started at ``params`` (a previous
        fit's :meth:`fitted_params`, for a refit); itself when it estimates none."""
        return self

    def profiled(self) -> Profiled | None:
        """The parameter chosen by profile likelihood, or None."""
        return None

    def at(self, value: float) -> Family:
        """This family with its profiled parameter set to ``value``."""
        raise SpecError(f"the {self.name} family has no parameter chosen by profile "
                        "likelihood")

    @property
    def n_estimated_parameters(self) -> int:
        """Parameters besides the coefficients that the fit estimates (AIC counts them):
        the scale when unknown, a nuisance parameter, a profiled one."""
        return ((0 if self.scale_known else 1) + (1 if self.estimates_nuisance else 0)
                + (1 if self.profiled() is not None or self.chosen_by_profile else 0))

    # ------------------------------------------------------------------ log-likelihood
    @property
    def loglik_at_three_scales(self) -> bool:
        """A pass evaluates the log-likelihood at three scales around its estimate, so it
        can be interpolated to the final scale (families whose density needs φ)."""
        return not self.scale_known and self.loglik_in_pass

    def final_loglik(self, sums: dict, deviance: float, scale: float, scale_pass: float,
                     step: float) -> float | None:
        """The log-likelihood at the fitted means and ``scale`` from a pass's sums, or
        None when it needs a pass of its own (``scale_pass``: the scale the pass used;
        ``step``: the log-scale step of the three scales it evaluated)."""
        if self.scale_known:
            return sums["loglik"]
        if not self.loglik_in_pass:
            return None
        t = np.log(scale / scale_pass) / step
        lo, mid, hi = sums["loglik_lo"], sums["loglik"], sums["loglik_hi"]
        return float(mid + 0.5 * t * (hi - lo) + 0.5 * t * t * (hi - 2 * mid + lo))

    # ------------------------------------------------------------------ identity
    def check_link(self, link: Link) -> None:
        if self.links and link.name not in self.links:
            raise SpecError(
                f"the {link.name!r} link is not available for the {self.name} family; "
                f"use one of {', '.join(self.links)}"
            )

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

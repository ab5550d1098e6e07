"""Link functions g: μ ↦ η, each a small object with its inverse and derivative.

Every link also renders its inverse as DuckDB SQL, so a fitted model can be exported as
one SQL expression. Links are looked up by name with :func:`get_link`.
"""

from __future__ import annotations

import numpy as np
from scipy import special

from tallgam.errors import SpecError, nearest

_TINY = 1e-300


class Link:
    """Base class: ``link(mu) = eta``, ``inverse(eta) = mu``, ``mu_eta(eta) = dμ/dη``."""

    name = "link"
    multiplicative = False  # exp of a link-scale difference is a ratio of means (log)

    def link(self, mu: np.ndarray) -> np.ndarray:
        raise NotImplementedError

    def inverse(self, eta: np.ndarray) -> np.ndarray:
        raise NotImplementedError

    def mu_eta(self, eta: np.ndarray) -> np.ndarray:
        raise NotImplementedError

    def sql_inverse(self, eta: str) -> str:
        """DuckDB SQL for μ given the SQL text of η."""
        raise NotImplementedError

    def __repr__(self) -> str:
        return f"link {self.name!r}"

    def __eq__(self, other) -> bool:
        return type(self) is type(other)

    def __hash__(self) -> int:
        return hash(self.name)


class Identity(Link):
    name = "identity"

    def link(self, mu):
        return mu

    def inverse(self, eta):
        return eta

    def mu_eta(self, eta):
        return np.ones_like(eta)

    def sql_inverse(self, eta):
        return f"({eta})"


class Log(Link):
    name = "log"
    multiplicative = True

    def link(self, mu):
        return np.log(mu)

    def inverse(self, eta):
        return np.exp(np.minimum(eta, 700.0))

    def mu_eta(self, eta):
        return np.exp(np.minimum(eta, 700.0))

    def sql_inverse(self, eta):
        return f"exp({eta})"


class Logit(Link):
    name = "logit"

    def link(self, mu):
        return special.logit(mu)

    def inverse(self, eta):
        return special.expit(eta)

    def mu_eta(self, eta):
        p = special.expit(eta)
        return np.maximum(p * (1.0 - p), _TINY)

    def sql_inverse(self, eta):
        return f"(1.0 / (1.0 + exp(-({eta}))))"


class Probit(Link):
    name = "probit"

    def link(self, mu):
        return special.ndtri(mu)

    def inverse(self, eta):
        return special.ndtr(eta)

    def mu_eta(self, eta):
        return np.maximum(np.exp(-0.5 * eta * eta) / np.sqrt(2.0 * np.pi), _TINY)

    def sql_inverse(self, eta):
        # Φ(η) through erf, which DuckDB lacks: Φ(x) = ½ erfc(−x/√2); not exported for now
        raise SpecError("the probit link cannot be exported to SQL (DuckDB has no normal CDF)")


class CLogLog(Link):
    name = "cloglog"

    def link(self, mu):
        return np.log(-np.log1p(-mu))

    def inverse(self, eta):
        return -np.expm1(-np.exp(np.minimum(eta, 700.0)))

    def mu_eta(self, eta):
        e = np.minimum(eta, 700.0)
        return np.maximum(np.exp(e - np.exp(e)), _TINY)

    def sql_inverse(self, eta):
        return f"(1.0 - exp(-exp({eta})))"


class Inverse(Link):
    name = "inverse"

    def link(self, mu):
        return 1.0 / mu

    def inverse(self, eta):
        return 1.0 / eta

    def mu_eta(self, eta):
        return -1.0 / (eta * eta)

    def sql_inverse(self, eta):
        return f"(1.0 / ({eta}))"


class InverseSquared(Link):
    name = "inverse_squared"

    def link(self, mu):
        return 1.0 / (mu * mu)

    def inverse(self, eta):
        return 1.0 / np.sqrt(eta)

    def mu_eta(self, eta):
        return -0.5 * eta ** -1.5

    def sql_inverse(self, eta):
        return f"(1.0 / sqrt({eta}))"


class Sqrt(Link):
    name = "sqrt"

    def link(self, mu):
        return np.sqrt(mu)

    def inverse(self, eta):
        return eta * eta

    def mu_eta(self, eta):
        return 2.0 * eta

    def sql_inverse(self, eta):
        return f"(({eta}) * ({eta}))"


LINKS: dict[str, type[Link]] = {
    cls.name: cls for cls in (Identity, Log, Logit, Probit, CLogLog, Inverse, InverseSquared, Sqrt)
}


def get_link(link: str | Link) -> Link:
    """A link object from a name ('log', 'logit', ...) or a Link instance."""
    if isinstance(link, Link):
        return link
    key = str(link).lower().replace("-", "_")
    if key == "1/mu^2":
        key = "inverse_squared"
    if key not in LINKS:
        raise SpecError(f"unknown link {link!r}{nearest(key, LINKS)}; choose one of "
                        f"{', '.join(LINKS)}")
    return LINKS[key]()

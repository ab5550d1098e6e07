"""Distributions: one module per family, each offering what the engine asks of it (see
:mod:`tallgam.families.base`), and links (:mod:`tallgam.families.links`).

A family defined elsewhere joins with :func:`register`; ``get_family(name)`` finds it.
"""

from __future__ import annotations

from tallgam.errors import SpecError, nearest
from tallgam.families.base import Family, Profiled
from tallgam.families.binomial import Binomial
from tallgam.families.gamma import Gamma
from tallgam.families.gaussian import Gaussian
from tallgam.families.inverse_gaussian import InverseGaussian
from tallgam.families.links import Link, get_link
from tallgam.families.negative_binomial import NegativeBinomial
from tallgam.families.poisson import Poisson
from tallgam.families.tweedie import Tweedie

FAMILIES: dict[str, type[Family]] = {}


def register(cls: type[Family]) -> type[Family]:
    """Make a family known by its ``name`` (to spec files, model files and
    ``get_family``); usable as a class decorator. Registering a name again replaces it."""
    name = getattr(cls, "name", None)
    if not isinstance(name, str) or not name or name == "family":
        raise SpecError(f"a family class needs a 'name', got {name!r}")
    FAMILIES[name] = cls
    return cls


def unregister(name: str) -> None:
    """Forget a registered family (e.g. one a test defined)."""
    FAMILIES.pop(name, None)


for _cls in (Gaussian, Poisson, Binomial, Gamma, InverseGaussian, Tweedie, NegativeBinomial):
    register(_cls)


def get_family(family: str | Family, **params) -> Family:
    """A family object from a name ('poisson', 'tweedie', ...) or a Family instance."""
    if isinstance(family, Family):
        return family
    key = str(family).lower().replace("-", "_").replace(" ", "_")
    if key not in FAMILIES:
        raise SpecError(f"unknown family {family!r}{nearest(key, FAMILIES)}; choose one of "
                        f"{', '.join(FAMILIES)}")
    try:
        return FAMILIES[key](**params)
    except TypeError as exc:
        raise SpecError(f"bad parameters for the {key} family: {exc}") from None


def family_from_dict(d: dict) -> Family:
    d = dict(d)
    return get_family(d.pop("name"), **d)


def resolve(family: str | Family, link: str | Link | None) -> tuple[Family, Link]:
    """The (family, link) pair of a model, checking the link suits the family."""
    fam = get_family(family)
    lnk = get_link(link if link is not None else fam.default_link)
    fam.check_link(lnk)
    return fam, lnk


__all__ = ["FAMILIES", "Binomial", "Family", "Gamma", "Gaussian", "InverseGaussian", "Link",
           "NegativeBinomial", "Poisson", "Profiled", "Tweedie", "family_from_dict",
           "get_family", "get_link", "register", "resolve", "unregister"]

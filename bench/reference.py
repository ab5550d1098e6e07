"""The issue's reference model on the synthetic motor book (bench/make_book.py).

Poisson claim frequency with exposure (offset ln exposure): eight splines of size 10 on
integer-valued and continuous columns, one 6 × 6 tensor-product surface on (lat, lon),
two categoricals and one random effect with 500 levels. No column is used twice.

    from reference import reference_model
    fit = reference_model().fit("bench/data/book-1000000/book-*.parquet")
"""

from __future__ import annotations

import tallgam as tg

RESPONSE = "claim_count"
EXPOSURE = "exposure"
SPLINES = ("driver_age", "vehicle_age", "bonus_level", "power", "tenure",
           "density", "vehicle_value", "mileage")
INTEGER_SPLINES = ("driver_age", "vehicle_age", "bonus_level", "power", "tenure")
SPLINE_SIZE = 10
SURFACE = ("lat", "lon")
SURFACE_SIZE = (6, 6)
CATEGORICALS = ("region", "fuel")
RANDOM_EFFECT = "vehicle_group"
COLUMNS = (RESPONSE, EXPOSURE, *SPLINES, *SURFACE, *CATEGORICALS, RANDOM_EFFECT)


def reference_terms() -> list:
    """The reference model's terms, in order."""
    return ([tg.spline(c, size=SPLINE_SIZE) for c in SPLINES]
            + [tg.surface(*SURFACE, size=SURFACE_SIZE)]
            + [tg.categorical(c) for c in CATEGORICALS]
            + [tg.random_effect(RANDOM_EFFECT)])


AMOUNT = "claim_amount"
TWEEDIE_POWER = 1.5


def reference_model(family: str = "poisson") -> tg.Model:
    """The reference terms (8 splines, a 6 × 6 surface, 2 categoricals and a 500-level
    random effect) for claim frequency (``"poisson"``: claim counts with exposure), claim
    severity (``"gamma"``: mean claim size over the rows with claims, claim counts as
    weights) or pure premium (``"tweedie"``: amount per unit of exposure, power 1.5,
    exposure as weights)."""
    terms = reference_terms()
    if family == "poisson":
        return tg.Model(response=RESPONSE, family="poisson", exposure=EXPOSURE, terms=terms)
    if family == "gamma":
        return tg.Model(response=f"{AMOUNT} / {RESPONSE}", family="gamma", weights=RESPONSE,
                        where=f"{RESPONSE} > 0", terms=terms)
    if family == "tweedie":
        return tg.Model(response=f"{AMOUNT} / {EXPOSURE}",
                        family=tg.get_family("tweedie", power=TWEEDIE_POWER),
                        weights=EXPOSURE, terms=terms)
    raise ValueError(f"no reference model for the {family} family")

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


def reference_model() -> tg.Model:
    """Poisson frequency with exposure: 8 splines, a 6 × 6 surface, 2 categoricals and a
    500-level random effect."""
    return tg.Model(response=RESPONSE, family="poisson", exposure=EXPOSURE,
                    terms=reference_terms())

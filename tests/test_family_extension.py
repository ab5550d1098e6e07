"""A family defined entirely here joins through the public registry and fits through
PIRLS with its own starting values: a Poisson variant under another name starting every
row at the response's mean. Its fit must equal the built-in Poisson fit (the model is the
same; only the starting point differs) and survive the model file."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

import tallgam as tg
from tallgam.families import Poisson, register, unregister

STARTS: list[int] = []


class FlatStartPoisson(Poisson):
    name = "poisson_flat_start_for_test"

    def start_mu(self, y, w):
        STARTS.append(len(y))
        return np.full(len(y), max(float(np.mean(y)), 0.05))

    def working_kernel(self, link):
        return None  # the numpy path of the pass, with this family's functions


@pytest.fixture(autouse=True)
def registered():
    register(FlatStartPoisson)
    yield
    unregister(FlatStartPoisson.name)


def test_a_family_defined_outside_the_package_fits(tmp_path):
    # synthetic truth: claim counts with a smooth age effect and a categorical region
    rng = np.random.default_rng(5)
    n = 6_000
    df = pd.DataFrame({"age": rng.uniform(18, 80, n), "region": rng.choice(list("abc"), n),
                       "exposure": rng.uniform(0.1, 1.0, n)})
    eta = -2.0 + 0.4 * np.cos(df.age / 12.0) + df.region.map({"a": 0.0, "b": 0.2, "c": -0.3})
    df["claims"] = rng.poisson(df.exposure * np.exp(eta))
    terms = [tg.spline("age", size=8), tg.categorical("region")]
    mine = tg.Model("claims", family="poisson_flat_start_for_test", exposure="exposure",
                    terms=terms).fit(df)
    builtin = tg.Model("claims", family="poisson", exposure="exposure", terms=terms).fit(df)
    assert STARTS and sum(STARTS) == n   # its starting means were used, on every row
    assert mine.converged and mine.model.family.name == "poisson_flat_start_for_test"
    np.testing.assert_allclose(mine.coefficients_raw, builtin.coefficients_raw, atol=1e-6)
    assert abs(mine.deviance - builtin.deviance) <= 1e-8 * builtin.deviance
    path = tmp_path / "m.json"
    mine.save(path)
    again = tg.load(path)
    assert again.model.family.name == "poisson_flat_start_for_test"
    np.testing.assert_array_equal(again.predict(df.iloc[:50]), mine.predict(df.iloc[:50]))

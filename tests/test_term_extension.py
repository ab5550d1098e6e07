"""A term kind defined entirely here, outside the package, joins through the public
registry and then works everywhere a built-in kind does: fitting, prediction with standard
errors, SQL export (checked in DuckDB), relativity tables, the HTML report and the model
file. The kind is a step function on given cut points with a ridge penalty (common
practice: banded rating factors with credibility shrinkage)."""

from __future__ import annotations

from dataclasses import dataclass

import duckdb
import numpy as np
import pandas as pd
import pytest

import tallgam as tg
from tallgam.terms import sqltext
from tallgam.terms.base import (
    Basis,
    TermSpec,
    check_smoothing,
    register,
    sum_to_zero,
    unregister,
)


@dataclass(frozen=True)
class StepSpec(TermSpec):
    column: str
    cuts: tuple[float, ...] = ()
    smoothing: float | None = None

    kind = "step_for_test"

    def __post_init__(self):
        object.__setattr__(self, "cuts", tuple(float(c) for c in self.cuts))
        check_smoothing(self.label, self.smoothing)

    def build(self, profile):
        return StepBasis(self)


class StepBasis(Basis):
    width = 1

    @property
    def n_raw(self):
        return len(self.spec.cuts) + 1

    def encode(self, cols, idx, val, col0):
        idx[:, 0] = col0 + np.searchsorted(self.spec.cuts, cols[self.spec.column], side="right")
        val[:, 0] = 1.0

    def penalties(self):
        return [np.eye(self.n_raw)]

    def constraint(self, colsum):
        return sum_to_zero(colsum)

    def coefficient_names(self):
        edges = ["-inf", *map(str, self.spec.cuts), "inf"]
        return [f"[{a}, {b})" for a, b in zip(edges[:-1], edges[1:])]

    def sql(self, coef):
        x = sqltext.column(self.spec.column)
        whens = " ".join(f"WHEN {x} < {sqltext.num(c)} THEN {sqltext.num(v)}"
                         for c, v in zip(self.spec.cuts, coef))
        return f"(CASE {whens} ELSE {sqltext.num(coef[-1])} END)"

    @classmethod
    def from_dict(cls, spec, d):
        return cls(spec)


@pytest.fixture(scope="module", autouse=True)
def registered():
    register(StepSpec, StepBasis)
    yield
    unregister(StepSpec.kind)


@pytest.fixture(scope="module")
def book():
    # synthetic truth: a claim rate stepping with a vehicle's power band, a smooth age curve
    rng = np.random.default_rng(11)
    n = 40_000
    df = pd.DataFrame({"power": rng.uniform(40, 200, n), "age": rng.uniform(18, 80, n),
                       "exposure": rng.uniform(0.2, 1.0, n)})
    step = np.select([df.power < 70, df.power < 110, df.power < 150], [-0.3, 0.0, 0.25], 0.5)
    df["claims"] = rng.poisson(df.exposure * np.exp(-1.0 + step + 0.01 * (df.age - 45)))
    return df


@pytest.fixture(scope="module")
def fit(book):
    model = tg.Model("claims", family="poisson", exposure="exposure",
                     terms=[StepSpec("power", cuts=(70, 110, 150)), tg.spline("age", size=6)])
    return model.fit(book)


def test_the_new_kind_fits_and_recovers_the_steps(fit):
    assert fit.converged
    rel = fit.relativities().tables["step_for_test(power)"]
    by_band = pd.DataFrame({"power": rel.column("power").to_numpy(),
                            "r": rel.column("relativity").to_numpy()})
    band = np.searchsorted([70, 110, 150], by_band.power, side="right")
    means = np.log(by_band.groupby(band).r.mean().to_numpy())
    np.testing.assert_allclose(np.diff(means), [0.3, 0.25, 0.25], atol=0.1)
    assert "training_weight" in rel.column_names
    assert fit.smoothing["step_for_test(power)"] > 0


def test_predictions_with_standard_errors_and_sql_agree(fit, book):
    sample = book.iloc[::37].reset_index(drop=True)
    mu, se = fit.predict(sample, se=True)
    assert np.all(se > 0) and np.all(np.isfinite(se))
    con = duckdb.connect()
    con.register("sample", sample)
    sql_mu = np.array([r[0] for r in con.execute(f"SELECT {fit.to_sql()} FROM sample")
                      .fetchall()])
    np.testing.assert_allclose(sql_mu, mu, rtol=1e-9)


def test_model_file_round_trip_and_report(fit, book, tmp_path):
    path = tmp_path / "step.json"
    fit.save(path)
    again = tg.load(path)
    sample = book.iloc[::53]
    np.testing.assert_array_equal(again.predict(sample), fit.predict(sample))
    coef = again.coefficients.to_pandas()
    assert "[70.0, 110.0)" in set(coef.name)
    from tallgam.outputs.report import write_report

    out = write_report(again, tmp_path / "step.html")
    html = open(out, encoding="utf-8").read()
    # the term appears under its title (its column) and its kind's name
    assert ">power <span" in html and "step_for_test" in html and html.count("<img ") >= 2

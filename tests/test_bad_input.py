"""Bad input gets one clear exception (or a warning with counts), naming what is wrong.

Each check asserts the exception class and that the message names the column or file and,
where there is one, the count. Messages are matched on those facts only, not on wording.
"""

from __future__ import annotations

import re
import warnings

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

import tallgam as tg

N = 400


@pytest.fixture(scope="module")
def frame() -> pd.DataFrame:
    rng = np.random.default_rng(3)
    x = rng.uniform(0.0, 10.0, N)
    return pd.DataFrame({
        "x": x,
        "z": rng.normal(0.0, 1.0, N),
        "g": rng.choice(["a", "b", "c"], N),
        "y": np.sin(x) + rng.normal(0.0, 0.3, N),
    })


def model(**kwargs) -> tg.Model:
    return tg.Model("y", terms=[tg.spline("x", size=8), tg.linear("z"), tg.categorical("g")],
                    **kwargs)


@pytest.fixture(scope="module")
def fit(frame):
    return model().fit(frame)


# ------------------------------------------------------------------ columns and values


def test_missing_column_is_named_with_a_suggestion(frame):
    with pytest.raises(tg.DataError) as err:
        tg.Model("y", terms=[tg.spline("xx")]).fit(frame)
    msg = str(err.value)
    assert "'xx'" in msg and "did you mean 'x'" in msg


def test_missing_response_is_named(frame):
    with pytest.raises(tg.DataError, match="'yy'"):
        tg.Model("yy", terms=[tg.spline("x")]).fit(frame)


def _with_gaps() -> pa.Table:
    """5 NULL in x, 2 NaN and 1 inf in z, 3 NULL in g (Arrow keeps NaN apart from NULL)."""
    rng = np.random.default_rng(4)
    x = [None if i < 5 else float(v) for i, v in enumerate(rng.uniform(0, 10, N))]
    z = rng.normal(0.0, 1.0, N)
    z[10:12] = np.nan
    z[20] = np.inf
    g = [None if i in (30, 31, 32) else v for i, v in enumerate(rng.choice(["a", "b"], N))]
    y = rng.normal(0.0, 1.0, N)
    return pa.table({"x": pa.array(x, pa.float64()), "z": pa.array(z, from_pandas=False),
                     "g": pa.array(g, pa.string()), "y": pa.array(y)})


def test_null_nan_inf_are_counted_per_column():
    with pytest.raises(tg.DataError) as err:
        model().fit(_with_gaps())
    msg = str(err.value)
    assert re.search(r"'x': 5 NULL", msg), msg
    assert re.search(r"'z': 0 NULL, 3 NaN/inf", msg), msg
    assert re.search(r"'g': 3 NULL", msg), msg
    assert 'set missing to "drop"' in msg


def test_missing_drop_leaves_rows_out_and_says_how_many():
    table = _with_gaps()
    with pytest.warns(tg.TallgamWarning, match=r"\b11 row"):
        fit = model(missing="drop").fit(table)
    assert fit.rows == N - 11  # 5 + 3 + 3 distinct rows
    assert fit.statistics["dropped_rows"] == 11


def test_filter_that_removes_every_row(frame):
    with pytest.raises(tg.DataError, match=r"no rows.*x > 100"):
        model(where="x > 100").fit(frame)


def test_non_numeric_column_as_spline(frame):
    data = frame.assign(s=frame["g"])
    with pytest.raises(tg.DataError, match=r"'s'.*VARCHAR"):
        tg.Model("y", terms=[tg.spline("s")]).fit(data)


def test_too_few_distinct_values_for_a_spline(frame):
    rng = np.random.default_rng(5)
    data = frame.assign(three=rng.integers(0, 3, N).astype(float))
    with pytest.raises(tg.DataError, match=r"'three'.*only 3 distinct"):
        tg.Model("y", terms=[tg.spline("three")]).fit(data)


def test_fewer_distinct_values_than_the_size_reduces_it_out_loud(frame):
    rng = np.random.default_rng(6)
    data = frame.assign(six=rng.integers(0, 6, N).astype(float))
    with pytest.warns(tg.TallgamWarning, match=r"'six'.*6 distinct.*size=10.*reduced to 6"):
        fit = tg.Model("y", terms=[tg.spline("six", size=10)]).fit(data)
    names = fit.coefficients.to_pandas().query("term == 'spline(six)'")["name"]
    assert len(names) == 6


def test_constant_linear_column(frame):
    with pytest.raises(tg.DataError, match=r"'c'.*constant"):
        tg.Model("y", terms=[tg.linear("c")]).fit(frame.assign(c=2.5))


# ------------------------------------------------------------------ files


@pytest.fixture
def good_file(tmp_path, frame) -> str:
    path = tmp_path / "good.parquet"
    pq.write_table(pa.Table.from_pandas(frame, preserve_index=False), path)
    return str(path)


def test_corrupt_parquet_file_is_named(tmp_path):
    bad = tmp_path / "corrupt.parquet"
    bad.write_bytes(b"PAR1 not a parquet file at all PAR1")
    with pytest.raises(tg.DataError, match="corrupt.parquet"):
        model().fit(str(bad))


def test_truncated_parquet_file_in_a_glob_is_named(tmp_path, good_file):
    data = open(good_file, "rb").read()
    (tmp_path / "truncated.parquet").write_bytes(data[: len(data) // 2])
    with pytest.raises(tg.DataError, match="truncated.parquet"):
        model().fit(str(tmp_path / "*.parquet"))


def test_nonexistent_file_and_empty_glob(tmp_path):
    with pytest.raises(tg.DataError, match="nothere.parquet"):
        model().fit(str(tmp_path / "nothere.parquet"))
    with pytest.raises(tg.DataError, match=re.escape("nothing/*.parquet")):
        model().fit(str(tmp_path / "nothing" / "*.parquet"))


# ------------------------------------------------------------------ specification


def test_bad_family_link_and_criterion_names():
    with pytest.raises(tg.SpecError, match=r"'poison'.*did you mean 'poisson'"):
        tg.Model("y", family="poison")
    with pytest.raises(tg.SpecError, match=r"'logg'.*did you mean 'log'"):
        tg.Model("y", link="logg")
    with pytest.raises(tg.SpecError, match=r"'logit'.*gamma"):
        tg.Model("y", family="gamma", link="logit")
    with pytest.raises(tg.SpecError, match=r"'remlx'"):
        tg.Model("y", criterion="remlx")


# ------------------------------------------------------------------ prediction


def test_predict_data_without_a_term_column(fit, frame):
    with pytest.raises(tg.DataError, match=r"'z'"):
        fit.predict(frame.drop(columns="z"))


def test_unseen_level_is_an_error_by_default(fit, frame):
    data = frame.copy()
    data.loc[:6, "g"] = "zz"
    with pytest.raises(tg.DataError) as err:
        fit.predict(data)
    msg = str(err.value)
    assert "'g'" in msg and "7 row" in msg and "zz" in msg


def test_unseen_level_with_base_warns_and_uses_the_base(fit, frame):
    data = frame.copy()
    data.loc[:6, "g"] = "zz"
    with pytest.warns(tg.TallgamWarning, match=r"7 of 400 row.*'g'"):
        got = fit.predict(data, unseen="base")
    base = fit.bases[-1].base
    expected = fit.predict(data.assign(g=data["g"].replace("zz", base)))
    np.testing.assert_array_equal(got, expected)


def test_out_of_range_values_are_clamped_with_counts(fit, frame):
    data = frame.copy()
    lo, hi = frame["x"].min(), frame["x"].max()
    data.loc[:2, "x"] = hi + 5.0
    data.loc[3, "x"] = lo - 1.0
    with pytest.warns(tg.TallgamWarning, match=r"4 of 400 row.*'x'.*outside"):
        got = fit.predict(data)
    clamped = data.assign(x=data["x"].clip(lo, hi))
    with warnings.catch_warnings():
        warnings.simplefilter("error", tg.TallgamWarning)
        expected = fit.predict(clamped)
    np.testing.assert_array_equal(got, expected)

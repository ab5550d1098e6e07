"""The JSON model file: exact round trip, validation on load, atomic writes."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest

import tallgam as tg


@pytest.fixture(scope="module")
def frame() -> pd.DataFrame:
    rng = np.random.default_rng(8)
    n = 3000
    age = rng.uniform(18.0, 80.0, n)
    power = rng.gamma(3.0, 25.0, n)
    region = rng.choice(["r1", "r2", "r3", "r4"], n)
    exposure = rng.uniform(0.2, 1.0, n)
    rate = np.exp(-2.0 + 0.02 * (age - 50) ** 2 / 50 + 0.003 * power
                  + (region == "r2") * 0.3)
    return pd.DataFrame({"age": age, "power": power, "region": region, "exposure": exposure,
                         "claims": rng.poisson(rate * exposure),
                         "cost": rng.gamma(2.0, 500.0 * rate / rate.mean())})


MODELS = {
    "gaussian": tg.Model("cost", terms=[tg.spline("age"), tg.linear("power"),
                                        tg.categorical("region")]),
    "poisson": tg.Model("claims", family="poisson", exposure="exposure",
                        terms=[tg.spline("age", size=8), tg.spline("power", size=6),
                               tg.categorical("region")]),
}


@pytest.fixture(scope="module", params=list(MODELS))
def fitted(request, frame):
    return MODELS[request.param].fit(frame)


def test_round_trip_predicts_bit_for_bit(fitted, frame, tmp_path):
    path = tmp_path / "model.json"
    fitted.save(path)
    loaded = tg.load(path)
    for output in ("response", "link"):
        np.testing.assert_array_equal(loaded.predict(frame, output), fitted.predict(frame, output))
    v0, s0 = fitted.predict(frame, se=True)
    v1, s1 = loaded.predict(frame, se=True)
    np.testing.assert_array_equal(v1, v0)
    np.testing.assert_array_equal(s1, s0)
    np.testing.assert_array_equal(loaded.coefficients_raw, fitted.coefficients_raw)
    np.testing.assert_array_equal(loaded.covariance_raw, fitted.covariance_raw)
    assert loaded.edf == fitted.edf
    assert loaded.smoothing == fitted.smoothing
    eff0, eff1 = fitted.effect("age"), loaded.effect("age")
    assert eff0.equals(eff1)
    # and saving the loaded model gives the same file
    again = tmp_path / "again.json"
    loaded.save(again)
    assert json.loads(again.read_text()) == json.loads(path.read_text())


def _saved(fitted, tmp_path) -> dict:
    path = tmp_path / "model.json"
    fitted.save(path)
    return json.loads(path.read_text())


def _write(tmp_path, content, name="edited.json"):
    path = tmp_path / name
    path.write_text(content if isinstance(content, str) else json.dumps(content))
    return path


def test_wrong_schema_version_is_refused(fitted, tmp_path):
    data = _saved(fitted, tmp_path)
    data["schema_version"] = 99
    with pytest.raises(tg.ModelFileError, match=r"schema version 99"):
        tg.load(_write(tmp_path, data))
    del data["schema_version"]
    with pytest.raises(tg.ModelFileError, match=r"schema version None"):
        tg.load(_write(tmp_path, data))


@pytest.mark.parametrize("content", [{"hello": 1}, [1, 2, 3], "not json {", ""])
def test_non_model_file_is_refused(tmp_path, content):
    path = _write(tmp_path, content)
    with pytest.raises(tg.ModelFileError, match="edited.json"):
        tg.load(path)


def test_missing_file_is_refused(tmp_path):
    with pytest.raises(tg.ModelFileError, match="absent.json"):
        tg.load(tmp_path / "absent.json")


def test_mismatched_coefficient_count_is_refused(fitted, tmp_path):
    data = _saved(fitted, tmp_path)
    p = len(data["coefficients"])
    data["coefficients"] = data["coefficients"][:-1]
    with pytest.raises(tg.ModelFileError, match=rf"{p} coefficients.*holds {p - 1}"):
        tg.load(_write(tmp_path, data))


def test_mismatched_covariance_is_refused(fitted, tmp_path):
    data = _saved(fitted, tmp_path)
    data["covariance"] = data["covariance"][:-1]
    with pytest.raises(tg.ModelFileError, match="covariance"):
        tg.load(_write(tmp_path, data))


def test_missing_section_is_refused(fitted, tmp_path):
    data = _saved(fitted, tmp_path)
    del data["terms"]
    with pytest.raises(tg.ModelFileError, match="terms"):
        tg.load(_write(tmp_path, data))


def test_write_is_atomic_and_leaves_no_temporary_file(fitted, tmp_path):
    folder = tmp_path / "out"
    folder.mkdir()
    target = folder / "model.json"
    fitted.save(target)
    fitted.save(target)  # overwrite in place
    assert sorted(p.name for p in folder.iterdir()) == ["model.json"]
    assert tg.load(target).coefficients_raw.tolist() == fitted.coefficients_raw.tolist()
    # a failing write (the target is a directory) leaves the folder as it was
    (folder / "taken").mkdir()
    with pytest.raises(OSError):
        fitted.save(folder / "taken")
    assert sorted(p.name for p in folder.iterdir()) == ["model.json", "taken"]
    assert list((folder / "taken").iterdir()) == []


def test_a_deep_path_keeps_its_file_name_in_the_message(tmp_path):
    # messages cut long values in the middle: the file name at the end of a deep warehouse
    # path survives (it was cut off at 80 characters)
    deep = tmp_path.joinpath(*["extracts_2026_q4_motor_book"] * 8)
    deep.mkdir(parents=True)
    with pytest.raises(tg.ModelFileError, match=r"absent_model\.json' \(\d+ characters\)"):
        tg.load(deep / "absent_model.json")

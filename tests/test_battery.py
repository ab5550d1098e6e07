"""A battery of bad inputs and faults as unattended batch jobs meet them.

Every case asserts the exact outcome: the error class and the column or file it names, the
exit code of the real command line, the files that exist afterwards and their permissions.
The classes: silent wrong results (types drifting across files, level keys, damaged model
files), library errors leaking through, files left behind by killed runs, noise on standard
output, and permissions. Nothing is mocked: kills are real SIGKILLs of subprocesses, a full
disk is a small tmpfs (where this process may mount one) or a real file-size limit
(RLIMIT_FSIZE), an unwritable folder is one another user cannot write (root drops to
'nobody' in a subprocess), and running out of memory is a real address-space limit.
"""

from __future__ import annotations

import contextlib
import errno
import json
import os
import re
import shutil
import signal
import stat
import subprocess
import sys
import tempfile
import textwrap
import warnings
from decimal import Decimal

import duckdb
import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

import tallgam as tg
from tallgam import OutOfMemoryError, OutputError, atomic
from tallgam.cli import failure, main
from tallgam.data.sources import open_source

pytestmark = pytest.mark.filterwarnings(
    "ignore:.*outside the training range:tallgam.TallgamWarning")

N = 400


def book(seed: int = 0, n: int = N, g_dtype=np.int64) -> pd.DataFrame:
    """Synthetic truth: y = sin(x) + 0.3 g + noise; g takes the values 1, 2, 3."""
    rng = np.random.default_rng(seed)
    x = rng.uniform(0, 10, n)
    g = rng.integers(1, 4, n)
    y = np.sin(x) + 0.3 * g + rng.normal(0, 0.2, n)
    return pd.DataFrame({"x": x, "g": g.astype(g_dtype), "y": y, "k": rng.integers(0, 8, n)})


def model() -> tg.Model:
    return tg.Model("y", terms=[tg.spline("x", size=6), tg.categorical("g")])


@pytest.fixture(scope="module")
def fitted():
    """Fitted with g stored as DOUBLE (1.0, 2.0, 3.0)."""
    return model().fit(book(g_dtype=np.float64))


@pytest.fixture(scope="module")
def model_file(fitted, tmp_path_factory):
    path = tmp_path_factory.mktemp("model") / "m.json"
    fitted.save(path)
    return path


@pytest.fixture(scope="module")
def data_file(tmp_path_factory):
    path = tmp_path_factory.mktemp("data") / "d.parquet"
    book(1).to_parquet(path)
    return path


def caught(fn, *args, **kwargs):
    """Run fn, returning the TallgamWarnings it emitted."""
    with warnings.catch_warnings(record=True) as seen:
        warnings.simplefilter("always")
        fn(*args, **kwargs)
    return [str(w.message) for w in seen if issubclass(w.category, tg.TallgamWarning)]


def cli(capsys, *argv):
    """The real command line in this process: (exit code, stdout, stderr)."""
    capsys.readouterr()
    code = main([str(a) for a in argv])
    out = capsys.readouterr()
    return code, out.out, out.err


def python(code: str, *args, preexec=None, env=None, timeout=300):
    """Run Python code in a fresh interpreter (the package from this checkout)."""
    return subprocess.run([sys.executable, "-c", textwrap.dedent(code), *map(str, args)],
                          capture_output=True, text=True, preexec_fn=preexec, env=env,
                          timeout=timeout)


def leftovers(folder) -> list[str]:
    return sorted(n for n in os.listdir(folder) if n.lstrip(".").startswith("tallgam-"))


# =============================================================== 1. silent wrong results
# ---- types that drift across the files of one source


@pytest.mark.parametrize("first, second, target, warns", [
    (pa.array([1, 2, 3], pa.int32()), pa.array([4, 5, 6], pa.int64()), "BIGINT", False),
    (pa.array([0.5, 1.5], pa.float32()), pa.array([0.1, 0.2]), "DOUBLE", False),
    (pa.array([1, 2, 3]), pa.array([1.25, 2.5, 3.75]), "DOUBLE", True),   # said out loud
    (pa.array([1.25, 2.5, 3.75]), pa.array([1, 2, 3]), "DOUBLE", True),   # reversed order
    (pa.array([Decimal("1.25"), Decimal("2.50")], pa.decimal128(8, 2)), pa.array([0.1]),
     "DOUBLE", True),
], ids=["int32+int64", "float32+float64", "int+double", "double+int", "decimal+double"])
def test_drifting_types_read_as_the_widest_type(tmp_path, first, second, target, warns):
    values = [first, second]
    for i, v in enumerate(values):
        pq.write_table(pa.table({"k": v}), tmp_path / f"p{i}.parquet")
    files = [str(tmp_path / "p0.parquet"), str(tmp_path / "p1.parquet")]
    with warnings.catch_warnings(record=True) as seen:
        warnings.simplefilter("always")
        src = open_source(files)
    said = [str(w.message) for w in seen if issubclass(w.category, tg.TallgamWarning)]
    assert src.schema["k"] == target
    got = [r[0] for r in src.fetchall("SELECT k FROM tallgam_source")]
    expect = [float(x) for v in values for x in v.to_pylist()]
    np.testing.assert_array_equal(np.array(got, dtype=float), expect)  # nothing rounded
    if warns:
        assert len(said) == 1 and "'k'" in said[0] and "p0.parquet" in said[0] \
            and "p1.parquet" in said[0] and f"read as {target}" in said[0]
    else:
        assert said == []


def test_drifting_types_fit_equals_the_fit_of_the_joined_data(tmp_path):
    a, b = book(1), book(2)
    b["k"] = b["k"] + 0.5                         # decimals in the second file only
    a.to_parquet(tmp_path / "a.parquet")
    b.to_parquet(tmp_path / "b.parquet")
    m = tg.Model("y", terms=[tg.spline("x", size=6), tg.linear("k")])
    said = []
    with warnings.catch_warnings(record=True) as seen:
        warnings.simplefilter("always")
        from_files = m.fit(str(tmp_path / "*.parquet"))
        said = [str(w.message) for w in seen if "different types" in str(w.message)]
    joined = m.fit(pd.concat([a.astype({"k": float}), b]))
    assert len(said) == 1 and "'k'" in said[0]
    np.testing.assert_allclose(from_files.coefficients_raw, joined.coefficients_raw,
                               rtol=1e-10, atol=1e-12)


def test_drifting_types_in_csv_files(tmp_path):
    (tmp_path / "a.csv").write_text("k,y\n1,1.0\n2,2.0\n3,3.0\n")
    (tmp_path / "b.csv").write_text("k,y\n1.5,1.0\n2.5,2.0\n3.5,3.0\n")
    src = open_source(str(tmp_path / "*.csv"))
    assert src.schema["k"] == "DOUBLE"
    assert sorted(r[0] for r in src.fetchall("SELECT k FROM tallgam_source")) == \
        [1.0, 1.5, 2.0, 2.5, 3.0, 3.5]


def test_an_empty_csv_column_does_not_make_the_column_text(tmp_path):
    (tmp_path / "a.csv").write_text("k,y\n1,1.0\n2,2.0\n")
    (tmp_path / "b.csv").write_text("k,y\n,1.0\n,2.0\n")   # DuckDB sniffs k as VARCHAR here
    assert caught(open_source, str(tmp_path / "*.csv")) == []
    assert open_source(str(tmp_path / "*.csv")).schema["k"] == "BIGINT"


def test_hive_keys_are_typed_over_all_paths_not_file_by_file(tmp_path):
    for region, x in (("1", [1.0, 2.0]), ("north", [3.0])):
        (tmp_path / f"region={region}").mkdir()
        pq.write_table(pa.table({"x": x}), tmp_path / f"region={region}" / "p.parquet")
    src = open_source(tmp_path)                   # '1' alone would be typed BIGINT
    assert src.schema == {"x": "DOUBLE", "region": "VARCHAR"}
    assert sorted(src.fetchall("SELECT region, x FROM tallgam_source")) == \
        [("1", 1.0), ("1", 2.0), ("north", 3.0)]


def test_numbers_and_text_in_one_column_are_refused_naming_files_and_column(tmp_path):
    pq.write_table(pa.table({"g": [1, 2]}), tmp_path / "a.parquet")
    pq.write_table(pa.table({"g": ["north", "south"]}), tmp_path / "b.parquet")
    with pytest.raises(tg.DataError, match=r"column 'g' has types that do not mix") as err:
        open_source(str(tmp_path / "*.parquet"))
    assert "BIGINT in 'a.parquet'" in str(err.value)
    assert "VARCHAR in 'b.parquet'" in str(err.value)


def test_a_file_without_a_column_is_named(tmp_path):
    pq.write_table(pa.table({"g": [1, 2], "k": [1, 2]}), tmp_path / "a.parquet")
    pq.write_table(pa.table({"g": [1, 2]}), tmp_path / "b.parquet")
    with pytest.raises(tg.DataError, match=r"b\.parquet' lacks column 'k'"):
        open_source([tmp_path / "a.parquet", tmp_path / "b.parquet"])


# ---- level keys


def test_nan_in_a_numeric_level_column_is_missing_not_a_level():
    df = book(g_dtype=np.float64)
    df.loc[:2, "g"] = np.nan
    with pytest.raises(tg.DataError, match=r"'g': 3 NULL/NaN"):
        model().fit(df)
    m = tg.Model("y", terms=[tg.spline("x", size=6), tg.categorical("g")], missing="drop")
    with pytest.warns(tg.TallgamWarning, match="3 row"):
        fit = m.fit(df)
    assert fit.bases[-1].levels == ["1", "2", "3"] and fit.rows == N - 3


def test_nan_level_in_parquet_is_missing(tmp_path):
    # NaN (not NULL) stored in the file: pandas would turn it into NULL on the way
    g = pa.array([1.0, 2.0, float("nan"), 3.0] * 100)
    x = pa.array(np.linspace(0, 10, 400))
    pq.write_table(pa.table({"g": g, "x": x, "y": x}), tmp_path / "d.parquet")
    with pytest.raises(tg.DataError, match=r"'g': 100 NULL/NaN"):
        model().fit(tmp_path / "d.parquet")


@pytest.mark.parametrize("dtype", [np.int8, np.int32, np.int64, np.float32, "decimal", "str"])
def test_levels_fitted_from_decimals_score_any_storage(fitted, dtype):
    data = book(5, g_dtype=np.float64)
    expect = fitted.predict(data)
    if dtype == "decimal":
        table = pa.Table.from_pandas(data, preserve_index=False)
        table = table.set_column(table.schema.get_field_index("g"), "g",
                                 table.column("g").cast(pa.decimal128(6, 2)))
        got = fitted.predict(table)
    else:
        got = fitted.predict(data.astype({"g": np.int64}).astype({"g": dtype}))
    np.testing.assert_array_equal(got, expect)


def test_levels_fitted_from_integers_score_doubles():
    fit = model().fit(book())
    data = book(6)
    np.testing.assert_array_equal(fit.predict(data.astype({"g": float})), fit.predict(data))


def test_text_codes_keep_their_leading_zeros():
    df = book()
    df["g"] = np.where(df.g == 1, "007", np.where(df.g == 2, "7", "70"))
    fit = model().fit(df)
    assert fit.bases[-1].levels == ["007", "7", "70"]


@pytest.mark.parametrize("unseen", ["error", "base"])
def test_null_levels_stop_scoring_whatever_unseen_says(fitted, unseen):
    data = book(7, g_dtype=np.float64)
    data.loc[:4, "g"] = np.nan
    with pytest.raises(tg.DataError, match=r"column 'g' has 5 NULL/NaN value\(s\)"):
        fitted.predict(data, unseen=unseen)


def test_null_levels_leave_no_scored_file(fitted, tmp_path):
    data = book(7, g_dtype=np.float64)
    data.loc[10:11, "g"] = np.nan
    data.to_parquet(tmp_path / "d.parquet")
    with pytest.raises(tg.DataError, match="NULL"):
        fitted.score(tmp_path / "d.parquet", tmp_path / "out.parquet", unseen="base")
    assert os.listdir(tmp_path) == ["d.parquet"]


def _legacy(model_file, tmp_path):
    """The model file as an older release wrote it: levels of a DOUBLE column as '1.0'."""
    data = json.loads(model_file.read_text())
    term = data["terms"][-1]
    term["levels"] = [f"{lev}.0" for lev in term["levels"]]
    term["base"] = f"{term['base']}.0"
    path = tmp_path / "legacy.json"
    path.write_text(json.dumps(data))
    return tg.load(path)


def test_older_model_files_with_decimal_level_labels_still_score(fitted, model_file, tmp_path):
    legacy = _legacy(model_file, tmp_path)
    assert legacy.bases[-1].levels == ["1.0", "2.0", "3.0"]
    data = book(8)
    np.testing.assert_array_equal(legacy.predict(data), fitted.predict(data))


@pytest.mark.parametrize("which", ["current", "legacy"])
def test_sql_export_matches_predict_on_integer_levels(fitted, model_file, tmp_path, which):
    fit = fitted if which == "current" else _legacy(model_file, tmp_path)
    data = book(9)                        # g as BIGINT; the model was fitted on DOUBLE
    con = duckdb.connect()
    con.register("d", data)
    got = np.array([r[0] for r in con.execute(f"SELECT {fit.to_sql()} FROM d").fetchall()])
    np.testing.assert_allclose(got, fitted.predict(data), rtol=1e-12)


# ---- damaged model files


def _damage(model_file, tmp_path, edit=None, text=None):
    data = json.loads(model_file.read_text())
    if edit is not None:
        edit(data)
    path = tmp_path / "damaged.json"
    path.write_text(text(json.dumps(data)) if text else json.dumps(data))
    return path


def _set(path, value):
    def edit(d):
        target = d
        for key in path[:-1]:
            target = target[key]
        target[path[-1]] = value
    return edit


DAMAGE = {
    "null coefficient": (_set(["coefficients", 3], None),
                         r"coefficient 3 \(number 2 of term 'spline\(x\)'\) is null"),
    "text coefficient": (_set(["coefficients", 0], "1.5"), r"coefficient 0 .* is str '1\.5'"),
    "boolean coefficient": (_set(["coefficients", 1], True), r"coefficient 1 .* is bool True"),
    "null covariance entry": (_set(["covariance", 0, 1], None),
                              r"covariance entry \[0\]\[1\] is null"),
    "null knot": (_set(["terms", 1, "knots", 2], None), r"terms\[1\]\.knots\[2\] is null"),
    "negative scale": (_set(["statistics", "scale"], -1.0), r"statistics\.scale"),
    "terms not a list": (_set(["terms"], {}), r"section 'terms' is a dict"),
    "one coefficient too many": (lambda d: d["coefficients"].append(0.0),
                                 r"coefficients but it holds"),
}


@pytest.mark.parametrize("case", list(DAMAGE))
def test_damaged_model_files_are_refused_naming_the_entry(model_file, tmp_path, case):
    edit, message = DAMAGE[case]
    with pytest.raises(tg.ModelFileError, match=message):
        tg.load(_damage(model_file, tmp_path, edit))


@pytest.mark.parametrize("where, literal, message", [
    ("coefficients", "NaN", r"coefficient 2 .* is NaN"),
    ("covariance", "Infinity", r"covariance entry \[2\]\[2\] is Infinity"),
    ("tolerance", "-Infinity", r"model\.tolerance is -Infinity"),
])
def test_non_finite_literals_are_refused(model_file, tmp_path, where, literal, message):
    marker = 987654.321

    def place(d):
        if where == "coefficients":
            d["coefficients"][2] = marker
        elif where == "covariance":
            d["covariance"][2][2] = marker
        else:
            d["model"]["tolerance"] = marker
    path = _damage(model_file, tmp_path, place, text=lambda t: t.replace(repr(marker), literal))
    with pytest.raises(tg.ModelFileError, match=message):
        tg.load(path)


def test_non_finite_values_in_an_encoded_covariance_are_refused(fitted, model_file, tmp_path):
    from tallgam.solve.covariance import encode_array

    cov = fitted.covariance_raw.copy()
    cov[1, 4] = np.nan

    def edit(d):
        d["schema_version"] = 2
        d["covariance"] = {"dense": encode_array(cov), "eliminated": None}
    with pytest.raises(tg.ModelFileError, match=r"covariance entry \[1\]\[4\] is nan;"):
        tg.load(_damage(model_file, tmp_path, edit))


def test_damaged_model_file_on_the_command_line_exits_5(model_file, tmp_path, capsys):
    path = _damage(model_file, tmp_path, _set(["coefficients", 3], None))
    code, out, err = cli(capsys, "show", path)
    assert code == 5 and "coefficient 3" in err and out == ""


# =============================================================== 2. errors that leak
# ---- data frames and files


def test_a_mixed_object_column_of_a_data_frame_is_named():
    df = book().astype({"g": object})
    df.loc[3, "g"] = "x"
    with pytest.raises(tg.DataError, match=r"Arrow cannot read as one type: 'g' \("):
        model().fit(df)


def test_duplicate_column_names_of_a_data_frame_are_named():
    df = book()
    df.columns = ["x", "g", "y", "x"]
    with pytest.raises(tg.DataError, match=r"duplicate column names: 'x'"):
        model().fit(df)


def _corrupt_a_page(path):
    """Overwrite bytes of the first data page (its header is no longer readable)."""
    offset = pq.ParquetFile(path).metadata.row_group(0).column(0).data_page_offset
    raw = bytearray(path.read_bytes())
    raw[offset + 30: offset + 400] = b"\xab" * 370
    path.write_bytes(bytes(raw))


def test_a_corrupt_page_in_one_file_of_a_glob_is_named(tmp_path):
    rng = np.random.default_rng(0)
    for i in range(3):
        pq.write_table(pa.table({"x": rng.uniform(0, 10, 5000), "y": rng.normal(size=5000)}),
                       tmp_path / f"p{i}.parquet", compression="zstd")
    _corrupt_a_page(tmp_path / "p1.parquet")
    with pytest.raises(tg.DataError, match=r"p1\.parquet \(file 2 of the 3 of the source\)"):
        tg.Model("y", terms=[tg.spline("x")]).fit(str(tmp_path / "*.parquet"))


def test_a_truncated_file_of_a_folder_is_named_before_any_pass(tmp_path):
    book(1).to_parquet(tmp_path / "a.parquet")
    book(2).to_parquet(tmp_path / "b.parquet")
    raw = (tmp_path / "b.parquet").read_bytes()
    (tmp_path / "b.parquet").write_bytes(raw[: len(raw) // 2])
    with pytest.raises(tg.DataError, match=r"cannot read '.*b\.parquet' \(one of the 2 files"):
        model().fit(tmp_path)


def test_a_stray_readme_in_a_data_folder_is_skipped_and_named(tmp_path):
    book(1).to_parquet(tmp_path / "a.parquet")
    (tmp_path / "README.txt").write_text("extract of 2024-06\n")
    (tmp_path / "notes.md").write_text("-")
    said = caught(model().fit, tmp_path)
    assert said == ["the folder " + repr(str(tmp_path)) + " holds 2 file(s) that are not "
                    "Parquet data, skipped: 'README.txt', 'notes.md'"]


def test_hidden_files_and_job_markers_are_skipped_silently(tmp_path):
    book(1).to_parquet(tmp_path / "part-0.parquet")
    (tmp_path / "_SUCCESS").write_text("")
    (tmp_path / ".part-0.parquet.crc").write_bytes(b"\0")
    (tmp_path / "_temporary").mkdir()
    book(2).iloc[:5].to_parquet(tmp_path / "_temporary" / "half.parquet")
    src = open_source(tmp_path)
    assert [os.path.basename(f) for f in src.files] == ["part-0.parquet"]
    assert caught(open_source, tmp_path) == []


def test_a_folder_mixing_parquet_and_csv_is_refused(tmp_path):
    book(1).to_parquet(tmp_path / "a.parquet")
    book(2).to_csv(tmp_path / "b.csv", index=False)
    with pytest.raises(tg.DataError, match=r"holds Parquet files \(1, e\.g\. .*a\.parquet'\) "
                                           r"and CSV files \(1, e\.g\. .*b\.csv'\)"):
        open_source(tmp_path)


def test_a_folder_with_only_notes_is_refused_naming_them(tmp_path):
    (tmp_path / "README.txt").write_text("x")
    with pytest.raises(tg.DataError, match=r"holds no Parquet or CSV files \(only 'README"):
        open_source(tmp_path)


def test_a_glob_catching_a_note_names_both_kinds(tmp_path):
    book(1).to_parquet(tmp_path / "a.parquet")
    (tmp_path / "README.txt").write_text("x")
    with pytest.raises(tg.DataError, match=r"mixes Parquet files \('a\.parquet'\) and "
                                           r"CSV/text files \('README\.txt'\)"):
        open_source(str(tmp_path / "*"))


# ---- messages capped in length


def test_a_huge_unseen_level_is_not_echoed_whole():
    fit = model().fit(book().astype({"g": str}))
    data = book(3).astype({"g": str})
    data.loc[0, "g"] = "z" * 3_000_000
    with pytest.raises(tg.DataError, match=r"not seen in training") as err:
        fit.predict(data)
    assert len(str(err.value)) < 600 and "3,000,002 characters" in str(err.value)


def test_a_huge_column_name_is_not_echoed_whole():
    with pytest.raises(tg.ColumnNotFound) as err:
        tg.Model("y", terms=[tg.spline("c" * 1_000_000)]).fit(book())
    assert len(str(err.value)) < 600


def test_a_huge_string_in_a_duckdb_error_is_cut():
    with pytest.raises(tg.DataError) as err:
        tg.Model("y", terms=[tg.spline("x")], where="x > 'q" + "u" * 2_000_000 + "'"
                 ).fit(book())
    assert len(str(err.value)) < 4000


def test_command_line_messages_are_capped(tmp_path, data_file, capsys):
    spec = tmp_path / "s.toml"
    spec.write_text(f'data = "{data_file}"\nresponse = "y"\n[[term]]\nkind = "spline"\n'
                    f'column = "{"c" * 100_000}"\n')
    code, out, err = cli(capsys, "fit", spec, "-o", tmp_path / "m.json")
    assert code == 2 and "not found" in err and len(err) < 2500


# ---- file-system faults: named, mapped to exit 6, nothing left


def test_save_to_a_folder_names_it(fitted, tmp_path):
    with pytest.raises(OutputError, match=re.escape(f"{str(tmp_path)!r} is a folder")):
        fitted.save(tmp_path)


def test_save_into_a_missing_folder_names_it(fitted, tmp_path):
    with pytest.raises(OutputError, match=r"the folder '.*missing' does not exist"):
        fitted.save(tmp_path / "missing" / "m.json")
    assert os.listdir(tmp_path) == []


def test_save_below_a_file_names_the_file(fitted, tmp_path):
    (tmp_path / "plain").write_text("x")
    with pytest.raises(OutputError, match=r"'.*plain' is a file, not a folder"):
        fitted.save(tmp_path / "plain" / "sub" / "m.json")
    assert isinstance(OutputError("x"), OSError)   # callers catching OSError still do


def test_output_errors_on_the_command_line(model_file, data_file, tmp_path, capsys):
    (tmp_path / "f.txt").write_text("x")
    cases = [
        (["score", model_file, data_file, "-o", tmp_path], "is a folder"),
        (["score", model_file, data_file, "-o", tmp_path / "no" / "s.parquet"],
         "does not exist"),
        (["score", model_file, data_file, "-o", tmp_path / "f.txt" / "s.parquet"],
         "is a file, not a folder"),
        (["tables", model_file, "-o", tmp_path / "f.txt"], "is a file"),
        (["validate", model_file, data_file, "-o", tmp_path / "f.txt"], "is a file"),
        (["report", model_file, "-o", tmp_path], "is a folder"),
    ]
    for argv, needle in cases:
        code, out, err = cli(capsys, *argv)
        assert code == 6, (argv, err)
        assert needle in err and "Traceback" not in err, (argv, err)
    assert sorted(os.listdir(tmp_path)) == ["f.txt"]


def test_fit_with_a_folder_as_output_fails_before_fitting(data_file, tmp_path, capsys):
    spec = tmp_path / "s.toml"
    spec.write_text(f'data = "{data_file}"\nresponse = "y"\n[[term]]\nkind = "linear"\n'
                    'column = "x"\n')
    code, out, err = cli(capsys, "fit", spec, "-o", tmp_path, "--log-json")
    assert code == 6 and "is a folder" in err
    assert '"kind"' not in err   # no progress event: the fit never started


@pytest.fixture
def locked(tmp_path):
    """A folder this process cannot write in: mode 0555 for an ordinary user; for root, whom
    modes do not stop, a read-only bind mount (needs the right to mount)."""
    folder = tmp_path / "locked"
    folder.mkdir()
    if os.geteuid() != 0:
        folder.chmod(0o555)
        yield folder, "not writable by this user|no permission"
        folder.chmod(0o755)
        return
    bind = subprocess.run(["mount", "--bind", str(folder), str(folder)], capture_output=True)
    if bind.returncode != 0:
        pytest.skip("root cannot mount here, and file modes do not stop root")
    try:
        subprocess.run(["mount", "-o", "remount,ro,bind", str(folder)], check=True)
        yield folder, "read-only file system|file system is read-only"
    finally:
        subprocess.run(["umount", str(folder)], check=True)


def test_an_unwritable_folder_is_named(fitted, model_file, data_file, locked, capsys):
    folder, reason = locked
    with pytest.raises(OutputError, match=re.escape(f"the folder {str(folder)!r} ")) as err:
        fitted.save(folder / "m.json")
    assert re.search(reason, str(err.value))
    for argv in (["tables", model_file, "-o", folder / "tables"],
                 ["score", model_file, data_file, "-o", folder / "s.parquet"],
                 ["validate", model_file, data_file, "-o", folder / "v"]):
        code, out, err = cli(capsys, *argv)
        assert code == 6 and re.search(reason, err) and str(folder) in err, (argv, err)
    assert os.listdir(folder) == []


@pytest.fixture
def small_disk(tmp_path):
    """A 1 MiB tmpfs: a real full disk (ENOSPC). Needs the right to mount."""
    mnt = tmp_path / "disk"
    mnt.mkdir()
    proc = subprocess.run(["mount", "-t", "tmpfs", "-o", "size=1m", "tmpfs", str(mnt)],
                          capture_output=True)
    if proc.returncode != 0:
        pytest.skip("cannot mount a tmpfs here (test_file_size_limit covers the same path)")
    yield mnt
    subprocess.run(["umount", str(mnt)], check=True)


def test_a_full_disk_is_named_and_leaves_the_old_file(fitted, small_disk):
    target = small_disk / "m.json"
    fitted.save(target)
    before = target.read_bytes()
    free = shutil.disk_usage(small_disk).free
    (small_disk / "filler").write_bytes(b"\0" * max(free - 4096, 0))
    with pytest.raises(OutputError, match=r"the disk holding it is full \(ENOSPC\)") as err:
        fitted.save(target)
    assert err.value.errno == errno.ENOSPC and repr(str(target)) in str(err.value)
    assert target.read_bytes() == before
    assert sorted(os.listdir(small_disk)) == ["filler", "m.json"]


def test_a_full_disk_on_the_command_line_exits_6(model_file, small_disk, tmp_path, capsys):
    big = tmp_path / "big.parquet"
    book(2, n=60_000).to_parquet(big)
    code, out, err = cli(capsys, "score", model_file, big, "-o", small_disk / "s.parquet",
                         "--se", "--terms", "-q")
    assert code == 6 and "ENOSPC" in err and "s.parquet" in err
    assert os.listdir(small_disk) == []


def test_file_size_limit(model_file, tmp_path):
    """RLIMIT_FSIZE gives a real EFBIG (Python ignores SIGXFSZ)."""
    import resource

    big = tmp_path / "big.parquet"
    book(2, n=60_000).to_parquet(big)
    out = tmp_path / "out"
    out.mkdir()

    def limit():
        resource.setrlimit(resource.RLIMIT_FSIZE, (200_000, 200_000))
    proc = python("""
        import sys
        from tallgam.cli import main
        sys.exit(main(["score", *sys.argv[1:], "--se", "--terms", "-q"]))
        """, model_file, big, "-o", out / "s.parquet", preexec=limit)
    assert proc.returncode == 6, proc.stderr
    assert "EFBIG" in proc.stderr and "s.parquet" in proc.stderr
    assert "Traceback" not in proc.stderr
    assert os.listdir(out) == []


# ---- memory


def test_out_of_memory_on_the_command_line_exits_7(tmp_path):
    """A categorical with 30,000 levels needs a 7 GB matrix; 3 GB of address space is given."""
    import resource

    rng = np.random.default_rng(0)
    n = 60_000
    pd.DataFrame({"g": [f"L{i}" for i in rng.integers(0, 30_000, n)],
                  "y": rng.normal(size=n)}).to_parquet(tmp_path / "d.parquet")
    spec = tmp_path / "s.toml"
    spec.write_text('data = "d.parquet"\nresponse = "y"\n[[term]]\nkind = "categorical"\n'
                    'column = "g"\n')

    def limit():
        resource.setrlimit(resource.RLIMIT_AS, (3 * 2**30, 3 * 2**30))
    proc = python("""
        import sys
        from tallgam.cli import main
        sys.exit(main(["fit", sys.argv[1], "-o", sys.argv[2], "-q"]))
        """, spec, tmp_path / "m.json", preexec=limit)
    assert proc.returncode == 7, proc.stderr
    assert "memory" in proc.stderr and "random effect instead" in proc.stderr
    assert "Traceback" not in proc.stderr and not (tmp_path / "m.json").exists()


def test_duckdb_running_out_of_memory_is_an_out_of_memory_error():
    con = duckdb.connect()
    con.execute("SET memory_limit = '20MB'")
    con.execute("SET threads = 1")
    con.execute("SET temp_directory = ''")
    # a relation whose own aggregate needs more than DuckDB may use (nowhere to spill)
    rel = con.sql("SELECT g, avg(y) AS y, count(*) AS x FROM (SELECT (i % 300000)::VARCHAR "
                  "|| repeat('x', 200) AS g, random() AS y FROM range(600000) r(i)) GROUP BY g")
    with pytest.raises(OutOfMemoryError, match="DuckDB ran out of memory") as err:
        tg.Model("y", terms=[tg.linear("x")]).fit(rel)
    assert failure(err.value)[0] == 7


# ---- the funnel: every exception has a code and a message, no traceback


@pytest.mark.parametrize("exc, code, needle", [
    (tg.SpecError("bad key"), 2, "bad key"),
    (tg.ColumnNotFound("column 'a' not found"), 2, "'a'"),
    (tg.DataError("3 NULL"), 3, "3 NULL"),
    (tg.FitError("rank"), 3, "rank"),
    (tg.ModelFileError("damaged"), 5, "damaged"),
    (OutputError("cannot write 'x'"), 6, "'x'"),
    (OutOfMemoryError("DuckDB ran out of memory"), 7, "lower --batch-rows"),
    (MemoryError(), 7, "out of memory (MemoryError: no details)"),
    (PermissionError(errno.EACCES, "Permission denied", "/srv/out/m.json"), 6,
     "'/srv/out/m.json': no permission to write there (EACCES)"),
    (IsADirectoryError(errno.EISDIR, "Is a directory", "/srv/out"), 6, "it is a folder"),
    (NotADirectoryError(errno.ENOTDIR, "Not a directory", "/srv/f/x"), 6, "is a file"),
    (FileNotFoundError(errno.ENOENT, "No such file", "/srv/gone/x"), 6, "'/srv/gone/x'"),
    (OSError(errno.ENOSPC, "No space left on device"), 6, "full (ENOSPC)"),
    (KeyboardInterrupt(), 130, "interrupted"),
    (tg.TallgamError("scheduler gone"), 1, "scheduler gone"),
    (TypeError("unsupported operand"), 1, "unexpected failure (TypeError: unsupported"),
])
def test_every_exception_maps_to_a_code_and_a_message(exc, code, needle):
    got, message = failure(exc)
    assert got == code and needle in message


def test_no_traceback_unless_debug(tmp_path, data_file, capsys):
    spec = tmp_path / "s.toml"
    spec.write_text(f'data = "{data_file}"\nresponse = "y"\nfamily = "gamma"\n'
                    '[[term]]\nkind = "linear"\ncolumn = "x"\n')   # y ≤ 0 in places
    code, _, err = cli(capsys, "fit", spec, "-o", tmp_path / "m.json")
    assert code == 3 and "Traceback" not in err and "outside what the model allows" in err
    for argv in (["--debug", "fit", spec], ["fit", spec, "--debug"]):
        code, _, err = cli(capsys, *argv, "-o", tmp_path / "m.json")
        assert code == 3 and "Traceback (most recent call last)" in err
        assert "tallgam: values outside what the model allows" in err


# =============================================================== 3. left behind


KILLED = """
    import os, sys, time, signal
    import tallgam as tg
    here = sys.argv[1]
    def hold(event):   # once the temporary exists, wait to be killed
        if event.kind == "advance" and any(n.lstrip(".").startswith("tallgam-")
                                           for n in os.listdir(here)):
            print("ready", flush=True)
            time.sleep(600)
"""


def _kill_when_ready(code, *args, env=None):
    proc = subprocess.Popen([sys.executable, "-c", textwrap.dedent(KILLED) + textwrap.dedent(code),
                             *map(str, args)], stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                            text=True, env=env)
    line = proc.stdout.readline()
    if line.strip() != "ready":
        proc.wait(timeout=60)
        raise AssertionError(f"the run ended before it could be killed: {proc.stderr.read()}")
    proc.send_signal(signal.SIGKILL)
    proc.wait(timeout=60)
    assert proc.returncode == -signal.SIGKILL
    return proc.pid


def test_scratch_of_a_killed_binned_fit_is_removed_by_the_next(tmp_path):
    data = tmp_path / "d.parquet"
    df = book(1, n=20_000)
    df["n"] = np.random.default_rng(1).poisson(np.exp(0.1 * df.x))
    df.to_parquet(data)
    here = tmp_path / "scratch"
    here.mkdir()
    m = tg.Model("n", family="poisson", terms=[tg.spline("x", size=6), tg.categorical("g")])
    pid = _kill_when_ready("""
        tg.Model("n", family="poisson", terms=[tg.spline("x", size=6), tg.categorical("g")]
                 ).fit(sys.argv[2], binned=True, scratch=here, progress=hold,
                       batch_rows=1000)
        """, here, data)
    left = leftovers(here)
    assert len(left) == 1 and left[0].startswith(f"tallgam-scratch-{pid}-")
    m.fit(data, binned=True, scratch=here)
    assert leftovers(here) == []


def test_spooled_reader_of_a_killed_run_is_removed_by_the_next(tmp_path, monkeypatch):
    here = tmp_path / "tmp"
    here.mkdir()
    pid = _kill_when_ready("""
        import pyarrow as pa
        from tallgam.data.sources import open_source
        from tallgam.progress import Event
        t = pa.table({"x": [1.0, 2.0, 3.0]})
        src = open_source(pa.RecordBatchReader.from_batches(t.schema, t.to_batches()))
        hold(Event("advance", "spool"))
        """, here, env=dict(os.environ, TMPDIR=str(here)))
    left = leftovers(here)
    assert len(left) == 1 and re.fullmatch(rf"tallgam-spool-{pid}-[0-9a-f]{{8}}-[0-9a-f]{{8}}"
                                           r"\.parquet", left[0])
    monkeypatch.setattr(tempfile, "tempdir", str(here))
    t = pa.table({"x": [1.0]})
    with open_source(pa.RecordBatchReader.from_batches(t.schema, t.to_batches())) as src:
        assert len(leftovers(here)) == 1 and str(os.getpid()) in leftovers(here)[0]
        assert src.fetchall("SELECT count(*) FROM tallgam_source") == [(1,)]
    assert leftovers(here) == []


KILLED_STREAMS = {  # a streaming run killed midway: (code, its temporary's prefix)
    "score": ("""
        tg.load(sys.argv[2]).score(sys.argv[3], os.path.join(here, "s.parquet"),
                                   batch_rows=1000, progress=hold)
        """, ".tallgam-score-"),
    "validate": ("""
        from tallgam.outputs.validation import validate
        validate(tg.load(sys.argv[2]), sys.argv[3], batch_rows=1000, progress=hold,
                 scratch_dir=here)
        """, "tallgam-holdout-"),
}


@pytest.mark.parametrize("run", list(KILLED_STREAMS))
def test_temporary_of_a_killed_stream_is_removed_by_the_next_run(fitted, model_file, tmp_path,
                                                                 run):
    from tallgam.outputs.validation import validate

    data = tmp_path / "d.parquet"
    book(2, n=30_000).to_parquet(data)
    here = tmp_path / "here"
    here.mkdir()
    code, prefix = KILLED_STREAMS[run]
    _kill_when_ready(code, here, model_file, data)
    assert len(leftovers(here)) == 1 and leftovers(here)[0].startswith(prefix)
    if run == "score":
        fitted.save(here / "m.json")            # any output into the folder cleans it
        assert os.listdir(here) == ["m.json"]
    else:
        validate(fitted, data, scratch_dir=str(here))
        assert leftovers(here) == []


def test_temporaries_of_live_processes_and_other_hosts_are_kept(tmp_path):
    host = atomic.host_tag()
    done = subprocess.Popen([sys.executable, "-c", "pass"])
    done.wait()                                   # exited and reaped: its files are stale
    sleeper = subprocess.Popen([sys.executable, "-c", "import time; time.sleep(60)"])
    try:
        dead = tmp_path / f".tallgam-out-{done.pid}-{host}-0badcafe-m.json.tmp"
        live = tmp_path / f".tallgam-out-{sleeper.pid}-{host}-0badcafe-m.json.tmp"
        other = tmp_path / f".tallgam-out-{done.pid}-{'0' * 8}-0badcafe-m.json.tmp"
        mine = tmp_path / "tallgam-scratch-data"     # not a name tallgam gives
        for p in (dead, live, other, mine):
            p.write_text("x")
        assert atomic.remove_stale(tmp_path) == [str(dead)]
        assert sorted(os.listdir(tmp_path)) == sorted(p.name for p in (live, other, mine))
    finally:
        sleeper.kill()
        sleeper.wait()
    assert atomic.remove_stale(tmp_path) == [str(live)]   # its owner has now exited


def test_a_failing_writer_leaves_the_old_file_and_no_temporary(tmp_path):
    target = tmp_path / "t.csv"
    target.write_text("old\n")
    with pytest.raises(ZeroDivisionError), atomic.replacing(target) as tmp:
        with open(tmp, "w") as fh:
            fh.write("half")
        raise ZeroDivisionError("the writer failed")
    assert target.read_text() == "old\n" and os.listdir(tmp_path) == ["t.csv"]


def test_a_bad_table_format_writes_nothing(fitted, tmp_path):
    with pytest.raises(tg.SpecError, match="unknown table format 'xlsx'"):
        fitted.relativities().write(tmp_path / "tables", formats=("csv", "xlsx"))
    assert os.listdir(tmp_path) == []


# =============================================================== 4. standard output


def test_library_calls_print_nothing_even_when_duckdb_would_show_progress(tmp_path):
    """DuckDB prints its progress bar on stdout once a query runs longer than
    progress_bar_time; lowered to 1 ms here for every connection, the bar shows on a raw
    connection (the control) but not on tallgam's."""
    harness = """
        import sys, duckdb
        plain = duckdb.connect
        def eager(*a, **k):
            con = plain(*a, **k)
            con.execute("SET enable_progress_bar = true")
            con.execute("SET enable_progress_bar_print = true")
            con.execute("SET progress_bar_time = 1")
            return con
        duckdb.connect = eager
    """
    control = python(harness + """
        duckdb.connect().execute("SELECT sum(i % 7) FROM range(200000000) r(i)").fetchall()
        """)
    assert "%" in control.stdout, control.stderr          # the bar shows where it is on
    quiet = python(harness + """
        import tallgam as tg
        data = tg.sql("SELECT i % 97 AS x, (i % 13)::DOUBLE + 0.1 * (i % 7) AS y "
                      "FROM range(2000000) r(i)")
        fit = tg.Model("y", terms=[tg.spline("x", size=6)]).fit(data, batch_rows=500000)
        fit.score(data, sys.argv[1], batch_rows=500000)
        fit.validate(data, batch_rows=500000)
        """, tmp_path / "s.parquet")
    assert quiet.returncode == 0, quiet.stderr
    assert quiet.stdout == ""


def _sources(tmp_path):
    df = book()
    df.to_parquet(tmp_path / "d.parquet")
    df.to_csv(tmp_path / "d.csv", index=False)
    db = tmp_path / "w.duckdb"
    with duckdb.connect(str(db)) as con:
        con.execute("CREATE TABLE t AS SELECT 1 AS x")
    table = pa.Table.from_pandas(df, preserve_index=False)
    return {
        "parquet": lambda: str(tmp_path / "d.parquet"),
        "csv": lambda: str(tmp_path / "d.csv"),
        "sql": lambda: tg.sql("SELECT 1 AS x"),
        "database": lambda: tg.sql("SELECT * FROM t", database=str(db)),
        "arrow": lambda: table,
        "pandas": lambda: df,
        "reader": lambda: pa.RecordBatchReader.from_batches(table.schema, table.to_batches()),
    }


@pytest.mark.parametrize("kind", ["parquet", "csv", "sql", "database", "arrow", "pandas",
                                  "reader"])
def test_every_connection_tallgam_opens_has_duckdb_progress_off(tmp_path, kind):
    with open_source(_sources(tmp_path)[kind]()) as src:
        setting = src.connection.execute(
            "SELECT current_setting('enable_progress_bar')").fetchall()
    assert setting == [(False,)]


def test_a_cluster_partition_connection_has_duckdb_progress_off(tmp_path):
    from tallgam.passes.cluster import open_partition, partitions_of

    book().to_parquet(tmp_path / "d.parquet")
    src = open_source(str(tmp_path / "d.parquet"))
    (part,) = partitions_of(str(tmp_path / "d.parquet"), src)
    con = open_partition(part).connection
    assert con.execute("SELECT current_setting('enable_progress_bar')").fetchall() == [(False,)]


# =============================================================== 5. permissions


@contextlib.contextmanager
def umask(mask: int):
    old = os.umask(mask)
    try:
        yield
    finally:
        os.umask(old)


def _outputs(fitted, data_file, folder, capsys) -> list:
    """Write every kind of output into ``folder``; return the files written."""
    from tallgam.outputs.report import write_report

    fitted.save(folder / "m.json")
    write_report(fitted, folder / "r.html")
    fitted.relativities().write(folder / "tables")
    fitted.score(data_file, folder / "s.parquet")
    code, _, err = cli(capsys, "validate", folder / "m.json", data_file, "-o",
                       folder / "validation")
    assert code == 0, err
    return sorted(p for p in folder.rglob("*") if p.is_file())


@pytest.mark.parametrize("mask, mode", [(0o022, 0o644), (0o027, 0o640), (0o077, 0o600)],
                         ids=["umask022", "umask027", "umask077"])
def test_outputs_follow_the_umask(fitted, data_file, tmp_path, capsys, mask, mode):
    with umask(mask):
        files = _outputs(fitted, data_file, tmp_path, capsys)
    names = {p.relative_to(tmp_path).as_posix() for p in files}
    assert {"m.json", "r.html", "s.parquet", "tables/base.csv", "validation/lift.csv"} <= names
    assert any(n.startswith("tables/") and n.endswith(".parquet") for n in names)
    for p in files:
        assert stat.S_IMODE(p.stat().st_mode) == mode, p
    for folder in (tmp_path / "tables", tmp_path / "validation"):
        assert stat.S_IMODE(folder.stat().st_mode) == 0o777 & ~mask


def test_scratch_copies_of_data_stay_private(tmp_path, monkeypatch):
    monkeypatch.setattr(tempfile, "tempdir", str(tmp_path))
    t = pa.table({"x": [1.0, 2.0]})
    with umask(0o022), open_source(pa.RecordBatchReader.from_batches(t.schema,
                                                                     t.to_batches())):
        (spool,) = leftovers(tmp_path)
        assert stat.S_IMODE(os.stat(tmp_path / spool).st_mode) == 0o600
        folder = atomic.new_folder(tmp_path, "scratch", private=True, hidden=False)
        assert stat.S_IMODE(os.stat(folder).st_mode) == 0o700


def test_cluster_part_folder_follows_the_umask(fitted, tmp_path):
    distributed = pytest.importorskip("distributed")
    for i in range(2):
        book(10 + i).to_parquet(tmp_path / f"p{i}.parquet")
    with umask(0o022), distributed.LocalCluster(n_workers=1, threads_per_worker=1,
                                                processes=False, dashboard_address=None) as lc, \
            distributed.Client(lc) as client:
        fitted.score(str(tmp_path / "p*.parquet"), tmp_path / "scored", cluster=client)
    out = tmp_path / "scored"
    assert sorted(os.listdir(out)) == ["part-00000.parquet", "part-00001.parquet"]
    assert stat.S_IMODE(out.stat().st_mode) == 0o755
    for p in out.iterdir():
        assert stat.S_IMODE(p.stat().st_mode) == 0o644
    assert leftovers(tmp_path) == []


# ---------------------------------------------------------------------------------------
# scales, memory, run options and response rules (engine side)


def _smooth_frame(n=1500, seed=4):
    # synthetic truth: a sine of x in [0, 1] with gaussian noise
    rng = np.random.default_rng(seed)
    x = rng.uniform(0, 1, n)
    return pd.DataFrame({"x": x, "y": np.sin(6 * x) + rng.normal(0, 0.3, n)})


@pytest.fixture(scope="module")
def unit_fit():
    return tg.Model("y", terms=[tg.spline("x", size=8)]).fit(_smooth_frame())


@pytest.mark.parametrize("scale", [1e300, 1e150, 1e-150, 1e-300, 2.0 ** 40, 3e-7])
def test_a_covariate_on_any_scale_gives_the_same_smooth(unit_fit, scale):
    # the penalty is built in internal units (a power of two near the column's span): the
    # fit in x·scale must be the fit in x (same EDF and fitted values), not unpenalized
    df = _smooth_frame()
    fit = tg.Model("y", terms=[tg.spline("x", size=8)]).fit(df.assign(x=df.x * scale))
    assert fit.edf["spline(x)"] == pytest.approx(unit_fit.edf["spline(x)"], rel=1e-6)
    np.testing.assert_allclose(fit.predict(df.assign(x=df.x * scale)),
                               unit_fit.predict(df), rtol=1e-7, atol=1e-9)


@pytest.mark.parametrize("scale", [1e300, 1e-300])
def test_a_linear_term_on_any_scale_is_fitted(scale):
    df = _smooth_frame()
    ref = tg.Model("y", terms=[tg.linear("x")]).fit(df)
    fit = tg.Model("y", terms=[tg.linear("x")]).fit(df.assign(x=df.x * scale))
    np.testing.assert_allclose(fit.predict(df.assign(x=df.x * scale)), ref.predict(df),
                               rtol=1e-9)


@pytest.mark.parametrize("scale", [1e300, 1e120, 1e-300, 1e-120])
def test_a_response_beyond_double_precision_squares_is_refused(scale):
    df = _smooth_frame()
    with pytest.raises(tg.DataError, match="response 'y'.*(overflow|underflow).*Rescale"):
        tg.Model("y", terms=[tg.spline("x", size=8)]).fit(df.assign(y=df.y * scale))


def test_a_fixed_smoothing_means_the_same_in_any_units():
    # λ∫f''(x)²dx: with x in units a thousand times larger, the same curve needs λ·1000³
    df = _smooth_frame()
    a = tg.Model("y", criterion="fixed", terms=[tg.spline("x", size=8, smoothing=1e-3)]
                 ).fit(df)
    b = tg.Model("y", criterion="fixed", terms=[tg.spline("x", size=8, smoothing=1e6)]
                 ).fit(df.assign(x=df.x * 1000.0))
    np.testing.assert_allclose(b.predict(df.assign(x=df.x * 1000.0)), a.predict(df),
                               rtol=1e-9)
    assert b.smoothing["spline(x)"] == pytest.approx(1e6, rel=1e-12)


def test_a_categorical_with_many_levels_is_refused_before_any_pass():
    rng = np.random.default_rng(0)
    n = 120_000
    df = pd.DataFrame({"g": rng.integers(0, 100_000, n).astype(str), "y": rng.normal(size=n)})
    with pytest.raises(tg.OutOfMemoryError, match=r"categorical\(g\).*random_effect"):
        tg.Model("y", terms=[tg.categorical("g")]).fit(df)
    # the same column as a random effect is eliminated and fits
    assert tg.Model("y", terms=[tg.random_effect("g")]).fit(df).converged


def test_the_memory_limit_is_a_tuning_value():
    df = _smooth_frame()
    with pytest.raises(tg.OutOfMemoryError, match="more than the 0.0 GiB"):
        tg.Model("y", terms=[tg.spline("x", size=8)]).fit(
            df, tuning=tg.Tuning(memory_limit=1000))


@pytest.mark.parametrize("size", [10**7, 2001, 3.5, "12", True])
def test_spline_sizes_beyond_reason_are_refused_at_once(size):
    with pytest.raises(tg.SpecError, match="size"):
        tg.spline("x", size=size)


@pytest.mark.parametrize("size", [(8, 10**6), (10**6, 8)])
def test_surface_sizes_beyond_reason_are_refused_at_once(size):
    with pytest.raises(tg.SpecError, match="size"):
        tg.surface("a", "b", size=size)


BAD_OPTIONS = [("batch_rows", 0), ("batch_rows", -5), ("batch_rows", 2.5),
               ("batch_rows", "many"), ("threads", 0), ("threads", -1)]


@pytest.mark.parametrize("entry,option,value",
                         [(e, o, v) for e in ("fit", "predict", "score", "validate")
                          for o, v in BAD_OPTIONS if o == "batch_rows" or e == "fit"])
def test_bad_run_options_are_refused_the_same_way_everywhere(unit_fit, tmp_path, entry,
                                                             option, value):
    df = _smooth_frame(200)
    calls = {"fit": lambda **kw: tg.Model("y", terms=[tg.spline("x", size=8)]).fit(df, **kw),
             "predict": lambda **kw: unit_fit.predict(df, **kw),
             "score": lambda **kw: unit_fit.score(df, tmp_path / "s.parquet", **kw),
             "validate": lambda **kw: unit_fit.validate(df, **kw)}
    with pytest.raises(tg.SpecError, match=f"{option} must be a positive whole number"):
        calls[entry](**{option: value})
    assert not (tmp_path / "s.parquet").exists()


@pytest.mark.parametrize("y,weights,ok", [(0.5, None, False), (0.25, None, False),
                                          (0.5, 4.0, True), (1.0, None, True)])
def test_binomial_proportions_need_their_trials(y, weights, ok):
    rng = np.random.default_rng(1)
    n = 400
    df = pd.DataFrame({"x": rng.uniform(size=n), "w": np.full(n, weights or 1.0),
                       "y": (rng.uniform(size=n) < 0.4).astype(float)})
    df.loc[:9, "y"] = y
    model = tg.Model("y", family="binomial", weights="w" if weights else None,
                     terms=[tg.linear("x")])
    if ok:
        assert model.fit(df).converged
    else:
        with pytest.raises(tg.DataError, match="no numbers of trials"):
            model.fit(df)

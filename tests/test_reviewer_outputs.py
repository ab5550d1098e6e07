"""What a pricing reviewer reads and types, through the real command line (``main([...])``)
on the demo's invented book: the summary, the tables, the report, the charts, the options of
every verb, ``--where`` and SQL sources, quiet runs, cautions, CSV output.

Independent figures come from DuckDB over the demo's Parquet (sums of exposure, filtered
row counts) and from pandas reading the written files back."""

from __future__ import annotations

import argparse
import csv
import json
import os
import re
import subprocess
import sys
import warnings

import duckdb
import numpy as np
import pandas as pd
import pyarrow.csv as pacsv
import pytest

import tallgam as tg
from tallgam.cli import build_parser, main

pytestmark = [pytest.mark.filterwarnings("ignore::tallgam.TallgamWarning"), pytest.mark.slow]

ROWS = 40_000
HOLDOUT = "policy_year = 2024"
# lines of another program's printed summary that ours must not carry (issue 15)
FORBIDDEN = ("deviance explained", "adjusted R²", "adjusted r-sq", "parametric coefficient",
             "std. error", "reml criterion", "scale φ")
INTERNAL = re.compile(r"\b(spline|linear|categorical|cyclic|surface|random_effect|adjacency)\(")


def cli(capsys, *args) -> tuple[int, str, str]:
    code = main([str(a) for a in args])
    out = capsys.readouterr()
    return code, out.out, out.err


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    """The demo on a small book, run once; what it printed is checked here."""
    import contextlib
    import io

    folder = tmp_path_factory.mktemp("demo")
    out = io.StringIO()
    with warnings.catch_warnings(), contextlib.redirect_stdout(out):
        warnings.simplefilter("ignore")
        assert main(["demo", "--rows", str(ROWS), "--dir", str(folder)]) == 0
    printed = out.getvalue()
    assert "claim frequency" in printed and "qualified actuary" in printed
    assert "spec files to copy from" in printed
    assert "premium moves by more than 5%" in printed  # the tariff step's cost of banding
    for name in ("frequency.toml", "severity.toml", "frequency_banded.toml",
                 "tables/frequency/notes.txt", "report_frequency.html"):
        assert (folder / name).exists(), name
    return folder


def book(demo) -> str:
    return str(demo / "book" / "*.parquet")


def duck(sql: str, *params):
    con = duckdb.connect()
    try:
        return con.execute(sql, list(params)).fetchall()
    finally:
        con.close()


# ---------------------------------------------------------------------------------------
# the summary, show, tables and report carry column names and trade words only


def test_show_reads_in_our_own_order_and_words(demo, capsys):
    code, out, _ = cli(capsys, "show", demo / "frequency.json")
    assert code == 0
    for heading in ("Data", "Fit", "Terms", "Levels", "Training data"):
        assert re.search(rf"^{heading}\b", out, re.M), heading
    assert out.index("\nData") < out.index("\nFit") < out.index("\nTerms") < out.index(
        "\nLevels")
    for line in FORBIDDEN:
        assert line.lower() not in out.lower(), line
    assert not INTERNAL.search(out), INTERNAL.search(out)
    assert "qualified actuary" in out
    # the deviance is stated as a ratio of deviances, numbers without exponents
    fit = tg.load(demo / "frequency.json")
    ratio = fit.deviance / fit.null_deviance
    assert f"ratio {ratio:.4f}" in out
    assert not re.search(r"\d\.\d+e[+-]\d\d", out.split("Terms")[0])  # Data and Fit
    # the training exposure: DuckDB's sum over the training rows, with separators
    (exposure,), = duck("SELECT sum(exposure) FROM read_parquet(?) WHERE policy_year <= 2023",
                        book(demo))
    assert f"{exposure:,.0f}" in out
    # one row per rating factor, by column name, with kind, EDF and relativity range
    for column, kind in (("driver_age", "spline"), ("density", "spline"),
                         ("bonus_level", "linear"), ("region", "categorical")):
        assert re.search(rf"^  {column}\s+{kind}\s+\d+\.\d\d\s", out, re.M), column


def test_levels_are_relativities_with_their_band(demo):
    # reference: exp(β) of the coefficient table and exp(β ± 1.96·se) (common practice)
    fit = tg.load(demo / "frequency.json")
    text = fit.summary()
    coef = fit.coefficients.to_pandas()
    fuel = coef[coef.term == "categorical(fuel)"].set_index("name")
    for level in ("diesel", "electric"):
        b, se = fuel.loc[level, "estimate"], fuel.loc[level, "std_error"]
        want = (f"{np.exp(b):.3f}  {np.exp(b - 1.959964 * se):.3f} to "
                f"{np.exp(b + 1.959964 * se):.3f}")
        assert re.search(rf"^\s+{level}\s+{re.escape(want)}", text, re.M), (level, want)
    assert re.search(r"^\s+petrol\s+base\b", text, re.M)


def test_r_squared_only_for_the_gaussian_family():
    rng = np.random.default_rng(4)
    df = pd.DataFrame({"x": rng.uniform(0, 1, 3000)})
    df["y"] = np.sin(5 * df.x) + rng.normal(0, 0.3, 3000)
    df["n"] = rng.poisson(np.exp(df.y))
    gauss = tg.Model("y", terms=[tg.spline("x", size=6)]).fit(df)
    pois = tg.Model("n", family="poisson", terms=[tg.spline("x", size=6)]).fit(df)
    assert "R²" in gauss.summary() and gauss.r2_adjusted is not None
    assert "R²" not in pois.summary() and pois.r2_adjusted is None


def test_term_tests_fill_the_p_value_column(demo):
    """Each term's row carries the p-value of fit.term_tests; a model file without the
    tests (written before they existed) says so instead."""
    fit = tg.load(demo / "frequency.json")
    tests = {r["term"]: r for r in fit.term_tests.to_pylist()}
    text = fit.summary()
    rows = {line.split()[0]: line.rstrip() for line in text.split("\nTerms\n")[1]
            .split("\n\n")[0].splitlines()[1:] if line.startswith("  ") and
            not line.startswith("   ")}
    for b in fit.bases[1:]:
        p = tests[b.label]["p_value"]
        want = "< 0.001" if p < 0.001 else f"{p:.3f}"
        assert rows[b.title].endswith(want), (b.title, rows[b.title], p)
    assert "p-value: the test that the term is not needed (" in text
    fit.statistics.pop("term_tests")
    assert "no test of the terms in this model file" in fit.summary()


def test_tables_and_report_use_column_names(demo, capsys, tmp_path):
    code, out, err = cli(capsys, "tables", demo / "severity.json", "-o", tmp_path / "t")
    assert code == 0
    files = sorted(os.listdir(tmp_path / "t"))
    assert {"driver_age.csv", "vehicle_power.csv", "region.csv", "base.csv",
            "notes.txt"} <= set(files)
    allowed = {"training_weight", "data_weight", "relativity", "relativity_lower",
               "relativity_upper", "difference", "lower", "upper", "std_error", "estimate"}
    for name in files:
        if name.endswith(".csv") and name != "base.csv":
            header = next(csv.reader(open(tmp_path / "t" / name)))
            assert set(header[1:]) <= allowed and header[0] == name[:-4], (name, header)
    notes = (tmp_path / "t" / "notes.txt").read_text()
    assert "qualified actuary" in notes and not INTERNAL.search(notes)
    code, _, _ = cli(capsys, "report", demo / "frequency.json", book(demo), "--where", HOLDOUT,
                     "-o", tmp_path / "r.html", "-q")
    html = (tmp_path / "r.html").read_text()
    visible = re.sub(r"<[^>]+>|data:image/png;base64,[A-Za-z0-9+/=]+", " ", html)
    assert not INTERNAL.search(visible), INTERNAL.search(visible)
    for line in FORBIDDEN:
        assert line.lower() not in visible.lower(), line
    assert "estimate" not in re.findall(r"<th>([^<]*)</th>", html)  # link-scale columns stay
    assert "<th>relativity</th>" in html and "training exposure (Σ exposure)" in html  # in files


# ---------------------------------------------------------------------------------------
# tables: rows where the data are, with the training weight


def test_every_numeric_factor_spreads_its_training_weight(demo, capsys, tmp_path):
    """No row of a numeric factor's table carries more than 20% of the training weight,
    unless that row is a single value of the column holding more than 20% on its own
    (then no table can split it: bonus_level 0 holds about 28% of the demo's exposure)."""
    for model, train in (("frequency", "policy_year <= 2023"),
                         ("severity", "claim_count > 0 AND policy_year <= 2023")):
        fit = tg.load(demo / f"{model}.json")
        weight = "exposure" if model == "frequency" else "claim_count"
        (total,), = duck(f"SELECT sum({weight}) FROM read_parquet(?) WHERE {train}", book(demo))
        tables = fit.relativities()
        numeric = [b for b in fit.bases[1:] if b.drawn_as == "curve"]
        assert numeric
        for b in numeric:
            column = b.inputs[0]
            t = tables.tables[b.label].to_pandas()
            assert "training_weight" in t.columns, column
            assert t.training_weight.sum() == pytest.approx(total, rel=1e-9), column
            heavy = t[t.training_weight > 0.2 * total]
            for _, row in heavy.iterrows():
                (alone,), = duck(f"SELECT sum({weight}) FROM read_parquet(?) WHERE {train} "
                                 f"AND {column} = ?", book(demo), float(row[column]))
                assert alone == pytest.approx(row.training_weight, rel=1e-9), (column, row)
            if column == "density":  # the skewed one: rows at weighted quantiles
                assert t.training_weight.max() < 0.05 * total
                assert len(t) > 50


def test_files_hold_no_float_noise(demo, tmp_path, capsys):
    cli(capsys, "tables", demo / "frequency.json", "-o", tmp_path / "t", "--format", "csv")
    for name in ("density.csv", "driver_age.csv", "base.csv"):
        for row in csv.DictReader(open(tmp_path / "t" / name)):
            if row.get("item", "reference") != "reference":
                continue  # the base rate and base link: every digit, on purpose
            for key in ("density", "driver_age", "training_weight", "value"):
                text = row.get(key)
                if text and re.fullmatch(r"-?[\d.]+(e[+-]?\d+)?", text):
                    digits = re.sub(r"e.*|[-.]", "", text).strip("0")
                    assert len(digits) <= 12, (name, key, text)


# ---------------------------------------------------------------------------------------
# the command line: --where and SQL sources on every verb that reads data


def test_validate_where_and_sql_equal_a_filtered_file(demo, capsys, tmp_path):
    held = tmp_path / "held.parquet"
    duck(f"COPY (SELECT * FROM read_parquet(?) WHERE {HOLDOUT} ORDER BY policy_id) TO "
         f"'{held}' (FORMAT parquet)", book(demo))
    model = demo / "frequency.json"
    outs = []
    for source in ([held], [book(demo), "--where", HOLDOUT],
                   ["--sql", f"SELECT * FROM read_parquet('{book(demo)}') ORDER BY policy_id",
                    "--where", HOLDOUT]):
        code, out, _ = cli(capsys, "validate", model, *source)
        assert code == 0
        outs.append(out)
    assert outs[0] == outs[1] == outs[2]
    (rows,), = duck(f"SELECT count(*) FROM read_parquet(?) WHERE {HOLDOUT}", book(demo))
    assert f"{rows:,}" in outs[0] and "qualified actuary" in outs[0]
    code, _, err = cli(capsys, "validate", model, book(demo), "--where", "no_such_column = 1")
    assert code == 3 and "no_such_column" in err


def test_score_where_and_sql_write_the_same_rows(demo, capsys, tmp_path):
    model = demo / "frequency.json"
    a, b = tmp_path / "a.parquet", tmp_path / "b.csv"
    assert cli(capsys, "score", model, book(demo), "--where", HOLDOUT, "-o", a,
               "--keep", "policy_id")[0] == 0
    assert cli(capsys, "score", model, "--sql",
               f"SELECT * FROM '{book(demo)}' WHERE {HOLDOUT}", "-o", b,
               "--keep", "policy_id")[0] == 0
    pa_, csv_ = pd.read_parquet(a), pacsv.read_csv(b).to_pandas()  # Arrow: exact parse
    (rows,), = duck(f"SELECT count(*) FROM read_parquet(?) WHERE {HOLDOUT}", book(demo))
    assert len(pa_) == len(csv_) == rows
    merged = pa_.merge(csv_, on="policy_id", suffixes=("", "_csv"))
    # CSV numbers read back as the same floats (full precision)
    np.testing.assert_array_equal(merged.prediction, merged.prediction_csv)
    code, _, err = cli(capsys, "score", model, book(demo), "-o", tmp_path / "c.txt")
    assert code == 2 and ".parquet or .csv" in err and not (tmp_path / "c.txt").exists()


def test_tables_and_report_take_a_filtered_source(demo, capsys, tmp_path):
    model = demo / "frequency.json"
    code, _, _ = cli(capsys, "tables", model, "--sql", f"SELECT * FROM '{book(demo)}'",
                     "--where", HOLDOUT, "-o", tmp_path / "t")
    assert code == 0
    fuel = pd.read_csv(tmp_path / "t" / "fuel.csv").set_index("fuel")
    got = dict(duck(f"SELECT fuel, sum(exposure) FROM read_parquet(?) WHERE {HOLDOUT} "
                    "GROUP BY 1", book(demo)))
    for level, value in got.items():
        assert fuel.loc[level, "data_weight"] == pytest.approx(value, rel=1e-9)
    code, _, _ = cli(capsys, "report", model, "--sql", f"SELECT * FROM '{book(demo)}'",
                     "--where", HOLDOUT, "-o", tmp_path / "r.html", "-q")
    assert code == 0
    (rows,), = duck(f"SELECT count(*) FROM read_parquet(?) WHERE {HOLDOUT}", book(demo))
    assert f"{rows:,}" in (tmp_path / "r.html").read_text()


def test_one_source_syntax_and_one_output_option_across_verbs():
    parser = build_parser()
    verbs = next(a for a in parser._actions if isinstance(a, argparse._SubParsersAction))
    reading = {"fit", "score", "tables", "validate", "check", "report"}
    for name, sub in verbs.choices.items():
        actions = {a.dest: a for a in sub._actions}
        for action in sub._actions:
            if isinstance(action, argparse._HelpAction) or action.dest == "debug":
                continue
            assert action.help, f"{name} {action.dest}: no help"
        if name in reading:
            assert {"source", "sql", "database", "where"} <= set(actions), name
            assert actions["source"].metavar == "SOURCE"
        if "output" in actions:
            assert actions["output"].option_strings == ["-o", "--output"], name
        if name == "tariff":  # its positionals are the models: the hold-out is named
            assert {"data", "sql", "database", "where"} <= set(actions)
            assert actions["data"].metavar == "SOURCE"
        else:
            assert "data" not in actions, f"{name}: the data is SOURCE or --sql, not --data"
        if name not in ("show",):
            assert "quiet" in actions, name


def test_no_select_or_discretize_in_public_names():
    import inspect

    from tallgam.spec import MODEL_KEYS, RUN_KEYS

    names = set(inspect.signature(tg.Model.fit).parameters) | set(MODEL_KEYS) | set(RUN_KEYS)
    for spec in tg.terms.kinds().values():
        names |= set(spec.options())
    for make in (tg.spline, tg.surface, tg.cyclic, tg.linear, tg.categorical):
        names |= set(inspect.signature(make).parameters)
    parser = build_parser()
    verbs = next(a for a in parser._actions if isinstance(a, argparse._SubParsersAction))
    for sub in verbs.choices.values():
        names |= {o for a in sub._actions for o in a.option_strings}
    assert not {n for n in names if "select" in n or "discreti" in n}, names
    root = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
    docs = [os.path.join(root, "README.md")] + [
        os.path.join(d, f) for d, _, fs in os.walk(os.path.join(root, "docs")) for f in fs
        if f.endswith(".md")]
    for path in docs:
        text = open(path, encoding="utf-8").read()
        bad = re.findall(r"discreti[sz]\w*|\bselect\s*=|--select\b", text)
        assert not bad, (path, bad)


def test_quiet_prints_nothing_and_cautions_go_with_the_outputs(demo, capsys, tmp_path):
    model = demo / "frequency.json"
    inside = "policy_year = 2024 AND driver_age BETWEEN 25 AND 85"  # nothing to clamp: quiet
    runs = [["score", model, book(demo), "--where", inside, "-o", tmp_path / "s.parquet"],
            ["tables", model, "-o", tmp_path / "t"],
            ["validate", model, book(demo), "--where", inside, "-o", tmp_path / "v"],
            ["sql", model, "-o", tmp_path / "q.sql"],
            ["report", model, "-o", tmp_path / "r.html"]]
    for argv in runs:
        code, out, err = cli(capsys, *argv, "-q")
        assert code == 0 and out == "" and err == "", (argv[0], out, err)
    assert "qualified actuary" in (tmp_path / "v" / "notes.txt").read_text()
    assert "qualified actuary" in (tmp_path / "t" / "notes.txt").read_text()
    code, out, _ = cli(capsys, "validate", model, book(demo), "--where", HOLDOUT)
    assert "qualified actuary" in out
    # one name per Gini figure: no line names two of them
    assert all(line.count("Gini") <= 1 for line in out.splitlines())


def test_fit_from_the_demo_spec_with_where_and_sql(demo, capsys, tmp_path):
    spec = demo / "severity.toml"
    text = spec.read_text()
    assert 'base = "R01"' in text and "data = " in text
    code, out, err = cli(capsys, "fit", spec, "--sql", f"SELECT * FROM '{book(demo)}'",
                         "--where", "region <> 'R22'", "-o", tmp_path / "m.json")
    assert code == 0 and "qualified actuary" in out and "region <> 'R22'" in out
    fit = tg.load(tmp_path / "m.json")
    assert "R22" not in fit.bases[-1].levels and "claim_count > 0" in fit.model.where
    # the demo's frequency and severity models measure region from the same level
    bases = [dict(b for basis in tg.load(demo / f"{m}.json").bases
                  for b in basis.base_levels().items()) for m in ("frequency", "severity")]
    assert bases[0]["region"] == bases[1]["region"] == "R01"


def test_the_demo_folder_is_ignored_by_git():
    root = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
    ignored = open(os.path.join(root, ".gitignore")).read().split()
    default = build_parser().parse_args(["demo"]).dir
    assert f"{default}/" in ignored


def test_the_command_line_starts_without_the_engine():
    """--version and `import tallgam` load neither numba, DuckDB, numpy nor Arrow (what
    makes them take 0.05 s rather than seconds; no wall-clock threshold here)."""
    code = ("import sys, tallgam, tallgam.cli; heavy = [m for m in ('numba', 'duckdb', "
            "'numpy', 'pyarrow', 'scipy', 'matplotlib') if m in sys.modules]; print(heavy)")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         check=True).stdout
    assert out.strip() == "[]"
    version = subprocess.run([sys.executable, "-m", "tallgam", "--version"],
                             capture_output=True, text=True, check=True).stdout
    assert version.startswith("tallgam ")


# ---------------------------------------------------------------------------------------
# charts: our own look


def test_effect_charts_have_a_filled_band_and_a_suitable_axis(demo):
    pytest.importorskip("matplotlib")
    from tallgam.outputs import plots

    fit = tg.load(demo / "frequency.json")
    rel = fit.relativities()
    for label, log_x in (("spline(density)", True), ("spline(driver_age)", False)):
        fig = plots.effect_figure(rel.tables[label], rel.titles[label], log_link=True,
                                  weight_label=rel.weight_label)
        ax, bar = fig.axes
        assert all(line.get_linestyle() not in (":", "dotted") for line in ax.lines)
        assert ax.collections, "the band is a fill"
        assert (bar.get_xscale() == "log") is log_x
        assert ax.get_title(loc="left") == rel.titles[label]
        assert "training exposure" in bar.get_ylabel().replace("\n", " ")
        assert len(bar.patches) > 5, "the weight panel is drawn"
        plots.to_png(fig)


def test_validation_charts_keep_levels_apart_and_small_differences_small(demo):
    pytest.importorskip("matplotlib")
    from tallgam.outputs import plots

    fit = tg.load(demo / "frequency.json")
    val = fit.validate(book(demo), where=HOLDOUT)
    fig = plots.actual_vs_expected_figure(val.actual_vs_expected["region"], "region",
                                          ordered=False)
    ax = fig.axes[0]
    ratio = [line for line in ax.lines if len(line.get_xdata()) > 2][0]
    assert ratio.get_linestyle() == "None"  # unordered levels: points, no joining line
    lo, hi = ax.get_ylim()
    assert lo <= 0.9 and hi >= 1.1
    numeric = plots.actual_vs_expected_figure(val.actual_vs_expected["driver_age"],
                                              "driver_age", ordered=True)
    assert [line for line in numeric.axes[0].lines if len(line.get_xdata()) > 2][0] \
        .get_linestyle() == "-"
    for f in (fig, numeric):
        plots.to_png(f)


def test_numbers_for_people():
    from tallgam.data.profile import tidy
    from tallgam.outputs.formatting import number, p_value

    assert number(284910.3) == "284,910" and number(0.0871377, 4) == "0.08714"
    assert number(9999.7) == "10,000" and number(None) == "–"
    assert p_value(0.0004) == "< 0.001" and p_value(0.0312) == "0.031"
    np.testing.assert_array_equal(tidy([413.89151999999996, 0.1 + 0.2, 201.66299999999998]),
                                  [413.89152, 0.3, 201.663])
    assert json.loads(json.dumps(float(tidy([1 / 3])[0]))) == 0.333333333333

"""The ``tallgam`` command line: fit, show, score, sql, tables, validate, check, report,
tariff, demo.

Exit codes: 0 success; 1 unexpected failure; 2 usage or spec error (unknown key, unknown
column, bad family); 3 data error (NULLs, values outside the family's support, unreadable
file); 4 the fit did not converge (the model file is still written, marked so);
5 model-file error; 6 an output or the file system failed (folder missing or not writable,
output path is a folder, disk full); 7 out of memory; 8 ``check --alert``: a stability index
reached the alert level; 130 interrupted. Every exception goes through one funnel
(:func:`failure`) to a message on stderr, capped in length, that says what to do; a Python
traceback only with ``--debug``.
"""

from __future__ import annotations

import argparse
import os
import sys
import warnings

from tallgam.atomic import check_target, make_folder
from tallgam.errors import (
    ConvergenceWarning,
    DataError,
    FitError,
    ModelFileError,
    OutputError,
    SpecError,
    TallgamError,
    clip,
)
from tallgam.version import __version__

EXIT_OK, EXIT_FAIL, EXIT_USAGE, EXIT_DATA, EXIT_NOT_CONVERGED, EXIT_MODEL_FILE = 0, 1, 2, 3, 4, 5
EXIT_OUTPUT, EXIT_MEMORY, EXIT_DRIFT, EXIT_INTERRUPTED = 6, 7, 8, 130
#: longest message printed for one error or warning
MESSAGE_LIMIT = 2000
MEMORY_ADVICE = ("lower --batch-rows, use fewer --threads, make large terms smaller (spline "
                 "sizes, categoricals with many levels: a random effect instead), or run on a "
                 "machine with more memory")


def _err(msg: str) -> None:
    print(f"tallgam: {clip(msg, MESSAGE_LIMIT)}", file=sys.stderr)


def _out_of_memory(exc: BaseException) -> bool:
    """Whether ``exc``, or an exception it was raised from, is running out of memory."""
    seen = set()
    while exc is not None and id(exc) not in seen:
        seen.add(id(exc))
        if isinstance(exc, MemoryError) or type(exc).__name__ == "OutOfMemoryException":
            return True
        exc = exc.__cause__ or exc.__context__
    return False


def failure(exc: BaseException) -> tuple[int, str]:
    """The exit code and the message for an exception that ended a command."""
    if isinstance(exc, KeyboardInterrupt):
        return EXIT_INTERRUPTED, "interrupted; no partial output was left behind"
    if isinstance(exc, SpecError):
        return EXIT_USAGE, str(exc)
    if isinstance(exc, ModelFileError):
        return EXIT_MODEL_FILE, str(exc)
    if isinstance(exc, OutputError):
        return EXIT_OUTPUT, str(exc)
    if _out_of_memory(exc):
        detail = str(exc) if isinstance(exc, TallgamError) else \
            f"out of memory ({type(exc).__name__}: {clip(exc, 300) or 'no details'})"
        return EXIT_MEMORY, f"{detail}; {MEMORY_ADVICE}"
    if isinstance(exc, (DataError, FitError)):
        return EXIT_DATA, str(exc)
    if isinstance(exc, TallgamError):
        return EXIT_FAIL, str(exc)
    if isinstance(exc, OSError):
        from tallgam.atomic import describe_os_error

        where = "" if exc.filename is None else f" {clip(repr(exc.filename), 300)}"
        if exc.filename2 is not None:
            where += f" -> {clip(repr(exc.filename2), 300)}"
        return EXIT_OUTPUT, f"file-system error on{where or ' a file'}: {describe_os_error(exc)}"
    return EXIT_FAIL, (f"unexpected failure ({type(exc).__name__}: {clip(exc, 500)}); run "
                       "again with --debug for the traceback and report it")


def _progress(args):
    if getattr(args, "log_json", False):
        from tallgam.progress import JsonLines

        return JsonLines(sys.stderr)
    if getattr(args, "quiet", False):
        return False
    return True  # a bar only when stderr is a terminal


def _show_warnings(caught) -> None:
    for w in caught:
        _err(f"warning: {w.message}")


def _say(args, text: str) -> None:
    """A message for the person at the terminal (stderr); nothing with --quiet."""
    if not getattr(args, "quiet", False):
        print(text, file=sys.stderr)


def _print(args, text: str) -> None:
    """A result on stdout; nothing with --quiet."""
    if not getattr(args, "quiet", False):
        print(text)


def _source(args, required: bool = True):
    """The data named on the command line: SOURCE (a file, glob or folder) or --sql QUERY
    (with --database FILE). None when neither is given and none is required."""
    if getattr(args, "sql", None) is not None:
        if args.source is not None:
            raise SpecError(f"give the data either as SOURCE ({args.source!r}) or with --sql, "
                            "not both")
        from tallgam.data.sources import sql

        return sql(args.sql, database=args.database)
    if getattr(args, "database", None) is not None:
        raise SpecError("--database names the DuckDB file that --sql reads; give --sql too")
    if args.source is None and required:
        raise SpecError("name the data: SOURCE (a Parquet/CSV file, glob or folder) or "
                        "--sql QUERY")
    return args.source


def _reference_values(items: list[str] | None) -> dict:
    reference = {}
    for item in items or []:
        col, _, value = item.partition("=")
        try:
            reference[col] = float(value)
        except ValueError:
            raise SpecError(f"--reference takes COLUMN=NUMBER, got {item!r}") from None
    return reference


def cmd_fit(args) -> int:
    from dataclasses import replace

    from tallgam.spec import load_spec

    spec = load_spec(args.spec)
    data = _source(args, required=False) or spec.data
    if not data:
        raise SpecError(f"{args.spec} names no data: add data = \"...\" to it, or give "
                        "SOURCE or --sql")
    model = spec.model
    if args.where:
        where = f"({model.where}) AND ({args.where})" if model.where else args.where
        model = replace(model, where=where)
    out = args.output or spec.output or os.path.splitext(args.spec)[0] + ".json"
    binned = spec.binned if args.binned is None else _binned_flag(args.binned)
    check_target(out)  # a bad output path fails now, not after the fit
    fit = model.fit(data, batch_rows=args.batch_rows or spec.batch_rows,
                    threads=args.threads or spec.threads, progress=_progress(args),
                    cluster=args.cluster, binned=binned,
                    scratch=args.scratch if args.scratch is not None else spec.scratch,
                    start=args.start or spec.start,
                    checkpoint=args.checkpoint or spec.checkpoint)
    fit.save(out)
    _print(args, fit.summary())
    _say(args, f"model written to {out}")
    return EXIT_OK if fit.converged else EXIT_NOT_CONVERGED


def _binned_flag(text: str):
    """``--binned`` [auto | on | off | POINTS] as Model.fit's ``binned``."""
    words = {"auto": "auto", "on": True, "true": True, "off": False, "false": False}
    if text.lower() in words:
        return words[text.lower()]
    try:
        return int(text)
    except ValueError:
        raise SpecError(f"--binned takes auto, on, off or a number of grid values, got "
                        f"{text!r}") from None


def cmd_show(args) -> int:
    from tallgam.model import load

    fit = load(args.model)
    print(fit.summary())
    from tallgam.outputs.summary import profile_text

    print(profile_text(fit), end="")
    return EXIT_OK


def cmd_score(args) -> int:
    from tallgam.model import load

    fit = load(args.model)
    keep = [k for k in (args.keep or "").split(",") if k]
    extra = {"cluster": args.cluster, "threads": args.threads} if args.cluster else {}
    if args.cluster and args.where:
        raise SpecError("--where cannot be used with --cluster (the workers read whole "
                        "files); write the rows to score to files first")
    if not args.cluster:
        extra["where"] = args.where
    report = fit.score(_source(args), args.output, keep=keep, terms=args.terms, se=args.se,
                       unseen=args.unseen, batch_rows=args.batch_rows,
                       progress=_progress(args), **extra)
    where = f"the part files of {args.output}" if args.cluster else args.output
    _say(args, f"scored {report.rows:,} rows into {where}")
    return EXIT_OK


def cmd_sql(args) -> int:
    from tallgam.model import load

    fit = load(args.model)
    text = fit.to_sql(output=args.scale, with_offset=not args.no_offset)
    if args.output:
        from tallgam.atomic import write_text

        write_text(args.output, text + "\n")
        _say(args, f"SQL written to {args.output}")
    else:
        print(text)
    return EXIT_OK


def cmd_tables(args) -> int:
    from tallgam.model import load
    from tallgam.outputs.formatting import number

    fit = load(args.model)
    formats = [f for f in args.format.split(",") if f]
    make_folder(args.output)  # a bad output folder fails now, not after reading data
    tables = fit.relativities(reference=_reference_values(args.reference),
                              data=_source(args, required=False), where=args.where)
    paths = tables.write(args.output, formats=formats)
    if tables.base_rate is not None:
        unit = " per unit of exposure" if fit.model.exposure else ""
        _print(args, f"base rate {number(tables.base_rate, 6)}{unit}")
    _say(args, f"{len(paths)} files written to {args.output} (notes.txt explains them)")
    return EXIT_OK


def cmd_validate(args) -> int:
    import textwrap

    from tallgam.model import load
    from tallgam.outputs.formatting import CAUTION

    fit = load(args.model)
    against = load(args.against) if args.against else None
    if args.output:
        make_folder(args.output)  # a bad output folder fails now, not after the pass
    val = fit.validate(_source(args), against=against, where=args.where,
                       batch_rows=args.batch_rows, progress=_progress(args))
    _print(args, val.summary() + "\n\n" + "\n".join(textwrap.wrap(f"Caution: {CAUTION}", 92)))
    if args.output:
        paths = val.write(args.output)
        _say(args, f"{len(paths)} files written to {args.output} (notes.txt explains them)")
    return EXIT_OK


def cmd_check(args) -> int:
    from tallgam.model import load

    fit = load(args.model)
    check = fit.check(_source(args), where=args.where)
    _print(args, check.summary())
    if args.output:
        from tallgam.atomic import write_text

        write_text(args.output, check.to_json() + "\n")
        _say(args, f"check written to {args.output}")
    if args.alert is not None and check.worst_psi >= args.alert:
        _err(f"a stability index reached {check.worst_psi:.3f} (alert level {args.alert:g}): "
             f"{', '.join(check.flagged(args.alert))}")
        return EXIT_DRIFT
    return EXIT_OK


def cmd_report(args) -> int:
    from tallgam.model import load
    from tallgam.outputs.report import write_report

    fit = load(args.model)
    against = load(args.against) if args.against else None
    data = _source(args, required=False)
    if data is None and (args.where or against is not None):
        raise SpecError("--where and --against apply to hold-out data: give SOURCE or --sql")
    path = write_report(fit, args.output, data=data, where=args.where, against=against,
                        title=args.title, progress=_progress(args))
    _say(args, f"report written to {path}")
    return EXIT_OK


def cmd_tariff(args) -> int:
    from tallgam.outputs.formatting import CAUTION
    from tallgam.outputs.tariff import tariff

    if len(args.models) > 2:
        raise SpecError("give one model, or a frequency and a severity model")
    if args.sql is not None and args.data is not None:
        raise SpecError("give the hold-out either with --data or with --sql, not both")
    if args.database is not None and args.sql is None:
        raise SpecError("--database names the DuckDB file that --sql reads; give --sql too")
    holdout = args.data
    if args.sql is not None:
        from tallgam.data.sources import sql

        holdout = sql(args.sql, database=args.database)
    if args.where and holdout is None:
        raise SpecError("--where filters the hold-out: give --data (or --sql) too")
    reference = {}
    for item in args.reference or []:
        col, sep, value = item.partition("=")
        if not sep or not col:
            raise SpecError(f"--reference takes COLUMN=VALUE, got {item!r}")
        reference[col] = value
    built = tariff(*args.models, bands=args.bands, tolerance=args.tolerance,
                   min_exposure=args.min_exposure, reference=reference,
                   training=args.training, batch_rows=args.batch_rows,
                   progress=_progress(args))
    cost = None
    if holdout is not None:
        cost = built.cost(holdout, where=args.where, actual=args.actual, power=args.power,
                          batch_rows=args.batch_rows, progress=_progress(args))
    paths = built.write(args.output, cost=cost)
    if not args.quiet:
        print(built.summary())
        if cost is not None:
            print("\n" + cost.summary())
        print(f"\nCaution: {CAUTION}")
    _say(args, f"tariff written to {args.output} ({len(paths)} files)")
    return EXIT_OK


def cmd_demo(args) -> int:
    from tallgam.demo import run_demo
    from tallgam.outputs.formatting import CAUTION

    def echo(text: str) -> None:
        if not args.quiet:
            print(text, flush=True)

    res = run_demo(args.dir, rows=args.rows, seed=args.seed, progress=_progress(args),
                   echo=echo)
    echo(f"\nbook: actual claims {res.actual_claims:,.0f}, expected by the frequency model "
         f"{res.expected_claims:,.1f} (ratio {res.actual_claims / res.expected_claims:.4f})")
    echo(f"models: {os.path.join(res.folder, 'frequency.json')}, "
         f"{os.path.join(res.folder, 'severity.json')}; scores: {res.scored}")
    echo("spec files to copy from: " + ", ".join(res.specs))
    if res.reports:
        echo("reports: " + ", ".join(res.reports))
    echo(f"\nCaution: {CAUTION}")
    return EXIT_OK


SOURCE_HELP = ("the data: a Parquet or CSV file, a glob (quote it: \"book/*.parquet\") or a "
               "folder (hive partitions are detected)")


def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(
        prog="tallgam",
        description="Generalized additive models fitted to data larger than memory. Every "
                    "command that reads data takes it as SOURCE (files) or --sql QUERY, and "
                    "--where CONDITION to keep some rows; -o/--output always names the file "
                    "(or folder) written.",
        epilog="Exit codes: 0 ok, 1 unexpected failure, 2 usage/spec error, 3 data error, "
               "4 fit did not converge, 5 model-file error, 6 output/file-system error (folder "
               "missing or not writable, disk full), 7 out of memory, 8 check found a stability "
               "index at the alert level, 130 interrupted. docs/commands/ has a page per "
               "command.")
    p.add_argument("--version", action="version", version=f"tallgam {__version__}")
    p.add_argument("--debug", action="store_true",
                   help="print the Python traceback of a failure (for reporting a bug)")
    sub = p.add_subparsers(dest="command", required=True, metavar="COMMAND")

    def quiet(sp, progress=True, help="print nothing but errors and warnings (no progress, "
                                      "summary or messages)"):
        sp.add_argument("-q", "--quiet", action="store_true", help=help)
        if progress:
            sp.add_argument("--log-json", action="store_true",
                            help="progress as JSON lines on stderr (for batch logs)")

    def model(sp):
        sp.add_argument("model", metavar="MODEL",
                        help="the model file (JSON) written by tallgam fit")

    def source(sp, optional: bool, what: str = "the data"):
        # always optional for argparse, so that --sql can stand in for it; _source insists
        sp.add_argument("source", nargs="?", metavar="SOURCE", default=None,
                        help=SOURCE_HELP.replace("the data", what)
                        + ("; optional" if optional else "") + "; or give --sql instead")
        sp.add_argument("--sql", metavar="QUERY", default=None,
                        help="read the rows of this DuckDB SQL query instead of SOURCE, e.g. "
                             "\"SELECT * FROM 'book/*.parquet' JOIN ...\"")
        sp.add_argument("--database", metavar="FILE", default=None,
                        help="with --sql: a DuckDB database file to run the query in "
                             "(opened read-only)")
        sp.add_argument("--where", metavar="CONDITION", default=None,
                        help="keep only the rows meeting this SQL condition, e.g. "
                             "\"policy_year = 2024\"")

    def batch_rows(sp, default):
        sp.add_argument("--batch-rows", type=int, default=default, metavar="N",
                        help="rows read and held in memory at once (the memory bound; "
                             f"default {default:,})" if default else
                             "rows read and held in memory at once (the memory bound; "
                             "default: the spec's batch_rows, else 1,000,000)")

    f = sub.add_parser("fit", help="fit the model of a spec file and write the model file",
                       description="Fit the model a spec file (TOML) describes, print its "
                                   "summary and write the model file.")
    f.add_argument("spec", metavar="SPEC",
                   help="the spec file (TOML): the model's keys and one [[term]] table per "
                        "term (docs/spec-file.md)")
    source(f, optional=True, what="the training data, instead of the spec's data")
    f.add_argument("-o", "--output", help="model file to write (default: the spec's output, "
                                          "else SPEC with .json)")
    batch_rows(f, None)
    f.add_argument("--threads", type=int, default=None, metavar="N",
                   help="cores to use (default: all; with --cluster: threads per task, "
                        "default 1)")
    f.add_argument("--binned", nargs="?", const="on", default=None,
                   metavar="auto|on|off|POINTS",
                   help="binned passes: code covariates into tables of distinct values, "
                        "exact for whole numbers, other columns rounded to POINTS grid values "
                        "(on: 200); several times faster per data pass. Default auto: "
                        "chosen by the fit and said in the model's notes")
    f.add_argument("--scratch", metavar="DIR", default=None,
                   help="binned passes: folder for the scratch copy of the coded rows "
                        "(default: the system's temporary folder)")
    f.add_argument("--start", metavar="MODEL", default=None,
                   help="a model file of an earlier fit of the same model (e.g. last "
                        "month's): its predictions start the iterations, so a refit takes "
                        "few passes; the result is the fit to the data")
    f.add_argument("--checkpoint", metavar="FILE", default=None,
                   help="record what every scan of the data returned in FILE, flushed as "
                        "each ends; run the same command again after a kill or a fault and "
                        "the fit resumes where it stopped, with the same result (FILE is "
                        "removed when the fit ends)")
    f.add_argument("--cluster", metavar="ADDRESS", default=None,
                   help="run the data passes on the Dask cluster whose scheduler is at "
                        "ADDRESS (e.g. tcp://host:8786); needs tallgam[dask] and data on "
                        "storage every worker reads")
    quiet(f)
    f.set_defaults(func=cmd_fit)

    s = sub.add_parser("show", help="the summary of a saved model and its training data",
                       description="Print the summary of a saved model (data, fit, terms, "
                                   "levels, notes) and the profile of its training data.")
    model(s)
    s.set_defaults(func=cmd_show)

    sc = sub.add_parser("score", help="stream predictions of a source into a Parquet or CSV "
                                      "file",
                        description="Predict every row of the data, batch by batch, into one "
                                    "file; its extension (.parquet or .csv) sets the format.")
    model(sc)
    source(sc, optional=False, what="the data to score")
    sc.add_argument("-o", "--output", required=True, metavar="FILE",
                    help="file to write: .parquet or .csv (with --cluster: a folder of "
                         "Parquet part files)")
    sc.add_argument("--keep", metavar="COLUMNS",
                    help="comma-separated columns to carry through (e.g. policy keys)")
    sc.add_argument("--terms", action="store_true",
                    help="add each term's contribution (link scale)")
    sc.add_argument("--se", action="store_true", help="add standard errors")
    sc.add_argument("--unseen", choices=["error", "base"], default="error",
                    help="levels not seen in training: stop (error, the default) or give "
                         "them the base level's effect (base)")
    batch_rows(sc, 1_000_000)
    sc.add_argument("--cluster", metavar="ADDRESS", default=None,
                    help="score on the Dask cluster whose scheduler is at ADDRESS; writes "
                         "OUTPUT as a folder of part files, only when all succeeded")
    sc.add_argument("--threads", type=int, default=None, metavar="N",
                    help="with --cluster: threads per task (default 1)")
    quiet(sc)
    sc.set_defaults(func=cmd_score)

    q = sub.add_parser("sql", help="a DuckDB SQL expression reproducing the predictions",
                       description="Print (or write with -o) one DuckDB SQL expression that "
                                   "reproduces the model's predictions.")
    model(q)
    q.add_argument("--scale", choices=["response", "link"], default="response",
                   help="the prediction (response, the default) or the linear predictor "
                        "(link)")
    q.add_argument("--no-offset", action="store_true",
                   help="leave out the exposure (or offset)")
    q.add_argument("-o", "--output", metavar="FILE", default=None,
                   help="write the expression to this file instead of printing it")
    quiet(q, progress=False, help="with -o: no message (without -o the expression itself is "
                                  "the output, and is printed)")
    q.set_defaults(func=cmd_sql)

    t = sub.add_parser("tables", help="write every rating factor's relativity table (CSV, "
                                      "Parquet) with notes",
                       description="Write one relativity table per rating factor, base.csv "
                                   "and notes.txt into a folder. With SOURCE (or --sql), the "
                                   "tables also give that data's exposure at each row "
                                   "(data_weight).")
    model(t)
    source(t, optional=True, what="data whose exposure to show beside the training weight")
    t.add_argument("-o", "--output", required=True, metavar="FOLDER",
                   help="folder for the tables")
    t.add_argument("--format", default="csv,parquet",
                   help="csv, parquet or both, comma-separated (default: both)")
    t.add_argument("--reference", action="append", metavar="COLUMN=VALUE",
                   help="reference value of a numeric column (default: exposure-weighted "
                        "median); repeatable")
    quiet(t, progress=False)
    t.set_defaults(func=cmd_tables)

    v = sub.add_parser("validate", help="hold-out deviance, Gini, lift, actual over expected",
                       description="Score hold-out data and print deviance, Gini and lift; "
                                   "with -o also write every table (CSV) with notes.")
    model(v)
    source(v, optional=False, what="the hold-out data")
    v.add_argument("--against", metavar="MODEL", help="a challenger model file: adds the "
                                                      "double lift")
    v.add_argument("-o", "--output", metavar="FOLDER", help="folder to write the tables "
                                                            "(CSV), summary.txt and notes.txt")
    batch_rows(v, 1_000_000)
    quiet(v)
    v.set_defaults(func=cmd_validate)

    k = sub.add_parser("check", help="new data against a model's training profile: range, "
                       "unseen levels, population stability index")
    model(k)
    source(k, optional=False, what="the data to check")
    k.add_argument("--alert", type=float, default=None, metavar="PSI",
                   help=f"exit with code {EXIT_DRIFT} when a stability index reaches PSI "
                        "(0.25 is the usual alert level, 0.1 the watch level)")
    k.add_argument("-o", "--output", metavar="FILE", help="write the check as JSON to this "
                                                          "file")
    quiet(k, progress=False)
    k.set_defaults(func=cmd_check)

    r = sub.add_parser("report", help="a self-contained HTML report of a model",
                       description="Write one HTML file: summary, every rating factor's chart "
                                   "and table, and with hold-out data the validation.")
    model(r)
    source(r, optional=True, what="hold-out data for the validation section")
    r.add_argument("--against", metavar="MODEL",
                   help="a challenger model file for the double lift")
    r.add_argument("-o", "--output", required=True, metavar="FILE", help="HTML file to write")
    r.add_argument("--title", help="the report's title (default: Model of RESPONSE)")
    quiet(r)
    r.set_defaults(func=cmd_report)

    tf = sub.add_parser("tariff", help="a banded rating tariff from one model, or a pure "
                                        "premium from a frequency and a severity model")
    tf.add_argument("models", nargs="+", metavar="MODEL",
                    help="the model file, or the frequency and the severity model files")
    tf.add_argument("-o", "--output", required=True, metavar="FOLDER",
                    help="folder for the tariff")
    tf.add_argument("--bands", metavar="SPEC",
                    help="TOML file with a [bands] table (cut points, auto, each, none, "
                         "level groups) and an optional [tariff] table; a model spec file "
                         "holding them will do (default: automatic bands)")
    tf.add_argument("--tolerance", type=float, default=None,
                    help="automatic bands keep the fitted relativity within this share of "
                         "the band's value (default 0.02)")
    tf.add_argument("--min-exposure", type=float, default=None,
                    help="training exposure a band should hold (default 1%% of the total)")
    tf.add_argument("--reference", action="append", metavar="COLUMN=VALUE",
                    help="reference value or level of a column; repeatable")
    tf.add_argument("--training", metavar="DATA",
                    help="the first model's training data: exact band values and exposures "
                         "from its rows instead of the model file's histograms")
    # the positionals are the models, so the hold-out is named: --data SOURCE or --sql
    tf.add_argument("--data", metavar="SOURCE",
                    help="hold-out data (file, glob or folder): measure the cost of banding "
                         "on it")
    tf.add_argument("--sql", metavar="QUERY", default=None,
                    help="the hold-out as the rows of a DuckDB SQL query instead of --data")
    tf.add_argument("--database", metavar="FILE", default=None,
                    help="with --sql: a DuckDB database file to run the query in (read-only)")
    tf.add_argument("--where", metavar="CONDITION",
                    help="keep only the hold-out rows meeting this SQL condition")
    tf.add_argument("--actual", metavar="SQL",
                    help="pure premium: the actual amount per row (default: frequency "
                         "response × severity response)")
    tf.add_argument("--power", type=float, default=None,
                    help="pure premium: Tweedie power of the deviance (default: from the "
                         "severity model's gamma shape)")
    batch_rows(tf, 1_000_000)
    quiet(tf)
    tf.set_defaults(func=cmd_tariff)

    d = sub.add_parser("demo", help="write an invented motor book, fit, summarise, report and "
                                    "score",
                       description="The whole batch job on an invented motor book: Parquet, "
                                   "spec files, models, tables, reports, scores.")
    d.add_argument("--rows", type=int, default=1_000_000, metavar="N",
                   help="policies in the book (default 1,000,000)")
    d.add_argument("--dir", default="tallgam-demo", metavar="FOLDER",
                   help="output folder (default tallgam-demo)")
    d.add_argument("--seed", type=int, default=7, metavar="N",
                   help="random seed of the book (default 7)")
    quiet(d)
    d.set_defaults(func=cmd_demo)
    for command in sub.choices.values():  # --debug after the command works too
        command.add_argument("--debug", action="store_true", default=argparse.SUPPRESS,
                             help="print the Python traceback of a failure")
    return p


def _terminate(signum, frame):  # SIGTERM unwinds like Ctrl-C, so temporary files are removed
    raise KeyboardInterrupt


def main(argv: list[str] | None = None) -> int:
    import signal

    if argv is None:
        signal.signal(signal.SIGTERM, _terminate)
    parser = build_parser()
    args = parser.parse_args(argv)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            code = args.func(args)
        except BrokenPipeError:  # e.g. `tallgam sql m.json | head`: the reader left early
            devnull = os.open(os.devnull, os.O_WRONLY)
            os.dup2(devnull, sys.stdout.fileno())
            code = EXIT_OK
        except (Exception, KeyboardInterrupt) as exc:
            code, message = failure(exc)
            if args.debug:
                import traceback

                traceback.print_exception(exc, file=sys.stderr)
            _err(message)
    _show_warnings(w for w in caught if not issubclass(w.category, DeprecationWarning))
    if any(issubclass(w.category, ConvergenceWarning) for w in caught) and code == EXIT_OK:
        code = EXIT_NOT_CONVERGED
    return code


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())

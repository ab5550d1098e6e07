"""The ``tallgam`` command line: fit, show, score, sql, tables, validate, report, tariff, demo.

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

from tallgam.atomic import check_target, make_folder, replacing
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


def cmd_fit(args) -> int:
    from tallgam.spec import load_spec

    spec = load_spec(args.spec)
    data = args.data or spec.data
    if not data:
        raise SpecError(f"{args.spec} names no data; add data = \"...\" or pass --data")
    out = args.output or spec.output or os.path.splitext(args.spec)[0] + ".json"
    binned = spec.binned if args.binned is None else args.binned
    check_target(out)  # a bad output path fails now, not after the fit
    fit = spec.model.fit(data, batch_rows=args.batch_rows or spec.batch_rows,
                         threads=args.threads or spec.threads, progress=_progress(args),
                         cluster=args.cluster, binned=binned,
                         scratch=args.scratch if args.scratch is not None else spec.scratch)
    fit.save(out)
    if not args.quiet:
        print(fit.summary())
    print(f"model written to {out}", file=sys.stderr)
    return EXIT_OK if fit.converged else EXIT_NOT_CONVERGED


def cmd_show(args) -> int:
    from tallgam.model import load

    fit = load(args.model)
    print(fit.summary())
    prof = fit.profile
    print(f"\n  training data: {prof.rows:,} rows")
    for name, col in prof.columns.items():
        if col.kind == "numeric":
            print(f"  - {name}: {col.min:g} to {col.max:g} (mean {col.mean:.6g})")
        else:
            print(f"  - {name}: {col.distinct} levels")
    prov = fit.provenance
    if prov:
        print(f"\n  fitted {prov.get('fitted_at', '?')} by tallgam {prov.get('tallgam_version')}")
    return EXIT_OK


def cmd_score(args) -> int:
    from tallgam.model import load

    fit = load(args.model)
    keep = [k for k in (args.keep or "").split(",") if k]
    extra = {"cluster": args.cluster, "threads": args.threads} if args.cluster else {}
    report = fit.score(args.input, args.output, keep=keep, terms=args.terms, se=args.se,
                       unseen=args.unseen, batch_rows=args.batch_rows,
                       progress=_progress(args), **extra)
    where = f"the part files of {args.output}" if args.cluster else args.output
    print(f"scored {report.rows:,} rows into {where}", file=sys.stderr)
    return EXIT_OK


def cmd_sql(args) -> int:
    from tallgam.model import load

    fit = load(args.model)
    print(fit.to_sql(output=args.output, with_offset=not args.no_offset))
    return EXIT_OK


def cmd_tables(args) -> int:
    from tallgam.model import load

    fit = load(args.model)
    reference = {}
    for item in args.reference or []:
        col, _, value = item.partition("=")
        try:
            reference[col] = float(value)
        except ValueError:
            raise SpecError(f"--reference takes COLUMN=NUMBER, got {item!r}") from None
    formats = [f for f in args.format.split(",") if f]
    tables = fit.relativities(reference=reference)
    paths = tables.write(args.output, formats=formats)
    if tables.base_rate is not None:
        print(f"base rate {tables.base_rate:.6g} per unit of exposure")
    print(f"{len(paths)} files written to {args.output}", file=sys.stderr)
    return EXIT_OK


def cmd_validate(args) -> int:
    from tallgam.model import load

    fit = load(args.model)
    against = load(args.against) if args.against else None
    if args.output:
        make_folder(args.output)  # a bad output folder fails now, not after the pass
    val = fit.validate(args.data, against=against, batch_rows=args.batch_rows,
                       progress=_progress(args))
    print(val.summary())
    if args.output:
        import pyarrow.csv as pacsv

        named = {"lift": val.lift, "lorenz": val.lorenz}
        if val.double_lift is not None:
            named["double_lift"] = val.double_lift
        for col, table in val.actual_vs_expected.items():
            named[f"actual_vs_expected_{col}"] = table
        for name, table in named.items():
            with replacing(os.path.join(args.output, f"{name}.csv")) as tmp:
                pacsv.write_csv(table, tmp)
        print(f"{len(named)} tables written to {args.output}", file=sys.stderr)
    return EXIT_OK


def cmd_check(args) -> int:
    from tallgam.model import load

    fit = load(args.model)
    check = fit.check(args.data, where=args.where)
    print(check.summary())
    if args.output:
        from tallgam.atomic import write_text

        write_text(args.output, check.to_json() + "\n")
        print(f"check written to {args.output}", file=sys.stderr)
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
    path = write_report(fit, args.output, data=args.data, against=against, title=args.title,
                        progress=_progress(args))
    print(f"report written to {path}", file=sys.stderr)
    return EXIT_OK


def cmd_tariff(args) -> int:
    from tallgam.outputs.report import CAUTION
    from tallgam.outputs.tariff import tariff

    if len(args.models) > 2:
        raise SpecError("give one model, or a frequency and a severity model")
    if args.where and not args.data:
        raise SpecError("--where filters the hold-out: give --data too")
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
    if args.data:
        cost = built.cost(args.data, where=args.where, actual=args.actual, power=args.power,
                          batch_rows=args.batch_rows, progress=_progress(args))
    paths = built.write(args.output, cost=cost)
    if not args.quiet:
        print(built.summary())
        if cost is not None:
            print("\n" + cost.summary())
        print(f"\n{CAUTION}")
    print(f"tariff written to {args.output} ({len(paths)} files)", file=sys.stderr)
    return EXIT_OK


def cmd_demo(args) -> int:
    from tallgam.demo import run_demo
    from tallgam.outputs.report import CAUTION

    def echo(text: str) -> None:
        print(text, flush=True)

    res = run_demo(args.dir, rows=args.rows, seed=args.seed, progress=_progress(args),
                   echo=echo)
    echo(f"\nbook: actual claims {res.actual_claims:,.0f}, expected by the frequency model "
         f"{res.expected_claims:,.1f} (ratio {res.actual_claims / res.expected_claims:.4f})")
    echo(f"models: {os.path.join(res.folder, 'frequency.json')}, "
         f"{os.path.join(res.folder, 'severity.json')}; scores: {res.scored}")
    if res.reports:
        echo("reports: " + ", ".join(res.reports))
    echo(f"\n{CAUTION}")
    return EXIT_OK


def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(
        prog="tallgam",
        description="Generalized additive models fitted to data larger than memory.",
        epilog="Exit codes: 0 ok, 1 unexpected failure, 2 usage/spec error, 3 data error, "
               "4 fit did not converge, 5 model-file error, 6 output/file-system error (folder "
               "missing or not writable, disk full), 7 out of memory, 8 check found a stability "
               "index at the alert level, 130 interrupted.")
    p.add_argument("--version", action="version", version=f"tallgam {__version__}")
    p.add_argument("--debug", action="store_true",
                   help="print the Python traceback of a failure (for reporting a bug)")
    sub = p.add_subparsers(dest="command", required=True, metavar="COMMAND")

    def common(sp, progress=True):
        sp.add_argument("-q", "--quiet", action="store_true", help="no progress or summary")
        if progress:
            sp.add_argument("--log-json", action="store_true",
                            help="progress as JSON lines on stderr (for batch logs)")

    f = sub.add_parser("fit", help="fit the model of a TOML spec file and write the model file")
    f.add_argument("spec", help="the spec file (TOML)")
    f.add_argument("-o", "--output", help="model file to write (default: SPEC with .json)")
    f.add_argument("--data", help="data source, overriding the spec's 'data'")
    f.add_argument("--batch-rows", type=int, default=None)
    f.add_argument("--threads", type=int, default=None,
                   help="cores to use (with --cluster: threads per task, default 1)")
    f.add_argument("--binned", nargs="?", type=int, const=True, default=None,
                   metavar="POINTS",
                   help="binned passes: code covariates into tables of distinct values, "
                        "exact for whole numbers, other columns rounded to POINTS grid values "
                        "(default 200); several times faster per data pass")
    f.add_argument("--scratch", metavar="DIR", default=None,
                   help="with --binned: folder for the scratch copy of the coded rows "
                        "(default: the system's temporary folder)")
    f.add_argument("--cluster", metavar="ADDRESS", default=None,
                   help="run the data passes on the Dask cluster whose scheduler is at "
                        "ADDRESS (e.g. tcp://host:8786); needs tallgam[dask] and data on "
                        "storage every worker reads")
    common(f)
    f.set_defaults(func=cmd_fit)

    s = sub.add_parser("show", help="summary of a saved model")
    s.add_argument("model")
    s.set_defaults(func=cmd_show)

    sc = sub.add_parser("score", help="stream predictions of a source into Parquet")
    sc.add_argument("model")
    sc.add_argument("input", help="data to score: file, glob or directory")
    sc.add_argument("-o", "--output", required=True,
                    help="Parquet file to write (with --cluster: a directory of part files)")
    sc.add_argument("--keep", help="comma-separated columns to carry through (e.g. keys)")
    sc.add_argument("--terms", action="store_true", help="add each term's contribution")
    sc.add_argument("--se", action="store_true", help="add standard errors")
    sc.add_argument("--unseen", choices=["error", "base"], default="error",
                    help="unseen levels: stop (default) or use the base level")
    sc.add_argument("--batch-rows", type=int, default=1_000_000)
    sc.add_argument("--cluster", metavar="ADDRESS", default=None,
                    help="score on the Dask cluster whose scheduler is at ADDRESS; writes "
                         "OUTPUT as a directory of part files, only when all succeeded")
    sc.add_argument("--threads", type=int, default=None,
                    help="with --cluster: threads per task (default 1)")
    common(sc)
    sc.set_defaults(func=cmd_score)

    q = sub.add_parser("sql", help="print a DuckDB SQL expression reproducing the predictions")
    q.add_argument("model")
    q.add_argument("--output", choices=["response", "link"], default="response")
    q.add_argument("--no-offset", action="store_true", help="leave out exposure/offset")
    q.set_defaults(func=cmd_sql)

    t = sub.add_parser("tables", help="write every term's relativity table (CSV, Parquet)")
    t.add_argument("model")
    t.add_argument("-o", "--output", required=True, help="folder for the tables")
    t.add_argument("--format", default="csv,parquet", help="csv, parquet or both (default)")
    t.add_argument("--reference", action="append", metavar="COLUMN=VALUE",
                   help="reference value of a numeric column (default: exposure-weighted "
                        "median); repeatable")
    t.set_defaults(func=cmd_tables)

    v = sub.add_parser("validate", help="hold-out deviance, Gini, lift, actual vs expected")
    v.add_argument("model")
    v.add_argument("data", help="hold-out data: file, glob or directory")
    v.add_argument("--against", help="a second model file: adds the double lift")
    v.add_argument("-o", "--output", help="folder to write the tables as CSV")
    v.add_argument("--batch-rows", type=int, default=1_000_000)
    common(v)
    v.set_defaults(func=cmd_validate)

    k = sub.add_parser("check", help="new data against a model's training profile: range, "
                       "unseen levels, population stability index")
    k.add_argument("model", help="the model file (JSON)")
    k.add_argument("data", help="data to check: file, glob or directory")
    k.add_argument("--where", help="SQL filter on the data (e.g. \"policy_year = 2025\")")
    k.add_argument("--alert", type=float, default=None, metavar="PSI",
                   help=f"exit with code {EXIT_DRIFT} when a stability index reaches PSI "
                        "(0.25 is the usual alert level, 0.1 the watch level)")
    k.add_argument("-o", "--output", help="write the check as JSON to this file")
    k.set_defaults(func=cmd_check)

    r = sub.add_parser("report", help="a self-contained HTML report of a model")
    r.add_argument("model")
    r.add_argument("--data", help="hold-out data for the validation section")
    r.add_argument("--against", help="a challenger model file for the double lift")
    r.add_argument("-o", "--output", required=True, help="HTML file to write")
    r.add_argument("--title", help="report title")
    common(r)
    r.set_defaults(func=cmd_report)

    tf = sub.add_parser("tariff", help="a banded rating tariff from one model, or a pure "
                                        "premium from a frequency and a severity model")
    tf.add_argument("models", nargs="+", metavar="MODEL",
                    help="the model file, or the frequency and the severity model files")
    tf.add_argument("-o", "--output", required=True, help="folder for the tariff")
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
    tf.add_argument("--data", help="hold-out data: measure the cost of banding on it")
    tf.add_argument("--where", help="SQL filter of the hold-out data (with --data)")
    tf.add_argument("--actual", metavar="SQL",
                    help="pure premium: the actual amount per row (default: frequency "
                         "response × severity response)")
    tf.add_argument("--power", type=float, default=None,
                    help="pure premium: Tweedie power of the deviance (default: from the "
                         "severity model's gamma shape)")
    tf.add_argument("--batch-rows", type=int, default=1_000_000)
    common(tf)
    tf.set_defaults(func=cmd_tariff)

    d = sub.add_parser("demo", help="write an invented motor book, fit, summarise and score")
    d.add_argument("--rows", type=int, default=1_000_000)
    d.add_argument("--dir", default="tallgam-demo", help="output folder (default tallgam-demo)")
    d.add_argument("--seed", type=int, default=7)
    common(d)
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

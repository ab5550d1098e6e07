"""The ``tallgam`` command line: fit, show, score, sql, tables, validate, report, demo.

Exit codes: 0 success; 1 unexpected failure; 2 usage or spec error (unknown key, unknown
column, bad family); 3 data error (NULLs, values outside the family's support, unreadable
file); 4 the fit did not converge (the model file is still written, marked so);
5 model-file error. Messages go to stderr and say what to do.
"""

from __future__ import annotations

import argparse
import os
import sys
import warnings

from tallgam.errors import (
    ConvergenceWarning,
    DataError,
    FitError,
    ModelFileError,
    SpecError,
    TallgamError,
)
from tallgam.version import __version__

EXIT_OK, EXIT_FAIL, EXIT_USAGE, EXIT_DATA, EXIT_NOT_CONVERGED, EXIT_MODEL_FILE = 0, 1, 2, 3, 4, 5


def _err(msg: str) -> None:
    print(f"tallgam: {msg}", file=sys.stderr)


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
    binned = spec.binned if args.binned is None else _binned_flag(args.binned)
    fit = spec.model.fit(data, batch_rows=args.batch_rows or spec.batch_rows,
                         threads=args.threads or spec.threads, progress=_progress(args),
                         cluster=args.cluster, binned=binned,
                         scratch=args.scratch if args.scratch is not None else spec.scratch,
                         start=args.start or spec.start)
    fit.save(out)
    if not args.quiet:
        print(fit.summary())
    print(f"model written to {out}", file=sys.stderr)
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
    val = fit.validate(args.data, against=against, batch_rows=args.batch_rows,
                       progress=_progress(args))
    print(val.summary())
    if args.output:
        import pyarrow.csv as pacsv

        os.makedirs(args.output, exist_ok=True)
        named = {"lift": val.lift, "lorenz": val.lorenz}
        if val.double_lift is not None:
            named["double_lift"] = val.double_lift
        for col, table in val.actual_vs_expected.items():
            named[f"actual_vs_expected_{col}"] = table
        for name, table in named.items():
            pacsv.write_csv(table, os.path.join(args.output, f"{name}.csv"))
        print(f"{len(named)} tables written to {args.output}", file=sys.stderr)
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
               "4 fit did not converge, 5 model-file error.")
    p.add_argument("--version", action="version", version=f"tallgam {__version__}")
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

    r = sub.add_parser("report", help="a self-contained HTML report of a model")
    r.add_argument("model")
    r.add_argument("--data", help="hold-out data for the validation section")
    r.add_argument("--against", help="a challenger model file for the double lift")
    r.add_argument("-o", "--output", required=True, help="HTML file to write")
    r.add_argument("--title", help="report title")
    common(r)
    r.set_defaults(func=cmd_report)

    d = sub.add_parser("demo", help="write an invented motor book, fit, summarise and score")
    d.add_argument("--rows", type=int, default=1_000_000)
    d.add_argument("--dir", default="tallgam-demo", help="output folder (default tallgam-demo)")
    d.add_argument("--seed", type=int, default=7)
    common(d)
    d.set_defaults(func=cmd_demo)
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
        except SpecError as exc:
            code = EXIT_USAGE
            _err(str(exc))
        except ModelFileError as exc:
            code = EXIT_MODEL_FILE
            _err(str(exc))
        except (DataError, FitError) as exc:
            code = EXIT_DATA
            _err(str(exc))
        except TallgamError as exc:
            code = EXIT_FAIL
            _err(str(exc))
        except KeyboardInterrupt:
            code = 130
            _err("interrupted; no partial output was left behind")
        except BrokenPipeError:  # e.g. `tallgam sql m.json | head`: the reader left early
            devnull = os.open(os.devnull, os.O_WRONLY)
            os.dup2(devnull, sys.stdout.fileno())
            code = EXIT_OK
    _show_warnings(w for w in caught if not issubclass(w.category, DeprecationWarning))
    if any(issubclass(w.category, ConvergenceWarning) for w in caught) and code == EXIT_OK:
        code = EXIT_NOT_CONVERGED
    return code


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())

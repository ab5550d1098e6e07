"""What a user would otherwise do on one machine: pandas + scikit-learn vs. tallgam.

Both routes fit the reference model's covariates (bench/reference.py) on the synthetic
motor book (bench/make_book.py) and are scored on a separate hold-out book of the same
seed (same truth, other rows: ``make_book.py --holdout``).

* ``sklearn`` (in memory): the book's columns read into a pandas DataFrame
  (``pandas.read_parquet``), then one scikit-learn ``Pipeline``:

  - the 8 spline columns: ``SplineTransformer(n_knots=8, degree=3, knots="quantile",
    include_bias=False)``, i.e. 10 cubic B-splines per column with knots at quantiles
    (as tallgam's size=10), the last one dropped because the intercept carries it: 9
    columns each. Tied quantiles of integer columns are kept as repeated knots, as
    scikit-learn does.
  - the (lat, lon) surface: ``SplineTransformer(n_knots=4, degree=3, knots="quantile")``
    on lat and lon (6 B-splines each, as tallgam's size=(6, 6)), then a
    ``FunctionTransformer`` that forms their row-wise tensor product (the 36 products
    B_lat,i · B_lon,j, the same basis as tallgam's surface) and drops one of them for the
    intercept: 35 columns. scikit-learn has no tensor-product spline transformer; this is
    the plain numpy stand-in a user would write.
  - region, fuel, vehicle_group: ``OneHotEncoder(handle_unknown="ignore")`` (every level).
  - ``PoissonRegressor(alpha=--alpha, solver=--solver)`` fitted to the rate
    claim_count / exposure with ``sample_weight=exposure`` (the way scikit-learn fits a
    frequency with exposure; its example "Poisson regression and non-normal loss" does
    the same). The one L2 penalty alpha (small) replaces tallgam's per-term smoothing
    and random-effect shrinkage. ``ColumnTransformer`` stacks the blocks into a sparse
    CSR matrix (its default when the one-hot block is sparse and the result is under 30 %
    dense).

* ``tallgam`` (streaming): ``reference_model().fit(files, **engine options)`` straight from
  the Parquet files; with no options, the defaults (exact or binned passes chosen by the
  fit, a sample start on large data).

Each route runs in a fresh Python process, so its peak resident memory (VmHWM, reset
after imports and the warm-up, and ru_maxrss of the whole process) belongs to it alone.
The timed span is end to end: reading the Parquet, building features, fitting. Imports
and, for tallgam, a small warm-up fit (numba compilation or cache loading; its seconds are
reported) come before it. The book's files are read once beforehand so both routes find
them in the OS page cache. The hold-out is scored after the timed span (the training data
released first); hold-out deviance is ``sklearn.metrics.mean_poisson_deviance`` of the
observed rate against the predicted rate, weighted by exposure, for both routes, for the
true rate (the floor) and for the exposure-weighted mean rate (the null model).

Figures come from ONE run per route and size (no repeats). The row count at which the
scikit-learn route exhausts this machine's memory is extrapolated by a straight line
(least squares) through its peak RSS at the measured sizes: an estimate, said as such.

    python bench/alternatives_bench.py --rows 1000000 5000000
    python bench/alternatives_bench.py --rows 1000000 --engine-option binned=false
"""

from __future__ import annotations

import argparse
import datetime as dt
import json
import os
import resource
import shutil
import subprocess
import sys
import time

import numpy as np

HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.insert(0, HERE)

from engine_bench import (  # noqa: E402
    Meter,
    engine_environment,
    engine_fingerprint,
    machine_info,
    proc_status,
    reset_peak_rss,
    wait_idle,
    warm_page_cache,
)

ROUTES = ("sklearn", "tallgam")
DEFAULT_ROWS = (1_000_000, 5_000_000)
WARMUP_ROWS = 20_000
DEGREE = 3  # cubic


# ---------------------------------------------------------------------------------------
# the scikit-learn route


def tensor_product(B: np.ndarray, sizes: tuple[int, int]) -> np.ndarray:
    """Row-wise tensor product of two B-spline blocks [B_a | B_b] (n × (ka + kb)) →
    (n × (ka·kb − 1)): all products B_a,i · B_b,j, the last dropped (it and the rest sum
    to one, which the intercept already carries)."""
    ka, kb = sizes
    B = np.asarray(B, dtype=np.float64)
    out = (B[:, :ka, None] * B[:, None, ka:ka + kb]).reshape(B.shape[0], ka * kb)
    return out[:, :-1]


def sklearn_pipeline(alpha: float, solver: str, max_iter: int):
    """The scikit-learn Pipeline of the module docstring (unfitted)."""
    from sklearn.compose import ColumnTransformer
    from sklearn.linear_model import PoissonRegressor
    from sklearn.pipeline import Pipeline
    from sklearn.preprocessing import FunctionTransformer, OneHotEncoder, SplineTransformer

    from reference import CATEGORICALS, RANDOM_EFFECT, SPLINE_SIZE, SPLINES, SURFACE, SURFACE_SIZE

    # n_splines = n_knots + degree − 1 (scikit-learn's SplineTransformer documentation)
    splines = SplineTransformer(n_knots=SPLINE_SIZE - DEGREE + 1, degree=DEGREE,
                                knots="quantile", include_bias=False)
    if SURFACE_SIZE[0] != SURFACE_SIZE[1]:
        raise ValueError("one SplineTransformer makes both margins: give equal sizes")
    surface = Pipeline([
        ("margins", SplineTransformer(n_knots=SURFACE_SIZE[0] - DEGREE + 1, degree=DEGREE,
                                      knots="quantile", include_bias=True)),
        ("tensor", FunctionTransformer(tensor_product, kw_args={"sizes": SURFACE_SIZE})),
    ])
    features = ColumnTransformer([
        ("splines", splines, list(SPLINES)),
        ("surface", surface, list(SURFACE)),
        ("levels", OneHotEncoder(handle_unknown="ignore"), [*CATEGORICALS, RANDOM_EFFECT]),
    ])
    glm = PoissonRegressor(alpha=alpha, solver=solver, max_iter=max_iter)
    return Pipeline([("features", features), ("glm", glm)])


def read_frame(files: list[str]):
    """The reference model's columns of ``files`` as one pandas DataFrame."""
    import pandas as pd

    from reference import COLUMNS

    return pd.read_parquet(files, columns=list(COLUMNS))


def sklearn_fit(files: list[str], opts: dict) -> tuple[object, dict]:
    import warnings

    from reference import EXPOSURE, RESPONSE

    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        t0 = time.perf_counter()
        df = read_frame(files)
        t_read = time.perf_counter() - t0
        pipe = sklearn_pipeline(opts["alpha"], opts["solver"], opts["max_iter"])
        rate = df[RESPONSE].to_numpy(np.float64) / df[EXPOSURE].to_numpy(np.float64)
        pipe.fit(df, rate, glm__sample_weight=df[EXPOSURE].to_numpy(np.float64))
    glm = pipe.named_steps["glm"]
    n_iter = int(glm.n_iter_)
    return pipe, {
        "rows": len(df), "read_seconds": t_read, "features": int(glm.coef_.shape[0]),
        "n_iter": n_iter, "converged": n_iter < opts["max_iter"],
        "warnings": sorted({f"{w.category.__name__}: {str(w.message)[:200]}" for w in caught}),
    }


def sklearn_predict(pipe, holdout) -> np.ndarray:
    return pipe.predict(holdout)


# ---------------------------------------------------------------------------------------
# the tallgam route


def tallgam_warm_up() -> float:
    """A small fit with the reference model's term kinds (spline, surface, categorical,
    random effect) so numba compiles or loads every kernel before the timed fit."""
    import tallgam as tg
    from make_book import book_table

    t0 = time.perf_counter()
    model = tg.Model("claim_count", family="poisson", exposure="exposure",
                     terms=[tg.spline("driver_age", size=5), tg.surface("lat", "lon", size=4),
                            tg.categorical("fuel"), tg.random_effect("region")])
    for binned in (False, True):
        model.fit(book_table(WARMUP_ROWS), batch_rows=WARMUP_ROWS // 4, binned=binned,
                  scratch=False)
    return time.perf_counter() - t0


def tallgam_fit(files: list[str], opts: dict) -> tuple[object, dict]:
    from reference import reference_model

    fit = reference_model().fit(files, **opts["engine_options"])
    st = fit.statistics
    edf = fit.edf["total"] if isinstance(fit.edf, dict) else None
    return fit, {"rows": int(st["rows"]), "passes": int(fit.passes),
                 "converged": bool(fit.converged), "engine_seconds": st.get("seconds"),
                 "edf_total": edf, "notes": list(fit.notes)}


def tallgam_predict(fit, holdout) -> np.ndarray:
    from reference import EXPOSURE

    # predict(output="response") is μ = exposure × rate (the exposure enters through the
    # offset ln exposure, result.py/scoring.py); the rate is μ / exposure
    mu = np.asarray(fit.predict(holdout, output="response"), dtype=np.float64)
    return mu / holdout[EXPOSURE].to_numpy(np.float64)


# ---------------------------------------------------------------------------------------
# one route in its own process


def poisson_deviance_of_rate(holdout, rate: np.ndarray) -> float:
    """Exposure-weighted mean Poisson deviance of the observed rate against ``rate``
    (scikit-learn's metric, as its exposure example uses it)."""
    from sklearn.metrics import mean_poisson_deviance

    from reference import EXPOSURE, RESPONSE

    e = holdout[EXPOSURE].to_numpy(np.float64)
    y = holdout[RESPONSE].to_numpy(np.float64) / e
    return float(mean_poisson_deviance(y, rate, sample_weight=e))


def worker(route: str, book: str, holdout_book: str, opts: dict) -> dict:
    import gc
    import glob

    files = sorted(glob.glob(os.path.join(book, "book-*.parquet")))
    hold_files = sorted(glob.glob(os.path.join(holdout_book, "book-*.parquet")))
    info: dict = {"route": route, "pid": os.getpid(), "options": opts}
    if route == "tallgam":
        import tallgam  # noqa: F401

        info["engine"] = engine_fingerprint()
        info["warmup_seconds"] = tallgam_warm_up()
    else:
        import pandas  # noqa: F401
        import sklearn.linear_model  # noqa: F401
        import sklearn.preprocessing  # noqa: F401

        info["warmup_seconds"] = 0.0
    info["rss_before_mb"] = proc_status().get("VmRSS")
    info["page_cache_warm_seconds"] = warm_page_cache(files)
    info["hwm_reset"] = reset_peak_rss()
    fit_fn, predict_fn = ((sklearn_fit, sklearn_predict) if route == "sklearn"
                          else (tallgam_fit, tallgam_predict))
    with Meter() as m:
        model, details = fit_fn(files, opts)
    info["timed"] = m.as_dict()
    info["contention_cores"] = m.foreign_cpu / max(m.wall, 1e-9)
    info["fit"] = details
    info["peak_rss_mb"] = proc_status().get("VmHWM")  # since the reset: read + fit
    gc.collect()
    # hold-out (not timed): the training data are gone; only the fitted model is kept
    t0 = time.perf_counter()
    holdout = read_frame(hold_files)
    rate = predict_fn(model, holdout)
    info["holdout"] = {"rows": len(holdout), "deviance": poisson_deviance_of_rate(holdout, rate),
                       "mean_rate": float(np.average(rate, weights=holdout["exposure"])),
                       "seconds": time.perf_counter() - t0}
    info["ru_maxrss_mb"] = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0
    return info


# ---------------------------------------------------------------------------------------
# the driver


def parse_option(text: str) -> tuple[str, object]:
    """``KEY=VALUE``; VALUE read as JSON (true, 3, 0.5, null, "x"), else as a string."""
    if "=" not in text:
        raise argparse.ArgumentTypeError(f"expected KEY=VALUE, got {text!r}")
    key, value = text.split("=", 1)
    try:
        return key.strip(), json.loads(value)
    except json.JSONDecodeError:
        return key.strip(), value


def ensure_books(rows: int, holdout_rows: int, data_dir: str, seed: int) -> tuple[str, str]:
    from make_book import manifest_matches, write_book

    book = os.path.join(data_dir, f"book-{rows}")
    if not manifest_matches(book, rows, seed):
        print(f"writing {rows:,d} rows to {book} ...", file=sys.stderr)
        write_book(rows, book, seed)
    hold = os.path.join(data_dir, f"holdout-{holdout_rows}")
    if not manifest_matches(hold, holdout_rows, seed, holdout=True):
        print(f"writing {holdout_rows:,d} hold-out rows to {hold} ...", file=sys.stderr)
        write_book(holdout_rows, hold, seed, holdout=True)
    return book, hold


def reference_deviances(hold: str, seed: int) -> dict:
    """Hold-out deviance of the true rate (the floor) and of the exposure-weighted mean
    rate (the null model); the mean rate is that of the hold-out itself, a slight
    advantage to the null model."""
    import glob

    from make_book import true_frequency
    from reference import EXPOSURE, RESPONSE

    holdout = read_frame(sorted(glob.glob(os.path.join(hold, "book-*.parquet"))))
    truth = true_frequency(holdout, seed)
    mean_rate = holdout[RESPONSE].sum() / holdout[EXPOSURE].sum()
    return {"truth": poisson_deviance_of_rate(holdout, truth),
            "null": poisson_deviance_of_rate(holdout, np.full(len(holdout), mean_rate))}


def run_worker(route: str, book: str, hold: str, opts: dict, env: dict | None) -> dict:
    cmd = [sys.executable, os.path.abspath(__file__), "--worker", route, "--book", book,
           "--holdout-book", hold, "--worker-options", json.dumps(opts)]
    proc = subprocess.run(cmd, capture_output=True, text=True, env=env)
    if proc.returncode != 0:
        killed = proc.returncode in (-9, 137)
        return {"route": route, "failed": True, "returncode": proc.returncode,
                "out_of_memory_likely": killed or "MemoryError" in proc.stderr,
                "stderr_tail": proc.stderr[-3000:]}
    return json.loads(proc.stdout.strip().splitlines()[-1])


def memory_total_mb() -> float:
    with open("/proc/meminfo") as fh:
        for line in fh:
            if line.startswith("MemTotal:"):
                return int(line.split()[1]) / 1024.0
    raise OSError("no MemTotal in /proc/meminfo")


def memory_limit_rows(sizes: list[int], peaks: list[float], limit_mb: float) -> dict:
    """Straight line peak_rss = a + b·rows through the measured sizes (least squares);
    the rows at which it reaches ``limit_mb``. An extrapolation."""
    if len(sizes) < 2 or len(set(sizes)) < 2:
        return {"method": "needs two sizes or more", "rows": None}
    b, a = np.polyfit(np.asarray(sizes, dtype=float), np.asarray(peaks, dtype=float), 1)
    out = {"method": "linear least-squares fit of peak RSS on rows (extrapolated)",
           "intercept_mb": float(a), "mb_per_million_rows": float(b * 1e6),
           "limit_mb": limit_mb}
    out["rows"] = float((limit_mb - a) / b) if b > 0 else None
    return out


def summarise(n: int, size: dict, ref: dict) -> dict:
    out: dict = {"rows": n, "truth_deviance": ref["truth"], "null_deviance": ref["null"]}
    for route, r in size.items():
        if r.get("failed"):
            out[f"{route}_failed"] = ("out of memory (likely)" if r["out_of_memory_likely"]
                                      else f"exit {r['returncode']}")
            continue
        out[f"{route}_s"] = r["timed"]["seconds"]
        out[f"{route}_rss_mb"] = r["peak_rss_mb"]
        out[f"{route}_deviance"] = r["holdout"]["deviance"]
        out[f"{route}_contention"] = r["contention_cores"]
        out[f"{route}_converged"] = r["fit"]["converged"]
    if "sklearn_s" in out and "tallgam_s" in out:
        out["time_ratio"] = out["sklearn_s"] / out["tallgam_s"]
        out["memory_ratio"] = out["sklearn_rss_mb"] / out["tallgam_rss_mb"]
        out["deviance_difference"] = out["sklearn_deviance"] - out["tallgam_deviance"]
    return out


def _f(r: dict, key: str, spec: str) -> str:
    v = r.get(key)
    return "–" if v is None else format(v, spec)


def markdown(rows: list[dict], limit: dict, tg_growth: dict) -> str:
    head = ("| rows | sklearn s | tallgam s | time sk/tg | sklearn RSS MB | tallgam RSS MB "
            "| memory sk/tg | deviance sklearn | deviance tallgam | sk − tg | truth | null |")
    lines = [head, "|" + "---|" * (head.count("|") - 1)]
    for r in rows:
        sk = r.get("sklearn_failed")
        lines.append(
            f"| {r['rows']:,d} | {sk or _f(r, 'sklearn_s', '.1f')} | {_f(r, 'tallgam_s', '.1f')} "
            f"| {_f(r, 'time_ratio', '.2f')} | {_f(r, 'sklearn_rss_mb', ',.0f')} "
            f"| {_f(r, 'tallgam_rss_mb', ',.0f')} | {_f(r, 'memory_ratio', '.2f')} "
            f"| {_f(r, 'sklearn_deviance', '.6f')} | {_f(r, 'tallgam_deviance', '.6f')} "
            f"| {_f(r, 'deviance_difference', '+.2e')} | {r['truth_deviance']:.6f} "
            f"| {r['null_deviance']:.6f} |")
    lines.append("")
    lines.append("Deviance: exposure-weighted mean Poisson deviance of the hold-out rate "
                 "(sklearn.metrics.mean_poisson_deviance); truth = the generating rate, "
                 "null = one rate for all. Times: read + features + fit, one run each.")
    if limit.get("rows"):
        lines.append(f"- sklearn route's memory: {limit['mb_per_million_rows']:,.0f} MB per "
                     f"million rows + {limit['intercept_mb']:,.0f} MB; straight-line "
                     f"extrapolation reaches {limit['limit_mb'] / 1024:.1f} GiB at about "
                     f"{limit['rows'] / 1e6:,.1f} million rows")
    else:
        lines.append(f"- sklearn route's memory limit: {limit.get('method')}")
    if "mb_per_million_rows" in tg_growth:
        lines.append(f"- tallgam route's memory: {tg_growth['mb_per_million_rows']:,.1f} MB per "
                     f"million rows + {tg_growth['intercept_mb']:,.0f} MB (same straight line; "
                     "it holds min(rows, batch_rows) rows at a time, so below batch_rows "
                     "(default 1,000,000) its memory grows with rows, above it should not)")
    return "\n".join(lines)


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description="pandas + scikit-learn vs. tallgam on one machine")
    ap.add_argument("--rows", type=int, nargs="+", default=list(DEFAULT_ROWS))
    ap.add_argument("--holdout-rows", type=int, default=1_000_000)
    ap.add_argument("--routes", nargs="+", choices=ROUTES, default=list(ROUTES))
    ap.add_argument("--data-dir", default=os.path.join(HERE, "data"))
    ap.add_argument("--seed", type=int, default=20240601)
    ap.add_argument("--engine-option", action="append", default=[], type=parse_option,
                    metavar="KEY=VALUE",
                    help="keyword argument of model.fit (VALUE read as JSON), repeatable")
    ap.add_argument("--alpha", type=float, default=1e-6, help="PoissonRegressor's L2 penalty")
    ap.add_argument("--solver", default="newton-cholesky", choices=("newton-cholesky", "lbfgs"))
    ap.add_argument("--max-iter", type=int, default=100)
    ap.add_argument("--memory-gib", type=float, default=None,
                    help="the memory to extrapolate to (default: MemTotal of this machine)")
    ap.add_argument("--wait-idle", type=float, default=0.0, metavar="SECONDS",
                    help="before each route, wait up to SECONDS until other processes use "
                         "less than 0.1 cores")
    ap.add_argument("--results", default=os.path.join(HERE, "results"))
    ap.add_argument("--out", help="write the JSON here instead of RESULTS/alternatives-<date>.json")
    ap.add_argument("--live-engine", action="store_true",
                    help="import the engine from its checkout instead of a copy taken at start")
    ap.add_argument("--worker", choices=ROUTES, help=argparse.SUPPRESS)
    ap.add_argument("--book", help=argparse.SUPPRESS)
    ap.add_argument("--holdout-book", help=argparse.SUPPRESS)
    ap.add_argument("--worker-options", help=argparse.SUPPRESS)
    args = ap.parse_args(argv)

    if args.worker:
        print(json.dumps(worker(args.worker, args.book, args.holdout_book,
                                json.loads(args.worker_options)), default=str))
        return 0

    started = dt.datetime.now()
    opts = {"engine_options": dict(args.engine_option), "alpha": args.alpha,
            "solver": args.solver, "max_iter": args.max_iter}
    limit_mb = (args.memory_gib * 1024.0 if args.memory_gib else memory_total_mb())
    env, engine = engine_environment(args.live_engine)
    sizes: dict[int, dict] = {}
    refs: dict[int, dict] = {}
    ref_cache: dict[str, dict] = {}
    try:
        for n in args.rows:
            book, hold = ensure_books(n, args.holdout_rows, args.data_dir, args.seed)
            if hold not in ref_cache:
                ref_cache[hold] = reference_deviances(hold, args.seed)
            refs[n] = ref_cache[hold]
            sizes[n] = {}
            for route in args.routes:
                wait_idle(args.wait_idle, 0.1)
                print(f"{n:>12,d} rows: {route} ...", file=sys.stderr)
                sizes[n][route] = run_worker(route, book, hold, opts, env)
    finally:
        if engine.get("snapshot"):
            shutil.rmtree(engine["snapshot"], ignore_errors=True)
    rows = [summarise(n, sizes[n], refs[n]) for n in args.rows]
    ok = [r for r in rows if "sklearn_rss_mb" in r]
    limit = memory_limit_rows([r["rows"] for r in ok], [r["sklearn_rss_mb"] for r in ok],
                              limit_mb)
    tg_ok = [r for r in rows if "tallgam_rss_mb" in r]
    tg_growth = memory_limit_rows([r["rows"] for r in tg_ok],
                                  [r["tallgam_rss_mb"] for r in tg_ok], limit_mb)
    result = {
        "started": started.isoformat(timespec="seconds"),
        "command": " ".join([os.path.relpath(sys.argv[0])] + sys.argv[1:]),
        "machine": machine_info(),
        "engine": {k: v for k, v in engine.items() if k != "snapshot"},
        "settings": {**opts, "rows": args.rows, "holdout_rows": args.holdout_rows,
                     "seed": args.seed, "routes": args.routes},
        "summary": rows,
        "sklearn_memory_limit": limit,
        "tallgam_memory_growth": tg_growth,
        "sizes": {str(n): v for n, v in sizes.items()},
    }
    path = args.out or os.path.join(args.results,
                                    f"alternatives-{started.date().isoformat()}.json")
    os.makedirs(os.path.dirname(os.path.abspath(path)), exist_ok=True)
    with open(path + ".tmp", "w") as fh:
        json.dump(result, fh, indent=1, default=str)
    os.replace(path + ".tmp", path)
    print(markdown(rows, limit, tg_growth))
    print(f"\nresults: {os.path.relpath(path)}")
    return 0


if __name__ == "__main__":
    sys.exit(main())

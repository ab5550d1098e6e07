"""Random effects with many levels: fit time and peak memory against the number of levels.

A synthetic Poisson book of ``--rows`` rows (default 2 000 000) is written once to
``DATA_DIR/re-<rows>`` (reused when present): three numeric rating factors with smooth,
clearly non-linear effects, an exposure, and one grouping column per level count in
``--levels`` (``g1250``, ``g2500``, ..., nested; see :func:`make_book`). For every
level count the model

    claims ~ spline(x1) + spline(x2) + spline(x3) + random_effect(g<L>),  exposure

is fitted in a fresh Python process, so that the peak resident memory belongs to that fit.
The process first warms numba up with a tiny fit (not timed), then resets its peak-memory
mark (Linux ``clear_refs``), fits, and reports:

* ``seconds``: the whole fit; ``pass_seconds``: the data passes and ``profile_seconds``
  (from the fit's progress events); ``dense_seconds``: the rest, i.e. the dense stage
  (assembling the working problem, smoothing selection, covariance);
* ``peak_rss_mb``: the process's VmHWM after the fit, and ``fit_rss_mb`` its rise during the
  fit above the resident memory before it.

With ``--dense-levels`` the same fits run with the random effect kept in the dense problem
(the path every level count took before elimination), for comparison.

Results: ``bench/results/random-effects-<date>.json``, and with ``--doc`` (or later with
``--doc-from RESULTS_JSON``) the section "Random effects with many levels" appended to
``docs/performance.md``.

    python bench/random_effects_bench.py --rows 2000000 --levels 1250 2500 5000 10000 20000 40000
"""

from __future__ import annotations

import argparse
import datetime as dt
import json
import os
import platform
import subprocess
import sys
import time

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(HERE)
SECTION = "## Random effects with many levels"
LEVELS = (1250, 2500, 5000, 10000, 20000, 40000)


# ---------------------------------------------------------------------------------------
# data


def make_book(path: str, rows: int, levels: list[int], seed: int = 20261202) -> None:
    """Write the synthetic book as Parquet files of 500 000 rows each (deterministic).

    The groupings are nested: a row's level of the finest one is drawn uniformly, and a
    coarser grouping with L levels merges them (level ⌊l·L/L_max⌋). Every grouping adds an
    effect N(0, 0.2²) per level, so each random effect fitted alone has a clear variance
    component (its own and the coarser ones; the finer ones act as noise)."""
    import numpy as np
    import pyarrow as pa
    import pyarrow.parquet as pq

    os.makedirs(path, exist_ok=True)
    rng = np.random.default_rng(seed)
    levels = sorted(levels)
    finest = levels[-1]
    effects = {L: rng.normal(0.0, 0.2, L) for L in levels}
    chunk = 500_000
    for part, start in enumerate(range(0, rows, chunk)):
        n = min(chunk, rows - start)
        x1 = rng.uniform(18.0, 80.0, n)
        x2 = rng.uniform(0.0, 20.0, n)
        x3 = rng.gamma(3.0, 1.0, n)
        exposure = rng.uniform(0.1, 1.0, n)
        eta = (-2.0 + 0.6 * np.exp(-(x1 - 18.0) / 8.0) + 0.2 * np.sin(x2 / 3.0)
               + 0.25 * np.log1p(x3))
        cols = {"x1": x1, "x2": x2, "x3": x3, "exposure": exposure}
        fine = rng.integers(0, finest, n)
        for L in levels:
            g = fine * L // finest
            eta = eta + effects[L][g]
            cols[f"g{L}"] = pa.array(np.char.add("L", np.char.zfill(g.astype(str), 5)))
        cols["claims"] = rng.poisson(np.exp(eta) * exposure).astype(np.float64)
        tmp = os.path.join(path, f"part-{part:03d}.parquet.tmp")
        pq.write_table(pa.table(cols), tmp)
        os.replace(tmp, os.path.join(path, f"part-{part:03d}.parquet"))
    with open(os.path.join(path, "manifest.json"), "w") as fh:
        json.dump({"rows": rows, "levels": levels, "seed": seed}, fh)


def book_path(data_dir: str, rows: int, levels: list[int]) -> str:
    path = os.path.join(data_dir, f"re-{rows}")
    manifest = os.path.join(path, "manifest.json")
    if os.path.exists(manifest):
        with open(manifest) as fh:
            m = json.load(fh)
        if m["rows"] == rows and sorted(set(levels) | set(LEVELS)) == m["levels"]:
            return path
    make_book(path, rows, sorted(set(levels) | set(LEVELS)))
    return path


# ---------------------------------------------------------------------------------------
# one fit (in its own process)


def vm_status() -> dict:
    out = {}
    with open("/proc/self/status") as fh:
        for line in fh:
            if line.startswith(("VmRSS:", "VmHWM:")):
                key, value = line.split(":", 1)
                out[key] = int(value.split()[0]) / 1024.0
    return out


def model(levels: int):
    import tallgam as tg

    return tg.Model("claims", family="poisson", exposure="exposure",
                    terms=[tg.spline("x1"), tg.spline("x2"), tg.spline("x3"),
                           tg.random_effect(f"g{levels}")])


def warm_up() -> None:
    """A tiny fit of the same term kinds, so numba compiles or loads every kernel first."""
    import numpy as np
    import pandas as pd

    rng = np.random.default_rng(0)
    n = 20_000
    frame = pd.DataFrame({"x1": rng.uniform(18, 80, n), "x2": rng.uniform(0, 20, n),
                          "x3": rng.gamma(3.0, 1.0, n), "exposure": np.ones(n),
                          "g50": [f"L{v}" for v in rng.integers(0, 50, n)],
                          "claims": rng.poisson(0.2, n).astype(float)})
    model(50).fit(frame, batch_rows=5_000).predict(frame.head(100), se=True)


def task_fit(path: str, levels: int, keep_dense: bool, batch_rows: int) -> dict:
    from tallgam.options import Tuning

    warm_up()
    # keep_dense: never eliminate the random effect, so the dense stage sees p × p
    tuning = Tuning(eliminate_levels=0) if keep_dense else Tuning()
    times: dict[str, float] = {}
    starts: dict[str, float] = {}

    def on_event(event):  # the fit's progress events time the profile and every pass
        if event.kind == "start":
            starts[event.task] = time.perf_counter()
        elif event.kind == "end" and event.task in starts:
            times[event.task] = times.get(event.task, 0.0) + (time.perf_counter()
                                                              - starts.pop(event.task))
    files = sorted(os.path.join(path, f) for f in os.listdir(path) if f.endswith(".parquet"))
    with open("/proc/self/clear_refs", "w") as fh:  # VmHWM := VmRSS (Linux ≥ 4.0)
        fh.write("5")
    before = vm_status()["VmRSS"]
    t0 = time.perf_counter()
    fit = model(levels).fit(files, batch_rows=batch_rows, tuning=tuning, progress=on_event)
    seconds = time.perf_counter() - t0
    passes = [v for k, v in times.items() if "pass" in k or k == "sample"]
    profile = [times.get("profile", 0.0)]
    peak = vm_status()["VmHWM"]
    label = f"random_effect(g{levels})"
    return {
        "levels": levels, "path": "dense" if keep_dense else "eliminated",
        "structured_covariance": fit.covariance.structured,
        "rows": fit.rows, "passes": fit.passes, "converged": fit.converged,
        "seconds": seconds, "pass_seconds": sum(passes), "profile_seconds": sum(profile),
        "dense_seconds": seconds - sum(passes) - sum(profile),
        "rss_before_mb": before, "peak_rss_mb": peak, "fit_rss_mb": peak - before,
        "smoothing": fit.smoothing[label], "edf": fit.edf[label],
        "variance_component": fit.scale / fit.smoothing[label],
    }


# ---------------------------------------------------------------------------------------
# driver


def run_one(path: str, levels: int, keep_dense: bool, batch_rows: int) -> dict:
    cmd = [sys.executable, os.path.abspath(__file__), "--task-fit", str(levels),
           "--book", path, "--batch-rows", str(batch_rows)] + (["--keep-dense"] if keep_dense
                                                               else [])
    out = subprocess.run(cmd, check=True, capture_output=True, text=True)
    return json.loads(out.stdout.strip().splitlines()[-1])


def with_ratios(runs: list[dict]) -> list[dict]:
    """Each eliminated run's growth against the smallest level count: levels, time, memory."""
    elim = sorted((r for r in runs if r["path"] == "eliminated"), key=lambda r: r["levels"])
    if not elim:
        return runs
    base = elim[0]
    for r in elim:
        r["levels_ratio"] = r["levels"] / base["levels"]
        r["seconds_ratio"] = r["seconds"] / base["seconds"]
        r["dense_seconds_ratio"] = r["dense_seconds"] / base["dense_seconds"]
        r["peak_rss_ratio"] = r["peak_rss_mb"] / base["peak_rss_mb"]
        r["fit_rss_ratio"] = r["fit_rss_mb"] / base["fit_rss_mb"]
    return runs


def table(runs: list[dict]) -> str:
    lines = ["| levels | path | passes | fit s | data passes s | dense stage s | peak RSS MB "
             "| RSS rise in fit MB | ratios (levels / fit s / dense stage s / peak RSS / RSS "
             "rise) |",
             "|---:|---|---:|---:|---:|---:|---:|---:|---|"]
    for r in sorted(runs, key=lambda r: (r["path"] != "eliminated", r["levels"])):
        ratios = ("–" if "levels_ratio" not in r else
                  f"{r['levels_ratio']:.0f} / {r['seconds_ratio']:.2f} / "
                  f"{r['dense_seconds_ratio']:.2f} / {r['peak_rss_ratio']:.2f} / "
                  f"{r['fit_rss_ratio']:.2f}")
        lines.append(f"| {r['levels']:,} | {r['path']} | {r['passes']} | {r['seconds']:.1f} | "
                     f"{r['pass_seconds']:.1f} | {r['dense_seconds']:.2f} | "
                     f"{r['peak_rss_mb']:.0f} | {r['fit_rss_mb']:.0f} | {ratios} |")
    return "\n".join(lines)


def machine() -> dict:
    import numba
    import numpy

    import tallgam

    cpu = "unknown"
    with open("/proc/cpuinfo") as fh:
        for line in fh:
            if line.startswith("model name"):
                cpu = line.split(":", 1)[1].strip()
                break
    return {"cpu_model": cpu, "cores": os.cpu_count(), "python": platform.python_version(),
            "numpy": numpy.__version__, "numba": numba.__version__,
            "tallgam": tallgam.__version__}


def doc_section(result: dict) -> str:
    rows = result["rows"]
    return f"""
{SECTION}

`bench/random_effects_bench.py`, {result['date']}: a Poisson model
`claims ~ spline(x1) + spline(x2) + spline(x3) + random_effect(g)` with exposure on
{rows:,} synthetic rows, one fresh process per fit ({result['machine']['cores']} cores,
{result['machine']['cpu_model']}). The largest random effect is eliminated from the dense
stage by its Schur complement (exact), so the dense stage costs O(L·p_k²) time and O(L·p_k)
memory for L levels and p_k other coefficients, and the covariance keeps only the levels'
variances and their covariances with the other coefficients. "dense" rows keep the random
effect in the p × p problem, as every fit did before, for comparison. Ratios are against the
smallest level count; "RSS rise" is the resident memory added during the fit (the batch
buffers of the data passes and the fit's own arrays).

{table(result['runs'])}

{reading(result['runs'])}
Raw numbers: `bench/results/{result['file']}`.
"""


def reading(runs: list[dict]) -> str:
    """What the table shows, in numbers taken from it."""
    elim = sorted((r for r in runs if r["path"] == "eliminated"), key=lambda r: r["levels"])
    lo, hi = elim[0], elim[-1]
    per_pass = [r["pass_seconds"] / r["passes"] for r in (lo, hi)]
    text = (f"Reading: from {lo['levels']:,} to {hi['levels']:,} levels ({hi['levels_ratio']:.0f}×)"
            f" the whole fit took {hi['seconds_ratio']:.2f}× the time, the dense stage "
            f"{hi['dense_seconds_ratio']:.2f}× and the peak memory {hi['peak_rss_ratio']:.2f}× "
            f"(the memory added by the fit {hi['fit_rss_ratio']:.2f}×): all well inside linear "
            "growth, because the rows, not the levels, dominate at this size. A data pass took "
            f"{per_pass[0]:.2f} s at the smallest level count and {per_pass[1]:.2f} s at the "
            "largest, and the number of passes follows the PIRLS path, not the levels.")
    dense = [r for r in runs if r["path"] == "dense"]
    if dense:
        d = min(dense, key=lambda r: r["levels"])
        same = next((r for r in elim if r["levels"] == d["levels"]), None)
        if same is not None:
            text += (f" With the random effect kept in the p × p problem, the dense stage at "
                     f"{d['levels']:,} levels took {d['dense_seconds']:.1f} s against "
                     f"{same['dense_seconds']:.2f} s eliminated, and it grows as p³ (about "
                     f"{(hi['levels'] / d['levels']) ** 3:,.0f}× that at {hi['levels']:,} "
                     "levels: not run).")
    return text


def append_section(text: str) -> None:
    """Append our section to docs/performance.md, re-reading the file just before writing
    (others write other sections of it); an earlier version of this section is replaced."""
    path = os.path.join(ROOT, "docs", "performance.md")
    current = ""
    if os.path.exists(path):
        with open(path, encoding="utf-8") as fh:
            current = fh.read()
    if SECTION in current:
        head, rest = current.split(SECTION, 1)
        nxt = rest.find("\n## ")
        current = head.rstrip("\n") + ("\n" + rest[nxt:] if nxt >= 0 else "\n")
    if not current.strip():
        current = "# Performance\n"
    with open(path, "w", encoding="utf-8") as fh:
        fh.write(current.rstrip("\n") + "\n" + text)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--rows", type=int, default=2_000_000)
    ap.add_argument("--levels", type=int, nargs="+", default=list(LEVELS))
    ap.add_argument("--dense-levels", type=int, nargs="*", default=[1250],
                    help="level counts also fitted with the random effect kept dense")
    ap.add_argument("--batch-rows", type=int, default=500_000)
    ap.add_argument("--data-dir", default=os.path.join(HERE, "data"))
    ap.add_argument("--doc", action="store_true", help="append the table to docs/performance.md")
    ap.add_argument("--doc-from", metavar="RESULTS_JSON",
                    help="only write the docs section, from a results file of an earlier run")
    ap.add_argument("--task-fit", type=int, help=argparse.SUPPRESS)
    ap.add_argument("--book", help=argparse.SUPPRESS)
    ap.add_argument("--keep-dense", action="store_true", help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.task_fit is not None:
        print(json.dumps(task_fit(args.book, args.task_fit, args.keep_dense, args.batch_rows)))
        return 0
    if args.doc_from:
        with open(args.doc_from) as fh:
            append_section(doc_section(json.load(fh)))
        return 0
    path = book_path(args.data_dir, args.rows, args.levels + args.dense_levels)
    runs = []
    for levels in args.levels:
        runs.append(run_one(path, levels, False, args.batch_rows))
        print(json.dumps(runs[-1]), flush=True)
    for levels in args.dense_levels:
        runs.append(run_one(path, levels, True, args.batch_rows))
        print(json.dumps(runs[-1]), flush=True)
    date = dt.date.today().isoformat()
    name = f"random-effects-{date}.json"
    result = {"date": date, "rows": args.rows, "batch_rows": args.batch_rows,
              "machine": machine(), "runs": with_ratios(runs), "file": name}
    os.makedirs(os.path.join(HERE, "results"), exist_ok=True)
    with open(os.path.join(HERE, "results", name), "w") as fh:
        json.dump(result, fh, indent=1)
    print(table(result["runs"]))
    if args.doc:
        append_section(doc_section(result))
    return 0


if __name__ == "__main__":
    sys.exit(main())

"""Cluster benchmark: data-pass times of the same fit in this process and on a Dask
LocalCluster with 1, 2 and 4 worker processes (one thread each).

With ``--reference`` the model is the reference model (bench/reference.py) with default
settings: binned passes where they pay, a sample start on large data; the profile's scans
and the sample are partition tasks, and every worker keeps a scratch copy of the coded rows
of its partitions, so the first pass reads the data and later passes read the copies.

A synthetic motor book (bench/make_book.py's generator) is written to
``DATA_DIR/cluster-<rows>-<files>`` as ``--files`` Parquet files of equal size (reused when
its manifest matches), so every worker count gets whole files to share. Two models, as in
bench/engine_bench.py: a gaussian y ~ 8 splines + region + vehicle_group (one data pass)
and a Poisson claim_count with the same terms and exposure (PIRLS, several passes).

Configurations: ``local-1`` and ``local-2`` (in this process, ``threads`` 1 and 2: the
reference), then ``cluster-K`` for K in ``--workers``: ``LocalCluster(n_workers=K,
threads_per_worker=1, processes=True)`` on loopback, each task with one numba and one
DuckDB thread. Before timing, every worker (and this process) runs a tiny fit so numba has
loaded its kernels, and the files are read once so they sit in the page cache: the times
are CPU-bound reading and accumulation, not disk. A pass's time is the wall time of one
call of the runner's ``working``/``loglik`` (submit, run, collect, merge), from outside the
engine. Each cluster fit is compared with the ``local-1`` fit (largest relative
difference of the raw coefficients, deviance, smoothing parameters).

Results: ``bench/results/cluster-<date>.json`` and a markdown table on stdout. With
``--wait-idle S`` each timed fit first waits (up to S seconds) for a quiet machine; the
CPU that other processes used meanwhile is recorded beside each fit.

    python bench/cluster_bench.py --rows 4000000 --files 8 --workers 1 2 4
"""

from __future__ import annotations

import argparse
import datetime as dt
import glob
import json
import os
import pickle
import statistics
import sys
import time

HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.insert(0, HERE)

from engine_bench import (  # noqa: E402
    Meter,
    Patches,
    engine_fingerprint,
    machine_busy,
    machine_info,
    models,
    own_cpu,
    warm_page_cache,
    warm_up,
)

GENERATOR = "cluster-book-1"


# ---------------------------------------------------------------------------------------
# data


def write_book(rows: int, files: int, out: str, seed: int = 20240601) -> list[str]:
    """``files`` Parquet files of rows/files rows each (one row group per file)."""
    import pyarrow.parquet as pq

    from make_book import make_chunk, structure

    manifest = os.path.join(out, "book.json")
    if os.path.exists(manifest):
        with open(manifest) as fh:
            m = json.load(fh)
        paths = [os.path.join(out, f) for f in m.get("files", [])]
        if (m.get("generator") == GENERATOR and m.get("rows") == rows and m.get("seed") == seed
                and len(paths) == files and all(map(os.path.exists, paths))):
            return paths
    os.makedirs(out, exist_ok=True)
    for old in glob.glob(os.path.join(out, "book-*.parquet")):
        os.remove(old)
    st = structure(seed)
    per = -(-rows // files)
    names = []
    for k in range(files):
        n = min(per, rows - k * per)
        table = make_chunk(seed, k, n, st, first_id=k * per)
        name = f"book-{k:05d}.parquet"
        pq.write_table(table, os.path.join(out, name) + ".tmp", row_group_size=n,
                       compression="snappy")
        os.replace(os.path.join(out, name) + ".tmp", os.path.join(out, name))
        names.append(name)
    with open(manifest + ".tmp", "w") as fh:
        json.dump({"generator": GENERATOR, "rows": rows, "seed": seed, "files": names}, fh)
    os.replace(manifest + ".tmp", manifest)
    return [os.path.join(out, n) for n in names]


# ---------------------------------------------------------------------------------------
# timing


def _worker_warm_up() -> float:
    """Runs on every worker: a tiny fit, so numba's kernels are loaded before timing."""
    sys.path.insert(0, HERE)
    return warm_up()


def children_cpu() -> float:
    """CPU seconds of this process's live child processes (the cluster's workers)."""
    import psutil

    total = 0.0
    for child in psutil.Process().children(recursive=True):
        try:
            t = child.cpu_times()
            total += t.user + t.system
        except psutil.Error:
            pass
    return total


def wait_idle(limit_s: float, cores: float = 0.3) -> float:
    """Wait (up to ``limit_s``) until other processes use less than ``cores`` CPU cores over
    two seconds; returns the seconds waited."""
    t0 = time.perf_counter()
    while True:
        b0, c0 = machine_busy()[0], own_cpu() + children_cpu()
        time.sleep(2.0)
        other = (machine_busy()[0] - b0) - (own_cpu() + children_cpu() - c0)
        if other / 2.0 < cores or time.perf_counter() - t0 > limit_s:
            return time.perf_counter() - t0
        time.sleep(5.0)


def timed_fit(model, files, batch_rows, *, threads=None, cluster=None) -> tuple[dict, object]:
    """Fit with every data pass timed at the runner (local or cluster)."""
    from tallgam.passes.cluster import ClusterPasses
    from tallgam.passes.run import LocalPasses

    passes: list[dict] = []
    sizes: dict = {}

    def timed(inner, kind):
        def run(self, plan, *args, **kwargs):
            t0 = time.perf_counter()
            value = inner(self, plan, *args, **kwargs)
            task = str(args[0] if args else kwargs.get("task", ""))
            if task.startswith("sample"):  # a sample start's passes run in memory, locally
                return value
            passes.append({"kind": kind, "seconds": time.perf_counter() - t0})
            if kind == "working" and not sizes:  # what a pass ships, pickled
                sizes["plan_bytes"] = len(pickle.dumps(plan))
                sizes["state_bytes"] = len(pickle.dumps(value))
            return value
        return run

    patches = Patches()
    owner = ClusterPasses if cluster is not None else LocalPasses
    patches.replace(owner, "working", lambda f: timed(f, "working"))
    patches.replace(owner, "loglik", lambda f: timed(f, "loglik"))
    try:
        w0 = children_cpu()
        with Meter() as m:
            fit = model.fit(files, batch_rows=batch_rows, threads=threads, cluster=cluster)
        workers_cpu = children_cpu() - w0
    finally:
        patches.restore()
    secs = [p["seconds"] for p in passes]
    return {
        "fit": m.as_dict(),
        "workers_cpu_seconds": workers_cpu,
        **sizes,
        # cores' worth of CPU used by processes other than this one and its workers
        "other_processes_cores": max(m.foreign_cpu - workers_cpu, 0.0) / max(m.wall, 1e-9),
        "passes": len(passes),
        "pass_seconds": secs,
        "pass_median_seconds": statistics.median(secs),
        "first_pass_seconds": secs[0],
        "later_pass_median_seconds": statistics.median(secs[1:]) if len(secs) > 1 else None,
        "outside_passes_seconds": m.wall - sum(secs),  # profile, sample, dense stage
        "passes_mode": fit.statistics.get("passes_mode"),
        "pass_mean_seconds": sum(secs) / len(secs),
        "converged": fit.converged,
        "rows": fit.statistics["rows"],
    }, fit


def agreement(fit, ref) -> dict:
    import numpy as np

    def rel(a, b):
        a, b = np.asarray(a, float), np.asarray(b, float)
        return float(np.max(np.abs(a - b)) / max(np.max(np.abs(b)), 1e-300))
    lam = [rel(fit.smoothing[k], v) for k, v in ref.smoothing.items()]
    return {"coefficients": rel(fit.coefficients_raw, ref.coefficients_raw),
            "deviance": rel(fit.deviance, ref.deviance),
            "smoothing": max(lam) if lam else 0.0,
            "edf_total": rel(fit.edf["total"], ref.edf["total"])}


def fit_models() -> dict:
    if os.environ.get("TALLGAM_BENCH_REFERENCE") == "1":
        from reference import reference_model
        return {"reference": reference_model()}
    return models()


def run_config(name, files, batch_rows, refs, *, threads=None, workers=None,
               idle_wait=0.0) -> dict:
    # load of the machine before the configuration (other work would distort the times)
    out = {"config": name, "models": {}, "loadavg_1min_before": os.getloadavg()[0]}
    if workers is None:
        for mname, model in fit_models().items():
            warm_page_cache(files)
            out.setdefault("idle_waited_seconds", []).append(wait_idle(idle_wait))
            res, fit = timed_fit(model, files, batch_rows, threads=threads)
            refs.setdefault(mname, fit)
            res["agreement_with_local_1"] = agreement(fit, refs[mname])
            out["models"][mname] = res
        return out
    import distributed

    t0 = time.perf_counter()
    with distributed.LocalCluster(n_workers=workers, threads_per_worker=1, processes=True,
                                  host="127.0.0.1", dashboard_address=None) as lc, \
            distributed.Client(lc, set_as_default=False) as client:
        out["cluster_start_seconds"] = time.perf_counter() - t0
        out["worker_warm_up_seconds"] = client.run(_worker_warm_up)
        for mname, model in fit_models().items():
            warm_page_cache(files)
            out.setdefault("idle_waited_seconds", []).append(wait_idle(idle_wait))
            res, fit = timed_fit(model, files, batch_rows, cluster=client)
            res["agreement_with_local_1"] = agreement(fit, refs[mname])
            out["models"][mname] = res
    return out


def table(results: list[dict]) -> str:
    base = {m: r["pass_median_seconds"] for m, r in results[0]["models"].items()}
    lines = ["| configuration | model | passes | first pass s | later pass s (median) | "
             "median pass s | speed-up vs local-1 | fit s | max rel. diff of coefficients vs "
             "local-1 | other processes (cores) |",
             "|---|---|---:|---:|---:|---:|---:|---:|---:|---:|"]
    for cfg in results:
        for m, r in cfg["models"].items():
            later = r.get("later_pass_median_seconds")
            lines.append(
                f"| {cfg['config']} | {m} | {r['passes']} | {r['first_pass_seconds']:.2f} | "
                f"{'–' if later is None else format(later, '.2f')} | "
                f"{r['pass_median_seconds']:.2f} | "
                f"{base[m] / r['pass_median_seconds']:.2f} | {r['fit']['seconds']:.1f} | "
                f"{r['agreement_with_local_1']['coefficients']:.1e} | "
                f"{r['other_processes_cores']:.2f} |")
    return "\n".join(lines)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=int, default=4_000_000)
    ap.add_argument("--files", type=int, default=8)
    ap.add_argument("--workers", type=int, nargs="+", default=[1, 2, 4])
    ap.add_argument("--reference", action="store_true",
                    help="fit the reference model (bench/reference.py), default settings")
    ap.add_argument("--batch-rows", type=int, default=500_000)
    ap.add_argument("--data-dir", default=os.path.join(HERE, "data"))
    ap.add_argument("--wait-idle", type=float, default=0.0, metavar="SECONDS",
                    help="before each timed fit wait up to SECONDS for other processes to "
                         "use less than 0.3 cores")
    ap.add_argument("--out", default=os.path.join(HERE, "results",
                                                  f"cluster-{dt.date.today():%Y-%m-%d}.json"))
    args = ap.parse_args(argv)
    if args.reference:
        os.environ["TALLGAM_BENCH_REFERENCE"] = "1"
    files = write_book(args.rows, args.files,
                       os.path.join(args.data_dir, f"cluster-{args.rows}-{args.files}"))
    info = {"machine": machine_info(), "engine": engine_fingerprint(), "rows": args.rows,
            "files": args.files, "batch_rows": args.batch_rows,
            "warm_up_seconds": warm_up(), "started": dt.datetime.now().isoformat()}
    refs: dict = {}
    wait = args.wait_idle
    results = [run_config("local-1", files, args.batch_rows, refs, threads=1, idle_wait=wait),
               run_config("local-2", files, args.batch_rows, refs, threads=2, idle_wait=wait)]
    for k in args.workers:
        results.append(run_config(f"cluster-{k}", files, args.batch_rows, refs, workers=k,
                                  idle_wait=wait))
    info["results"] = results
    os.makedirs(os.path.dirname(args.out), exist_ok=True)
    with open(args.out, "w") as fh:
        json.dump(info, fh, indent=1)
    print(table(results))
    print(f"\nraw numbers: {args.out}", file=sys.stderr)
    return 0


if __name__ == "__main__":
    sys.exit(main())

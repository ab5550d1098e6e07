"""Scale benchmark: the reference model (bench/reference.py) from 1M to 100M rows.

For every size in ``--rows`` the synthetic motor book (bench/make_book.py, deterministic)
is written or reused under ``--data-dir``, and these tasks run, each in a fresh Python
process so that its peak resident memory (VmHWM) is its own:

* ``scan``: read the model's select list in ``--batch-rows`` batches exactly as a data pass
  reads it (DuckDB → Arrow → numpy), and nothing else: the cost of reading the data once.
* ``discrete``: ``reference_model().fit(files, binned=True)`` (scratch copy of the coded
  rows in the system's temporary folder, the default).
* ``plain``: the same fit without binning (only up to ``--plain-max`` rows: at 100M
  rows it would take over an hour here).

Before a timed fit the process fits a 20,000-row in-memory book once, so numba's compiled
kernels are loaded, and reads the book's files once, so they sit in the page cache (a
23 GiB machine holds the 100M-row book). Pass times come from the fit's progress events.

Results: ``bench/results/scale-<date>.json``, a markdown table on stdout, and with
``--plot`` a PNG of time and memory against rows.

    python bench/scale_bench.py --rows 1000000 10000000 100000000 --plot docs/images/scale.png
"""

from __future__ import annotations

import argparse
import datetime as dt
import glob
import json
import os
import subprocess
import sys
import time

HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.insert(0, HERE)

from engine_bench import (  # noqa: E402
    engine_scan,
    machine_info,
    proc_status,
    reset_peak_rss,
    warm_page_cache,
)

TASKS = ("scan", "discrete", "plain")


def book_files(rows: int, data_dir: str, seed: int) -> list[str]:
    from make_book import manifest_matches, write_book

    out = os.path.join(data_dir, f"book-{rows}")
    if not manifest_matches(out, rows, seed):
        write_book(rows, out, seed=seed, verbose=True)
    return sorted(glob.glob(os.path.join(out, "book-*.parquet")))


def warm_up() -> None:
    """One small fit of each kind, so compiled kernels are loaded before timing."""
    import warnings

    from make_book import book_table
    from reference import reference_model

    table = book_table(20_000)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        for d in (False, True):
            reference_model().fit(table, binned=d, scratch=False)


def task(name: str, files: list[str], batch_rows: int) -> dict:
    from reference import reference_model

    warm_up()
    warm_page_cache(files)
    reset_peak_rss()
    base = proc_status().get("VmRSS")
    if name == "scan":
        out = engine_scan(files, reference_model(), batch_rows)
        out.pop("select", None)
        out["peak_rss_mb"] = proc_status().get("VmHWM")
        out["base_rss_mb"] = base
        return out
    times: dict[str, float] = {}
    starts: dict[str, float] = {}

    def on_event(event):
        if event.kind == "start":
            starts[event.task] = time.perf_counter()
        elif event.kind == "end" and event.task in starts:
            times[event.task] = time.perf_counter() - starts.pop(event.task)
    t0 = time.perf_counter()
    fit = reference_model().fit(files, batch_rows=batch_rows, binned=(name == "discrete"),
                                progress=on_event)
    seconds = time.perf_counter() - t0
    passes = [v for k, v in times.items() if k.startswith("pass")]
    later = sorted(passes[1:])
    return {
        "seconds": seconds, "passes": fit.passes, "converged": bool(fit.converged),
        "profile_seconds": times.get("profile"), "first_pass_seconds": passes[0],
        "median_later_pass_seconds": later[len(later) // 2] if later else None,
        "pass_seconds": passes, "deviance": float(fit.deviance),
        "edf": float(sum(v for k, v in fit.edf.items() if k != "total")),
        "peak_rss_mb": proc_status().get("VmHWM"), "base_rss_mb": base,
        "rows": int(fit.statistics.get("rows", 0)) if hasattr(fit, "statistics") else None,
        "notes": [n for n in fit.notes if n.startswith("binned")],
    }


def run_task(name: str, rows: int, files_dir: str, args) -> dict:
    cmd = [sys.executable, os.path.abspath(__file__), "--worker", name, "--worker-dir",
           files_dir, "--batch-rows", str(args.batch_rows)]
    proc = subprocess.run(cmd, capture_output=True, text=True)
    if proc.returncode != 0:
        return {"error": proc.stderr[-2000:]}
    return json.loads(proc.stdout.strip().splitlines()[-1])


def markdown(results: list[dict]) -> str:
    head = ("| rows | scan s | binned fit s | passes | profile s | first pass s | "
            "later pass s (median) | later pass / scan | peak RSS MB | plain fit s | "
            "plain pass s (median) | plain peak RSS MB |")
    lines = [head, "|" + "---:|" * 12]
    for r in results:
        s, d, p = r.get("scan", {}), r.get("discrete", {}), r.get("plain", {})

        def f(x, spec=".1f"):
            return "–" if x is None else format(x, spec)
        ratio = (d.get("median_later_pass_seconds") / s["seconds"]
                 if d.get("median_later_pass_seconds") and s.get("seconds") else None)
        lines.append(
            f"| {r['rows']:,} | {f(s.get('seconds'), '.2f')} | {f(d.get('seconds'))} | "
            f"{d.get('passes', '–')} | {f(d.get('profile_seconds'))} | "
            f"{f(d.get('first_pass_seconds'), '.2f')} | "
            f"{f(d.get('median_later_pass_seconds'), '.2f')} | {f(ratio, '.2f')} | "
            f"{f(d.get('peak_rss_mb'), '.0f')} | {f(p.get('seconds'))} | "
            f"{f(p.get('median_later_pass_seconds'), '.2f')} | {f(p.get('peak_rss_mb'), '.0f')} |")
    return "\n".join(lines)


def plot(results: list[dict], path: str) -> None:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    rows = [r["rows"] for r in results]
    fig, (ax1, ax2) = plt.subplots(1, 2, figsize=(10, 4))
    for key, label, style in (("discrete", "fit, binned", "o-"),
                              ("plain", "fit, plain", "s--"), ("scan", "one scan", "^:")):
        pts = [(r["rows"], r[key]["seconds"]) for r in results
               if key in r and "seconds" in r[key]]
        if pts:
            ax1.plot(*zip(*pts), style, color="0.1" if key == "discrete" else "0.5",
                     label=label)
        mem = [(r["rows"], r[key]["peak_rss_mb"]) for r in results
               if key in r and r[key].get("peak_rss_mb")]
        if mem:
            ax2.plot(*zip(*mem), style, color="0.1" if key == "discrete" else "0.5",
                     label=label)
    for ax, title in ((ax1, "wall time, s"), (ax2, "peak resident memory, MB")):
        ax.set_xscale("log")
        ax.set_xlabel("rows")
        ax.set_title(title)
        ax.grid(True, color="0.85")
        ax.legend(frameon=False)
    ax1.set_yscale("log")
    ax2.set_ylim(bottom=0)
    fig.suptitle(f"reference model, {min(rows):,} to {max(rows):,} rows (2 cores)")
    fig.tight_layout()
    fig.savefig(path, dpi=110)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=int, nargs="+", default=[1_000_000, 10_000_000,
                                                            100_000_000])
    ap.add_argument("--tasks", nargs="+", default=list(TASKS), choices=TASKS)
    ap.add_argument("--plain-max", type=int, default=10_000_000)
    ap.add_argument("--batch-rows", type=int, default=1_000_000)
    ap.add_argument("--seed", type=int, default=20240601)
    ap.add_argument("--data-dir", default=os.path.join(HERE, "data"))
    ap.add_argument("--plot", default=None, help="write a PNG of time and memory here")
    ap.add_argument("--out", default=os.path.join(
        HERE, "results", f"scale-{dt.date.today().isoformat()}.json"))
    ap.add_argument("--worker", choices=TASKS, help=argparse.SUPPRESS)
    ap.add_argument("--worker-dir", help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.worker:
        files = sorted(glob.glob(os.path.join(args.worker_dir, "book-*.parquet")))
        print(json.dumps(task(args.worker, files, args.batch_rows)))
        return 0
    results = []
    for rows in args.rows:
        files = book_files(rows, args.data_dir, args.seed)
        entry = {"rows": rows}
        for name in args.tasks:
            if name == "plain" and rows > args.plain_max:
                continue
            print(f"{rows:,} rows: {name} ...", file=sys.stderr, flush=True)
            entry[name] = run_task(name, rows, os.path.dirname(files[0]), args)
            print(f"  {json.dumps(entry[name])[:300]}", file=sys.stderr, flush=True)
        results.append(entry)
        os.makedirs(os.path.dirname(args.out), exist_ok=True)
        with open(args.out, "w") as fh:
            json.dump({"machine": machine_info(), "command": " ".join(sys.argv),
                       "batch_rows": args.batch_rows, "results": results}, fh, indent=1)
    print(markdown(results))
    if args.plot:
        plot(results, args.plot)
    print(f"\nraw numbers: {args.out}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())

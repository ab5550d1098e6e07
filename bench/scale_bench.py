"""Scale benchmark: the reference model (bench/reference.py) from 1M to 100M rows.

For every size in ``--rows`` the synthetic motor book (bench/make_book.py, deterministic)
is written or reused under ``--data-dir``, and these tasks run, each in a fresh Python
process so that its peak resident memory (VmHWM) is its own:

* ``scan``: read the model's select list in ``--batch-rows`` batches exactly as a data pass
  reads it (DuckDB → Arrow → numpy), and nothing else: the cost of reading the data once.
  It runs again at the end of the size's tasks; the ratios use the faster of the two.
* ``default``: ``reference_model().fit(files)`` with nothing else given: the fit chooses
  exact or binned passes (``binned="auto"``), starts from a sample when the data are
  large, keeps a scratch copy of binned rows in the system's temporary folder.
* ``exact``: the same fit with ``binned=False`` (only up to ``--exact-max`` rows).
* ``gamma``, ``tweedie``: the reference terms for severity and pure premium with default
  settings (``reference_model("gamma")``, ``reference_model("tweedie")``).
* ``refit``: a refit after a month: the default fit on the book without every 13th policy
  (``policy_id % 13 <> 12``), then the fit of the book without the first 13th
  (``policy_id % 13 <> 0``) from it (``start=``), against the same fit from scratch.

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

TASKS = ("scan", "default", "exact", "gamma", "tweedie", "refit")


def book_files(rows: int, data_dir: str, seed: int) -> list[str]:
    from make_book import manifest_matches, write_book

    out = os.path.join(data_dir, f"book-{rows}")
    if not manifest_matches(out, rows, seed):
        write_book(rows, out, seed=seed, verbose=True)
    return sorted(glob.glob(os.path.join(out, "book-*.parquet")))


def warm_up(family: str = "poisson") -> None:
    """Small fits of each path, so compiled kernels are loaded before timing."""
    import warnings

    from make_book import book_table
    from reference import reference_model
    from tallgam.options import Tuning

    table = book_table(20_000)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        for binned in (False, True):
            reference_model(family).fit(table, binned=binned, scratch=False,
                                        tuning=Tuning(sample_share=0.0))


class PassTimer:
    """Wall time of every progress task (profile, sample, sample passes, passes)."""

    def __init__(self):
        self.times: dict[str, float] = {}
        self.starts: dict[str, float] = {}

    def __call__(self, event) -> None:
        if event.kind == "start":
            self.starts[event.task] = time.perf_counter()
        elif event.kind == "end" and event.task in self.starts:
            self.times[event.task] = time.perf_counter() - self.starts.pop(event.task)

    def summary(self) -> dict:
        t = self.times
        passes = [v for k, v in t.items() if k.startswith("pass")]
        later = sorted(passes[1:])
        sample = sum(v for k, v in t.items() if k.startswith("sample"))
        return {"profile_seconds": t.get("profile"), "sample_seconds": sample or None,
                "first_pass_seconds": passes[0] if passes else None,
                "median_later_pass_seconds": later[len(later) // 2] if later else None,
                "pass_seconds": passes}


def fit_record(fit, seconds: float, timer: PassTimer) -> dict:
    st = fit.statistics
    return {"seconds": seconds, "passes": fit.passes, "converged": bool(fit.converged),
            "passes_mode": st.get("passes_mode"), "sample": st.get("sample"),
            "kinds": [h["kind"] for h in fit.history], **timer.summary(),
            "deviance": float(fit.deviance), "edf": float(fit.edf["total"]),
            "rows": int(st.get("rows", 0)),
            "notes": [n for n in fit.notes if "passes" in n or "sample" in n]}


def task(name: str, files: list[str], batch_rows: int) -> dict:
    from reference import reference_model

    family = name if name in ("gamma", "tweedie") else "poisson"
    warm_up(family)
    warm_page_cache(files)
    reset_peak_rss()
    base = proc_status().get("VmRSS")
    if name == "scan":
        out = engine_scan(files, reference_model(), batch_rows)
        out.pop("select", None)
        out["peak_rss_mb"] = proc_status().get("VmHWM")
        out["base_rss_mb"] = base
        return out
    if name == "refit":
        return refit_task(files, batch_rows, base)
    timer = PassTimer()
    options = {"binned": False} if name == "exact" else {}
    t0 = time.perf_counter()
    fit = reference_model(family).fit(files, batch_rows=batch_rows, progress=timer, **options)
    out = fit_record(fit, time.perf_counter() - t0, timer)
    out.update(peak_rss_mb=proc_status().get("VmHWM"), base_rss_mb=base)
    return out


def refit_task(files: list[str], batch_rows: int, base) -> dict:
    """Last month's fit, this month's fit from it, and this month's fit from scratch."""
    import dataclasses

    from reference import reference_model

    def model(where: str):
        return dataclasses.replace(reference_model(), where=where)
    last, now = model("policy_id % 13 <> 12"), model("policy_id % 13 <> 0")
    previous = last.fit(files, batch_rows=batch_rows)
    out = {}
    for key, start in (("refit", previous), ("fresh", None)):
        timer = PassTimer()
        t0 = time.perf_counter()
        fit = now.fit(files, batch_rows=batch_rows, progress=timer, start=start)
        out[key] = fit_record(fit, time.perf_counter() - t0, timer)
    out["refit"]["deviance_gap"] = out["refit"]["deviance"] / out["fresh"]["deviance"] - 1
    out.update(seconds=out["refit"]["seconds"], passes=out["refit"]["passes"],
               peak_rss_mb=proc_status().get("VmHWM"), base_rss_mb=base)
    return out


def run_task(name: str, rows: int, files_dir: str, args) -> dict:
    cmd = [sys.executable, os.path.abspath(__file__), "--worker", name, "--worker-dir",
           files_dir, "--batch-rows", str(args.batch_rows)]
    proc = subprocess.run(cmd, capture_output=True, text=True)
    if proc.returncode != 0:
        return {"error": proc.stderr[-2000:]}
    return json.loads(proc.stdout.strip().splitlines()[-1])


def _f(x, spec=".1f"):
    return "–" if x is None else format(x, spec)


def markdown(results: list[dict]) -> str:
    head = ("| rows | scan s | default fit s | × scan | passes (mode) | profile s | sample s | "
            "first pass s | later pass s (median) | later pass / scan | peak RSS MB | "
            "exact fit s | exact pass / scan | exact passes |")
    lines = [head, "|" + "---:|" * 14]
    for r in results:
        scan = min((x["seconds"] for x in (r.get("scan"), r.get("scan_after")) if x and
                    "seconds" in x), default=None)
        d, e = r.get("default", {}), r.get("exact", {})

        def per_scan(x, scan=scan):
            return x / scan if x is not None and scan else None
        lines.append(
            f"| {r['rows']:,} | {_f(scan, '.2f')} | {_f(d.get('seconds'))} | "
            f"{_f(per_scan(d.get('seconds')))} | {d.get('passes', '–')} "
            f"({d.get('passes_mode', '–')}) | {_f(d.get('profile_seconds'))} | "
            f"{_f(d.get('sample_seconds'))} | {_f(d.get('first_pass_seconds'), '.2f')} | "
            f"{_f(d.get('median_later_pass_seconds'), '.2f')} | "
            f"{_f(per_scan(d.get('median_later_pass_seconds')), '.2f')} | "
            f"{_f(d.get('peak_rss_mb'), '.0f')} | {_f(e.get('seconds'))} | "
            f"{_f(per_scan(e.get('median_later_pass_seconds')), '.2f')} | "
            f"{e.get('passes', '–')} |")
    extra = [r for r in results if any(k in r for k in ("gamma", "tweedie", "refit"))]
    if extra:
        lines += ["", "| rows | gamma fit s | gamma passes | tweedie fit s | tweedie passes | "
                  "refit s | refit passes | fresh fit s | fresh passes | refit deviance gap |",
                  "|" + "---:|" * 10]
        for r in extra:
            g, t, f = r.get("gamma", {}), r.get("tweedie", {}), r.get("refit", {})
            fresh = f.get("fresh", {})
            lines.append(
                f"| {r['rows']:,} | {_f(g.get('seconds'))} | {g.get('passes', '–')} | "
                f"{_f(t.get('seconds'))} | {t.get('passes', '–')} | "
                f"{_f(f.get('seconds'))} | {f.get('passes', '–')} | "
                f"{_f(fresh.get('seconds'))} | {fresh.get('passes', '–')} | "
                f"{_f(f.get('refit', {}).get('deviance_gap'), '.1e')} |")
    return "\n".join(lines)


def plot(results: list[dict], path: str) -> None:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    rows = [r["rows"] for r in results]
    for r in results:  # the faster of the two scans, as the table uses
        after = r.get("scan_after")
        if after and r.get("scan") and after.get("seconds", 1e300) < r["scan"]["seconds"]:
            r["scan"] = {**r["scan"], "seconds": after["seconds"]}
    fig, (ax1, ax2) = plt.subplots(1, 2, figsize=(10, 4))
    for key, label, style in (("default", "fit, default settings", "o-"),
                              ("exact", "fit, exact passes", "s--"),
                              ("scan", "one scan", "^:")):
        pts = [(r["rows"], r[key]["seconds"]) for r in results
               if key in r and "seconds" in r[key]]
        if pts:
            ax1.plot(*zip(*pts), style, color="0.1" if key == "default" else "0.5",
                     label=label)
        mem = [(r["rows"], r[key]["peak_rss_mb"]) for r in results
               if key in r and r[key].get("peak_rss_mb")]
        if mem:
            ax2.plot(*zip(*mem), style, color="0.1" if key == "default" else "0.5",
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
    ap.add_argument("--exact-max", type=int, default=10_000_000)
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
            if name == "exact" and rows > args.exact_max:
                continue
            print(f"{rows:,} rows: {name} ...", file=sys.stderr, flush=True)
            entry[name] = run_task(name, rows, os.path.dirname(files[0]), args)
            print(f"  {json.dumps(entry[name])[:300]}", file=sys.stderr, flush=True)
        if "scan" in args.tasks and len(args.tasks) > 1:  # the scan again: the machine drifts
            entry["scan_after"] = run_task("scan", rows, os.path.dirname(files[0]), args)
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

"""Peak resident memory of the engine's read path and of a gaussian fit, per configuration.

Each configuration runs in a fresh Python process (peak RSS = VmHWM after a reset that
follows imports and the JIT warm-up). Rows beyond a book's size are made by listing its
files several times (``x3`` = the 10M book read three times = 30M rows), so no larger
book needs writing. Configurations vary the rows, DuckDB's threads and the batch size,
to tell memory that grows with the rows from memory that depends on the read layout.

    python bench/memory_probe.py --data-dir bench/data
"""

from __future__ import annotations

import argparse
import datetime as dt
import glob
import json
import os
import subprocess
import sys

HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.insert(0, HERE)

# (task, book, repeat, duckdb threads (0: default), batch rows)
CONFIGS = [
    ("scan", "book-1000000", 1, 0, 1_000_000),
    ("scan", "book-10000000", 1, 0, 1_000_000),
    ("scan", "book-10000000", 3, 0, 1_000_000),
    ("scan", "book-10000000", 1, 1, 1_000_000),
    ("scan", "book-1000000", 1, 0, 250_000),
    ("scan", "book-10000000", 1, 0, 250_000),
    ("gaussian", "book-1000000", 1, 0, 1_000_000),
    ("gaussian", "book-10000000", 1, 0, 1_000_000),
    ("gaussian", "book-10000000", 3, 0, 1_000_000),
]


def worker(task: str, book: str, repeat: int, threads: int, batch_rows: int) -> dict:
    import time

    import engine_bench as eb

    files = sorted(glob.glob(os.path.join(book, "book-*.parquet"))) * repeat
    if task != "scan":
        eb.warm_up()
    base = eb.proc_status().get("VmRSS")
    eb.reset_peak_rss()
    t0 = time.perf_counter()
    if task == "scan":
        r = eb.engine_scan(files, eb.models()["gaussian"], batch_rows, threads or None)
        rows = r["rows"]
    else:
        fit = eb.models()[task].fit(files, batch_rows=batch_rows)
        rows = fit.statistics["rows"]
    return {"task": task, "book": os.path.basename(book), "repeat": repeat,
            "duckdb_threads": threads or "default", "batch_rows": batch_rows, "rows": rows,
            "seconds": time.perf_counter() - t0, "rss_before_mb": base,
            "peak_rss_mb": eb.proc_status().get("VmHWM"), "engine": eb.engine_fingerprint()}


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description="peak RSS of reads and fits per configuration")
    ap.add_argument("--data-dir", default=os.path.join(HERE, "data"))
    ap.add_argument("--results", default=os.path.join(HERE, "results"))
    ap.add_argument("--worker", nargs=5, help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.worker:
        task, book, repeat, threads, batch = args.worker
        print(json.dumps(worker(task, book, int(repeat), int(threads), int(batch))))
        return 0
    out = []
    for task, book, repeat, threads, batch in CONFIGS:
        path = os.path.join(args.data_dir, book)
        if not glob.glob(os.path.join(path, "book-*.parquet")):
            print(f"skipping {book}: not written (run engine_bench.py or make_book.py)",
                  file=sys.stderr)
            continue
        cmd = [sys.executable, os.path.abspath(__file__), "--worker", task, path, str(repeat),
               str(threads), str(batch)]
        proc = subprocess.run(cmd, capture_output=True, text=True)
        if proc.returncode:
            raise RuntimeError(proc.stderr[-3000:])
        out.append(json.loads(proc.stdout.strip().splitlines()[-1]))
        print(f"{task:>8} {out[-1]['rows']:>11,d} rows  threads {out[-1]['duckdb_threads']!s:>7}"
              f"  batch {batch:>9,d}  peak {out[-1]['peak_rss_mb']:7.0f} MB", file=sys.stderr)
    lines = ["| task | rows | DuckDB threads | batch rows | peak RSS MB |", "|---|---|---|---|---|"]
    for r in out:
        lines.append(f"| {r['task']} | {r['rows']:,d} | {r['duckdb_threads']} "
                     f"| {r['batch_rows']:,d} | {r['peak_rss_mb']:.0f} |")
    print("\n".join(lines))
    os.makedirs(args.results, exist_ok=True)
    path = os.path.join(args.results, f"memory-{dt.date.today().isoformat()}.json")
    with open(path + ".tmp", "w") as fh:
        json.dump(out, fh, indent=1)
    os.replace(path + ".tmp", path)
    print(f"\nresults: {os.path.relpath(path)}")
    return 0


if __name__ == "__main__":
    sys.exit(main())

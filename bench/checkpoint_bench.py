"""What a checkpoint costs and what a resume saves, on the reference model (bench/reference.py).

Three fits of the same book in one run: without a checkpoint, with one (the time of every
record written is measured by timing ``Checkpoint.add``), and with one that is interrupted
after data pass ``--stop`` and then resumed. Reports the cost per pass (seconds and share of
the pass), the file's size, the resumed fit's time and its largest coefficient difference
from the uninterrupted fit.

    python bench/checkpoint_bench.py --rows 2000000 --out bench/results/checkpoint.json
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import tempfile
import time

import numpy as np

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))

from make_book import write_book  # noqa: E402
from reference import reference_model  # noqa: E402
from tallgam.solve import checkpoint as ck  # noqa: E402


class _Stop(Exception):
    pass


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=int, default=2_000_000)
    ap.add_argument("--stop", type=int, default=2, help="interrupt after this data pass")
    ap.add_argument("--data", default="bench/data")
    ap.add_argument("--out", default=None)
    args = ap.parse_args(argv)
    book = os.path.join(args.data, f"book-{args.rows}")
    write_book(args.rows, book)
    data = os.path.join(book, "book-*.parquet")
    model = reference_model()

    writes: list[tuple[str, float, int]] = []
    real_add = ck.Checkpoint.add

    def timed_add(self, call, tag, result):
        before = os.path.getsize(self.path)
        t = time.perf_counter()
        real_add(self, call, tag, result)
        writes.append((call, time.perf_counter() - t, os.path.getsize(self.path) - before))
    ck.Checkpoint.add = timed_add

    t = time.perf_counter()
    plain = model.fit(data)
    t_plain = time.perf_counter() - t
    folder = tempfile.mkdtemp()
    path = os.path.join(folder, "fit.ckpt")
    t = time.perf_counter()
    recorded = model.fit(data, checkpoint=path)
    t_recorded = time.perf_counter() - t
    passes = [w for w in writes if w[0] in ("working", "loglik")]
    pass_seconds = [h["seconds"] for h in recorded.history]

    writes.clear()
    seen = [0]

    def stop(ev):
        if ev.kind == "end" and ev.task.startswith("pass"):
            seen[0] += 1
            if seen[0] == args.stop:
                raise _Stop
    t = time.perf_counter()
    try:
        model.fit(data, checkpoint=path, progress=stop)
    except _Stop:
        pass
    t_killed = time.perf_counter() - t
    size = os.path.getsize(path)
    t = time.perf_counter()
    resumed = model.fit(data, checkpoint=path)
    t_resumed = time.perf_counter() - t
    out = {
        "rows": args.rows, "passes": plain.passes,
        "seconds_without_checkpoint": t_plain, "seconds_with_checkpoint": t_recorded,
        "checkpoint_write_seconds_per_pass": float(np.mean([w[1] for w in passes])),
        "checkpoint_bytes_per_pass": float(np.mean([w[2] for w in passes])),
        "mean_pass_seconds": float(np.mean(pass_seconds)),
        "write_share_of_pass": float(np.mean([w[1] for w in passes]) / np.mean(pass_seconds)),
        "interrupted_after_pass": args.stop, "seconds_until_interrupt": t_killed,
        "checkpoint_bytes_at_interrupt": size, "seconds_resumed": t_resumed,
        "replayed": resumed.statistics.get("checkpoint"),
        "max_coefficient_difference": float(np.max(np.abs(
            resumed.coefficients_raw - plain.coefficients_raw))),
        "max_coefficient_difference_recorded": float(np.max(np.abs(
            recorded.coefficients_raw - plain.coefficients_raw))),
    }
    print(json.dumps(out, indent=1))
    if args.out:
        with open(args.out, "w") as fh:
            json.dump(out, fh, indent=1)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())

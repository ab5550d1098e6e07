"""Where the time of a data pass goes: the steps of one pass of the reference model, timed
one by one through the engine's public pieces (nothing in the engine changes).

For the exact layout (``Design``) and the binned one (``BinnedDesign``), over the first
``--rows`` rows of a book written by bench/make_book.py, in batches of ``--batch-rows``:

* read        DuckDB → Arrow → numpy (``Source.batches`` + ``batch_columns``): a scan
* code        the rows in kernel form (``layout.read``: B-spline rows, or term codes)
* order       binned: the rows sorted by the largest term's codes, as the scratch copy
              keeps them (``layout.order``), and the copy's write
* predict     the linear predictor at an iterate (``layout.predict``)
* working     the family's fused working-model loop (``Family.working_kernel``)
* accumulate  the normal equations (``layout.accumulator(...).add`` + ``finish``)
* stored      binned: the same rows read back from the scratch copy

Each step is the best of ``--repeats``; the sum is what a pass costs without Python's
glue. The model is the Poisson reference model at a small random iterate.

    python bench/pass_profile.py --rows 2000000
"""

from __future__ import annotations

import argparse
import datetime as dt
import glob
import json
import os
import sys
import tempfile
import time

import numpy as np

HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.insert(0, HERE)

from engine_bench import machine_info, warm_page_cache  # noqa: E402


def best(fn, repeats: int):
    """(best seconds, last result) of ``fn()`` over ``repeats`` runs."""
    out, seconds = None, float("inf")
    for _ in range(repeats):
        t0 = time.perf_counter()
        out = fn()
        seconds = min(seconds, time.perf_counter() - t0)
    return seconds, out


def profile_layouts(files: list[str], rows: int, batch_rows: int, repeats: int) -> dict:
    import numba

    from reference import reference_model
    from tallgam.data.sources import open_source
    from tallgam.options import RunOptions
    from tallgam.progress import make_callback
    from tallgam.solve.pirls import prepare

    model = reference_model()
    source = open_source(files)
    out = {}
    for name, binned in (("exact", False), ("binned", True)):
        setup = prepare(model, source, RunOptions(binned=binned), make_callback(False))
        out[name], size = profile_layout(setup, source, model, binned, rows, batch_rows,
                                         repeats, numba.get_num_threads())
        if size is not None:
            out[f"{name}_bytes_per_row"] = size
    source.close()
    return out


def profile_layout(setup, source, model, binned: bool, rows: int, batch_rows: int,
                   repeats: int, threads: int) -> tuple[dict, float | None]:
    """The steps of one pass over ``rows`` rows with one layout; and the scratch copy's
    bytes a row (binned)."""
    from tallgam.data.inputs import WC, O, Y
    from tallgam.data.scratch import ScratchPolicy
    from tallgam.data.scratch import prepare as prepare_scratch
    from tallgam.passes.design import batch_columns
    from tallgam.passes.run import PassPlan

    layout = setup.binned if binned else setup.design
    rng = np.random.default_rng(1)
    beta = 0.01 * rng.standard_normal(setup.design.p)
    beta[0] = -2.0
    coef = layout.pass_coefficients(beta)
    fused = model.family.working_kernel(model.link)

    def read():
        batches = []
        for batch in source.batches(setup.inputs.select, f"policy_id < {rows}",
                                    batch_rows):
            batches.append(batch_columns(batch, setup.inputs.level_names))
        return batches
    t_read, cols = best(read, repeats)
    n = sum(len(c[Y]) for c in cols)
    t_code, blocks = best(lambda: [b for c in cols for _, b in layout.read(c)], repeats)
    ys = [c[Y] for c in cols]
    os_ = [c[O] for c in cols]
    wcs = [c[WC] for c in cols]
    steps = {"read": t_read, "code": t_code}
    if binned:
        def order():
            return [layout.reordered(b, layout.order(b)) for b in blocks]
        steps["order"], blocks = best(order, repeats)
    sizes = [b.shape[1] if binned else b.rows for b in blocks]

    def predict():
        fitted = [np.zeros(m) for m in sizes]
        for b, f in zip(blocks, fitted):
            layout.predict(b, coef, f)
        return fitted
    steps["predict"], fitted = best(predict, repeats)
    if not binned:  # exact blocks are CHUNK_ROWS slices of the batches
        fitted = [np.concatenate(fitted)]
        ys, os_, wcs = [np.concatenate(ys)], [np.concatenate(os_)], [np.concatenate(wcs)]

    def working():
        res = []
        for f, y, o in zip(fitted, ys, os_):
            wz, r = np.empty(len(y)), np.empty(len(y))
            fused(f, o, y, np.ones(len(y)), -2.0, 0.1, np.ones(3), wz, r)
            res.append((wz, r))
        return res
    steps["working"], wr = best(working, repeats)
    wz = np.concatenate([a for a, _ in wr])
    r = np.concatenate([b for _, b in wr])
    wc = np.concatenate(wcs)
    y_all = np.concatenate(ys)

    def accumulate():
        acc = layout.accumulator(threads, setup.options.tuning.blas_width)
        at = 0
        for b, m in zip(blocks, sizes):
            acc.add(b, wz[at:at + m], r[at:at + m], wc[at:at + m])
            at += m
        return acc.finish()
    steps["accumulate"], _ = best(accumulate, repeats)
    if binned:
        plan = PassPlan(inputs=setup.inputs, design=setup.design, family=model.family,
                        link=model.link, beta=beta, beta_prev=None, start_shift=-2.0,
                        null_beta0=-2.0, y_mean=0.1, scale_est=1.0, batch_rows=batch_rows,
                        binned=layout, values=setup.values)
        with tempfile.TemporaryDirectory() as folder:
            scratch = prepare_scratch(None, ScratchPolicy(folder=folder), plan, n)
            t0 = time.perf_counter()
            at = 0
            for b, m in zip(blocks, sizes):
                scratch.append(b, y_all[at:at + m], None, None, wc[at:at + m])
                at += m
            scratch.commit()
            steps["write copy"] = time.perf_counter() - t0
            steps["stored"], _ = best(lambda: list(scratch.blocks(batch_rows)), repeats)
            size = scratch.size / n
            scratch.remove()
    return ({"rows": n, "seconds": steps,
             "per_million_rows": {k: v * 1e6 / n for k, v in steps.items()}},
            size if binned else None)


def markdown(res: dict) -> str:
    lines = ["| layout | step | seconds | s per 1M rows | × read |", "|---|---|---:|---:|---:|"]
    for name in ("exact", "binned"):
        steps = res[name]["seconds"]
        for k, v in steps.items():
            lines.append(f"| {name} | {k} | {v:.3f} | {res[name]['per_million_rows'][k]:.3f} "
                         f"| {v / steps['read']:.2f} |")
    return "\n".join(lines)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--book", default=os.path.join(HERE, "data", "book-10000000"))
    ap.add_argument("--rows", type=int, default=2_000_000)
    ap.add_argument("--batch-rows", type=int, default=1_000_000)
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--out", default=os.path.join(
        HERE, "results", f"pass-profile-{dt.date.today().isoformat()}.json"))
    args = ap.parse_args(argv)
    files = sorted(glob.glob(os.path.join(args.book, "book-*.parquet")))
    warm_page_cache(files)
    res = profile_layouts(files, args.rows, args.batch_rows, args.repeats)
    os.makedirs(os.path.dirname(args.out), exist_ok=True)
    with open(args.out, "w") as fh:
        json.dump({"machine": machine_info(), "args": vars(args), **res}, fh, indent=1)
    print(markdown(res))
    print(f"\nraw numbers: {args.out}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())

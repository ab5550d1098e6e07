"""The accumulation kernel vs. materialising each block's dense design matrix and BLAS.

On the reference model (bench/reference.py: intercept, 8 splines of size 10, a 6 × 6
surface, region, fuel and a 500-level random effect) and ``--rows`` rows of the synthetic
book (bench/make_book.py, made in memory), every *contender* builds the same XᵀWX, XᵀWr
and Xᵀw_c from the same rows and weights (Poisson working weights and residuals at the
intercept-only start, constraint weights = exposure):

* ``kernel``: tallgam's own path, as an exact data pass runs it
  (engine/tallgam/passes/state.py): the rows encoded by ``Design.blocks`` (timed apart,
  once, before), then ``Accumulator.add`` per block (``kernels.accumulate`` for the
  right-hand side, column sums and level terms, the dense group's XᵀWX by BLAS ``dsyrk``
  on its rows made dense when the group is narrow, ``Tuning.blas_width``) and ``finish``;
  the time is add + finish.
* ``sparse``: the same with the dense group's XᵀWX from the sparse kernel's loops
  (``blas_width=0``).
* ``blas``: what a plain implementation would do: for chunks of ``--blas-chunk-rows``
  rows, materialise X (chunk × p, all p columns dense: the dense group scattered from
  the same encoded idx/val, the level terms as one-hot columns) and add
  ``X.T @ (w[:, None] * X)`` (numpy → BLAS dgemm), ``X.T @ (w r)`` and ``X.T @ w_c``;
  the time is building X + the products.
* ``binned``: the engine's binned layout (``tallgam.passes.binned.BinnedDesign``, the
  ``binned=`` option of fit), through the same pass interface
  (``read`` / ``accumulator`` / ``add`` / ``finish``); the time is add + finish, its
  set-up and the coding of the rows are reported apart. Binned continuous columns make it
  approximate, so its difference from the exact XᵀWX is reported, not checked.

To add a contender, add a :class:`Contender` to the list :func:`contenders` returns (the
registry; ``--contenders NAME ...`` picks some): ``run(prep)``
receives the :class:`Prepared` rows (raw batch columns, design, profile, encoded blocks,
weights) and returns an :class:`Output`; ``exact=True`` makes the script check its XᵀWX
against the reference (``blas``) to ``--tolerance`` (max abs difference / max abs entry).

FLOP counts. kernel: per row, counting 2 flops per multiply-add its loops perform and 1 per
lone multiply or add, with q dense non-zeros a row and m level terms:
q(q+1)/2 multiply-adds for the dense triangle, q multiplies (w·x), 2q multiply-adds
(XᵀWr, Xᵀw_c), 1 multiply (w·r); per level term 3 adds and q multiply-adds (the cross
row); m(m−1)/2 adds for the level pairs. blas: 2·n·p² (dgemm, the full p × p product as
numpy calls it) + n·p (scaling) + 4·n·p (two matrix-vector products). "useful GFLOP/s"
divides the kernel's count (the non-zero work) by a contender's time. The machine's dense
rate is a square ``numpy.matmul`` of ``--gemm-size`` (2n³ flops, best of 3), with the same
BLAS threads.

All timings: best of ``--repeats`` after one untimed run (numba compilation or cache load).

    python bench/kernel_bench.py --rows 500000
"""

from __future__ import annotations

import argparse
import datetime as dt
import json
import os
import sys
import time
from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np

HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.insert(0, HERE)


@dataclass
class Prepared:
    """The rows every contender works on (one or more batches, already read)."""

    rows: int
    design: object                      # tallgam.passes.design.Design
    profile: object                     # tallgam.data.profile.DataProfile
    batches: list[dict]                 # raw batch columns (tallgam.passes.design.batch_columns)
    weights: list[tuple[np.ndarray, np.ndarray, np.ndarray]]  # per batch: (w, r, wc)
    blocks: list[tuple[object, np.ndarray, np.ndarray, np.ndarray]]  # (Encoded, w, r, wc)
    encode_seconds: float
    threads: int

    @property
    def level_sizes(self) -> list[int]:
        return self.design.level_sizes

    @property
    def level_offsets(self) -> list[int]:
        return list(self.design.level_offsets)


@dataclass
class Output:
    """What a contender made: the full XᵀWX (p × p, raw column order), XᵀWr, Xᵀw_c, the
    flops it performed and a breakdown of its seconds."""

    gram: np.ndarray
    rhs: np.ndarray
    colsum: np.ndarray
    flops: float
    parts: dict = field(default_factory=dict)
    seconds: float | None = None  # the timed span, when not the whole run (e.g. no set-up)


@dataclass
class Contender:
    name: str
    description: str
    run: Callable[[Prepared], Output]
    exact: bool = True
    available: Callable[[], str | None] = lambda: None   # None, or why it cannot run


# ---------------------------------------------------------------------------------------
# preparing the rows


def prepare(rows: int, seed: int, batch_rows: int) -> Prepared:
    """The reference model's design on ``rows`` in-memory rows of the book, encoded."""
    import numba

    import tallgam as tg  # noqa: F401
    from make_book import book_table
    from reference import reference_model
    from tallgam.data.inputs import WC, O, Y, model_inputs
    from tallgam.data.profile import run_profile
    from tallgam.data.sources import open_source
    from tallgam.passes.design import Design, batch_columns
    from tallgam.terms import InterceptBasis

    model = reference_model()
    source = open_source(book_table(rows, seed))
    try:
        inputs = model_inputs(model, source, model.terms)
        profile = run_profile(source, inputs.profile_fields, inputs.rules, model.where)
        design = Design([InterceptBasis()] + [t.build(profile) for t in model.terms])
        rate0 = profile.role("response").mean  # rows' mean count: a start near the mean rate
        batches, weights = [], []
        for batch in source.batches(inputs.select, inputs.where, batch_rows):
            cols = batch_columns(batch, inputs.level_names)
            exposure = np.exp(cols[O])
            mu = exposure * max(rate0, 1e-3) / np.mean(exposure)
            w = mu                                  # Poisson, log link: W = μ
            r = (cols[Y] - mu) / mu                 # working residual (y − μ) g'(μ)
            wc = cols[WC] if WC in cols else exposure
            batches.append(cols)
            weights.append((w, r, np.ascontiguousarray(wc)))
    finally:
        source.close()
    t0 = time.perf_counter()
    blocks = []
    for cols, (w, r, wc) in zip(batches, weights):
        for sl, enc in design.blocks(cols):
            blocks.append((enc, w[sl], r[sl], wc[sl]))
    encode_s = time.perf_counter() - t0
    n = sum(len(w) for w, _, _ in weights)
    return Prepared(rows=n, design=design, profile=profile, batches=batches, weights=weights,
                    blocks=blocks, encode_seconds=encode_s, threads=numba.get_num_threads())


# ---------------------------------------------------------------------------------------
# contenders


def kernel_flops_per_row(q: int, m: int) -> int:
    """Flops of one row in kernels.accumulate + accumulate_level_pair (module docstring)."""
    return q * (q + 1) + q + 4 * q + 1 + m * (3 + 2 * q) + m * (m - 1) // 2


def make_run_kernel(blas_width: int) -> Callable[[Prepared], Output]:
    def run_kernel(prep: Prepared) -> Output:
        return kernel_output(prep, blas_width)
    return run_kernel


def kernel_output(prep: Prepared, blas_width: int) -> Output:
    """tallgam's accumulator over the pre-encoded blocks, as a data pass calls it."""
    from tallgam.options import Tuning
    from tallgam.passes.state import Accumulator

    d = prep.design
    t0 = time.perf_counter()
    acc = Accumulator(d.pd, prep.level_sizes, prep.threads,
                      Tuning().blas_width if blas_width is None else blas_width)
    for enc, w, r, wc in prep.blocks:
        acc.add(enc, w, r, wc)
    t1 = time.perf_counter()
    state = acc.finish()
    t2 = time.perf_counter()
    return Output(gram=state.gram(prep.level_offsets, prep.level_sizes), rhs=state.rhs,
                  colsum=state.colsum, flops=prep.rows * kernel_flops_per_row(d.q, d.m),
                  parts={"add_seconds": t1 - t0, "finish_seconds": t2 - t1},
                  seconds=t2 - t0)


def run_kernel_accumulate_only(prep: Prepared) -> float:
    """Seconds of ``kernels.accumulate`` alone over the blocks (no level pairs, no finish)."""
    from tallgam.passes import kernels
    from tallgam.passes.state import Accumulator

    acc = Accumulator(prep.design.pd, prep.level_sizes, prep.threads)
    t0 = time.perf_counter()
    for enc, w, r, wc in prep.blocks:
        kernels.accumulate(enc.idx, enc.val, enc.lev, w, r, wc, acc.dense, acc.cross, acc.diag,
                           acc.rhs_d, acc.rhs_l, acc.col_d, acc.col_l, True)
    return time.perf_counter() - t0


def dense_rows(enc, pd: int, p: int, lo: int, hi: int, out: np.ndarray) -> np.ndarray:
    """Rows lo..hi of an encoded block as dense rows of X (n × p) in ``out``."""
    n = hi - lo
    X = out[:n]
    X[:] = 0.0
    rows = np.arange(n)[:, None]
    # a column appears at most once in a row's dense non-zeros (kernels.py), so = is +=
    X[rows, enc.idx[lo:hi]] = enc.val[lo:hi]
    lev = enc.lev[lo:hi]
    for k in range(lev.shape[1]):
        ok = lev[:, k] >= 0
        X[np.flatnonzero(ok), pd + lev[ok, k]] = 1.0
    return X


def make_run_blas(chunk_rows: int) -> Callable[[Prepared], Output]:
    def run_blas(prep: Prepared) -> Output:
        d = prep.design
        p = d.p
        G = np.zeros((p, p))
        rhs = np.zeros(p)
        col = np.zeros(p)
        buf = np.empty((chunk_rows, p))
        build = gemm = 0.0
        for enc, w, r, wc in prep.blocks:
            for lo in range(0, enc.rows, chunk_rows):
                hi = min(enc.rows, lo + chunk_rows)
                t0 = time.perf_counter()
                X = dense_rows(enc, d.pd, p, lo, hi, buf)
                t1 = time.perf_counter()
                ww = w[lo:hi]
                G += X.T @ (ww[:, None] * X)
                rhs += X.T @ (ww * r[lo:hi])
                col += X.T @ wc[lo:hi]
                t2 = time.perf_counter()
                build += t1 - t0
                gemm += t2 - t1
        n = prep.rows
        return Output(gram=G, rhs=rhs, colsum=col, flops=2.0 * n * p * p + 5.0 * n * p,
                      parts={"build_x_seconds": build, "blas_seconds": gemm,
                             "chunk_rows": chunk_rows, "p": p}, seconds=build + gemm)
    return run_blas


def make_run_binned(points: int | None) -> Callable[[Prepared], Output]:
    def run_binned(prep: Prepared) -> Output:
        from tallgam.options import DEFAULT_BIN_POINTS as DEFAULT_POINTS
        from tallgam.passes.binned import BinnedDesign

        t0 = time.perf_counter()
        layout = BinnedDesign(prep.design, prep.profile, points or DEFAULT_POINTS)
        coded = []
        for cols, (w, r, wc) in zip(prep.batches, prep.weights):
            for sl, block in layout.read(cols):
                coded.append((block, w[sl], r[sl], wc[sl]))
        t1 = time.perf_counter()
        acc = layout.accumulator(prep.threads)
        for block, w, r, wc in coded:
            acc.add(block, w, r, wc)
        t2 = time.perf_counter()
        state = acc.finish()
        t3 = time.perf_counter()
        # its loop's flops are not counted here (a different algorithm): the kernel's count
        # of the same rows is reported as "useful" work instead
        return Output(gram=state.gram(prep.level_offsets, prep.level_sizes), rhs=state.rhs,
                      colsum=state.colsum, flops=float("nan"),
                      parts={"setup_and_code_seconds": t1 - t0, "add_seconds": t2 - t1,
                             "finish_seconds": t3 - t2, "points": points or DEFAULT_POINTS},
                      seconds=t3 - t1)
    return run_binned


def contenders(args) -> list[Contender]:
    """The named contenders, in run order."""
    return [
        Contender("kernel", "tallgam: Accumulator.add (kernels.accumulate, dense group by "
                  "BLAS dsyrk, level pairs) over Design.blocks, finish", make_run_kernel(None)),
        Contender("sparse", "tallgam: Accumulator.add with the sparse kernel for the dense "
                  "group too (blas_width=0)", make_run_kernel(0)),
        Contender("blas", f"dense X ({args.blas_chunk_rows:,d}-row chunks, levels one-hot), "
                  "X.T @ (w X) by numpy/BLAS", make_run_blas(args.blas_chunk_rows)),
        Contender("binned", "tallgam.passes.binned: coded rows, cross-tables per term pair",
                  make_run_binned(args.binned_points), exact=False),
    ]


# ---------------------------------------------------------------------------------------
# measuring


def best_of(fn: Callable[[], object], repeats: int) -> tuple[float, object]:
    """(fastest seconds, the fastest call's value) over ``repeats`` calls; a value with a
    ``seconds`` attribute (an :class:`Output`) gives its own timed span."""
    best, best_value = float("inf"), None
    for _ in range(max(repeats, 1)):
        t0 = time.perf_counter()
        value = fn()
        took = time.perf_counter() - t0
        own = getattr(value, "seconds", None)
        took = own if own is not None else took
        if took < best:
            best, best_value = took, value
    return best, best_value


def gemm_rate(size: int, repeats: int = 3) -> dict:
    """The dense dgemm rate of this machine: a square numpy matmul, 2n³ flops."""
    rng = np.random.default_rng(0)
    a = rng.standard_normal((size, size))
    b = rng.standard_normal((size, size))
    a @ b  # warm (threads started, pages touched)
    seconds, _ = best_of(lambda: a @ b, repeats)
    return {"size": size, "seconds": seconds, "gflops": 2.0 * size ** 3 / seconds / 1e9}


def rel_diff(a: np.ndarray, b: np.ndarray) -> float:
    """max |a − b| / max |b|."""
    scale = float(np.max(np.abs(b)))
    return float(np.max(np.abs(a - b))) / (scale if scale > 0 else 1.0)


def blas_threads() -> list[dict]:
    try:
        from threadpoolctl import threadpool_info
    except ImportError:
        return []
    return [{k: d.get(k) for k in ("internal_api", "num_threads", "version")}
            for d in threadpool_info()]


def markdown(res: dict) -> str:
    rows = res["contenders"]
    ref = res["reference"]
    lines = [f"reference model design: p = {res['design']['p']} columns "
             f"({res['design']['pd']} dense, {res['design']['pl']} level), "
             f"q = {res['design']['q']} dense non-zeros a row, m = {res['design']['m']} "
             f"level terms; {res['rows']:,d} rows; {res['threads']} numba threads; "
             f"encoding (Design.blocks) {res['encode_seconds']:.2f} s, not in the times below",
             "",
             "| contender | seconds | rows/s | × kernel time | flops/row | GFLOP/s "
             "| useful GFLOP/s | max rel diff vs " + ref + " |",
             "|---|---|---|---|---|---|---|---|"]
    k_s = rows.get("kernel", {}).get("seconds")
    for name, r in rows.items():
        if "seconds" not in r:
            lines.append(f"| {name} | {r.get('skipped', 'failed')} | | | | | | |")
            continue
        fr = r["flops"] / res["rows"]
        lines.append(
            f"| {name} | {r['seconds']:.3f} | {res['rows'] / r['seconds']:,.0f} "
            f"| {(r['seconds'] / k_s) if k_s else float('nan'):.2f} "
            f"| {'–' if np.isnan(fr) else f'{fr:,.0f}'} "
            f"| {'–' if np.isnan(r['gflops']) else format(r['gflops'], '.2f')} "
            f"| {r['useful_gflops']:.2f} "
            f"| {'(reference)' if name == ref else format(r['max_rel_diff'], '.2e')} |")
    g = res["machine_gemm"]
    lines += ["", f"machine dense dgemm ({g['size']}² numpy matmul): {g['gflops']:.1f} GFLOP/s; "
              f"kernels.accumulate alone {res['kernel_accumulate_only_seconds']:.3f} s "
              f"= {res['kernel_accumulate_only_gflops']:.2f} GFLOP/s "
              f"({100 * res['kernel_accumulate_only_gflops'] / g['gflops']:.1f}% of dgemm)"]
    if "blas" in rows and "seconds" in rows["blas"]:
        b = rows["blas"]
        lines.append(f"blas: build X {b['parts']['build_x_seconds']:.2f} s, BLAS "
                     f"{b['parts']['blas_seconds']:.2f} s "
                     f"({100 * b['gflops'] / g['gflops']:.0f}% of dgemm)")
    for name, r in rows.items():
        if r.get("check"):
            lines.append(f"- {name}: {r['check']}")
        if r.get("parts"):
            parts = ", ".join(f"{k} {v:.3f}" if isinstance(v, float) else f"{k} {v}"
                              for k, v in r["parts"].items())
            lines.append(f"- {name} parts: {parts}; other processes used "
                         f"{r['contention_cores']:.2f} cores meanwhile")
    return "\n".join(lines)


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description="accumulation kernel vs dense BLAS on XᵀWX")
    ap.add_argument("--rows", type=int, default=500_000)
    ap.add_argument("--batch-rows", type=int, default=1_000_000)
    ap.add_argument("--seed", type=int, default=20240601)
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--blas-chunk-rows", type=int, default=8192)
    ap.add_argument("--binned-points", type=int, default=None,
                    help="grid values per binned column (default: the engine's)")
    ap.add_argument("--gemm-size", type=int, default=2000)
    ap.add_argument("--tolerance", type=float, default=1e-10)
    ap.add_argument("--contenders", nargs="+", default=None,
                    help="names to run (default: all available)")
    ap.add_argument("--results", default=os.path.join(HERE, "results"))
    ap.add_argument("--out", help="write the JSON here instead of RESULTS/kernel-<date>.json")
    args = ap.parse_args(argv)

    from engine_bench import Meter, engine_fingerprint, machine_info

    started = dt.datetime.now()
    registry = contenders(args)
    names = args.contenders or [c.name for c in registry]
    unknown = set(names) - {c.name for c in registry}
    if unknown:
        ap.error(f"unknown contender(s): {', '.join(sorted(unknown))}")
    prep = prepare(args.rows, args.seed, args.batch_rows)
    d = prep.design
    out: dict = {}
    outputs: dict[str, Output] = {}
    for c in registry:
        if c.name not in names:
            continue
        why = c.available()
        if why:
            out[c.name] = {"description": c.description, "skipped": why}
            continue
        print(f"{c.name} ...", file=sys.stderr)
        try:
            c.run(prep)  # untimed: compilation / cache load, first touch of memory
            with Meter() as m:
                seconds, o = best_of(lambda c=c: c.run(prep), args.repeats)
        except Exception as exc:  # an engine path in progress: report, go on
            out[c.name] = {"description": c.description,
                           "skipped": f"failed: {type(exc).__name__}: {exc}"}
            continue
        outputs[c.name] = o
        out[c.name] = {"description": c.description, "exact": c.exact, "seconds": seconds,
                       "flops": o.flops, "gflops": o.flops / seconds / 1e9,
                       "useful_gflops": prep.rows * kernel_flops_per_row(d.q, d.m)
                       / seconds / 1e9, "parts": o.parts,
                       "contention_cores": m.foreign_cpu / max(m.wall, 1e-9)}
    ref = "blas" if "blas" in outputs else next(iter(outputs), None)
    for name, o in outputs.items():
        if name == ref:
            continue
        r = outputs[ref]
        diffs = {"gram": rel_diff(o.gram, r.gram), "rhs": rel_diff(o.rhs, r.rhs),
                 "colsum": rel_diff(o.colsum, r.colsum)}
        out[name]["max_rel_diff"] = max(diffs.values())
        out[name]["rel_diffs"] = diffs
        if out[name]["exact"]:
            ok = out[name]["max_rel_diff"] <= args.tolerance
            out[name]["agrees"] = ok
            out[name]["check"] = (f"agrees with {ref} to {out[name]['max_rel_diff']:.1e} "
                                  f"(≤ {args.tolerance:g})" if ok else
                                  f"DIFFERS from {ref}: {out[name]['max_rel_diff']:.2e} "
                                  f"> {args.tolerance:g}")
        else:
            out[name]["check"] = (f"approximate by design: differs from {ref} by "
                                  f"{out[name]['max_rel_diff']:.2e} (not checked)")
    acc_s = min(run_kernel_accumulate_only(prep) for _ in range(max(args.repeats, 1)))
    acc_flops = prep.rows * (kernel_flops_per_row(d.q, d.m) - d.m * (d.m - 1) // 2)
    result = {
        "started": started.isoformat(timespec="seconds"),
        "command": " ".join([os.path.relpath(sys.argv[0])] + sys.argv[1:]),
        "machine": machine_info(), "engine": engine_fingerprint(),
        "blas_threads": blas_threads(), "threads": prep.threads, "rows": prep.rows,
        "design": {"p": d.p, "pd": d.pd, "pl": d.pl, "q": d.q, "m": d.m,
                   "kernel_flops_per_row": kernel_flops_per_row(d.q, d.m)},
        "encode_seconds": prep.encode_seconds,
        "settings": {k: v for k, v in vars(args).items() if k not in ("results", "out")},
        "machine_gemm": gemm_rate(args.gemm_size),
        "kernel_accumulate_only_seconds": acc_s,
        "kernel_accumulate_only_gflops": acc_flops / acc_s / 1e9,
        "reference": ref, "contenders": out,
    }
    path = args.out or os.path.join(args.results, f"kernel-{started.date().isoformat()}.json")
    os.makedirs(os.path.dirname(os.path.abspath(path)), exist_ok=True)
    with open(path + ".tmp", "w") as fh:
        json.dump(result, fh, indent=1, default=str)
    os.replace(path + ".tmp", path)
    print(markdown(result))
    print(f"\nresults: {os.path.relpath(path)}")
    failed = [n for n, r in out.items() if r.get("exact") and r.get("agrees") is False]
    return 1 if failed else 0


if __name__ == "__main__":
    sys.exit(main())

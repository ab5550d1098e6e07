"""Where the time of a data pass goes: the engine's own steps, timed from outside.

Runs the benchmark models (bench/engine_bench.py) on a book written by bench/make_book.py
with timers wrapped around the engine's functions (nothing in the engine changes):

* DuckDB read + rebatch    ``Source.batches`` (time inside the generator)
* Arrow → numpy            ``batch_columns``
* encode                   ``Design.blocks`` (inside the generator), of which
  level codes              ``CategoricalBasis.codes`` (pyarrow ``index_in``),
  spline encode            ``SplineBasis.encode``, of which B-spline evaluation
                           ``basis.evaluate`` (numba)
* kernels                  ``kernels.accumulate``, ``kernels.accumulate_level_pair``,
                           ``kernels.linear_predictor``
* family & link functions  the methods of the model's family and link (numpy / scipy)
* rest                     the pass minus the above: inline numpy in ``_data_pass``
                           (working weights, residuals, scalar sums) and Python overhead

Then a few measurements on one real batch that bear on what to change (kernel thread
scaling, alternatives for the spline encoding, a dense BLAS product, the profile query
without value histograms). Prototypes here are measurement aids, not engine code.

    python bench/pass_profile.py --book bench/data/book-10000000
"""

from __future__ import annotations

import argparse
import datetime as dt
import glob
import json
import os
import sys
import time
from collections import defaultdict

import numpy as np

HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.insert(0, HERE)

from engine_bench import (  # noqa: E402
    Meter,
    Patches,
    engine_model_inputs,
    machine_info,
    models,
    pass_hooks,
    profile_hooks,
    profile_timer,
    wait_idle,
    warm_page_cache,
    warm_up,
)


def passes_module():
    try:
        from tallgam.passes import run as passes
    except ImportError:
        return None
    return passes


def input_names() -> tuple[str, str]:
    """The batch aliases of the response and the offset."""
    try:
        from tallgam.data.inputs import O, Y
    except ImportError:
        from tallgam.solve.pirls import O, Y
    return Y, O

STEPS = [  # (label, parent) in display order
    ("pass", None),
    ("duckdb read + rebatch", "pass"),
    ("arrow → numpy (batch_columns)", "pass"),
    ("encode (design.blocks)", "pass"),
    ("level codes (pyarrow index_in)", "encode (design.blocks)"),
    ("spline encode (SplineBasis.encode)", "encode (design.blocks)"),
    ("B-spline evaluation (numba)", "spline encode (SplineBasis.encode)"),
    ("kernel accumulate", "pass"),
    ("kernel level pairs", "pass"),
    ("kernel linear predictor", "pass"),
    ("family & link functions", "pass"),
    ("accumulator finish", "pass"),
]


class Timers:
    def __init__(self):
        self.seconds: dict[str, float] = defaultdict(float)
        self.calls: dict[str, int] = defaultdict(int)
        self.active = False
        self._undo: list = []

    def add(self, label: str, seconds: float) -> None:
        if self.active:
            self.seconds[label] += seconds
            self.calls[label] += 1

    def wrap_function(self, owner, name: str, label: str, always: bool = False) -> None:
        """Replace ``owner.name`` (module or class attribute) by a timed call."""
        had = name in vars(owner)  # else an inherited method, shadowed and then removed
        orig = getattr(owner, name)
        timers = self

        def timed(*args, **kwargs):
            t0 = time.perf_counter()
            try:
                return orig(*args, **kwargs)
            finally:
                dt_ = time.perf_counter() - t0
                if always:
                    timers.seconds[label] += dt_
                    timers.calls[label] += 1
                else:
                    timers.add(label, dt_)

        setattr(owner, name, timed)
        self._undo.append((owner, name, orig if had else None))

    def wrap_generator(self, owner, name: str, label: str) -> None:
        """Replace a generator method by one that times the work inside each ``next``."""
        orig = getattr(owner, name)
        timers = self

        def timed(*args, **kwargs):
            it = orig(*args, **kwargs)
            while True:
                t0 = time.perf_counter()
                try:
                    item = next(it)
                except StopIteration:
                    timers.add(label, time.perf_counter() - t0)
                    return
                timers.add(label, time.perf_counter() - t0)
                yield item

        setattr(owner, name, timed)
        self._undo.append((owner, name, orig))

    def restore(self) -> None:
        for owner, name, orig in reversed(self._undo):
            if orig is None:
                delattr(owner, name)
            else:
                setattr(owner, name, orig)
        self._undo.clear()


def profile_fit(name: str, files: list[str], batch_rows: int) -> dict:
    """One fit with every step of its data passes timed."""
    from tallgam.data.sources import Source
    from tallgam.passes import kernels
    from tallgam.passes.design import Design
    from tallgam.passes.state import Accumulator
    from tallgam.solve import pirls as fitting
    from tallgam.terms import CategoricalBasis, SplineBasis
    from tallgam.terms import bsplines as basis

    model = models()[name]
    T = Timers()
    pass_seconds: list[float] = []

    def timed_pass(inner):
        def timed(*args, **kwargs):
            T.active = True
            t0 = time.perf_counter()
            try:
                return inner(*args, **kwargs)
            finally:
                pass_seconds.append(time.perf_counter() - t0)
                T.seconds["pass"] += pass_seconds[-1]
                T.calls["pass"] += 1
                T.active = False
        return timed

    T.wrap_generator(Source, "batches", "duckdb read + rebatch")
    for mod in (fitting, passes_module()):
        if mod is not None and hasattr(mod, "batch_columns"):
            T.wrap_function(mod, "batch_columns", "arrow → numpy (batch_columns)")
    T.wrap_generator(Design, "blocks", "encode (design.blocks)")
    T.wrap_function(CategoricalBasis, "codes", "level codes (pyarrow index_in)")
    T.wrap_function(SplineBasis, "encode", "spline encode (SplineBasis.encode)")
    T.wrap_function(basis, "evaluate", "B-spline evaluation (numba)")
    T.wrap_function(kernels, "accumulate", "kernel accumulate")
    T.wrap_function(kernels, "accumulate_level_pair", "kernel level pairs")
    T.wrap_function(kernels, "linear_predictor", "kernel linear predictor")
    T.wrap_function(Accumulator, "finish", "accumulator finish")
    fam_cls, link_cls = type(model.family), type(model.link)
    for meth in ("variance", "unit_deviance", "loglik", "clip_mu", "valid_mu", "nuisance_sums"):
        if hasattr(fam_cls, meth):
            T.wrap_function(fam_cls, meth, "family & link functions")
    for meth in ("link", "inverse", "mu_eta"):
        T.wrap_function(link_cls, meth, "family & link functions")
    profile_s = []

    timed_profile = profile_timer(profile_s)

    patches = Patches()
    for owner, attr, _kind in pass_hooks():
        patches.replace(owner, attr, timed_pass)
    for owner, attr in profile_hooks():
        patches.replace(owner, attr, timed_profile)
    try:
        with Meter() as meter:
            fit = model.fit(files, batch_rows=batch_rows)
        whole = meter.wall
    finally:
        patches.restore()
        T.restore()
    top = [lab for lab, parent in STEPS if parent == "pass"]
    rest = T.seconds["pass"] - sum(T.seconds[lab] for lab in top)
    return {
        "model": name, "rows": fit.statistics["rows"], "passes": fit.passes,
        "whole_seconds": whole, "profile_seconds": sum(profile_s),
        "pass_seconds": pass_seconds,
        # setup, smoothing selection between passes, covariance, result
        "rest_seconds": whole - sum(profile_s) - sum(pass_seconds),
        "steps": {lab: T.seconds[lab] for lab, _ in STEPS},
        "calls": {lab: T.calls[lab] for lab, _ in STEPS},
        "rest": rest,
        "contention_cores": meter.foreign_cpu / max(meter.wall, 1e-9),
    }


# ---------------------------------------------------------------------------------------
# measurements on one batch


def best_of(fn, repeats: int = 3) -> float:
    times = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
    return min(times)


def one_batch(files: list[str], batch_rows: int, name: str):
    from tallgam.data.profile import run_profile
    from tallgam.data.sources import open_source
    from tallgam.passes.design import Design, batch_columns
    from tallgam.terms import InterceptBasis

    model = models()[name]
    source = open_source(files)
    inputs = engine_model_inputs()(model, source, model.terms)
    profile = run_profile(source, inputs.profile_fields, inputs.rules, model.where)
    design = Design([InterceptBasis()] + [t.build(profile) for t in model.terms])
    batch = next(iter(source.batches(inputs.select, inputs.where, batch_rows)))
    cols = batch_columns(batch, inputs.level_names)
    return source, inputs, design, cols


def micro(files: list[str], batch_rows: int) -> dict:
    """Measurements on the first batch that bear on what to change."""
    import numba

    from tallgam.data.profile import Field, run_profile
    from tallgam.passes import kernels
    from tallgam.passes.state import Accumulator
    from tallgam.terms import SplineBasis
    from tallgam.terms import bsplines as bs

    out: dict = {}
    source, inputs, design, cols = one_batch(files, batch_rows, "poisson")
    Y, O = input_names()
    n = len(cols[Y])
    blocks = list(design.blocks(cols))
    out["batch_rows"] = n
    out["blocks"] = len(blocks)
    out["design"] = {"p_dense": design.pd, "p_levels": design.pl, "q_nonzeros": design.q,
                     "m_level_terms": design.m}
    y = cols[Y]
    o = cols[O]
    w = np.ones(n)

    # kernel thread scaling: the whole batch through kernels.accumulate
    threads_max = numba.get_num_threads()
    scaling = {}
    for t in sorted({1, threads_max}):
        numba.set_num_threads(t)

        def run(t=t):
            acc = Accumulator(design.pd, [b.n_raw for b in design.levels], t)
            for sl, enc in blocks:
                kernels.accumulate(enc.idx, enc.val, enc.lev, w[sl], y[sl], w[sl], acc.dense,
                                   acc.cross, acc.diag, acc.rhs_d, acc.rhs_l, acc.col_d,
                                   acc.col_l)
        scaling[str(t)] = best_of(run)
    numba.set_num_threads(threads_max)
    out["kernel_accumulate_seconds_by_threads"] = scaling

    # a prototype kernel that adds each pair of spline terms as a 4 × 4 block (the
    # columns of a spline row are consecutive), checked against kernels.accumulate
    widths = [b.width for b in design.dense]
    if widths[0] == 1 and all(x == 4 for x in widths[1:]):
        blocked = _blocked_kernel()
        L = design.pl

        def run_blocked(check=False):
            res = []
            for fn in ((blocked, kernels.accumulate) if check else (blocked,)):
                acc = Accumulator(design.pd, [b.n_raw for b in design.levels], threads_max)
                for sl, enc in blocks:
                    args = (enc.idx, enc.val, enc.lev, w[sl], y[sl], w[sl], acc.dense,
                            acc.cross, acc.diag, acc.rhs_d, acc.rhs_l, acc.col_d, acc.col_l)
                    fn(*args, len(widths) - 1) if fn is blocked else fn(*args)
                res.append(acc.finish())
            return res
        a, b = run_blocked(check=True)
        scale = np.max(np.abs(b.dense)) + np.max(np.abs(b.cross))
        out["kernel_blocked_max_rel_diff"] = float(
            max(np.max(np.abs(a.dense - b.dense)), np.max(np.abs(a.cross - b.cross))) / scale)
        out["kernel_blocked_seconds"] = best_of(run_blocked)
        out["kernel_levels_in_prototype"] = L

    # the dense part of XᵀWX by a dense BLAS product of the materialised block
    def dense_blas():
        for sl, enc in blocks:
            m = enc.idx.shape[0]
            X = np.zeros((m, design.pd))
            np.put_along_axis(X, enc.idx.astype(np.intp), enc.val, axis=1)
            _ = (X * w[sl][:, None]).T @ X
    out["dense_blas_xtwx_seconds"] = best_of(dense_blas, repeats=1)

    # spline encoding: as the engine does it, vs. a fused numba fill, vs. a table lookup
    splines = [b for b in design.dense if isinstance(b, SplineBasis)]
    q = design.q

    def engine_encode():
        for sl, _enc in blocks:
            m = sl.stop - sl.start
            idx = np.empty((m, q), dtype=np.int32)
            val = np.empty((m, q))
            slot = 1
            for b in splines:
                col0 = design.dense_starts[design.dense.index(b)]
                part = {b.spec.column: cols[b.spec.column][sl]}
                b.encode(part, idx[:, slot:slot + 4], val[:, slot:slot + 4], col0)
                slot += 4
    out["spline_encode_engine_seconds"] = best_of(engine_encode)

    def evaluate_only():
        for sl, _enc in blocks:
            for b in splines:
                bs.evaluate(b.knots, cols[b.spec.column][sl])
    out["spline_evaluate_only_seconds"] = best_of(evaluate_only)

    fused = _fused_encoder()
    starts = np.array([design.dense_starts[design.dense.index(b)] for b in splines],
                      dtype=np.int32)

    def fused_encode():
        for sl, _enc in blocks:
            m = sl.stop - sl.start
            idx = np.empty((m, q), dtype=np.int32)
            val = np.empty((m, q))
            for k, b in enumerate(splines):
                fused(b.knots, cols[b.spec.column][sl], starts[k], 1 + 4 * k, idx, val)
    fused_encode()  # compile
    out["spline_encode_fused_seconds"] = best_of(fused_encode)

    # integer-valued columns: basis rows at the distinct values, gathered per row
    int_cols = [b for b in splines
                if np.all(cols[b.spec.column] == np.round(cols[b.spec.column]))]
    tables = {}
    for b in int_cols:
        x = cols[b.spec.column]
        lo, hi = int(x.min()), int(x.max())
        grid = np.arange(lo, hi + 1, dtype=np.float64)
        first, values = bs.evaluate(b.knots, grid)
        tables[b.spec.column] = (lo, first, values)

    def lookup_encode():
        for sl, _enc in blocks:
            m = sl.stop - sl.start
            idx = np.empty((m, 4 * len(int_cols)), dtype=np.int32)
            val = np.empty((m, 4 * len(int_cols)))
            for k, b in enumerate(int_cols):
                lo, first, values = tables[b.spec.column]
                pos = cols[b.spec.column][sl].astype(np.intp) - lo
                idx[:, 4 * k:4 * k + 4] = first[pos][:, None] + np.arange(4, dtype=np.int32)
                val[:, 4 * k:4 * k + 4] = values[pos]

    def engine_int_encode():
        for sl, _enc in blocks:
            m = sl.stop - sl.start
            idx = np.empty((m, 4 * len(int_cols)), dtype=np.int32)
            val = np.empty((m, 4 * len(int_cols)))
            for k, b in enumerate(int_cols):
                b.encode({b.spec.column: cols[b.spec.column][sl]}, idx[:, 4 * k:4 * k + 4],
                         val[:, 4 * k:4 * k + 4], 0)
    out["integer_columns"] = [b.spec.column for b in int_cols]
    out["integer_encode_engine_seconds"] = best_of(engine_int_encode)
    out["integer_encode_lookup_seconds"] = best_of(lookup_encode)

    # level codes: pyarrow index_in on strings vs. codes from a dictionary read
    from tallgam.terms import CategoricalBasis

    cats = [b for b in design.levels if isinstance(b, CategoricalBasis)]
    out["level_codes_seconds"] = best_of(lambda: [b.codes(cols) for b in cats])

    # numpy in _data_pass (a copy of its statements, Poisson, later pass): weights/residuals
    # vs. the per-pass scalar sums
    fam, link = models()["poisson"].family, models()["poisson"].link
    eta = o + np.log(max(float(np.mean(y)), 1e-3))

    def working():
        for sl, _enc in blocks:
            e = eta[sl]
            mu = fam.clip_mu(link.inverse(e))
            dmu = link.mu_eta(e)
            var = fam.variance(mu)
            wz = w[sl] * dmu * dmu / var
            _ = (y[sl] - mu) * (1.0 / dmu) + wz

    def scalars():
        for sl, _enc in blocks:
            e = eta[sl]
            yy, ww, oo = y[sl], w[sl], o[sl]
            mu = fam.clip_mu(link.inverse(e))
            var = fam.variance(mu)
            r = yy - mu
            wz = ww * mu
            dev_rows = fam.unit_deviance(yy, mu)
            eta0 = oo - 2.0
            mu0 = fam.clip_mu(link.inverse(eta0))
            dmu0 = link.mu_eta(eta0)
            w0 = ww * dmu0 * dmu0 / fam.variance(mu0)
            r0 = (yy - mu0) / dmu0
            _ = (np.sum(ww), np.sum(wz * r * r), np.sum(ww * dev_rows),
                 np.sum(ww * (yy - mu) ** 2 / var), np.sum(ww * (yy - mu) ** 2),
                 np.sum(ww * (yy - 0.1) ** 2), np.sum(ww * (yy - 0.1)), np.sum(np.log(ww)),
                 fam.loglik(yy, mu, ww, 1.0), np.sum(ww * fam.unit_deviance(yy, mu0)),
                 np.sum(w0), np.sum(w0 * r0))

    def loglik_only():
        for sl, _enc in blocks:
            mu = fam.clip_mu(link.inverse(eta[sl]))
            fam.loglik(y[sl], mu, w[sl], 1.0)
    out["numpy_working_weights_seconds"] = best_of(working)
    out["numpy_scalar_sums_seconds"] = best_of(scalars)
    out["numpy_poisson_loglik_seconds"] = best_of(loglik_only)

    # the profile query with and without the value histograms of the spline columns
    fields = inputs.profile_fields
    no_hist = [Field(f.key, f.expr, f.kind, False) for f in fields]
    out["profile_query_seconds"] = best_of(
        lambda: run_profile(source, fields, inputs.rules, None), repeats=1)
    out["profile_query_no_histograms_seconds"] = best_of(
        lambda: run_profile(source, no_hist, inputs.rules, None), repeats=1)
    # leaner aggregate queries over the same columns, for comparison (not what the
    # engine needs exactly: no NULL / non-finite counts, approximate quantiles)
    from tallgam.data.sources import quote

    num = [c for c in cols if not c.startswith("__") and c not in inputs.level_names]
    plain = ", ".join(f"min({quote(c)}), max({quote(c)}), avg({quote(c)}), "
                      f"stddev_pop({quote(c)})" for c in num)
    out["profile_query_plain_aggregates_seconds"] = best_of(
        lambda: source.fetchall(f"SELECT count(*), {plain} FROM tallgam_source"), repeats=1)
    probs = "[0.1, 0.2, 0.3, 0.4, 0.5, 0.6, 0.7, 0.8, 0.9]"
    approx = ", ".join(f"approx_quantile({quote(c)}, {probs})" for c in num)
    out["profile_query_approx_quantiles_seconds"] = best_of(
        lambda: source.fetchall(f"SELECT {approx} FROM tallgam_source"), repeats=1)
    out["profile_query_rows"] = "all rows of the book"
    source.close()
    return out


def _blocked_kernel():
    """A numba prototype of kernels.accumulate for an intercept plus 4-wide spline terms:
    each pair of terms is one 4 × 4 block of consecutive columns, no per-entry index
    look-up or branch. Same accumulators and thread split as the engine's kernel."""
    import numba

    @numba.njit(parallel=True, cache=False)
    def accumulate_blocked(idx, val, lev, w, r, wp, dense, cross, diag, rhs_d, rhs_l, col_d,
                           col_l, nterms):
        n, q = idx.shape
        m = lev.shape[1]
        n_threads = dense.shape[0]
        chunk = (n + n_threads - 1) // n_threads
        for t in numba.prange(n_threads):
            lo = t * chunk
            hi = min(n, lo + chunk)
            dt = dense[t]
            ct = cross[t]
            for i in range(lo, hi):
                wi = w[i]
                wri = wi * r[i]
                wpi = wp[i]
                c0 = idx[i, 0]
                v0 = wi * val[i, 0]
                for a in range(q):
                    ia = idx[i, a]
                    va = val[i, a]
                    rhs_d[t, ia] += wri * va
                    col_d[t, ia] += wpi * va
                    dt[c0, ia] += v0 * va
                for s in range(nterms):
                    sa = 1 + 4 * s
                    ra = idx[i, sa]
                    for a in range(4):
                        va = wi * val[i, sa + a]
                        row = dt[ra + a]
                        for b in range(a, 4):
                            row[ra + b] += va * val[i, sa + b]
                        for u in range(s + 1, nterms):
                            sb = 1 + 4 * u
                            cb = idx[i, sb]
                            row[cb] += va * val[i, sb]
                            row[cb + 1] += va * val[i, sb + 1]
                            row[cb + 2] += va * val[i, sb + 2]
                            row[cb + 3] += va * val[i, sb + 3]
                for k in range(m):
                    lk = lev[i, k]
                    if lk < 0:
                        continue
                    diag[t, lk] += wi
                    rhs_l[t, lk] += wri
                    col_l[t, lk] += wpi
                    crow = ct[lk]
                    for a in range(q):
                        crow[idx[i, a]] += wi * val[i, a]
    return accumulate_blocked


def _fused_encoder():
    """A numba prototype: B-spline non-zeros written straight into the (n × q) arrays."""
    import numba

    from tallgam.terms.bsplines import _basis_row, _span

    @numba.njit(parallel=True, cache=False)
    def fill(t, x, col0, slot, idx, val):
        size = t.shape[0] - 4
        lo = t[3]
        hi = t[size]
        for i in numba.prange(x.shape[0]):
            xi = min(max(x[i], lo), hi)
            s = _span(t, size, xi)
            first = s - 3 + col0
            _basis_row(t, s, xi, val[i, slot:slot + 4])
            for a in range(4):
                idx[i, slot + a] = first + a
    return fill


def table(fit: dict) -> str:
    passes = fit["passes"]
    total = fit["steps"]["pass"]
    lines = [f"**{fit['model']}**, {fit['rows']:,d} rows, {passes} pass(es); per pass:", "",
             "| step | s per pass | share of pass |", "|---|---|---|"]
    depth = {"pass": 0}
    for label, parent in STEPS:
        if parent is not None:
            depth[label] = depth[parent] + 1
        if label != "pass" and fit["calls"][label] == 0:
            continue
        pad = "&nbsp;&nbsp;" * 2 * max(depth[label] - 1, 0)
        s = fit["steps"][label] / passes
        lines.append(f"| {pad}{label} | {s:.3f} | {100 * fit['steps'][label] / total:.1f}% |")
    lines.append(f"| rest: numpy in `_data_pass`, Python | {fit['rest'] / passes:.3f} "
                 f"| {100 * fit['rest'] / total:.1f}% |")
    lines.append("")
    lines.append(f"profile query {fit['profile_seconds']:.2f} s; data passes "
                 f"{sum(fit['pass_seconds']):.2f} s; rest (setup, smoothing selection, "
                 f"result) {fit['rest_seconds']:.2f} s; whole fit {fit['whole_seconds']:.2f} s; "
                 f"other processes used {fit['contention_cores']:.2f} cores meanwhile")
    return "\n".join(lines)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description="time the steps of a tallgam data pass")
    ap.add_argument("--book", required=True, help="a directory written by make_book.py")
    ap.add_argument("--batch-rows", type=int, default=1_000_000)
    ap.add_argument("--models", nargs="*", default=["gaussian", "poisson"])
    ap.add_argument("--no-micro", action="store_true")
    ap.add_argument("--wait-idle", type=float, default=0.0, metavar="SECONDS",
                    help="before each fit, wait up to SECONDS until other processes use "
                         "less than --idle-load cores")
    ap.add_argument("--idle-load", type=float, default=0.1)
    ap.add_argument("--results", default=os.path.join(HERE, "results"))
    ap.add_argument("--live-engine", action="store_true",
                    help="import the engine from its checkout instead of a copy taken at start")
    args = ap.parse_args(argv)
    if not args.live_engine and "TALLGAM_BENCH_SNAPSHOT" not in os.environ:
        # run again in a child that imports a copy of the engine taken now, so that edits
        # to the checkout while this runs do not mix engine versions
        import shutil
        import subprocess

        from engine_bench import snapshot_engine

        root, _ = snapshot_engine()
        env = dict(os.environ, TALLGAM_BENCH_SNAPSHOT=root, PYTHONPATH=os.pathsep.join(
            [root] + [p for p in os.environ.get("PYTHONPATH", "").split(os.pathsep) if p]))
        try:
            return subprocess.run([sys.executable, os.path.abspath(__file__),
                                   *(sys.argv[1:] if argv is None else argv)],
                                  env=env).returncode
        finally:
            shutil.rmtree(root, ignore_errors=True)
    files = sorted(glob.glob(os.path.join(args.book, "book-*.parquet")))
    if not files:
        ap.error(f"no book-*.parquet files in {args.book}")
    started = dt.datetime.now()
    warmup = warm_up()
    fits = []
    for m in args.models:
        wait_idle(args.wait_idle, args.idle_load)
        warm_page_cache(files)
        fits.append(profile_fit(m, files, args.batch_rows))
    wait_idle(args.wait_idle, args.idle_load)
    warm_page_cache(files)
    with Meter() as meter:
        extra = None if args.no_micro else micro(files, args.batch_rows)
    if extra:
        extra["contention_cores"] = meter.foreign_cpu / max(meter.wall, 1e-9)
    from engine_bench import engine_fingerprint, git_head

    engine = {**engine_fingerprint(), "head": git_head(HERE)}
    result = {"started": started.isoformat(timespec="seconds"), "book": args.book,
              "engine": engine,
              "warmup_seconds": warmup, "machine": machine_info(), "fits": fits,
              "micro": extra}
    os.makedirs(args.results, exist_ok=True)
    path = os.path.join(args.results, f"pass-profile-{started.date().isoformat()}.json")
    with open(path + ".tmp", "w") as fh:
        json.dump(result, fh, indent=1, default=str)
    os.replace(path + ".tmp", path)
    for fit in fits:
        print(table(fit))
        print()
    if extra:
        print("measurements on one batch:")
        for k, v in extra.items():
            print(f"- {k}: {v}")
    print(f"\nresults: {os.path.relpath(path)}")
    return 0


if __name__ == "__main__":
    sys.exit(main())

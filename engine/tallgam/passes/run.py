"""Data passes: one streaming pass of the working model over a source.

A :class:`PassPlan` holds everything a pass needs (the model's select list, the design, the
family and link, the current coefficients); it is a plain picklable value, so the same
:func:`working_pass` runs here or on a cluster worker over a part of the data, and the
resulting :class:`~tallgam.passes.state.PassState` values are merged by addition. A
:class:`LocalPasses` runs passes over one source in this process.
"""

from __future__ import annotations

from dataclasses import dataclass

import numba
import numpy as np

from tallgam.data.inputs import WC, Inputs, O, W, Y, sample_rows
from tallgam.data.profile import histogram_scan, profile_scan
from tallgam.data.sources import Source
from tallgam.errors import FitError
from tallgam.families.fused import FUSED_SUMS
from tallgam.passes.design import Design, batch_columns
from tallgam.passes.state import PassState
from tallgam.progress import Event

LOGLIK_STEP = 0.001   # δ: the pass evaluates the log-likelihood at φ·e^(−δ), φ, φ·e^(+δ)


@dataclass
class PassPlan:
    """Everything one data pass needs. ``beta`` None: the starting values (first pass);
    ``beta_prev``: the previous iterate, to measure how far η moved."""

    inputs: Inputs
    design: Design
    family: object
    link: object
    beta: np.ndarray | None
    beta_prev: np.ndarray | None
    start_shift: float
    null_beta0: float
    y_mean: float
    scale_est: float
    batch_rows: int
    binned: object = None     # a tallgam.passes.binned.BinnedDesign: run on coded rows
    more_passes: bool = True  # False when this pass is known to be the only one
    fused: bool = True        # use the family's fused working-model loop when it has one
    values: object = None     # a tallgam.data.scratch.RowValues: how stored rows keep y, w, o
    start: StartModel | None = None  # with beta None: start from this fit's predictor
    column_sums: bool = True  # sum the constraint weights per column (the first pass)
    blas_width: int = 4       # see tallgam.options.Tuning

    @property
    def layout(self):
        """What encodes the rows: the design, or its binned form."""
        return self.binned if self.binned is not None else self.design


class LocalPasses:
    """Runs passes over one source in this process (the default runner).

    With ``scratch_policy`` (a :class:`~tallgam.data.scratch.ScratchPolicy`), a binned fit
    writes the coded rows to a scratch folder during its first pass and reads them from
    there in later passes instead of the source; :meth:`close` removes the folder."""

    def __init__(self, source: Source, callback=None, scratch_policy=None):
        callback = callback or _quiet
        self.source = source
        self.callback = callback
        self.policy = scratch_policy
        self.scratch = None

    # the profile's scans and the sample of a sample start (the cluster runner does the same
    # on its workers)
    def profile_sums(self, fields, rules, where):
        return profile_scan(self.source, fields, rules, where)

    def histogram_sums(self, profile, fields, weight_expr, where):
        return histogram_scan(self.source, profile, fields, weight_expr, where)

    def sample(self, inputs, share: float):
        return sample_rows(self.source, inputs, share)

    def _scratch(self, plan: PassPlan, rows: int | None):
        if plan.binned is None or self.policy is None:
            return None
        if not plan.more_passes and (self.scratch is None or not self.scratch.complete):
            return None   # a single pass: a scratch copy would only cost
        from tallgam.data.scratch import prepare

        self.scratch = prepare(self.scratch, self.policy, plan, rows)
        return self.scratch

    def working(self, plan: PassPlan, task: str, total: int | None) -> PassState:
        return working_pass(self.source, plan, self.callback, task, total,
                            scratch=self._scratch(plan, total))

    def loglik(self, plan: PassPlan, scale: float, task: str, total: int | None) -> float:
        return loglik_pass(self.source, plan, scale, self.callback, task, total,
                           scratch=self._scratch(plan, total))

    def close(self) -> None:
        if self.scratch is not None:
            self.scratch.remove()
            self.scratch = None


def _quiet(event) -> None:
    return None


def row_blocks(source: Source, plan: PassPlan, scratch=None):
    """The rows of a pass, block by block, in kernel form: yields ``(y, w, o, wc, block,
    done, start)`` where w, o, wc are None when the model has no weights, offset or separate
    constraint weights, ``done`` is the count of rows read when the block ends a batch
    (else None) and ``start`` the previous fit's X·β for the block's rows when the plan
    starts from one (else None). Rows come from stored rows when they are complete, else
    from the source (and are appended to ``scratch`` when one is being made)."""
    inputs, layout = plan.inputs, plan.layout
    if scratch is not None and scratch.complete:
        for block in scratch.blocks(plan.batch_rows):
            yield (*block, None)
        return
    done = 0
    try:
        for batch in source.batches(inputs.select, inputs.where, plan.batch_rows):
            cols = batch_columns(batch, inputs.level_names)
            y_all = cols[Y]
            w_all = cols[W] if inputs.has_weights else None
            o_all = cols[O] if inputs.has_offset else None
            wc_all = cols[WC] if inputs.has_cweights else None
            start_all = plan.start.linear_predictor(cols) if plan.start is not None else None
            done += batch.num_rows
            parts = list(layout.read(cols)) if scratch is not None else layout.read(cols)
            last = None
            for sl, block in parts:
                if last is not None:
                    yield last
                last = (y_all[sl], _part(w_all, sl), _part(o_all, sl), _part(wc_all, sl),
                        block, None, _part(start_all, sl))
                if scratch is not None:
                    order = layout.order(block)  # rows as the stored copy keeps them
                    if order is not None:
                        y, w, o, wc, _, _, start = last
                        last = (y[order], _part(w, order), _part(o, order), _part(wc, order),
                                layout.reordered(block, order), None,
                                _part(start, order))
                    scratch.append(last[4], *last[:4])
            if last is not None:
                yield last[:5] + (done, last[6])
        if scratch is not None:
            scratch.commit()
    finally:
        if scratch is not None and not scratch.complete:
            scratch.discard()


@dataclass
class StartModel:
    """A previous fit of the same model, whose linear predictor starts a refit: its term
    bases (their knots and levels, not the new fit's) and raw coefficients."""

    design: Design
    beta: np.ndarray

    def linear_predictor(self, cols: dict) -> np.ndarray:
        """X·β (n,) of a batch's columns (values outside the fit's ranges are clamped,
        unseen levels count as the base level, as in scoring)."""
        n = len(next(iter(cols.values()))) if cols else 0
        out = np.zeros(n)
        coef = self.design.pass_coefficients(self.beta)
        for sl, enc in self.design.read(cols):
            self.design.predict(enc, coef, out[sl])
        return out


def _outside_range(link, fam, rows: int, task: str) -> FitError:
    return FitError(
        f"the {link.name} link took the mean of the {fam.name} family outside its range in "
        f"{rows} row(s) of {task} (e.g. a log link with non-positive means, an inverse link "
        "through zero); use the family's default link or check the response")


def _part(values, sl):
    return values[sl] if values is not None else None


def working_pass(source: Source, plan: PassPlan, callback=None, task: str = "pass",
                 total: int | None = None, scratch=None) -> PassState:
    """One pass over ``source``: the working model at ``plan.beta`` (or at the starting
    values when it is None) accumulated into a :class:`PassState`."""
    callback = callback or _quiet
    fam, link, layout = plan.family, plan.link, plan.layout
    beta, beta_prev = plan.beta, plan.beta_prev
    acc = layout.accumulator(numba.get_num_threads(), plan.blas_width)
    callback(Event("start", task, total=total))
    done = 0
    if beta is not None:
        coef = layout.pass_coefficients(beta)
    if beta_prev is not None:
        step = layout.pass_coefficients(beta - beta_prev)
    scales = plan.scale_est * np.exp(np.array([-LOGLIK_STEP, 0.0, LOGLIK_STEP]))
    fused = fam.working_kernel(link) if plan.fused else None
    with_wc = plan.column_sums
    for y, w, o, wc, block, batch_done, start in row_blocks(source, plan, scratch):
        m = len(y)
        w = w if w is not None else np.ones(m)
        o = o if o is not None else np.zeros(m)
        wc = (wc if wc is not None else w) if with_wc else _NO_ROWS
        extra = {}
        base = None
        if start is not None:      # the previous fit's linear predictor (a refit)
            fitted = start
            base = plan.start_shift
        elif beta is None:         # the family's starting means
            with np.errstate(all="ignore"):
                fitted = link.link(_start_mu(fam, link, y, w, plan.y_mean)) - o
            base = plan.start_shift
        else:
            fitted = np.zeros(m)
            layout.predict(block, coef, fitted)
            if beta_prev is not None:
                change = np.zeros(m)
                layout.predict(block, step, change)
                extra["max_eta_change"] = np.max(np.abs(change), initial=0.0)
        if fused is not None:
            wz, r = np.empty(m), np.empty(m)
            sums = dict(zip(FUSED_SUMS, fused(fitted, o, y, w, plan.null_beta0, plan.y_mean,
                                              scales, wz, r)))
            bad = sums.pop("bad")
            if bad:
                sums = _drop_unusable(wz, r, sums, bad, beta is None, link, fam, task)
            if base is not None:   # r is measured from the intercept-only anchor
                r += fitted - base
                sums["resid_ss"] = float(np.dot(wz * r, r))
                sums["invalid_rows"] = 0.0
            if not fam.estimates_nuisance or beta is None:
                sums.pop("nuisance_score")
                sums.pop("nuisance_info")
        else:
            wz, r, sums = _working_numpy(plan, fam, link, fitted, o, y, w, base, scales,
                                         beta is not None, task)
        acc.add(block, wz, r, wc)
        acc.add_scalars(rows=m, **sums, **extra)
        if batch_done is not None:
            done = batch_done
            callback(Event("advance", task, rows=done, total=total))
    callback(Event("end", task, rows=done, total=total))
    return acc.finish()


_NO_ROWS = np.zeros(0)


def _drop_unusable(wz, r, sums: dict, bad: int, start: bool, link, fam, task: str) -> dict:
    """Rows whose working weight or residual is not finite: at the start an error (the link
    cannot start there); at an iterate, rows outside the mean space that the driver will
    halve the step for (they are left out of this pass's sums, which it discards)."""
    if start:
        raise _outside_range(link, fam, bad, task)
    unusable = ~np.isfinite(wz * r)
    wz[unusable] = 0.0
    r[unusable] = 0.0
    sums = dict(sums)
    sums["invalid_rows"] = max(float(sums.get("invalid_rows", 0.0)), float(bad))
    for key, value in sums.items():
        if not np.isfinite(value):
            sums[key] = 0.0
    return sums


def _working_numpy(plan, fam, link, fitted, o, y, w, base, scales, evaluated: bool,
                   task: str):
    """The working model of a block in numpy (the reference for the fused loops): working
    weights, residuals and the pass's sums. ``base``: the residuals are measured from the
    intercept-only anchor (first pass); ``evaluated``: the block is at a fitted β (count
    rows outside the mean space, nuisance sums)."""
    eta = fitted + o
    with np.errstate(all="ignore"):
        mu = link.inverse(eta)
        invalid = np.count_nonzero(~fam.valid_mu(mu)) if evaluated else 0
    mu = fam.clip_mu(mu)
    sums = {"invalid_rows": invalid}
    if evaluated and fam.estimates_nuisance:
        sums["nuisance_score"], sums["nuisance_info"] = fam.nuisance_sums(y, mu, w)
    dmu = link.mu_eta(eta)
    var = fam.variance(mu)
    wz = w * dmu * dmu / var
    r = (y - mu) / dmu
    if base is not None:
        r = r + (fitted - base)
    bad = int(np.sum(~np.isfinite(wz * r)))
    if bad:
        sums = _drop_unusable(wz, r, sums, bad, not evaluated, link, fam, task)
    # the intercept-and-offset (null) model, one IRLS step per pass
    eta0 = o + plan.null_beta0
    mu0 = fam.clip_mu(link.inverse(eta0))
    dmu0 = link.mu_eta(eta0)
    w0 = w * dmu0 * dmu0 / fam.variance(mu0)
    if not fam.loglik_at_three_scales:
        sums["loglik"] = fam.loglik(y, mu, w, 1.0) if fam.scale_known else 0.0
    else:
        sums.update(zip(("loglik_lo", "loglik", "loglik_hi"),
                        (fam.loglik(y, mu, w, sc) for sc in scales)))
    sums.update(
        weight=np.sum(w), resid_ss=np.sum(wz * r * r),
        deviance=np.sum(w * fam.unit_deviance(y, mu)),
        pearson=np.sum(w * (y - mu) ** 2 / var),
        response_ss=np.sum(w * (y - mu) ** 2),
        centred_ss=np.sum(w * (y - plan.y_mean) ** 2),
        centred_sum=np.sum(w * (y - plan.y_mean)), log_weight=np.sum(np.log(w)),
        null_deviance=np.sum(w * fam.unit_deviance(y, mu0)),
        null_weight=np.sum(w0), null_score=np.sum(w0 * (y - mu0) / dmu0))
    return wz, r, sums


def loglik_pass(source: Source, plan: PassPlan, scale: float, callback=None,
                task: str = "pass", total_rows: int | None = None, scratch=None) -> float:
    """One light pass for the log-likelihood at ``plan.beta`` and ``scale`` (for families
    whose density is too costly to evaluate in every pass)."""
    callback = callback or _quiet
    fam, link, layout = plan.family, plan.link, plan.layout
    coef = layout.pass_coefficients(plan.beta)
    callback(Event("start", task, total=total_rows, message="log-likelihood"))
    total = 0.0
    done = 0
    for y, w, o, _, block, batch_done, _ in row_blocks(source, plan, scratch):
        m = len(y)
        eta = o.copy() if o is not None else np.zeros(m)
        layout.predict(block, coef, eta)
        w = w if w is not None else np.ones(m)
        total += fam.loglik(y, fam.clip_mu(link.inverse(eta)), w, scale)
        if batch_done is not None:
            done = batch_done
            callback(Event("advance", task, rows=done, total=total_rows))
    callback(Event("end", task, rows=done, total=total_rows))
    return total


def _start_mu(fam, link, y: np.ndarray, w: np.ndarray, y_mean: float) -> np.ndarray:
    """Per-row starting means from the family; rows where the link of that value is not
    finite start at the mean."""
    mu = fam.start_mu(y, w)
    with np.errstate(all="ignore"):
        bad = ~np.isfinite(link.link(mu))
    if bad.any():
        mu = np.where(bad, y_mean, mu)
    return mu

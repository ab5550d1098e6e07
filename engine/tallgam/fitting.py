"""The iteration driver: profile → term setup → data passes (PIRLS) → dense stage → result.

One data pass streams the source once: every batch is encoded, the working weights and
residuals of the current iterate are formed (numpy, per block) and the kernel adds the
block to the pass's normal equations. Between passes only p × p quantities are touched.

PIRLS (penalized iteratively re-weighted least squares) with performance iteration
(Gu 1992): the smoothing parameters are re-selected on each pass's working model, so a
fit costs one data pass per iteration. A step that raises the penalized deviance (at the
current λ) is halved, at the cost of another pass. The gaussian family with the identity
link is exact after one pass.
"""

from __future__ import annotations

import time
import warnings
from dataclasses import dataclass, field

import numba
import numpy as np

from . import kernels
from .dense import Constraints
from .design import Design, batch_columns
from .errors import ColumnNotFound, ConvergenceWarning, DataError, FitError, TallgamWarning
from .model import Model
from .profile import DataProfile, Field, Rule, run_profile
from .progress import Event, make_callback
from .smoothing import RHO_BOUND, Solution, select, solve
from .sources import Source, open_source, quote
from .state import Accumulator, PassState
from .terms import Basis, InterceptBasis

Y, W, O, WC = "__y", "__w", "__o", "__wc"  # reserved batch aliases

_NUMERIC_TYPES = ("TINYINT", "SMALLINT", "INTEGER", "BIGINT", "HUGEINT", "UTINYINT",
                  "USMALLINT", "UINTEGER", "UBIGINT", "UHUGEINT", "FLOAT", "DOUBLE", "DECIMAL",
                  "REAL", "BOOLEAN")


# ---------------------------------------------------------------------------------------
# inputs: the SQL the model reads


@dataclass
class Inputs:
    """The SQL select list of a model over a source, and how to read its batches."""

    select: list[str]
    where: str | None
    level_names: set[str]
    has_weights: bool
    has_offset: bool
    has_cweights: bool
    profile_fields: list[Field] = field(default_factory=list)
    rules: list[Rule] = field(default_factory=list)
    exprs: dict[str, str] = field(default_factory=dict)


def column_or_expression(source: Source, text: str, role: str) -> str:
    """A quoted column if ``text`` names one, else ``text`` as a checked SQL expression."""
    if text in source.schema:
        return quote(text)
    try:
        source.query(f"SELECT {text} FROM tallgam_source LIMIT 0").fetchall()
    except DataError as exc:
        from .errors import nearest

        raise ColumnNotFound(
            f"{role} {text!r} is neither a column of {source.label}{nearest(text, source.schema)}"
            f" nor a SQL expression DuckDB accepts ({exc})") from None
    return f"({text})"


def model_inputs(model: Model, source: Source, design_specs, for_prediction: bool = False,
                 with_offset: bool = True) -> Inputs:
    """Resolve the model's columns and expressions against ``source``."""
    columns: dict[str, str] = {}  # column -> "numeric" | "levels"
    for spec in design_specs:
        for c in spec.inputs:
            columns[c] = "levels" if spec.kind == "categorical" else "numeric"
    source.require_columns(list(columns))
    for c, kind in columns.items():
        typ = source.schema[c].upper()
        if kind == "numeric" and not typ.startswith(_NUMERIC_TYPES):
            raise DataError(f"column {c!r} has type {source.schema[c]}, but the model uses it "
                            "as a number; cast it in SQL or use tg.categorical")
    exprs: dict[str, str] = {}
    if not for_prediction:
        exprs[Y] = column_or_expression(source, model.response, "response")
        if model.weights is not None:
            exprs[W] = column_or_expression(source, model.weights, "weights")
    if with_offset:
        if model.exposure is not None:
            exprs["__exposure"] = column_or_expression(source, model.exposure, "exposure")
        if model.offset is not None:
            exprs["__offset"] = column_or_expression(source, model.offset, "offset")
    select = []
    fields_: list[Field] = []
    rules: list[Rule] = []
    if Y in exprs:
        select.append(f"CAST({exprs[Y]} AS DOUBLE) AS {Y}")
        fields_.append(Field("response", exprs[Y]))
        for cond, msg in model.family.response_rules:
            rules.append(Rule(f"response: {msg}", "response", cond.format(y="{response}"),
                              f"response {model.response!r} has {msg}"))
    if W in exprs:
        select.append(f"CAST({exprs[W]} AS DOUBLE) AS {W}")
        fields_.append(Field("weights", exprs[W]))
        rules.append(Rule("weights: not positive", "weights", "{weights} <= 0",
                          f"weights {model.weights!r} has values ≤ 0"))
    parts = []
    if "__exposure" in exprs:
        parts.append(f"ln(CAST({exprs['__exposure']} AS DOUBLE))")
        fields_.append(Field("exposure", exprs["__exposure"]))
        rules.append(Rule("exposure: not positive", "exposure", "{exposure} <= 0",
                          f"exposure {model.exposure!r} has values ≤ 0"))
    if "__offset" in exprs:
        parts.append(f"CAST({exprs['__offset']} AS DOUBLE)")
        fields_.append(Field("offset", exprs["__offset"]))
    if parts:
        select.append(f"{' + '.join(parts)} AS {O}")
    cw = None
    if "__exposure" in exprs:
        cw = f"CAST({exprs['__exposure']} AS DOUBLE)"
    elif W in exprs:
        cw = f"CAST({exprs[W]} AS DOUBLE)"
    if cw is not None and not for_prediction:
        select.append(f"{cw} AS {WC}")
    seen = set()
    for spec in design_specs:
        for f in spec.profile_fields():
            if f.key not in seen:
                fields_.append(f)
                seen.add(f.key)
    for c, kind in columns.items():
        cast = "VARCHAR" if kind == "levels" else "DOUBLE"
        select.append(f"CAST({quote(c)} AS {cast}) AS {quote(c)}")
    return Inputs(select=select, where=model.where, level_names={
        c for c, k in columns.items() if k == "levels"}, has_weights=W in exprs,
        has_offset=bool(parts), has_cweights=cw is not None and not for_prediction,
        profile_fields=fields_, rules=rules, exprs=exprs)


def resolved_expressions(inputs: Inputs) -> dict[str, str]:
    """The SQL the fit used for response, weights, exposure and offset (for export)."""
    names = {Y: "response", W: "weights", "__exposure": "exposure", "__offset": "offset"}
    return {names[k]: v for k, v in inputs.exprs.items() if k in names}


def complete_rows_condition(fields_: list[Field]) -> str:
    conds = []
    for f in fields_:
        if f.kind == "numeric":
            conds.append(f"isfinite(CAST({f.expr} AS DOUBLE))")
        else:
            conds.append(f"({f.expr}) IS NOT NULL")
    return " AND ".join(conds) if conds else "TRUE"


def check_profile(profile: DataProfile, source: Source, model: Model) -> None:
    """DataError for empty data, NULL/NaN/inf values and rule violations (with counts)."""
    where = f" after the filter {model.where!r}" if model.where else ""
    if profile.rows == 0:
        raise DataError(f"{source.label} has no rows{where}")
    bad = []
    for key, fp in profile.fields.items():
        n_bad = fp.nulls + fp.nonfinite
        if n_bad:
            name = key.split(":", 1)[-1]
            what = f"{fp.nulls} NULL" + (f", {fp.nonfinite} NaN/inf" if fp.nonfinite else "")
            bad.append(f"{name!r}: {what}")
    if bad:
        raise DataError(
            f"missing or non-finite values in {len(bad)} column(s) of {profile.rows} rows — "
            + "; ".join(bad) + ". Clean them, filter them with where=, or pass missing='drop'.")
    if profile.violations:
        lines = [f"{msg}: {n} row(s), e.g. {', '.join(f'{v:g}' for v in ex)}"
                 for n, ex, msg in profile.violations.values()]
        raise DataError("values outside what the model allows — " + "; ".join(lines))


# ---------------------------------------------------------------------------------------
# the driver


@dataclass
class PassRecord:
    """One data pass of the fit, for the history."""

    number: int
    kind: str                 # "start", "step", "halved"
    deviance: float
    penalized_deviance: float
    smoothing: list[float]
    seconds: float
    rows: int


@dataclass
class FitState:
    """Everything the result needs from the driver."""

    model: Model
    design: Design
    constraints: Constraints
    profile: DataProfile
    beta: np.ndarray
    solution: Solution
    state: PassState
    scale: float
    converged: bool
    passes: int
    history: list[PassRecord]
    null_deviance: float
    loglik: float
    notes: list[str]
    dropped_rows: int
    seconds: float
    expressions: dict = field(default_factory=dict)


def fit_model(model: Model, data, *, batch_rows: int = 1_000_000, threads: int | None = None,
              progress=False):
    from .result import FitResult

    if int(batch_rows) < 1:
        raise DataError(f"batch_rows must be a positive integer, got {batch_rows!r}")
    callback = make_callback(progress)
    source = open_source(data, threads=threads)
    owned = source is not data
    old_threads = numba.get_num_threads()
    if threads:
        numba.set_num_threads(min(int(threads), numba.config.NUMBA_NUM_THREADS))
    t0 = time.perf_counter()
    try:
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            fs = _fit(model, source, int(batch_rows), callback)
        for w in caught:
            fs.notes.append(str(w.message))
            warnings.warn_explicit(w.message, w.category, w.filename, w.lineno)
        fs.seconds = time.perf_counter() - t0
        callback(Event("end", "done"))
    finally:
        numba.set_num_threads(old_threads)
        if owned:
            source.close()
    return FitResult.from_state(fs)


def _fit(model: Model, source: Source, batch_rows: int, callback) -> FitState:
    fam, link = model.family, model.link
    inputs = model_inputs(model, source, model.terms)
    callback(Event("start", "profile"))
    profile = run_profile(source, inputs.profile_fields, inputs.rules, model.where)
    dropped = 0
    where = model.where
    if model.missing == "drop" and any(
            fp.nulls + fp.nonfinite for fp in profile.fields.values()):
        keep = complete_rows_condition(inputs.profile_fields)
        where = f"({model.where}) AND ({keep})" if model.where else keep
        rows_before = profile.rows
        profile = run_profile(source, inputs.profile_fields, inputs.rules, where)
        dropped = rows_before - profile.rows
    inputs.where = where
    callback(Event("end", "profile", rows=profile.rows))
    check_profile(profile, source, model)
    if dropped:
        warnings.warn(TallgamWarning(f"{dropped} row(s) with missing or non-finite values were "
                                     "left out (missing='drop')"), stacklevel=3)
    bases: list[Basis] = [InterceptBasis()] + [t.build(profile) for t in model.terms]
    design = Design(bases)
    y_mean = profile["response"].mean
    start_shift = _start_shift(model, profile)

    scale_known = fam.scale_known
    exact = fam.name == "gaussian" and link.name == "identity"
    history: list[PassRecord] = []
    constraints: Constraints | None = None
    beta = None            # current iterate (raw), None before the first solve
    beta_prev = None
    lam = None
    rho = None
    prev_dev = None        # deviance of beta_prev (from its pass)
    null_beta0 = start_shift
    scale_est = 1.0
    halvings = 0
    converged = False
    solution = None
    last: Solution | None = None
    state = None
    passes = 0
    notes: list[str] = []
    while passes < model.max_iterations:
        passes += 1
        t_pass = time.perf_counter()
        state = _data_pass(source, inputs, design, model, beta, start_shift, null_beta0,
                           y_mean, scale_est, batch_rows, callback, passes, profile.rows)
        if constraints is None:
            constraints = Constraints(design, state.colsum)
        null_beta0 = null_beta0 + _null_step(state)
        dev = state.scalars["deviance"]
        if beta is not None:
            S = _raw_penalty(constraints, lam)
            pdev = dev + beta @ S @ beta
            if beta_prev is not None and prev_dev is not None:
                prev_pdev = prev_dev + beta_prev @ S @ beta_prev
                if pdev > prev_pdev * (1 + 1e-9) + 1e-12 and halvings < 25:
                    halvings += 1
                    history.append(PassRecord(passes, "halved", dev, pdev, list(lam),
                                              time.perf_counter() - t_pass,
                                              int(state.scalars["rows"])))
                    beta = 0.5 * (beta + beta_prev)
                    continue
                if abs(pdev - prev_pdev) <= model.tolerance * (abs(pdev) + 1e-3):
                    history.append(PassRecord(passes, "step", dev, pdev, list(lam),
                                              time.perf_counter() - t_pass,
                                              int(state.scalars["rows"])))
                    solution = _final_solution(constraints, state, beta, lam, last)
                    converged = True
                    break
        halvings = 0
        anchor = beta if beta is not None else _intercept_only(design, start_shift)
        problem = constraints.problem(state, anchor, 1.0 if scale_known else None)
        if passes == 1:
            constraints.check_identifiable(problem)
        sol = select(problem, model.criterion, constraints.fixed, start=rho)
        if sol is None:
            raise FitError("smoothing selection failed: the penalized equations are singular")
        notes.extend(n for n in sol.notes if n not in notes)
        last = sol
        rho = _rho_of(sol.lam, problem, constraints)
        beta_prev, prev_dev = beta, (dev if beta is not None else None)
        beta = constraints.to_raw(sol.gamma)
        lam = sol.lam
        scale_est = _scale_estimate(state, sol, scale_known, exact)
        history.append(PassRecord(passes, "start" if beta_prev is None else "step", dev,
                                  dev + (0.0 if beta_prev is None else
                                         float(beta_prev @ _raw_penalty(constraints, lam)
                                               @ beta_prev)),
                                  list(lam), time.perf_counter() - t_pass,
                                  int(state.scalars["rows"])))
        if exact:
            solution = sol
            converged = True
            break
    if not converged:
        msg = (f"PIRLS did not converge in {model.max_iterations} data passes (relative change "
               f"of the penalized deviance above {model.tolerance:g}); the estimates are from "
               "the last pass. Raise max_iterations or check the model.")
        warnings.warn(ConvergenceWarning(msg), stacklevel=3)
        notes.append(msg)
        solution = _final_solution(constraints, state, beta, lam, last)
    if exact:
        deviance = solution.deviance
        null_dev = state.scalars["null_deviance"] - state.scalars["null_score"] ** 2 / max(
            state.scalars["null_weight"], 1e-300)
    else:
        deviance = state.scalars["deviance"]
        null_dev = state.scalars["null_deviance"]
    n = state.scalars["rows"]
    edf_total = float(np.sum(solution.edf))
    if scale_known:
        scale = 1.0
    elif exact:
        scale = deviance / max(n - edf_total, 1.0)
    else:
        scale = state.scalars["pearson"] / max(n - edf_total, 1.0)
    if fam.name == "gaussian":
        loglik = -0.5 * (deviance / scale + n * np.log(2 * np.pi * scale)
                         - state.scalars["log_weight"])
    else:
        loglik = state.scalars["loglik"]
    state.scalars["deviance"] = deviance
    if exact:  # the pass ran at the starting values; the fit's residuals are the deviance
        state.scalars["response_ss"] = state.scalars["pearson"] = deviance
    return FitState(model=model, design=design, constraints=constraints, profile=profile,
                    beta=beta, solution=solution, state=state, scale=scale, converged=converged,
                    passes=passes, history=history, null_deviance=null_dev, loglik=loglik,
                    notes=notes, dropped_rows=dropped, seconds=0.0,
                    expressions=resolved_expressions(inputs))


def _final_solution(constraints, state, beta, lam, last: Solution) -> Solution:
    """Covariance and EDF at the reported β: the working model of its own pass, at the λ
    that produced it (the reported β is the anchor of that pass). The criterion is the
    one of the last selection."""
    problem = constraints.problem(state, beta, None)
    sol = solve(problem, lam)
    sol.gamma = constraints.to_free(beta)
    sol.criterion, sol.criterion_name = last.criterion, last.criterion_name
    sol.iterations, sol.converged = last.iterations, last.converged
    return sol


def _rho_of(lam, problem, constraints) -> np.ndarray:
    from .smoothing import _relative_scale

    base = _relative_scale(problem)
    return np.clip(np.log(np.maximum(lam, 1e-300) / base), -RHO_BOUND, RHO_BOUND)


def _raw_penalty(constraints: Constraints, lam) -> np.ndarray:
    """S_λ in raw coordinates (p × p)."""
    p = constraints.Z.shape[0]
    if lam is None or len(lam) == 0:
        return np.zeros((p, p))
    S_free = np.zeros((constraints.n_free, constraints.n_free))
    for blk in constraints.blocks:
        for j, m in enumerate(blk.matrices):
            S_free[blk.sl, blk.sl] += lam[blk.first + j] * m
    return constraints.Z @ S_free @ constraints.Z.T


def _scale_estimate(state, sol, scale_known, exact) -> float:
    if scale_known:
        return 1.0
    n = state.scalars["rows"]
    edf = float(np.sum(sol.edf))
    stat = sol.deviance if exact else state.scalars["pearson"]
    return max(stat / max(n - edf, 1.0), 1e-300)


def _intercept_only(design: Design, value: float) -> np.ndarray:
    beta = np.zeros(design.p)
    beta[design.slices[0].start] = value
    return beta


def _null_step(state: PassState) -> float:
    w = state.scalars["null_weight"]
    return state.scalars["null_score"] / w if w > 0 else 0.0


def _start_shift(model: Model, profile: DataProfile) -> float:
    """A constant near the mean of η − offset at the start, to centre the residuals."""
    y = profile["response"].mean
    fam, link = model.family, model.link
    mu = fam.clip_mu(np.array([y if y is not None else 0.0]))
    if fam.name == "binomial":
        mu = np.clip(mu, 0.01, 0.99)
    eta = float(link.link(mu)[0]) if np.all(np.isfinite(link.link(mu))) else 0.0
    if "exposure" in profile.fields and link.name == "log":
        eta -= np.log(max(profile["exposure"].mean, 1e-300))
    if "offset" in profile.fields:
        eta -= profile["offset"].mean
    return float(eta) if np.isfinite(eta) else 0.0


def _data_pass(source, inputs: Inputs, design: Design, model: Model, beta, start_shift,
               null_beta0, y_mean, scale_est, batch_rows, callback, number, total_rows
               ) -> PassState:
    fam, link = model.family, model.link
    threads = numba.get_num_threads()
    acc = Accumulator(design.pd, [b.n_raw for b in design.levels], threads)
    task = f"pass {number}"
    callback(Event("start", task, total=total_rows))
    done = 0
    if beta is not None:
        beta_d = np.ascontiguousarray(beta[:design.pd])
        beta_l = np.ascontiguousarray(beta[design.pd:])
    for batch in source.batches(inputs.select, inputs.where, batch_rows):
        cols = batch_columns(batch, inputs.level_names)
        n = batch.num_rows
        y_all = cols[Y]
        w_all = cols[W] if inputs.has_weights else None
        o_all = cols[O] if inputs.has_offset else None
        wc_all = cols[WC] if inputs.has_cweights else None
        for sl, enc in design.blocks(cols):
            y = y_all[sl]
            m = len(y)
            w = w_all[sl] if w_all is not None else np.ones(m)
            o = o_all[sl] if o_all is not None else np.zeros(m)
            wc = wc_all[sl] if wc_all is not None else w
            if beta is None:
                mu = _start_mu(fam, y, w)
                eta = link.link(mu)
                fitted = eta - o  # r is measured from the intercept-only anchor
                base = start_shift
            else:
                fitted = np.zeros(m)
                kernels.linear_predictor(enc.idx, enc.val, enc.lev, beta_d, beta_l, fitted)
                eta = fitted + o
                mu = fam.clip_mu(link.inverse(eta))
                base = None
            dmu = link.mu_eta(eta)
            var = fam.variance(mu)
            gprime = 1.0 / dmu
            wz = w * dmu * dmu / var
            resid = (y - mu) * gprime
            r = resid + (fitted - base if base is not None else 0.0)
            acc.add(enc, wz, r, wc)
            dev_rows = fam.unit_deviance(y, mu)
            # the intercept-and-offset (null) model, one IRLS step per pass
            eta0 = o + null_beta0
            mu0 = fam.clip_mu(link.inverse(eta0))
            dmu0 = link.mu_eta(eta0)
            w0 = w * dmu0 * dmu0 / fam.variance(mu0)
            r0 = (y - mu0) / dmu0
            acc.add_scalars(
                rows=m, weight=np.sum(w), resid_ss=np.sum(wz * r * r),
                deviance=np.sum(w * dev_rows), pearson=np.sum(w * (y - mu) ** 2 / var),
                response_ss=np.sum(w * (y - mu) ** 2),
                centred_ss=np.sum(w * (y - y_mean) ** 2), centred_sum=np.sum(w * (y - y_mean)),
                log_weight=np.sum(np.log(w)),
                loglik=fam.loglik(y, mu, w, scale_est) if fam.name != "gaussian" else 0.0,
                null_deviance=np.sum(w * fam.unit_deviance(y, mu0)),
                null_weight=np.sum(w0), null_score=np.sum(w0 * r0))
        done += n
        callback(Event("advance", task, rows=done, total=total_rows))
    callback(Event("end", task, rows=done, total=total_rows))
    return acc.finish()


def _start_mu(fam, y: np.ndarray, w: np.ndarray) -> np.ndarray:
    """Per-row starting means (McCullagh & Nelder 1989, §2.5: μ₀ from y, nudged inside
    the mean space)."""
    name = fam.name
    if name == "binomial":
        return (w * y + 0.5) / (w + 1.0)
    if name in ("poisson", "negative_binomial", "tweedie"):
        return y + 0.1
    return fam.clip_mu(y.copy())

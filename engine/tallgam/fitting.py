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
from .profile import DataProfile, Field, Rule, add_weighted_histograms, run_profile
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

    def select_expr(self, alias: str) -> str:
        """The SQL expression behind a select-list alias (e.g. the constraint weights)."""
        for item in self.select:
            if item.endswith(f" AS {alias}"):
                return item[: -len(f" AS {alias}")]
        raise KeyError(alias)


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
        columns.update(spec.input_kinds())
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
    seen: dict[str, Field] = {}
    for spec in design_specs:
        for f in spec.profile_fields():
            if f.key not in seen:
                seen[f.key] = Field(f.key, f.expr, f.kind, f.histogram)
                fields_.append(seen[f.key])
            else:  # a column several terms use: profile it once, with a histogram if any asks
                seen[f.key].histogram |= f.histogram
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
    kind: str                 # "start", "step", "halved", "exact", "loglik"
    deviance: float
    penalized_deviance: float
    smoothing: list[float]
    seconds: float
    rows: int
    invalid_rows: int = 0     # rows whose mean left the family's range (a halving cause)


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
    family: object = None         # the family as fitted (estimated parameters filled in)
    extra_statistics: dict = field(default_factory=dict)


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
            if getattr(model.family, "grid", None):
                fs = _profile_tweedie_power(model, source, int(batch_rows), callback)
            else:
                fs = _fit(model, source, int(batch_rows), callback)
        for w in caught:
            if str(w.message) not in fs.notes:
                fs.notes.append(str(w.message))
            warnings.warn_explicit(w.message, w.category, w.filename, w.lineno)
        fs.seconds = time.perf_counter() - t0
        callback(Event("end", "done"))
    finally:
        numba.set_num_threads(old_threads)
        if owned:
            source.close()
    return FitResult.from_state(fs)


def _profile_tweedie_power(model: Model, source: Source, batch_rows: int, callback
                           ) -> FitState:
    """Fit at every candidate Tweedie power, then at the maximum of a parabola through the
    best candidate and its neighbours; keep the fit with the highest log-likelihood."""
    from dataclasses import replace

    grid = model.family.grid
    fits: dict[float, FitState] = {}
    for p in grid:
        callback(Event("note", "profile", message=f"tweedie power {p:g}"))
        fits[p] = _fit(replace(model, family=model.family.at_power(p)), source, batch_rows,
                       callback)
    lls = np.array([fits[p].loglik for p in grid])
    i = int(np.argmax(lls))
    if 0 < i < len(grid) - 1:
        x, y = np.array(grid[i - 1:i + 2]), lls[i - 1:i + 2]
        a, b, _ = np.polyfit(x, y, 2)
        if a < 0:
            p_star = float(np.clip(-b / (2 * a), x[0], x[2]))
            if min(abs(p_star - g) for g in grid) > 1e-3:
                fits[p_star] = _fit(replace(model, family=model.family.at_power(p_star)),
                                    source, batch_rows, callback)
    best = max(fits, key=lambda p: fits[p].loglik)
    fs = fits[best]
    fs.passes = sum(f.passes for f in fits.values())
    table = sorted((float(p), float(f.loglik)) for p, f in fits.items())
    fs.extra_statistics["power_profile"] = [list(t) for t in table]
    fs.notes.append(
        "tweedie power chosen by profile likelihood: "
        + ", ".join(f"{p:.3g} → {ll:.6g}" for p, ll in table) + f"; kept {best:.4g}")
    return fs


def _fit(model: Model, source: Source, batch_rows: int, callback) -> FitState:
    fam = model.family
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
    check_profile(profile, source, model)
    if inputs.has_cweights:
        add_weighted_histograms(source, profile, inputs.profile_fields,
                                inputs.select_expr(WC), where)
    callback(Event("end", "profile", rows=profile.rows))
    if dropped:
        warnings.warn(TallgamWarning(f"{dropped} row(s) with missing or non-finite values were "
                                     "left out (missing='drop')"), stacklevel=3)
    bases: list[Basis] = [InterceptBasis()] + [t.build(profile) for t in model.terms]
    design = Design(bases)
    run = _Run(model, fam, source, inputs, design, profile, batch_rows, callback)
    return run.iterate(dropped)


class _Run:
    """The PIRLS iterations of one fit (state between data passes)."""

    def __init__(self, model, fam, source, inputs, design, profile, batch_rows, callback):
        self.model, self.fam, self.link = model, fam, model.link
        self.source, self.inputs, self.design = source, inputs, design
        self.profile, self.batch_rows, self.callback = profile, batch_rows, callback
        self.y_mean = profile["response"].mean
        self.start_shift = _start_shift(model, profile)
        self.null_beta0 = self.start_shift
        self.scale_est = 1.0
        self.passes = 0
        self.extra_records: list[PassRecord] = []

    def data_pass(self, beta, beta_prev=None) -> PassState:
        self.passes += 1
        state = _data_pass(self, beta, beta_prev)
        self.null_beta0 += _null_step(state)
        return state

    def iterate(self, dropped: int) -> FitState:
        """Data passes until the penalized deviance and the linear predictor settle.

        Every pass evaluates one iterate. A step is *worse* when it puts a mean outside
        the family's range (e.g. a negative Poisson mean under the identity link) or raises
        the penalized deviance at the current λ; a worse step is halved towards the last
        accepted iterate. If halving cannot find a better point, the fit stops at the last
        accepted iterate and says it did not converge.
        """
        model, design = self.model, self.design
        scale_known = self.fam.scale_known
        exact = self.fam.name == "gaussian" and self.link.name == "identity"
        history: list[PassRecord] = []
        constraints: Constraints | None = None
        beta = None            # the iterate this pass evaluates; None: the starting means
        accepted = None        # (beta, state, deviance, λ) of the last accepted iterate
        lam = rho = None
        halvings = 0
        converged = stuck = False
        nuisance_moved = False
        last: Solution | None = None
        notes: list[str] = []
        while True:
            t_pass = time.perf_counter()
            state = self.data_pass(beta, accepted[0] if accepted else None)
            if constraints is None:
                constraints = Constraints(design, state.colsum, model.criterion)
            dev = state.scalars["deviance"]
            rows = int(state.scalars["rows"])
            if beta is None:
                history.append(PassRecord(self.passes, "start", dev, dev, [],
                                          time.perf_counter() - t_pass, rows))
            else:
                # deviances of two passes compare only if the family's parameters were equal
                comparable = not nuisance_moved
                nuisance_moved = self._update_nuisance(state)
                pdev = dev + _penalty_value(constraints, lam, beta)
                record = PassRecord(self.passes, "step", dev, pdev, list(lam),
                                    time.perf_counter() - t_pass, rows,
                                    int(state.scalars["invalid_rows"]))
                invalid = state.scalars["invalid_rows"] > 0
                prev_pdev = np.inf
                if accepted is not None and accepted[2] is not None:
                    prev_pdev = accepted[2] + _penalty_value(constraints, lam, accepted[0])
                rise = comparable and pdev - prev_pdev > 1e-9 * abs(prev_pdev) + 1e-12
                if (invalid or rise) and accepted is not None:
                    record.kind = "halved"
                    history.append(record)
                    if halvings < 25 and self.passes < model.max_iterations:
                        halvings += 1
                        beta = 0.5 * (beta + accepted[0])
                        continue
                    stuck = True
                    if accepted[1] is None:
                        raise FitError(
                            f"PIRLS found no coefficients giving valid means for the "
                            f"{self.fam.name} family with the {self.link.name} link "
                            f"({int(state.scalars['invalid_rows'])} rows outside the range); "
                            "use the family's default link")
                    beta, state, _, lam = accepted
                    break
                history.append(record)
                if (accepted is not None and comparable and abs(pdev - prev_pdev)
                        <= model.tolerance * (abs(pdev) + 1e-3)
                        and state.scalars["max_eta_change"] <= ETA_TOLERANCE):
                    converged = True
                    break
                if self.passes >= model.max_iterations:
                    break
            halvings = 0
            anchor = beta if beta is not None else _intercept_only(design, self.start_shift)
            problem = constraints.problem(state, anchor, 1.0 if scale_known else None)
            if last is None:
                constraints.check_identifiable(problem)
            sol = select(problem, model.criterion, constraints.fixed, start=rho)
            if constraints.shapes:
                sol = constraints.shapes.apply(sol, problem)
            notes.extend(n for n in sol.notes if n not in notes)
            last = sol
            rho = _rho_of(sol.lam, problem, constraints)
            # the iterate just evaluated becomes the anchor of halving; before the first
            # solve that is the intercept-only start (valid means, deviance not evaluated)
            accepted = (anchor, state if beta is not None else None,
                        dev if beta is not None else None, lam)
            beta = constraints.to_raw(sol.gamma)
            lam = sol.lam
            self.scale_est = _scale_estimate(state, sol, scale_known, exact)
            if exact:
                history[-1].kind = "exact"
                history[-1].smoothing = list(lam)
                converged = True
                break
        if exact:
            solution = last
        else:
            solution = _final_solution(constraints, state, beta, lam, last)
        if not converged:
            why = ("step halving found no better coefficients; the fit stopped at the last "
                   "accepted iterate" if stuck else
                   f"the relative change of the penalized deviance stayed above "
                   f"{model.tolerance:g}")
            msg = (f"PIRLS did not converge in {self.passes} data passes ({why}); the estimates "
                   "and statistics are those of the reported iterate. Raise max_iterations or "
                   "check the model.")
            warnings.warn(ConvergenceWarning(msg), stacklevel=4)
        return self._finish(state, beta, solution, constraints, converged, history, notes,
                            dropped, exact)

    def _update_nuisance(self, state: PassState) -> bool:
        """One Newton step for a family's estimated extra parameter; True while it moves."""
        if not self.fam.estimates_nuisance:
            return False
        old = self.fam
        new = old.with_nuisance(state.scalars["nuisance_score"], state.scalars["nuisance_info"])
        if abs(np.log(new.theta / old.theta)) <= 1e-10:  # settled: freeze it exactly
            return False
        self.fam = new
        return True

    def _finish(self, state, beta, solution, constraints, converged, history, notes, dropped,
                exact) -> FitState:
        fam = self.fam
        sc = state.scalars
        n = sc["rows"]
        if exact:
            deviance = solution.deviance
            null_dev = sc["null_deviance"] - sc["null_score"] ** 2 / max(sc["null_weight"],
                                                                          1e-300)
        else:
            deviance = sc["deviance"]
            null_dev = sc["null_deviance"]
        edf_total = float(np.sum(solution.edf))
        if fam.scale_known:
            scale = 1.0
        elif exact:
            scale = deviance / max(n - edf_total, 1.0)
        else:
            scale = sc["pearson"] / max(n - edf_total, 1.0)
        if fam.name == "gaussian":
            loglik = -0.5 * (deviance / scale + n * np.log(2 * np.pi * scale) - sc["log_weight"])
        elif fam.scale_known:
            loglik = sc["loglik"]
        elif fam.loglik_in_pass:
            loglik = _interpolate_loglik(sc, self.scale_est, scale)
        else:
            loglik = _loglik_pass(self, beta, scale)
        sc["deviance"] = deviance
        if exact:  # the pass ran at the starting values; the fit's residuals are the deviance
            sc["response_ss"] = sc["pearson"] = deviance
        fs = FitState(model=self.model, design=self.design, constraints=constraints,
                      profile=self.profile, beta=beta, solution=solution, state=state,
                      scale=scale, converged=converged, passes=self.passes,
                      history=history + self.extra_records,
                      null_deviance=null_dev, loglik=loglik, notes=notes, dropped_rows=dropped,
                      seconds=0.0, expressions=resolved_expressions(self.inputs), family=fam)
        return fs


ETA_TOLERANCE = 1e-6  # largest change of the linear predictor between the last two iterates
LOGLIK_STEP = 0.01    # δ: the pass evaluates the log-likelihood at φ·e^(−δ), φ, φ·e^(+δ)


def _interpolate_loglik(sc: dict, scale_pass: float, scale: float) -> float:
    """The log-likelihood at ``scale`` from its values at three scales around the one the
    pass used (quadratic in log φ; the final scale differs from the pass's by the
    convergence tolerance, so the error is far below rounding of the sum)."""
    t = np.log(scale / scale_pass) / LOGLIK_STEP
    lo, mid, hi = sc["loglik_lo"], sc["loglik"], sc["loglik_hi"]
    return float(mid + 0.5 * t * (hi - lo) + 0.5 * t * t * (hi - 2 * mid + lo))


def _final_solution(constraints, state, beta, lam, last: Solution) -> Solution:
    """Covariance and EDF at the reported β: the working model of its own pass, at the λ
    that produced it (the reported β is the anchor of that pass). The criterion is the
    one of the last selection."""
    problem = constraints.problem(state, beta, None)
    sol = solve(problem, lam)
    sol.gamma = constraints.to_free(beta)
    if constraints.shapes:  # inference conditional on the active shape constraints
        sol = constraints.shapes.apply(sol, problem, keep_gamma=True)
    sol.criterion, sol.criterion_name = last.criterion, last.criterion_name
    sol.iterations, sol.converged = last.iterations, last.converged
    return sol


def _rho_of(lam, problem, constraints) -> np.ndarray:
    from .smoothing import _relative_scale

    base = _relative_scale(problem)
    return np.clip(np.log(np.maximum(lam, 1e-300) / base), -RHO_BOUND, RHO_BOUND)


def _penalty_value(constraints: Constraints, lam, beta: np.ndarray) -> float:
    """βᵀS_λβ (see :meth:`Constraints.penalty_value`)."""
    return constraints.penalty_value(lam, beta)


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


def _data_pass(run: _Run, beta, beta_prev) -> PassState:
    """One pass over the data: the working model at ``beta`` (or at the starting values
    when ``beta`` is None) accumulated into a :class:`PassState`."""
    fam, link, design, inputs = run.fam, run.link, run.design, run.inputs
    acc = Accumulator(design.pd, [b.n_raw for b in design.levels], numba.get_num_threads())
    task = f"pass {run.passes}"
    total = run.profile.rows
    run.callback(Event("start", task, total=total))
    done = 0
    if beta is not None:
        beta_d = np.ascontiguousarray(beta[:design.pd])
        beta_l = np.ascontiguousarray(beta[design.pd:])
    if beta_prev is not None:
        step_d = np.ascontiguousarray(beta[:design.pd] - beta_prev[:design.pd])
        step_l = np.ascontiguousarray(beta[design.pd:] - beta_prev[design.pd:])
    three_scales = not fam.scale_known and fam.loglik_in_pass and fam.name != "gaussian"
    scales = run.scale_est * np.exp(np.array([-LOGLIK_STEP, 0.0, LOGLIK_STEP]))
    for batch in run.source.batches(inputs.select, inputs.where, run.batch_rows):
        cols = batch_columns(batch, inputs.level_names)
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
            extra = {}
            if beta is None:
                mu = _start_mu(fam, link, y, w, run.y_mean)
                eta = link.link(mu)
                fitted = eta - o  # r is measured from the intercept-only anchor
                base = run.start_shift
            else:
                fitted = np.zeros(m)
                kernels.linear_predictor(enc.idx, enc.val, enc.lev, beta_d, beta_l, fitted)
                eta = fitted + o
                with np.errstate(all="ignore"):
                    mu = link.inverse(eta)
                    extra["invalid_rows"] = np.count_nonzero(~fam.valid_mu(mu))
                mu = fam.clip_mu(mu)
                base = None
                if beta_prev is not None:
                    change = np.zeros(m)
                    kernels.linear_predictor(enc.idx, enc.val, enc.lev, step_d, step_l, change)
                    extra["max_eta_change"] = np.max(np.abs(change), initial=0.0)
                if fam.estimates_nuisance:
                    extra["nuisance_score"], extra["nuisance_info"] = fam.nuisance_sums(y, mu, w)
            dmu = link.mu_eta(eta)
            var = fam.variance(mu)
            wz = w * dmu * dmu / var
            r = (y - mu) / dmu
            if base is not None:
                r = r + (fitted - base)
            if not (np.all(np.isfinite(wz)) and np.all(np.isfinite(r))):
                raise FitError(
                    f"the {link.name} link took the mean of the {fam.name} family outside its "
                    f"range in {int(np.sum(~np.isfinite(wz * r)))} row(s) of pass {run.passes} "
                    "(e.g. a log link with non-positive means, an inverse link through zero); "
                    "use the family's default link or check the response")
            acc.add(enc, wz, r, wc)
            # the intercept-and-offset (null) model, one IRLS step per pass
            eta0 = o + run.null_beta0
            mu0 = fam.clip_mu(link.inverse(eta0))
            dmu0 = link.mu_eta(eta0)
            w0 = w * dmu0 * dmu0 / fam.variance(mu0)
            if not three_scales:
                ll = {"loglik": fam.loglik(y, mu, w, 1.0) if fam.scale_known else 0.0}
            else:
                ll = dict(zip(("loglik_lo", "loglik", "loglik_hi"),
                              (fam.loglik(y, mu, w, sc) for sc in scales)))
            acc.add_scalars(
                rows=m, weight=np.sum(w), resid_ss=np.sum(wz * r * r),
                deviance=np.sum(w * fam.unit_deviance(y, mu)),
                pearson=np.sum(w * (y - mu) ** 2 / var),
                response_ss=np.sum(w * (y - mu) ** 2),
                centred_ss=np.sum(w * (y - run.y_mean) ** 2),
                centred_sum=np.sum(w * (y - run.y_mean)), log_weight=np.sum(np.log(w)),
                null_deviance=np.sum(w * fam.unit_deviance(y, mu0)),
                null_weight=np.sum(w0), null_score=np.sum(w0 * (y - mu0) / dmu0), **ll, **extra)
        done += batch.num_rows
        run.callback(Event("advance", task, rows=done, total=total))
    run.callback(Event("end", task, rows=done, total=total))
    return acc.finish()


def _loglik_pass(run: _Run, beta, scale: float) -> float:
    """One light pass for the log-likelihood at the final coefficients and scale (for
    families whose density is too costly to evaluate in every pass)."""
    fam, link, design, inputs = run.fam, run.link, run.design, run.inputs
    beta_d = np.ascontiguousarray(beta[:design.pd])
    beta_l = np.ascontiguousarray(beta[design.pd:])
    run.passes += 1
    task = f"pass {run.passes}"
    run.callback(Event("start", task, total=run.profile.rows, message="log-likelihood"))
    t0 = time.perf_counter()
    total = 0.0
    done = 0
    for batch in run.source.batches(inputs.select, inputs.where, run.batch_rows):
        cols = batch_columns(batch, inputs.level_names)
        for sl, enc in design.blocks(cols):
            m = sl.stop - sl.start
            eta = cols[O][sl].copy() if inputs.has_offset else np.zeros(m)
            kernels.linear_predictor(enc.idx, enc.val, enc.lev, beta_d, beta_l, eta)
            w = cols[W][sl] if inputs.has_weights else np.ones(m)
            total += fam.loglik(cols[Y][sl], fam.clip_mu(link.inverse(eta)), w, scale)
        done += batch.num_rows
        run.callback(Event("advance", task, rows=done, total=run.profile.rows))
    run.callback(Event("end", task, rows=done, total=run.profile.rows))
    run.extra_records.append(PassRecord(run.passes, "loglik", float("nan"), float("nan"), [],
                                        time.perf_counter() - t0, done))
    return total


def _start_mu(fam, link, y: np.ndarray, w: np.ndarray, y_mean: float) -> np.ndarray:
    """Per-row starting means (McCullagh & Nelder 1989, §2.5: μ₀ from y, nudged inside
    the mean space); rows where the link of that value is not finite start at the mean."""
    name = fam.name
    if name == "binomial":
        mu = (w * y + 0.5) / (w + 1.0)
    elif name in ("poisson", "negative_binomial", "tweedie"):
        mu = y + 0.1
    else:
        mu = fam.clip_mu(y.copy())
    with np.errstate(all="ignore"):
        bad = ~np.isfinite(link.link(mu))
    if bad.any():
        mu = np.where(bad, y_mean, mu)
    return mu

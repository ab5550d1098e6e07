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

from tallgam.data.inputs import (
    WC,
    check_profile,
    complete_rows_condition,
    model_inputs,
    resolved_expressions,
)
from tallgam.data.profile import DataProfile, add_value_histograms, run_profile
from tallgam.data.scratch import ScratchPolicy
from tallgam.data.sources import Source, open_source
from tallgam.errors import ConvergenceWarning, FitError, TallgamWarning
from tallgam.options import RunOptions
from tallgam.passes.binned import BinnedDesign
from tallgam.passes.design import Design
from tallgam.passes.run import LOGLIK_STEP, LocalPasses, PassPlan
from tallgam.passes.state import PassState
from tallgam.progress import Event, make_callback
from tallgam.solve.constraints import Constraints, check_memory
from tallgam.solve.smoothing import (
    RHO_BOUND,
    Solution,
    select,
    smoothing_uncertainty,
    solve,
)
from tallgam.terms.base import Basis, InterceptBasis


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

    model: object
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


def fit_model(model, data, options: RunOptions) -> FitState:
    """Fit ``model`` (a :class:`tallgam.Model`) to ``data`` as ``options`` say: the
    profile pass, term set-up, data passes until PIRLS converges, the dense stage."""
    callback = make_callback(options.progress)
    source = open_source(data, threads=options.threads)
    owned = source is not data
    old_threads = numba.get_num_threads()
    if options.threads:
        numba.set_num_threads(min(options.threads, numba.config.NUMBA_NUM_THREADS))
    t0 = time.perf_counter()
    runner = None
    try:
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            if options.cluster is not None:  # imported only here: the local path never loads dask
                from tallgam.passes.cluster import ClusterPasses

                runner = ClusterPasses.open(options.cluster, data, source, callback,
                                            threads=options.threads,
                                            min_rows=options.tuning.partition_min_rows)
            else:
                policy = None
                if options.bin_points is not None and options.scratch is not False:
                    folder = options.scratch if isinstance(options.scratch, str) else None
                    policy = ScratchPolicy(folder=folder)
                runner = LocalPasses(source, callback, scratch_policy=policy)
            setup = prepare(model, source, options, callback)
            if model.family.profiled() is not None:
                fs = _profile_family_parameter(setup, runner)
            else:
                fs = _Run(setup, model.family, runner).iterate()
        for w in caught:
            if str(w.message) not in fs.notes:
                fs.notes.append(str(w.message))
            warnings.warn_explicit(w.message, w.category, w.filename, w.lineno)
        fs.seconds = time.perf_counter() - t0
        callback(Event("end", "done"))
    finally:
        numba.set_num_threads(old_threads)
        if runner is not None:
            runner.close()
        if owned:
            source.close()
    return fs


@dataclass
class Setup:
    """What a fit knows before its first data pass: the model's inputs, the profile, the
    design (and its binned form), the run options."""

    model: object
    inputs: object
    profile: DataProfile
    design: Design
    binned: object
    dropped: int
    options: RunOptions
    callback: object


def prepare(model, source: Source, options: RunOptions, callback) -> Setup:
    """The profile pass (with NULL handling and checks) and the terms' bases."""
    inputs = model_inputs(model, source, model.terms)
    callback(Event("start", "profile"))
    profile = run_profile(source, inputs.profile_fields, inputs.rules, model.where,
                          histograms=False)
    dropped = 0
    where = model.where
    if model.missing == "drop" and profile.missing():
        keep = complete_rows_condition(inputs.profile_fields)
        where = f"({model.where}) AND ({keep})" if model.where else keep
        rows_before = profile.rows
        profile = run_profile(source, inputs.profile_fields, inputs.rules, where,
                              histograms=False)
        dropped = rows_before - profile.rows
    inputs.where = where
    check_profile(profile, source, model)
    add_value_histograms(source, profile, inputs.profile_fields,
                         inputs.select_expr(WC) if inputs.has_cweights else None, where,
                         "exposure" if model.exposure else "weights")
    callback(Event("end", "profile", rows=profile.rows))
    if dropped:
        warnings.warn(TallgamWarning(f"{dropped} row(s) with missing or non-finite values were "
                                     "left out (missing='drop')"), stacklevel=3)
    bases: list[Basis] = [InterceptBasis()] + [t.build(profile) for t in model.terms]
    design = Design(bases)
    check_memory(design, model.criterion, options.tuning,
                 options.threads or numba.get_num_threads())
    binned = None
    if options.bin_points is not None:
        binned = BinnedDesign(design, profile, options.bin_points, options.tuning)
    return Setup(model, inputs, profile, design, binned, dropped, options, callback)


PROFILE_XTOL = 5e-4  # a profiled family parameter is found to this tolerance


def _profile_family_parameter(setup: Setup, runner) -> FitState:
    """The family parameter (e.g. the Tweedie power) that maximises the log-likelihood of
    the fitted model: fits at the family's candidates, then a bounded one-dimensional
    search (Brent's method) between the neighbours of the best candidate, each fit started
    from the nearest one done. Its standard error comes from the curvature of the profile
    log-likelihood at the maximum."""
    from scipy.optimize import minimize_scalar

    family = setup.model.family
    spec = family.profiled()
    fits: dict[float, FitState] = {}

    def fit_at(value: float) -> FitState:
        value = float(value)
        if value not in fits:
            setup.callback(Event("note", "profile", message=f"{spec.name} {value:.4g}"))
            near = min(fits, key=lambda v: abs(v - value)) if fits else None
            start = None if near is None else fits[near]
            fits[value] = _Run(setup, family.at(value), runner, start=start).iterate()
        return fits[value]

    grid = sorted(spec.candidates)
    lls = [fit_at(v).loglik for v in grid]
    i = int(np.argmax(lls))
    lo = grid[i - 1] if i > 0 else spec.lower
    hi = grid[i + 1] if i < len(grid) - 1 else spec.upper
    found = minimize_scalar(lambda v: -fit_at(v).loglik, bounds=(lo, hi), method="bounded",
                            options={"xatol": PROFILE_XTOL})
    best = max(fits, key=lambda v: fits[v].loglik)
    se = _profile_standard_error(fits, best, fit_at, spec)
    fs = fits[best]
    fs.passes = sum(f.passes for f in fits.values())
    table = sorted((float(p), float(f.loglik)) for p, f in fits.items())
    fs.extra_statistics["family_profile"] = {
        "parameter": spec.name, "value": float(best), "std_error": se,
        "search_converged": bool(found.success), "points": [list(t) for t in table]}
    fs.notes.append(
        f"{family.name} {spec.name} chosen by profile likelihood: {best:.4f}"
        + (f" (standard error {se:.3g})" if se is not None else "")
        + f" over {len(fits)} fits")
    return fs


def _profile_standard_error(fits: dict, best: float, fit_at, spec) -> float | None:
    """1/√(−ℓ''(p̂)) from a parabola through the profile log-likelihood at p̂ ± h."""
    h = 0.02
    if not (spec.lower < best - h and best + h < spec.upper):
        return None
    y = np.array([fit_at(best - h).loglik, fits[best].loglik, fit_at(best + h).loglik])
    curvature = (y[0] - 2.0 * y[1] + y[2]) / (h * h)
    return float(1.0 / np.sqrt(-curvature)) if curvature < 0 else None


class _Run:
    """The PIRLS iterations of one fit (state between data passes). ``runner`` carries
    out the passes: :class:`~tallgam.passes.run.LocalPasses` here, or a cluster runner."""

    def __init__(self, setup: Setup, family, runner, start: FitState | None = None):
        model = setup.model
        self.setup = setup
        self.model, self.fam, self.link = model, family, model.link
        self.runner, self.inputs, self.design = runner, setup.inputs, setup.design
        self.profile, self.callback = setup.profile, setup.callback
        self.batch_rows = setup.options.batch_rows
        self.binned = setup.binned
        self.start = start
        # e.g. gaussian with the identity link: one pass gives the exact normal equations
        self.single_pass = family.exact_with(model.link)
        self.y_mean = setup.profile.role("response").mean
        self.start_shift = _start_shift(family, model.link, setup.profile)
        self.null_beta0 = self.start_shift
        self.scale_est = 1.0
        self.passes = 0
        self.extra_records: list[PassRecord] = []
        self.searches: list[dict] = []  # smoothing-search history of every selection

    def plan(self, beta, beta_prev=None) -> PassPlan:
        return PassPlan(inputs=self.inputs, design=self.design, family=self.fam,
                        link=self.link, beta=beta, beta_prev=beta_prev,
                        start_shift=self.start_shift, null_beta0=self.null_beta0,
                        y_mean=self.y_mean, scale_est=self.scale_est,
                        batch_rows=self.batch_rows, binned=self.binned,
                        more_passes=not self.single_pass,
                        fused=self.setup.options.tuning.fused_loops)

    def data_pass(self, beta, beta_prev=None) -> PassState:
        self.passes += 1
        state = self.runner.working(self.plan(beta, beta_prev), f"pass {self.passes}",
                                    self.profile.rows)
        self.null_beta0 += _null_step(state)
        return state

    def loglik_pass(self, beta, scale: float) -> float:
        self.passes += 1
        t0 = time.perf_counter()
        total = self.runner.loglik(self.plan(beta), scale, f"pass {self.passes}",
                                   self.profile.rows)
        self.extra_records.append(PassRecord(self.passes, "loglik", float("nan"),
                                             float("nan"), [], time.perf_counter() - t0,
                                             self.profile.rows))
        return total

    def iterate(self) -> FitState:
        """Data passes until the penalized deviance and the linear predictor settle.

        Every pass evaluates one iterate. A step is *worse* when it puts a mean outside
        the family's range (e.g. a negative Poisson mean under the identity link) or raises
        the penalized deviance at the current λ; a worse step is halved towards the last
        accepted iterate. If halving cannot find a better point, the fit stops at the last
        accepted iterate and says it did not converge.
        """
        model, design = self.model, self.design
        scale_known = self.fam.scale_known
        exact = self.single_pass
        history: list[PassRecord] = []
        constraints: Constraints | None = None
        beta = None            # the iterate this pass evaluates; None: the starting means
        accepted = None        # (beta, state, deviance, λ) of the last accepted iterate
        lam = rho = None
        if self.start is not None and not exact:  # a warm start: the previous fit's iterate
            beta = np.array(self.start.beta, dtype=np.float64, copy=True)
            lam = np.array(self.start.solution.lam, dtype=np.float64, copy=True)
            self.scale_est = self.start.scale
        halvings = 0
        converged = stuck = False
        nuisance_moved = False
        last: Solution | None = None
        notes: list[str] = []
        while True:
            t_pass = time.perf_counter()
            state = self.data_pass(beta, accepted[0] if accepted else None)
            if constraints is None:
                constraints = Constraints(design, state.colsum, model.criterion,
                                          self.setup.options.tuning.eliminate_levels)
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
                record = PassRecord(self.passes, "step", dev, pdev,
                                    constraints.user_smoothing(lam),
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
                if lam is not None:  # warm start: from the previous fit's smoothing
                    rho = _rho_of(lam, problem, constraints)
            sol = select(problem, model.criterion, constraints.fixed, start=rho)
            if sol.search is not None:
                self.searches.append({"pass": self.passes, **sol.search})
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
                history[-1].smoothing = constraints.user_smoothing(lam)
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
        fs = self._finish(state, beta, solution, constraints, converged, history, notes,
                          self.setup.dropped, exact)
        if self.binned is not None:
            fs.notes.extend(self.binned.notes())
        return fs

    def _update_nuisance(self, state: PassState) -> bool:
        """One Newton step for a family's estimated extra parameter; True while it moves."""
        if not self.fam.estimates_nuisance:
            return False
        old = self.fam
        new = old.with_nuisance(state.scalars["nuisance_score"], state.scalars["nuisance_info"])
        if not old.nuisance_moved(new):  # settled: freeze it exactly
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
        loglik = fam.final_loglik(sc, deviance, scale, self.scale_est, LOGLIK_STEP)
        if loglik is None:
            loglik = self.loglik_pass(beta, scale)
        sc["deviance"] = deviance
        if exact:  # the pass ran at the starting values; the fit's residuals are the deviance
            sc["response_ss"] = sc["pearson"] = deviance
        fs = FitState(model=self.model, design=self.design, constraints=constraints,
                      profile=self.profile, beta=beta, solution=solution, state=state,
                      scale=scale, converged=converged, passes=self.passes,
                      history=history + self.extra_records,
                      null_deviance=null_dev, loglik=loglik, notes=notes, dropped_rows=dropped,
                      seconds=0.0, expressions=resolved_expressions(self.inputs), family=fam)
        fs.extra_statistics.update(self._dense_summaries(state, beta, solution, constraints,
                                                         scale, n))
        return fs

    # ---- smoothing-search history and term tests: dense stage only, no data pass ----
    def _dense_summaries(self, state, beta, solution, constraints, scale, rows) -> dict:
        """``smoothing_search`` (the search of every selection, its free penalties named)
        and ``term_tests`` (see :mod:`tallgam.solve.term_tests`), as JSON types."""
        from tallgam.solve.term_tests import term_tests

        bases = self.design.bases
        out: dict = {}
        if self.searches:
            owners = constraints.penalty_owner
            names = [bases[j].label if owners.count(j) == 1
                     else f"{bases[j].label} #{owners[:k + 1].count(j)}"
                     for k, j in enumerate(owners)]
            out["smoothing_search"] = {
                "penalties": [names[k] for k, f in enumerate(constraints.fixed) if f is None],
                "steps": self.searches}
        problem = constraints.problem(state, beta, 1.0 if self.fam.scale_known else None)
        uncertainty = (smoothing_uncertainty(problem, solution, constraints.fixed)
                       if self.model.criterion == "reml" else None)
        penalized = [j in constraints.penalty_owner for j in range(len(bases))]
        out["term_tests"] = term_tests([b.label for b in bases], constraints.free_slices,
                                       penalized, solution, problem.A, scale,
                                       self.fam.scale_known, rows, constraints.eliminated_term,
                                       uncertainty)
        return out
    # ---- end of smoothing-search history and term tests ----


ETA_TOLERANCE = 1e-6  # largest change of the linear predictor between the last two iterates


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
    from tallgam.solve.smoothing import relative_scale

    base = relative_scale(problem)
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


def _start_shift(family, link, profile: DataProfile) -> float:
    """A constant near the mean of η − offset at the start, to centre the residuals."""
    y = profile.role("response").mean
    mu = np.array([family.start_mean(y if y is not None else 0.0)])
    with np.errstate(all="ignore"):
        eta = float(link.link(mu)[0])
    if not np.isfinite(eta):
        eta = 0.0
    exposure, offset = profile.role("exposure"), profile.role("offset")
    if exposure is not None and link.multiplicative:
        eta -= np.log(max(exposure.mean, 1e-300))
    if offset is not None:
        eta -= offset.mean
    return float(eta) if np.isfinite(eta) else 0.0

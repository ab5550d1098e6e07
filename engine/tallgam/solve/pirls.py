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
from tallgam.data.sources import Source, open_source
from tallgam.errors import ConvergenceWarning, DataError, FitError, SpecError, TallgamWarning
from tallgam.model import Model
from tallgam.passes.design import Design
from tallgam.passes.run import LOGLIK_STEP, LocalPasses, PassPlan
from tallgam.passes.state import PassState
from tallgam.progress import Event, make_callback
from tallgam.solve.constraints import Constraints
from tallgam.solve.smoothing import (
    RHO_BOUND,
    Solution,
    select,
    smoothing_uncertainty,
    solve,
)
from tallgam.terms import Basis, InterceptBasis


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
              progress=False, cluster=None, discretize: bool | int = False,
              scratch: str | bool | None = None):
    from tallgam.outputs.result import FitResult

    if int(batch_rows) < 1:
        raise DataError(f"batch_rows must be a positive integer, got {batch_rows!r}")
    points = _grid_points(discretize)
    policy = _scratch_policy(scratch) if points else None
    callback = make_callback(progress)
    source = open_source(data, threads=threads)
    owned = source is not data
    old_threads = numba.get_num_threads()
    if threads:
        numba.set_num_threads(min(int(threads), numba.config.NUMBA_NUM_THREADS))
    t0 = time.perf_counter()
    runner = None
    try:
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            if cluster is not None:  # imported only here: the local path never loads dask
                from tallgam.passes.cluster import ClusterPasses

                runner = ClusterPasses.open(cluster, data, source, callback, threads=threads)
            else:
                runner = LocalPasses(source, callback, cache=policy)
            if getattr(model.family, "grid", None):
                fs = _profile_tweedie_power(model, source, int(batch_rows), callback, runner,
                                            points)
            else:
                fs = _fit(model, source, int(batch_rows), callback, runner, points)
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
    return FitResult.from_state(fs)


def _grid_points(discretize) -> int | None:
    """discretize= as grid values per binned column (None: not discretized)."""
    from tallgam.passes.binned import DEFAULT_POINTS, MIN_POINTS

    if discretize is None or discretize is False:
        return None
    if discretize is True:
        return DEFAULT_POINTS
    if isinstance(discretize, (int, np.integer)) and int(discretize) >= MIN_POINTS:
        return int(discretize)
    raise SpecError(f"discretize takes False, True or a number of grid values of at least "
                    f"{MIN_POINTS} for binned columns, got {discretize!r}")


def _scratch_policy(scratch):
    """scratch= as a :class:`~tallgam.data.scratch.ScratchPolicy` (None: no scratch copy)."""
    import os

    from tallgam.data.scratch import ScratchPolicy

    if scratch is False:
        return None
    if scratch is None or scratch is True:
        return ScratchPolicy()
    folder = os.fspath(scratch)
    if not os.path.isdir(folder):
        raise SpecError(f"the scratch folder {folder!r} does not exist; create it, or pass "
                        "scratch=None for the system's temporary folder")
    return ScratchPolicy(folder=folder)


def _profile_tweedie_power(model: Model, source: Source, batch_rows: int, callback,
                           runner, points: int | None = None) -> FitState:
    """Fit at every candidate Tweedie power, then at the maximum of a parabola through the
    best candidate and its neighbours; keep the fit with the highest log-likelihood."""
    from dataclasses import replace

    grid = model.family.grid
    fits: dict[float, FitState] = {}
    for p in grid:
        callback(Event("note", "profile", message=f"tweedie power {p:g}"))
        fits[p] = _fit(replace(model, family=model.family.at_power(p)), source, batch_rows,
                       callback, runner, points)
    lls = np.array([fits[p].loglik for p in grid])
    i = int(np.argmax(lls))
    if 0 < i < len(grid) - 1:
        x, y = np.array(grid[i - 1:i + 2]), lls[i - 1:i + 2]
        a, b, _ = np.polyfit(x, y, 2)
        if a < 0:
            p_star = float(np.clip(-b / (2 * a), x[0], x[2]))
            if min(abs(p_star - g) for g in grid) > 1e-3:
                fits[p_star] = _fit(replace(model, family=model.family.at_power(p_star)),
                                    source, batch_rows, callback, runner, points)
    best = max(fits, key=lambda p: fits[p].loglik)
    fs = fits[best]
    fs.passes = sum(f.passes for f in fits.values())
    table = sorted((float(p), float(f.loglik)) for p, f in fits.items())
    fs.extra_statistics["power_profile"] = [list(t) for t in table]
    fs.notes.append(
        "tweedie power chosen by profile likelihood: "
        + ", ".join(f"{p:.3g} → {ll:.6g}" for p, ll in table) + f"; kept {best:.4g}")
    return fs


def _fit(model: Model, source: Source, batch_rows: int, callback, runner,
         points: int | None = None) -> FitState:
    fam = model.family
    inputs = model_inputs(model, source, model.terms)
    callback(Event("start", "profile"))
    profile = run_profile(source, inputs.profile_fields, inputs.rules, model.where,
                          histograms=False)
    dropped = 0
    where = model.where
    if model.missing == "drop" and any(
            fp.nulls + fp.nonfinite for fp in profile.fields.values()):
        keep = complete_rows_condition(inputs.profile_fields)
        where = f"({model.where}) AND ({keep})" if model.where else keep
        rows_before = profile.rows
        profile = run_profile(source, inputs.profile_fields, inputs.rules, where,
                              histograms=False)
        dropped = rows_before - profile.rows
    inputs.where = where
    check_profile(profile, source, model)
    add_value_histograms(source, profile, inputs.profile_fields,
                         inputs.select_expr(WC) if inputs.has_cweights else None, where)
    callback(Event("end", "profile", rows=profile.rows))
    if dropped:
        warnings.warn(TallgamWarning(f"{dropped} row(s) with missing or non-finite values were "
                                     "left out (missing='drop')"), stacklevel=3)
    bases: list[Basis] = [InterceptBasis()] + [t.build(profile) for t in model.terms]
    design = Design(bases)
    discrete = None
    if points is not None:
        from tallgam.passes.binned import DiscreteDesign

        discrete = DiscreteDesign(design, profile, points)
    run = _Run(model, fam, runner, inputs, design, profile, batch_rows, callback, discrete)
    fs = run.iterate(dropped)
    if discrete is not None:
        fs.notes.extend(discrete.notes())
    return fs


class _Run:
    """The PIRLS iterations of one fit (state between data passes). ``runner`` carries
    out the passes: :class:`~tallgam.passes.run.LocalPasses` here, or a cluster runner."""

    def __init__(self, model, fam, runner, inputs, design, profile, batch_rows, callback,
                 discrete=None):
        self.model, self.fam, self.link = model, fam, model.link
        self.runner, self.inputs, self.design = runner, inputs, design
        self.profile, self.batch_rows, self.callback = profile, batch_rows, callback
        self.discrete = discrete
        # gaussian with the identity link: one pass gives the exact normal equations
        self.single_pass = fam.name == "gaussian" and model.link.name == "identity"
        self.y_mean = profile["response"].mean
        self.start_shift = _start_shift(model, profile)
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
                        batch_rows=self.batch_rows, discrete=self.discrete,
                        more_passes=not self.single_pass)

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
        exact = self.single_pass
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
                                       self.fam.scale_known, rows, constraints.eliminated,
                                       uncertainty)
        return out
    # ---- end of smoothing-search history and term tests ----


ETA_TOLERANCE = 1e-6  # largest change of the linear predictor between the last two iterates


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
    from tallgam.solve.smoothing import _relative_scale

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



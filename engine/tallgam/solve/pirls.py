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

import tempfile
import time
import warnings
from dataclasses import dataclass, field, replace

import numba
import numpy as np
from threadpoolctl import threadpool_limits

from tallgam.atomic import remove_stale
from tallgam.data.inputs import (
    WC,
    check_profile,
    complete_rows_condition,
    model_inputs,
    resolved_expressions,
)
from tallgam.data.profile import DataProfile
from tallgam.data.scratch import RowValues, ScratchPolicy
from tallgam.data.sources import Source, open_source
from tallgam.errors import ConvergenceWarning, FitError, SpecError, TallgamWarning
from tallgam.options import RunOptions
from tallgam.passes.binned import choose_passes
from tallgam.passes.design import Design
from tallgam.passes.run import LOGLIK_STEP, LocalPasses, PassPlan, StartModel
from tallgam.passes.state import PassState
from tallgam.progress import Event, make_callback
from tallgam.solve.checkpoint import Checkpoint, Recorded, data_identity, digest
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
    null_beta0: float | None = None  # the null model's intercept at the end


def fit_model(model, data, options: RunOptions, start=None) -> FitState:
    """Fit ``model`` (a :class:`tallgam.Model`) to ``data`` as ``options`` say: the
    profile pass, term set-up, data passes until PIRLS converges, the dense stage.
    ``start``: a previous fit of the same model (a :class:`~tallgam.FitResult`) whose
    predictions start the iterations (a refit)."""
    callback = make_callback(options.progress)
    source = open_source(data, threads=options.threads)
    owned = source is not data
    old_threads = numba.get_num_threads()
    if options.threads:
        numba.set_num_threads(min(options.threads, numba.config.NUMBA_NUM_THREADS))
    t0 = time.perf_counter()
    runner = checkpoint = None
    blas = threadpool_limits(options.tuning.blas_threads or None, user_api="blas")
    try:
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            if options.cluster is not None:  # imported only here: the local path never loads dask
                from tallgam.passes.cluster import ClusterPasses

                runner = ClusterPasses.open(options.cluster, data, source, callback,
                                            threads=options.threads,
                                            min_rows=options.tuning.partition_min_rows,
                                            scratch=options.scratch is not False)
            else:
                folder = options.scratch if isinstance(options.scratch, str) else None
                # scratch copies of killed fits go now, whether or not this fit makes one
                remove_stale(folder or tempfile.gettempdir())
                runner = LocalPasses(source, callback, scratch_policy=(
                    None if options.scratch is False else ScratchPolicy(folder=folder)))
            if options.checkpoint is not None:
                checkpoint = Checkpoint(options.checkpoint,
                                        _job_key(model, data, source, options, start)).open()
                runner = Recorded(runner, checkpoint)
            setup = prepare(model, source, options, callback, runner)
            begin = _start_of(start, setup) if start is not None else {}
            if model.family.profiled() is not None:
                fs = _profile_family_parameter(setup, runner, begin)
            else:
                if not begin:
                    begin = _remembered(runner, "sample start",
                                        lambda: _sample_start(setup, model.family, runner))
                family = begin.pop("family", model.family)
                report = begin.pop("report", None)
                fs = _Run(setup, family, runner, **begin).iterate()
                if report is not None:
                    fs.extra_statistics["sample"] = report
                    fs.notes.append(
                        f"started from a sample of {report['rows']:,} rows "
                        f"({100 * report['share']:.1f}%, {report['passes']} passes in memory)")
            fs.extra_statistics["passes_mode"] = setup.mode
            fs.notes.append(setup.mode_note)
            if start is not None:
                fs.notes.append("started from a previous fit's predictions (start=)")
            if checkpoint is not None and runner.replayed_scans:
                fs.extra_statistics["checkpoint"] = {"replayed_passes": runner.replayed,
                                                     "replayed_scans": runner.replayed_scans}
                if runner.replayed:
                    fs.notes.append(f"resumed from the checkpoint {options.checkpoint}: "
                                    f"{runner.replayed} data passes taken from it")
        for w in caught:
            if str(w.message) not in fs.notes:
                fs.notes.append(str(w.message))
            warnings.warn_explicit(w.message, w.category, w.filename, w.lineno)
        fs.seconds = time.perf_counter() - t0
        if checkpoint is not None:
            checkpoint.remove()
        callback(Event("end", "done"))
    finally:
        blas.restore_original_limits()
        numba.set_num_threads(old_threads)
        if runner is not None:
            runner.close()
        if owned:
            source.close()
    return fs


def _job_key(model, data, source: Source, options: RunOptions, start) -> str:
    """What a checkpoint must belong to: the model, the options that shape the fit, the
    data's identity and the start."""
    from dataclasses import asdict

    parts = {"model": model.to_dict(), "binned": options.binned,
             "tuning": asdict(options.tuning), "data": data_identity(data, source)}
    if start is not None:
        parts["start"] = [np.asarray(start.coefficients_raw, dtype=np.float64),
                          start.smoothing]
    return digest(parts)


def _remembered(runner, call: str, compute) -> dict:
    """``compute()`` (a sample start), through the checkpoint when the fit keeps one."""
    if not isinstance(runner, Recorded):
        return compute()
    record = runner.remember(call, lambda: _plain_begin(compute()))
    warm = record.get("warm")
    return {**record, "warm": Warm(**warm)} if warm is not None else record


def _plain_begin(begin: dict) -> dict:
    warm = begin.get("warm")
    return {**begin, "warm": vars(warm)} if warm is not None else begin


def _start_of(previous, setup: Setup) -> dict:
    """What a refit takes from a previous fit (``start=``): its linear predictor (the
    first pass's starting means), its smoothing parameters (the first selection's start)
    and its family parameters. SpecError when it is not a fit of the same model."""
    model, old = setup.model, previous.model
    mine = [t.label for t in model.terms]
    theirs = [t.label for t in old.terms]
    differences = []
    if old.response != model.response:
        differences.append(f"response {old.response!r} instead of {model.response!r}")
    if old.family.name != model.family.name or old.link.name != model.link.name:
        differences.append(f"{old.family.name}/{old.link.name} instead of "
                           f"{model.family.name}/{model.link.name}")
    if theirs != mine:
        differences.append(f"terms {', '.join(theirs)} instead of {', '.join(mine)}")
    if differences:
        raise SpecError("start= must be a fit of the same model; the one given has "
                        + "; ".join(differences))

    begin = {"start": StartModel(Design(list(previous.bases)),
                                 np.asarray(previous.coefficients_raw, dtype=np.float64)),
             "start_smoothing": dict(previous.smoothing)}
    params = previous.statistics.get("family_parameters") or {}
    begin["family"] = model.family.started_at(params)
    return begin


def _sample_start(setup: Setup, family, runner) -> dict:
    """PIRLS on a sample of the rows, held in memory, as the start of the full passes: its
    coefficients, smoothing and family parameters (a :class:`Warm` start). Empty when the
    data are too small for a sample to pay. The full passes go on from there to the
    full-data optimum; the sample only saves passes over the data."""
    tuning = setup.options.tuning
    n = setup.rows
    size = min(max(tuning.sample_share * n, tuning.sample_min_rows), tuning.sample_max_rows)
    if tuning.sample_share <= 0 or family.exact_with(setup.model.link) or size > 0.5 * n:
        return {}
    share = size / n
    setup.callback(Event("start", "sample"))
    table = runner.sample(setup.inputs, share)
    setup.callback(Event("end", "sample", rows=table.num_rows))
    if table.num_rows < tuning.sample_min_rows // 2:
        return {}
    sample = open_source(table, threads=setup.options.threads)
    local = LocalPasses(sample, setup.callback, scratch_policy=ScratchPolicy(memory=True))
    sub = replace(setup, inputs=setup.inputs.over_selected(), pass_rows=table.num_rows)
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")   # a start: its own troubles show in the fit
            try:
                fs = _Run(sub, family, local, name="sample pass").iterate()
            except FitError:
                return {}
    finally:
        local.close()
        sample.close()
    warm = Warm(np.array(fs.beta, copy=True), np.array(fs.solution.lam, copy=True), fs.scale,
                fs.family if family.estimates_nuisance else None, fs.null_beta0)
    return {"warm": warm, "report": {"rows": int(table.num_rows), "share": float(share),
                                     "passes": int(fs.passes),
                                     "converged": bool(fs.converged)}}


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
    values: RowValues
    mode: str = "exact"          # "exact" or "binned"
    mode_note: str = ""          # why
    pass_rows: int | None = None  # rows a pass reads when not the profile's (a sample)

    @property
    def rows(self) -> int:
        """Rows a data pass reads."""
        return self.pass_rows if self.pass_rows is not None else self.profile.rows


def prepare(model, source: Source, options: RunOptions, callback, runner=None) -> Setup:
    """The profile pass (with NULL handling and checks) and the terms' bases. ``runner``
    reads the data for the profile (:class:`~tallgam.passes.run.LocalPasses` over
    ``source`` when None; a cluster runner profiles the parts on its workers)."""
    runner = runner or LocalPasses(source)
    inputs = model_inputs(model, source, model.terms)
    fields, rules = inputs.profile_fields, inputs.rules
    callback(Event("start", "profile"))
    profile = runner.profile_sums(fields, rules, model.where).profile(fields, rules)
    dropped = 0
    where = model.where
    if model.missing == "drop" and profile.missing():
        keep = complete_rows_condition(fields)
        where = f"({model.where}) AND ({keep})" if model.where else keep
        rows_before = profile.rows
        profile = runner.profile_sums(fields, rules, where).profile(fields, rules)
        dropped = rows_before - profile.rows
    inputs.where = where
    check_profile(profile, source, model)
    weight = inputs.select_expr(WC) if inputs.has_cweights else None
    runner.histogram_sums(profile, fields, weight, where).apply(
        profile, "exposure" if model.exposure else "weights")
    callback(Event("end", "profile", rows=profile.rows))
    if dropped:
        warnings.warn(TallgamWarning(f"{dropped} row(s) with missing or non-finite values were "
                                     "left out (missing='drop')"), stacklevel=3)
    bases: list[Basis] = [InterceptBasis()] + [t.build(profile) for t in model.terms]
    design = Design(bases)
    check_memory(design, model.criterion, options.tuning,
                 options.threads or numba.get_num_threads())
    binned, note = None, "exact passes (binned=False)"
    if options.auto_binned or options.bin_points is not None:
        binned, note = choose_passes(design, profile, options.tuning, options.bin_points)
    return Setup(model, inputs, profile, design, binned, dropped, options, callback,
                 RowValues.of(inputs, profile), "binned" if binned is not None else "exact",
                 note)


PROFILE_XTOL = 5e-4  # a profiled family parameter is found to this tolerance


def _profile_family_parameter(setup: Setup, runner, begin: dict) -> FitState:
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
            if near is None:  # the first fit: from a previous fit's predictions, if given
                run = _Run(setup, family.at(value), runner, **begin)
            else:
                run = _Run(setup, family.at(value), runner, warm=warm_of(fits[near]))
            fits[value] = run.iterate()
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


@dataclass
class Warm:
    """An iterate to start PIRLS from: raw coefficients of the same design, smoothing
    parameters in the order of the constraints' penalties (or None), the scale estimate,
    the family as fitted (estimated parameters filled in) and the null model's intercept."""

    beta: np.ndarray
    lam: np.ndarray | None
    scale: float
    family: object = None
    null_beta0: float | None = None


def warm_of(fs: FitState) -> Warm:
    """The end of a fit as the start of another over the same design."""
    return Warm(np.array(fs.beta, dtype=np.float64, copy=True),
                np.array(fs.solution.lam, dtype=np.float64, copy=True), fs.scale)


class _Run:
    """The PIRLS iterations of one fit (state between data passes). ``runner`` carries
    out the passes: :class:`~tallgam.passes.run.LocalPasses` here, or a cluster runner.

    ``warm``: start from an iterate of the same design (a fit nearby, or the fit to a
    sample of the rows); ``start``: start from a previous fit's linear predictor (a refit,
    :class:`~tallgam.passes.run.StartModel`) with its smoothing ``start_smoothing`` (λ by
    term label, as a fit result holds them); ``name``:
    the progress task of a pass ("pass" or "sample pass")."""

    def __init__(self, setup: Setup, family, runner, warm: Warm | None = None,
                 start: StartModel | None = None, start_smoothing: dict | None = None,
                 name: str = "pass"):
        model = setup.model
        self.setup = setup
        self.tuning = setup.options.tuning
        self.model, self.fam, self.link = model, family, model.link
        if warm is not None and warm.family is not None:
            self.fam = warm.family
        self.runner, self.inputs, self.design = runner, setup.inputs, setup.design
        self.profile, self.callback = setup.profile, setup.callback
        self.rows = setup.rows
        self.batch_rows = setup.options.batch_rows
        self.binned = setup.binned
        self.warm = warm
        self.start_model = start
        self.start_smoothing = start_smoothing
        self.name = name
        # e.g. gaussian with the identity link: one pass gives the exact normal equations
        self.single_pass = family.exact_with(model.link)
        self.y_mean = setup.profile.role("response").mean
        self.start_shift = _start_shift(family, model.link, setup.profile)
        self.null_beta0 = self.start_shift
        if warm is not None and warm.null_beta0 is not None:
            self.null_beta0 = warm.null_beta0
        self.scale_est = 1.0
        self.pass_scale = 1.0
        self.passes = 0
        self.column_sums = True
        self.extra_records: list[PassRecord] = []
        self.searches: list[dict] = []  # smoothing-search history of every selection
        self.frozen: dict[int, float] = {}     # penalty -> λ held (effectively infinite)
        self.at_bound: dict[int, int] = {}     # penalty -> selections in a row near-null

    def plan(self, beta, beta_prev=None) -> PassPlan:
        tuning = self.tuning
        return PassPlan(inputs=self.inputs, design=self.design, family=self.fam,
                        link=self.link, beta=beta, beta_prev=beta_prev,
                        start_shift=self.start_shift, null_beta0=self.null_beta0,
                        y_mean=self.y_mean, scale_est=self.scale_est,
                        batch_rows=self.batch_rows, binned=self.binned,
                        more_passes=not self.single_pass, fused=tuning.fused_loops,
                        values=self.setup.values, blas_width=tuning.blas_width,
                        start=self.start_model if beta is None else None,
                        column_sums=self.column_sums)

    def data_pass(self, beta, beta_prev=None) -> PassState:
        self.passes += 1
        self.pass_scale = self.scale_est  # the scale this pass evaluates the density at
        state = self.runner.working(self.plan(beta, beta_prev), f"{self.name} {self.passes}",
                                    self.rows)
        self.null_beta0 += _null_step(state)
        return state

    def loglik_pass(self, beta, scale: float) -> float:
        self.passes += 1
        t0 = time.perf_counter()
        total = self.runner.loglik(self.plan(beta), scale, f"{self.name} {self.passes}",
                                   self.rows)
        self.extra_records.append(PassRecord(self.passes, "loglik", float("nan"),
                                             float("nan"), [], time.perf_counter() - t0,
                                             self.rows))
        return total

    def iterate(self) -> FitState:
        """Data passes until the next step would change nothing.

        Every pass evaluates one iterate. A step is *worse* when it puts a mean outside
        the family's range (e.g. a negative Poisson mean under the identity link) or raises
        the penalized deviance at the current λ; a worse step is halved towards the last
        accepted iterate (an accelerated step first falls back to the plain one). If
        halving cannot find a better point, the fit stops at the last accepted iterate and
        says it did not converge.

        After each pass the working model gives the next iterate; when that step would move
        the fitted values by less than the tolerance (:func:`_step_is_negligible`), the fit
        has converged and reports the iterate the pass evaluated, without another pass.
        When successive steps shrink slowly (linear convergence: a non-canonical link,
        weakly identified terms), the next iterate is accelerated (:class:`_Anderson`).
        """
        model, design = self.model, self.design
        scale_known = self.fam.scale_known
        exact = self.single_pass
        history: list[PassRecord] = []
        constraints: Constraints | None = None
        beta = None            # the iterate this pass evaluates; None: the starting means
        accepted = None        # (beta, state, deviance, λ) of the last accepted iterate
        lam = rho = None
        foreign = False        # beta satisfies another fit's constraints (a sample's)
        if self.warm is not None and not exact:
            beta = np.array(self.warm.beta, dtype=np.float64, copy=True)
            lam = None if self.warm.lam is None else np.array(self.warm.lam, dtype=np.float64)
            self.scale_est = self.warm.scale
            foreign = True
        halvings = 0
        converged = stuck = False
        nuisance_moved = False
        plain_target = None    # the plain iterate, while an accelerated one is tried
        mixer = _Anderson()    # acceleration of slow, linearly converging steps
        last: Solution | None = None
        notes: list[str] = []
        halving_cause = None
        while True:
            t_pass = time.perf_counter()
            state = self.data_pass(beta, accepted[0] if accepted else None)
            if constraints is None:
                constraints = Constraints(design, state.colsum, model.criterion,
                                          self.tuning.eliminate_levels)
                self.column_sums = False
                if lam is None and self.start_smoothing and not exact:
                    lam = _smoothing_by_label(self.start_smoothing, constraints)
            dev = state.scalars["deviance"]
            rows = int(state.scalars["rows"])
            pdev = dev
            if foreign and not dev <= state.scalars["null_deviance"]:
                # the sample's fit is worse on the data than the intercept alone (the sample
                # missed a region the data reach): start from the family's means instead
                history.append(PassRecord(self.passes, "rejected", dev, dev, [],
                                          time.perf_counter() - t_pass, rows))
                notes.append("the fit to the sample fitted the data worse than the intercept "
                             "alone; the passes started from the response instead")
                beta = lam = None
                foreign = False
                continue
            if beta is None:
                history.append(PassRecord(self.passes, "start", dev, dev, [],
                                          time.perf_counter() - t_pass, rows))
            else:
                # deviances of two passes compare only if the family's parameters were equal
                comparable = not nuisance_moved
                nuisance_moved = self._update_nuisance(state)
                pdev = dev + _penalty_value(constraints, lam, beta) if lam is not None else dev
                record = PassRecord(self.passes, "step", dev, pdev,
                                    [] if lam is None else constraints.user_smoothing(lam),
                                    time.perf_counter() - t_pass, rows,
                                    int(state.scalars["invalid_rows"]))
                invalid = state.scalars["invalid_rows"] > 0
                prev_pdev = np.inf
                if accepted is not None and accepted[2] is not None:
                    prev_pdev = accepted[2] + _penalty_value(constraints, lam, accepted[0])
                rise = comparable and pdev - prev_pdev > 1e-9 * abs(prev_pdev) + 1e-12
                if plain_target is not None:
                    # an accelerated iterate is judged by its next step (below), and may
                    # raise the penalized deviance at one λ a little: under performance
                    # iteration λ moves too, and it need not fall on the way to the joint
                    # solution; a large rise falls back to the plain iterate
                    rise = comparable and pdev - prev_pdev > ACCELERATED_RISE * abs(prev_pdev)
                if (invalid or rise) and accepted is not None:
                    record.kind = "halved"
                    history.append(record)
                    halving_cause = halving_cause or ("invalid" if invalid else "rise")
                    if plain_target is not None:   # the acceleration overshot
                        mixer.reject()
                        beta, plain_target = plain_target, None
                        continue
                    mixer.reset()
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
            halvings = 0
            anchor = beta if beta is not None else _intercept_only(design, self.start_shift)
            problem = constraints.problem(state, anchor, 1.0 if scale_known else None)
            if last is None:
                constraints.check_identifiable(problem)
                if lam is not None:  # warm start: from the previous fit's smoothing
                    rho = _rho_of(lam, problem, constraints)
            sol = select(problem, model.criterion, self._fixed(constraints), start=rho)
            if sol.search is not None:
                self.searches.append({"pass": self.passes, **sol.search})
            if constraints.shapes:
                sol = constraints.shapes.apply(sol, problem)
            notes.extend(n for n in sol.notes if n not in notes)
            new_beta = constraints.to_raw(sol.gamma)
            if plain_target is not None and not exact:
                step = constraints.to_free(new_beta) - constraints.to_free(beta)
                if _weighted_size(problem, step) > mixer.last_size(problem):
                    history[-1].kind = "rejected"   # the acceleration did not help
                    mixer.reject()
                    beta, plain_target = plain_target, None
                    continue
            plain_target = None
            last = sol
            rho = _rho_of(sol.lam, problem, constraints)
            self._freeze(sol, constraints)
            self.scale_est = _scale_estimate(state, sol, scale_known, exact)
            if exact:
                history[-1].kind = "exact"
                history[-1].smoothing = constraints.user_smoothing(sol.lam)
                beta, lam = new_beta, sol.lam
                converged = True
                break
            step = None
            if beta is not None and not foreign:
                step = constraints.to_free(new_beta) - constraints.to_free(beta)
                size = _weighted_size(problem, step)
                if _step_is_negligible(size, state, sol, constraints, new_beta - beta,
                                       pdev, model.tolerance,
                                       self._eta_tolerance(constraints)):
                    converged = True   # report the iterate this pass evaluated, its λ
                    break
            foreign = False
            if beta is not None and self.passes >= model.max_iterations:
                break
            # the iterate just evaluated becomes the anchor of halving; before the first
            # solve that is the intercept-only start (valid means, deviance not evaluated)
            accepted = (anchor, state if beta is not None else None,
                        dev if beta is not None else None, lam)
            target = new_beta
            if step is not None and self.tuning.accelerate:
                mixed = mixer.next(constraints.to_free(beta), step, problem)
                if mixed is not None:
                    plain_target = new_beta
                    target = constraints.to_raw(mixed)
            beta, lam = target, sol.lam
        if exact:
            solution = last
        else:
            solution = _final_solution(constraints, state, beta, lam, last)
        if not converged:
            warnings.warn(ConvergenceWarning(self._not_converged(stuck, halving_cause, history,
                                                                 constraints)), stacklevel=4)
        fs = self._finish(state, beta, solution, constraints, converged, history, notes,
                          self.setup.dropped, exact)
        fs.null_beta0 = self.null_beta0
        if self.binned is not None:
            fs.notes.extend(self.binned.notes())
        return fs

    def _eta_tolerance(self, constraints: Constraints) -> float:
        selecting = self.model.criterion != "fixed" and any(
            f is None for f in constraints.fixed)
        return self.tuning.eta_tolerance_for(self.setup.profile.rows, selecting)

    def _fixed(self, constraints: Constraints) -> list[float | None]:
        """The smoothing parameters the selection must keep: given ones and frozen ones."""
        return [f if f is not None else self.frozen.get(k)
                for k, f in enumerate(constraints.fixed)]

    def _freeze(self, sol: Solution, constraints: Constraints) -> None:
        """Hold a smoothing parameter that is effectively infinite: in two selections in a
        row, the coefficients its penalty acts on carried less than ``FREEZE_EDF`` effective
        degrees of freedom in all (the term is a straight line, or gone). Its criterion is
        flat there, so λ wanders from pass to pass (1e8 one pass, 1e12 the next) without
        changing the fit, and only keeps the fit from settling."""
        for k, edf in enumerate(_penalized_edf(sol, constraints)):
            if constraints.fixed[k] is not None or k in self.frozen:
                continue
            self.at_bound[k] = self.at_bound.get(k, 0) + 1 if edf < FREEZE_EDF else 0
            if self.at_bound[k] >= 2:
                self.frozen[k] = float(sol.lam[k])

    def _not_converged(self, stuck: bool, cause, history, constraints) -> str:
        """The non-convergence warning, naming the likely cause."""
        model = self.model
        if stuck:
            why = ("step halving found no better coefficients; the fit stopped at the last "
                   "accepted iterate")
        else:
            why = "the steps were still moving the fitted values"
        hints = []
        if cause == "invalid" or not self.link.multiplicative and self.fam.mean_floor is not None:
            hints.append(f"the {self.link.name} link lets the {self.fam.name} mean reach the "
                         "boundary of its range (0): steps were cut back there; the family's "
                         f"default link ({self.fam.default_link}) keeps means inside it")
        weak = [self.design.bases[constraints.penalty_owner[k]].label for k in self.frozen]
        steps = [h.penalized_deviance for h in history if h.kind == "step"]
        if len(steps) >= 4 and not hints:
            hints.append("the penalized deviance fell by a nearly constant ratio each pass: "
                         "weakly identified terms (nearly collinear with others, e.g. a "
                         "multiplier that is almost constant, or a term repeating another)"
                         + (f"; terms at their largest smoothing: {', '.join(sorted(set(weak)))}"
                            if weak else ""))
        return (f"PIRLS did not converge in {self.passes} data passes ({why}); the estimates "
                "and statistics are those of the reported iterate. "
                + ("Likely cause: " + "; ".join(hints) + ". " if hints else "")
                + f"Raise max_iterations (now {model.max_iterations}) or check the model.")

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
        loglik = fam.final_loglik(sc, deviance, scale, self.pass_scale, LOGLIK_STEP)
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


ACCELERATED_RISE = 1e-6  # an accelerated iterate may raise the penalized deviance this much
FREEZE_EDF = 1e-3     # a penalty whose coefficients carry less EDF is effectively infinite


def _penalized_edf(sol: Solution, constraints: Constraints) -> list[float]:
    """Per penalty, the effective degrees of freedom of the coefficients it acts on (its
    range in free coordinates; all of an eliminated term's)."""
    out = [0.0] * len(constraints.fixed)
    for blk in constraints.blocks:
        for j, m in enumerate(blk.matrices):
            acts = np.flatnonzero(np.any(m != 0, axis=0)) + blk.sl.start
            out[blk.first + j] = float(np.sum(sol.edf[acts]))
    if constraints.eliminated_term is not None:
        out[-1] = float(np.sum(sol.edf[constraints.free_slices[constraints.eliminated_term]]))
    return out


def _smoothing_by_label(smoothing: dict, constraints: Constraints) -> np.ndarray | None:
    """λ in the constraints' penalty order from λ by term label (a fit result's
    ``smoothing``: a number, or a list for a term with several penalties); None when they
    do not match."""
    queues = {k: list(v) if isinstance(v, (list, tuple)) else [v]
              for k, v in smoothing.items()}
    out = []
    for owner, e in zip(constraints.penalty_owner, constraints.penalty_exponents):
        label = constraints.design.bases[owner].label
        if not queues.get(label):
            return None
        out.append(float(np.ldexp(float(queues[label].pop(0)), e)))  # to internal units
    return np.array(out) if out and np.all(np.isfinite(out)) and min(out) > 0 else None


def _weighted_size(problem, step: np.ndarray) -> float:
    """ΔᵀAΔ = Σᵢ Wᵢ (xᵢΔ)² for a step Δ in free coordinates (eliminated ones last): how far
    the step moves the fitted values, weighted by the working weights."""
    k = problem.A.shape[0]
    dk = step[:k]
    total = float(dk @ problem.A @ dk)
    el = problem.eliminated_block
    if el is not None:
        de = step[k:]
        total += float(de @ (el.d * de)) + 2.0 * float(de @ (el.C @ dk))
    return max(total, 0.0)


def _step_is_negligible(size: float, state: PassState, sol: Solution,
                        constraints: Constraints, raw_step: np.ndarray, pdev: float,
                        tolerance: float, eta_tolerance: float) -> bool:
    """True when the next PIRLS step changes nothing that matters: the fitted values move by
    at most ``eta_tolerance`` (root mean square of the change of η, weighted by the working
    weights), and the penalized deviance the step would gain, ½Δᵀ(A + S_λ)Δ, is at most
    ``tolerance`` of it."""
    total_weight = state.dense[0, 0]   # Σ W: the intercept's diagonal entry
    if total_weight <= 0:
        return False
    rms = np.sqrt(size / total_weight)
    gain = 0.5 * (size + constraints.penalty_value(sol.lam, raw_step))
    return bool(rms <= eta_tolerance and gain <= tolerance * (abs(pdev) + 1e-3))


class _Anderson:
    """Anderson acceleration of the PIRLS map x ↦ g(x) (Anderson 1965; Walker & Ni 2011,
    SIAM J. Numer. Anal. 49:1715): from the last few iterates and their steps fₖ = g(xₖ) − xₖ,
    the next iterate is g(xₖ) − (ΔX + ΔF)γ with γ minimising ‖fₖ − ΔFγ‖ in the working-
    weight norm. Used once two plain steps in a row have shrunk by a steady ratio of at least
    ``SLOW`` (within a factor of three of the one before): PIRLS then converges linearly
    (Fisher scoring with a non-canonical link, weakly identified terms, smoothing that
    moves with the weights); a fit whose steps shrink ever faster (quadratically) is left
    alone."""

    MEMORY = 4
    SLOW = 0.5
    REACH = 10.0   # the accelerated move beyond the plain step, at most this many of it
    GIVE_UP = 2    # rejected accelerations after which a fit goes on without

    def __init__(self):
        self.xs: list[np.ndarray] = []
        self.fs: list[np.ndarray] = []
        self.active = False
        self.slow = 0
        self.ratio = None
        self.rejected = 0

    def reset(self) -> None:
        self.xs, self.fs, self.active, self.slow = [], [], False, 0
        self.ratio = None

    def reject(self) -> None:
        """An accelerated iterate did worse than the plain one: start over; after
        ``GIVE_UP`` such, accelerate no more in this fit."""
        self.reset()
        self.rejected += 1

    def last_size(self, problem) -> float:
        """The working-weight size of the last plain step (infinite when there is none)."""
        return _weighted_size(problem, self.fs[-1]) if self.fs else np.inf

    def next(self, x: np.ndarray, f: np.ndarray, problem) -> np.ndarray | None:
        """The accelerated iterate after evaluating ``x`` with plain step ``f`` (free
        coordinates), or None to take the plain one."""
        if self.rejected >= self.GIVE_UP:
            return None
        if self.fs and len(self.fs[-1]) != len(f):
            self.reset()
        self.xs.append(x)
        self.fs.append(f)
        del self.xs[:-self.MEMORY - 1], self.fs[:-self.MEMORY - 1]
        if len(self.fs) < 2:
            return None
        size = _weighted_size(problem, f)
        prev = _weighted_size(problem, self.fs[-2])
        if prev <= 0.0 or size <= 0.0:
            return None
        ratio = float(np.sqrt(size / prev))
        steady = self.ratio is not None and 1 / 3 <= ratio / self.ratio <= 3
        self.ratio = ratio
        self.slow = self.slow + 1 if ratio >= self.SLOW and steady else 0
        self.active = self.active or self.slow >= 2
        if not self.active:
            return None
        dF = np.array([b - a for a, b in zip(self.fs[:-1], self.fs[1:])]).T
        dX = np.array([b - a for a, b in zip(self.xs[:-1], self.xs[1:])]).T
        gram = np.array([[_weighted_inner(problem, a, b) for b in dF.T] for a in dF.T])
        rhs = np.array([_weighted_inner(problem, a, f) for a in dF.T])
        ridge = 1e-10 * max(np.trace(gram), 1e-300)
        try:
            gamma = np.linalg.solve(gram + ridge * np.eye(len(rhs)), rhs)
        except np.linalg.LinAlgError:
            return None
        extra = -(dX + dF) @ gamma
        reach = np.sqrt(_weighted_size(problem, extra) / size)
        if reach > self.REACH:  # a wild extrapolation: keep it to a sane multiple
            extra *= self.REACH / reach
        return x + f + extra


def _weighted_inner(problem, a: np.ndarray, b: np.ndarray) -> float:
    """aᵀAb in free coordinates (eliminated ones last), the inner product of
    :func:`_weighted_size`."""
    return 0.25 * (_weighted_size(problem, a + b) - _weighted_size(problem, a - b))


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
    """φ at the next iterate, for the next pass: its Pearson statistic as the working model
    predicts it (the working residual sum of squares at the new coefficients; exact for
    the gaussian identity fit, and otherwise off by the square of the step), over n − EDF."""
    if scale_known:
        return 1.0
    n = state.scalars["rows"]
    edf = float(np.sum(sol.edf))
    return max(sol.deviance / max(n - edf, 1.0), 1e-300)


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

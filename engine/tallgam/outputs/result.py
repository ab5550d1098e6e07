"""The fitted model: estimates, uncertainty, fit statistics, prediction and effects.

A :class:`FitResult` holds only p-sized and p × p quantities plus the data profile, so it
is small whatever the number of rows, and it round-trips exactly through the JSON model
file (:mod:`tallgam.modelfile`). Coefficients and covariance are kept in *raw*
coordinates (one per basis column, base levels at zero) so prediction is a plain sparse
product with the same kernels as fitting. The covariance is a
:class:`~tallgam.solve.covariance.Covariance`: a dense matrix, or for a fit with a large
eliminated random effect a structured one that never holds an L × L block.
"""

from __future__ import annotations

import numpy as np
import pyarrow as pa
from scipy import stats

from tallgam.data.profile import DataProfile
from tallgam.data.sources import open_source
from tallgam.errors import SpecError
from tallgam.options import DEFAULT_BATCH_ROWS, RunOptions
from tallgam.passes.design import Design
from tallgam.solve.covariance import Covariance
from tallgam.terms.base import Basis


class FitResult:
    """A fitted additive model. Made by :meth:`tallgam.Model.fit` or :func:`tallgam.load`.

    Attributes
    ----------
    edf : dict, effective degrees of freedom per term label, and ``"total"``.
    smoothing : dict, the smoothing parameter λ of every penalized term (a list when a term
        has several penalties), on the scale of its penalty (∫f''² for curvature).
    scale : the dispersion φ (1 for poisson/binomial/negative binomial).
    deviance, null_deviance, deviance_explained, r2_adjusted (gaussian only), loglik, aic :
        fit statistics.
    criterion : (name, value) of the smoothing criterion at the optimum.
    converged, passes, history : how the iterations went (data passes exclude the profile).
    covariance : the Bayesian covariance of the raw coefficients (:class:`Covariance`);
        ``covariance_raw`` is its p × p array when no term was eliminated.
    """

    def __init__(self, model, bases: list[Basis], beta: np.ndarray,
                 covariance: np.ndarray | Covariance, edf: dict, smoothing: dict, statistics: dict,
                 profile: DataProfile, history: list[dict], notes: list[str], provenance: dict,
                 expressions: dict | None = None):
        self.model = model
        self.bases = bases
        self.design = Design(bases)
        self.coefficients_raw = np.asarray(beta, dtype=np.float64)
        self.covariance = (covariance if isinstance(covariance, Covariance)
                           else Covariance(np.asarray(covariance, dtype=np.float64)))
        self.edf = edf
        self.smoothing = smoothing
        self.statistics = statistics
        self.profile = profile
        self.history = history
        self.notes = notes
        self.provenance = provenance
        self.expressions = dict(expressions or {})  # role -> SQL used at fit time

    # ------------------------------------------------------------------ construction
    @classmethod
    def from_state(cls, fs) -> FitResult:
        from tallgam.version import __version__

        sol, cons, design = fs.solution, fs.constraints, fs.design
        cov_raw = cons.covariance(sol, fs.scale)
        edf = {}
        for b, fsl in zip(design.bases, cons.free_slices):
            edf[b.label] = float(np.sum(sol.edf[fsl]))
        edf["total"] = float(np.sum(sol.edf))
        smoothing: dict = {}
        # in terms order (an eliminated random effect's λ comes last in sol.lam)
        user = cons.user_smoothing(sol.lam)  # internal units → the user's (see terms)
        for k in sorted(range(len(cons.penalty_owner)), key=lambda k: cons.penalty_owner[k]):
            label = design.bases[cons.penalty_owner[k]].label
            smoothing.setdefault(label, []).append(user[k])
        smoothing = {k: (v[0] if len(v) == 1 else v) for k, v in smoothing.items()}
        sc = fs.state.scalars
        n = sc["rows"]
        weight = sc["weight"]
        tss = sc["centred_ss"] - sc["centred_sum"] ** 2 / max(weight, 1e-300)
        dev, null = sc["deviance"], fs.null_deviance
        fam = fs.family or fs.model.family
        p_scale = fam.n_estimated_parameters
        statistics = {
            "rows": int(n),
            "weight": weight,
            "deviance": dev,
            "null_deviance": null,
            "deviance_explained": 1.0 - dev / null if null > 0 else float("nan"),
            "r2_adjusted": (1.0 - (sc["response_ss"] / max(n - edf["total"], 1.0))
                            / (tss / max(n - 1.0, 1.0)))
            if tss > 0 and fam.variance_explained else None,
            "scale": fs.scale,
            "loglik": fs.loglik,
            "aic": -2.0 * fs.loglik + 2.0 * (edf["total"] + p_scale),
            "criterion": sol.criterion_name if fs.model.criterion != "fixed" else "fixed",
            "criterion_value": sol.criterion if np.isfinite(sol.criterion) else None,
            "converged": bool(fs.converged),
            "passes": int(fs.passes),
            "dropped_rows": int(fs.dropped_rows),
            "seconds": fs.seconds,
            "family_parameters": fam.fitted_params(),
            **fs.extra_statistics,
        }
        history = [vars(h) for h in fs.history]
        provenance = {"tallgam_version": __version__,
                      "fitted_at": __import__("datetime").datetime.now(
                          __import__("datetime").timezone.utc).isoformat(timespec="seconds")}
        return cls(fs.model, design.bases, fs.beta, cov_raw, edf, smoothing, statistics,
                   fs.profile.compact(), history, list(fs.notes), provenance, fs.expressions)

    # ------------------------------------------------------------------ statistics
    @property
    def covariance_raw(self) -> np.ndarray:
        """The p × p covariance of the raw coefficients (SpecError for a fit whose large
        random effect was eliminated: use :attr:`covariance`)."""
        return self.covariance.matrix()

    @property
    def scale(self) -> float:
        return self.statistics["scale"]

    @property
    def deviance(self) -> float:
        return self.statistics["deviance"]

    @property
    def null_deviance(self) -> float:
        return self.statistics["null_deviance"]

    @property
    def deviance_explained(self) -> float:
        return self.statistics["deviance_explained"]

    @property
    def r2_adjusted(self) -> float | None:
        """R² with the EDF taken into account; None where a share of variance means
        nothing (every family but the gaussian)."""
        if not self.model.family.variance_explained:
            return None
        return self.statistics.get("r2_adjusted")

    @property
    def loglik(self) -> float:
        return self.statistics["loglik"]

    @property
    def aic(self) -> float:
        return self.statistics["aic"]

    @property
    def criterion(self) -> tuple[str, float | None]:
        return self.statistics["criterion"], self.statistics["criterion_value"]

    @property
    def converged(self) -> bool:
        return self.statistics["converged"]

    @property
    def passes(self) -> int:
        return self.statistics["passes"]

    @property
    def rows(self) -> int:
        return self.statistics["rows"]

    # ---- term tests ----
    @property
    def term_tests(self) -> pa.Table:
        """A test of whether each term is needed, one row per term (intercept excepted):
        ``term``, ``test`` (``"wald"`` for unpenalized terms, ``"wald_truncated"`` for
        penalized ones, Wood 2013), ``statistic`` (the Wald-type statistic T), ``df`` (its
        reference degrees of freedom), ``residual_df`` (the F form's denominator when the
        scale is estimated; null when it is known), ``reference`` (``"chi2"``: T against
        χ²_df, or a weighted sum of χ²₁ for a fractional df; ``"F"``: T/df against
        F(df, residual_df)), ``p_value``, ``edf`` and ``note``. Computed at the end of the
        fit from the dense stage (see :mod:`tallgam.solve.term_tests`); empty for a model
        file written before they existed."""
        rows = self.statistics.get("term_tests") or []
        return pa.Table.from_pylist(
            [{k: r.get(k) for k in TERM_TEST_SCHEMA.names} for r in rows],
            schema=TERM_TEST_SCHEMA)
    # ---- end of term tests ----

    # ------------------------------------------------------------------ coefficients
    def term(self, name: str) -> tuple[Basis, slice]:
        """The basis and raw coefficient range of a term, by label or column name."""
        labels = [b.label for b in self.bases]
        if name in labels:
            i = labels.index(name)
        else:
            hits = [i for i, b in enumerate(self.bases) if name in b.inputs]
            if len(hits) != 1:
                from tallgam.errors import nearest

                raise SpecError(f"no single term {name!r}{nearest(name, labels)}; terms are "
                                f"{', '.join(labels)}")
            i = hits[0]
        return self.bases[i], self.design.slices[i]

    @property
    def coefficients(self) -> pa.Table:
        """One row per raw coefficient: term, name, estimate, std_error (link scale).

        The intercept is the model's intercept as a GLM reads it (linear terms measured
        from 0, not from their mean; see :attr:`intercept`); linear terms are reported per
        unit of their column; base levels are 0 with se 0.
        """
        terms, names, est, se = [], [], [], []
        sd = np.sqrt(np.maximum(self.covariance.diagonal(), 0.0))
        for b, sl in zip(self.bases, self.design.slices):
            unit = b.coefficient_units()
            e, s = self.coefficients_raw[sl] / unit, sd[sl] / unit
            labels = b.coefficient_names()
            terms += [b.label] * len(labels)
            names += labels
            est += list(e)
            se += list(s)
        first = self.design.slices[0].start
        est[first], se[first] = self.intercept, self._intercept_se()
        return pa.table({"term": terms, "name": names, "estimate": np.array(est),
                         "std_error": np.array(se)})

    def _intercept_contrast(self) -> np.ndarray:
        a = np.zeros(self.design.p)
        a[self.design.slices[0].start] = 1.0
        for b, sl in zip(self.bases, self.design.slices):
            c = b.intercept_contrast()
            if c is not None:
                a[sl] = c
        return a

    @property
    def intercept(self) -> float:
        """The model's intercept on the link scale as a GLM reads it: the linear
        predictor with linear terms' columns at 0, level terms at their base level and
        smooth terms at 0 (their centred level). The base rate that pricing uses, at the
        reference point, is :attr:`RelativityTables.base_rate` (``fit.relativities()``)."""
        return float(self._intercept_contrast() @ self.coefficients_raw)

    def _intercept_se(self) -> float:
        return float(np.sqrt(max(self.covariance.contrast_variance(self._intercept_contrast()),
                                 0.0)))

    # ------------------------------------------------------------------ prediction
    def predict(self, data, output: str = "response", *, se: bool = False,
                with_offset: bool = True, unseen: str = "error",
                batch_rows: int = DEFAULT_BATCH_ROWS):
        """Predictions for every row of ``data`` (any source), in row order.

        ``output``: ``"response"`` (μ, including exposure/offset unless
        ``with_offset=False``), ``"link"`` (η) or ``"terms"`` (a dict of each term's
        contribution on the link scale). With ``se=True`` returns ``(values, std_errors)``
        (delta method on the response scale). Spline columns outside the training range
        are held at the boundary, with a warning that gives the counts.
        """
        from tallgam.outputs.scoring import OUTPUTS, Scorer

        if output not in OUTPUTS:
            raise SpecError(f"output must be one of {', '.join(OUTPUTS)}, got {output!r}")
        batch_rows = RunOptions(batch_rows=batch_rows).batch_rows
        source = open_source(data)
        owned = source is not data
        try:
            scorer = Scorer(self, source, with_offset=with_offset, unseen=unseen)
            parts = list(scorer.batches(batch_rows, se=se, terms=output == "terms"))
        finally:
            if owned:
                source.close()
        scorer.report.warn()
        if output == "terms":
            labels = [b.label for b in self.bases]
            return {lab: _cat([p[1][lab] for p in parts]) for lab in labels}
        values = _cat([p[1][output] for p in parts])
        if se:
            return values, _cat([p[1][f"{output}_se"] for p in parts])
        return values

    def score(self, data, output_path, *, cluster=None, **kwargs):
        """Stream predictions of ``data`` to a Parquet or CSV file, by the extension of
        ``output_path`` (see :func:`tallgam.outputs.scoring.score_to_file` for the options,
        ``where`` among them).

        With ``cluster`` (a ``distributed.Client``, scheduler address or Dask cluster
        object) the partitions of ``data`` are scored on the cluster's workers and
        ``output_path`` becomes a directory of Parquet part files, which appears only when
        every part succeeded (see docs/distributed.md)."""
        if cluster is not None:
            from tallgam.passes.cluster import score_to_directory

            if kwargs.pop("where", None):
                raise SpecError("scoring on a cluster reads whole files, so it takes no row "
                                "filter (where); write the filtered rows to files first, or "
                                "score without the cluster")
            if str(output_path).lower().endswith(".csv"):
                raise SpecError("scoring on a cluster writes a folder of Parquet part files; "
                                f"give a folder name, not {str(output_path)!r}")

            return score_to_directory(self, data, output_path, cluster=cluster, **kwargs)
        from tallgam.outputs.scoring import score_to_file

        return score_to_file(self, data, output_path, **kwargs)

    # ------------------------------------------------------------------ effects
    def effect(self, term: str, *, points: int = 200, level: float = 0.95) -> pa.Table:
        """A term's estimated effect with pointwise Bayesian bands.

        Smooth and linear terms: up to ``points`` values across the training range, placed
        where the training data are (a grid of up to 50 per axis for surfaces; every level
        for per-level curves); level terms: every level. Columns: the term's input
        columns, ``estimate``, ``std_error``, ``lower``, ``upper`` on the link scale
        (centred as in the fit), and for the log link ``relativity`` = exp(estimate) with
        its bounds.
        """
        from tallgam.terms.base import term_matrix

        b, sl = self.term(term)
        grid = b.effect_grid(points, self.profile)
        beta = self.coefficients_raw[sl]
        if b.group == "levels":  # one indicator per row: read the levels, form no matrix
            code = b.codes({c: pa.array(v, type=pa.string()) for c, v in grid.items()})
            est = beta[code]
            var = self.covariance.diagonal()[sl][code]
        else:
            X = term_matrix(b, grid)
            est = X @ beta
            var = self.covariance.term_variances(sl, X)
        se = np.sqrt(np.maximum(var, 0.0))
        z = stats.norm.ppf(0.5 + level / 2.0)
        cols = dict(grid)
        cols.update(estimate=est, std_error=se, lower=est - z * se, upper=est + z * se)
        if self.model.link.multiplicative:
            cols.update(relativity=np.exp(est), relativity_lower=np.exp(est - z * se),
                        relativity_upper=np.exp(est + z * se))
        return pa.table(cols)

    def relativities(self, *, reference: dict | None = None, level: float = 0.95,
                     data=None, where: str | None = None):
        """Relativity tables of every term, with the base rate (see
        :mod:`tallgam.outputs.tables`).

        ``reference`` overrides the reference value of numeric columns (default: the
        exposure-weighted median of the training data). With ``data`` (any source, the
        rows meeting the SQL condition ``where``) the tables also give that data's exposure
        at each row (``data_weight``)."""
        from tallgam.outputs.tables import relativity_tables

        return relativity_tables(self, reference=reference, level=level, data=data,
                                 where=where)

    def validate(self, data, *, against=None, where: str | None = None,
                 batch_rows: int = DEFAULT_BATCH_ROWS, progress=False, tuning=None):
        """Hold-out statistics on ``data`` (the rows meeting the SQL condition ``where``,
        when given): deviance, Gini, lift, actual versus expected by rating factor; with
        ``against`` (another fit) the double lift. Streams through DuckDB with bounded
        memory (see :mod:`tallgam.outputs.validation`)."""
        from tallgam.outputs.validation import validate

        return validate(self, data, against=against, where=where, batch_rows=batch_rows,
                        progress=progress, tuning=tuning)

    def check(self, data, *, where: str | None = None):
        """New data against the training profile: rows outside the training range,
        unseen levels, missing values and the population stability index per input (see
        :mod:`tallgam.outputs.datacheck`). Returns a
        :class:`~tallgam.outputs.datacheck.DataCheck`."""
        from tallgam.outputs.datacheck import check_data

        return check_data(self, data, where=where)

    # ------------------------------------------------------------------ output
    def summary(self) -> str:
        """The summary for a pricing reviewer (see :mod:`tallgam.outputs.summary`)."""
        from tallgam.outputs.summary import summary_text

        return summary_text(self)

    def __repr__(self) -> str:
        s = self.statistics
        ratio = s["deviance"] / s["null_deviance"] if s["null_deviance"] else float("nan")
        return (f"<tallgam FitResult: {self.model.family.name}/{self.model.link.name}, "
                f"{len(self.bases) - 1} terms, {s['rows']} rows, EDF {self.edf['total']:.2f}, "
                f"deviance ratio {ratio:.4f}>")

    def to_sql(self, output: str = "response", *, with_offset: bool = True) -> str:
        """One DuckDB SQL expression reproducing ``predict`` (see :mod:`tallgam.sqlexport`)."""
        from tallgam.outputs.sqlexport import to_sql

        return to_sql(self, output=output, with_offset=with_offset)

    def save(self, path) -> None:
        """Write the model file (JSON) atomically: a temporary name, then a rename."""
        from tallgam.outputs.modelfile import save

        save(self, path)


TERM_TEST_SCHEMA = pa.schema([("term", pa.string()), ("test", pa.string()),
                              ("statistic", pa.float64()), ("df", pa.float64()),
                              ("residual_df", pa.float64()), ("reference", pa.string()),
                              ("p_value", pa.float64()), ("edf", pa.float64()),
                              ("note", pa.string())])


def _cat(parts: list[np.ndarray]) -> np.ndarray:
    return np.concatenate(parts) if parts else np.empty(0)

"""The model specification: response, family and link, terms, offsets and the data filter.

A :class:`Model` is a plain, immutable description; :meth:`Model.fit` hands it with the
data to the iteration driver (:mod:`tallgam.solve.pirls`) and returns a
:class:`~tallgam.outputs.result.FitResult`; :func:`load` reads a fitted one back.
"""

from __future__ import annotations

import os
from collections.abc import Sequence
from dataclasses import dataclass, field

from tallgam.errors import ModelFileError, SpecError, TallgamError
from tallgam.families import Family, family_from_dict, resolve
from tallgam.families.links import Link
from tallgam.options import DEFAULT_BATCH_ROWS, RunOptions, Tuning
from tallgam.outputs import modelfile
from tallgam.outputs.result import FitResult
from tallgam.terms.base import TermSpec, spec_from_dict

CRITERIA = ("reml", "gcv", "ubre", "fixed")
MISSING = ("error", "drop")


@dataclass(frozen=True)
class Model:
    """A generalized additive model to be fitted to a (possibly huge) data source.

    Parameters
    ----------
    response : column name or DuckDB SQL expression of the response.
    family : ``"gaussian"``, ``"poisson"``, ``"binomial"``, ``"gamma"``,
        ``"inverse_gaussian"``, ``"tweedie"``, ``"negative_binomial"`` or a Family object.
    link : link name or object; ``None`` takes the family's default.
    terms : term specs (``tg.spline``, ``tg.linear``, ``tg.categorical``, ...).
        An intercept is always included.
    exposure : column or SQL expression; with the log link, ln(exposure) joins the offset
        and sum-to-zero constraints and the default base levels are exposure-weighted.
    offset : column or SQL expression added to the linear predictor.
    weights : column or SQL expression of prior weights (e.g. claim counts for severity).
    where : a SQL filter applied by DuckDB before anything else.
    criterion : ``"reml"`` (default), ``"gcv"``, ``"ubre"`` (known scale) or ``"fixed"``.
    missing : ``"error"`` (default) stops on NULL/NaN/inf in a used column; ``"drop"``
        leaves such rows out and reports how many.
    max_iterations : cap on PIRLS data passes; the last pass always evaluates the reported
        coefficients, so non-gaussian fits use at least 2.
    tolerance : PIRLS ends when its next step would gain at most this share of the
        penalized deviance (and move the fitted values by at most
        ``Tuning.eta_tolerance``, root mean square on the link scale); the fit then reports
        the iterate its last pass evaluated.
    """

    response: str
    family: str | Family = "gaussian"
    link: str | Link | None = None
    terms: Sequence[TermSpec] = field(default_factory=tuple)
    exposure: str | None = None
    offset: str | None = None
    weights: str | None = None
    where: str | None = None
    criterion: str = "reml"
    missing: str = "error"
    max_iterations: int = 50
    tolerance: float = 1e-8

    def __post_init__(self):
        object.__setattr__(self, "terms", tuple(self.terms))
        fam, lnk = resolve(self.family, self.link)
        object.__setattr__(self, "family", fam)
        object.__setattr__(self, "link", lnk)
        if not isinstance(self.response, str) or not self.response.strip():
            raise SpecError("response must be a column name or SQL expression")
        for t in self.terms:
            if not isinstance(t, TermSpec):
                raise SpecError(f"terms must be made with tg.spline/tg.linear/tg.categorical..., "
                                f"got {t!r}")
        if self.criterion not in CRITERIA:
            raise SpecError(f"criterion must be one of {', '.join(CRITERIA)}, "
                            f"got {self.criterion!r}")
        if self.missing not in MISSING:
            raise SpecError(f"missing must be one of {', '.join(MISSING)}, got {self.missing!r}")
        if self.exposure is not None and not lnk.multiplicative:
            raise SpecError(f"exposure needs the log link (the offset is ln(exposure)); the "
                            f"model uses {lnk.name!r}. Use weights, or an explicit offset.")
        if self.criterion == "ubre" and not fam.scale_known:
            raise SpecError(f"UBRE needs a known scale; the {fam.name} family estimates it. "
                            "Set criterion to \"reml\" or \"gcv\".")
        labels = [t.label for t in self.terms]
        dup = {lab for lab in labels if labels.count(lab) > 1}
        if dup:
            raise SpecError(f"terms given twice: {', '.join(sorted(dup))}")
        kinds = [(c, k) for t in self.terms for c, k in t.input_kinds().items()]
        numeric = {c for c, k in kinds if k == "numeric"}
        levels = {c for c, k in kinds if k == "levels"}
        both = numeric & levels
        if both:
            raise SpecError(f"column(s) {', '.join(sorted(both))} used both as numeric and as "
                            "levels; derive a copy with SQL for one of the uses")
        for t in self.terms:
            t.check_with(self.terms, self.criterion)
        if not (self.max_iterations >= 1):
            raise SpecError("max_iterations must be at least 1")

    def fit(self, data, *, batch_rows: int = DEFAULT_BATCH_ROWS, threads: int | None = None,
            progress=False, cluster=None, binned: bool | int | str | None = "auto",
            scratch: str | bool | None = None, tuning: Tuning | None = None,
            start=None, checkpoint: str | os.PathLike | None = None) -> FitResult:
        """Fit the model to ``data`` and return the :class:`~tallgam.FitResult`.

        Parameters
        ----------
        data : path, glob, list of files, directory, ``tg.sql(...)``, DuckDB relation,
            Arrow table or reader, pandas or polars DataFrame (see
            :func:`tallgam.data.sources.open_source`).
        batch_rows : int, default 1,000,000
            Rows held in memory at once.
        threads : int, optional
            Cores used (default: all; on a cluster, the threads of each task, default 1).
        progress : bool or callable, default False
            True draws a bar on a terminal; a callable receives
            :class:`tallgam.progress.Event` objects.
        cluster : distributed.Client, scheduler address or Dask cluster, optional
            Runs the data passes on that cluster (``data`` must be files every worker can
            read; see docs/distributed.md); the result equals the local fit up to rounding.
        binned : "auto" (or None), bool or int, default "auto"
            Binned data passes (see :mod:`tallgam.passes.binned` and
            docs/performance.md): every term coded into a table of its distinct design
            rows; exact for whole-number columns, other numeric columns rounded to the
            nearest of ``binned`` grid values (True: 200); several times faster per pass.
            "auto" chooses: exact passes for small data, binned ones for large data when
            binning moves no value by more than a quarter of its knot interval; the choice
            and its reason are in ``statistics["passes_mode"]`` and the notes.
        scratch : str, bool or None
            Binned fits: a folder for a scratch copy of the coded rows that later passes
            read instead of the data (None: the system's temporary folder; False: read the
            data every pass); removed when the fit ends.
        tuning : tallgam.options.Tuning, optional
            Engine constants (tests and benchmarks).
        start : FitResult or path of a model file, optional
            A previous fit of the same model (e.g. last month's): its predictions start the
            iterations, so a refit on data that changed a little takes two or three
            passes. The result is the fit to ``data``, as without ``start``.
        checkpoint : path of a file, optional
            Records what every scan of the data returned (the profile, the sample start,
            the sums of every data pass), flushed to disk as each ends. A fit killed at
            any point and started again with the same ``checkpoint`` (same model, options
            and data) takes the recorded results instead of reading the data again and
            gives the uninterrupted fit's result; see :mod:`tallgam.solve.checkpoint`.
            Removed when the fit ends.
        """
        from tallgam.solve.pirls import fit_model

        options = RunOptions(batch_rows=batch_rows, threads=threads, progress=progress,
                             cluster=cluster, binned=binned, scratch=scratch, tuning=tuning,
                             checkpoint=checkpoint)
        if start is not None and not isinstance(start, FitResult):
            if not isinstance(start, (str, os.PathLike)):
                raise SpecError(f"start= takes a fit result or the path of a model file, got "
                                f"{type(start).__name__}")
            start = load(start)
        return FitResult.from_state(fit_model(self, data, options, start=start))

    def to_dict(self) -> dict:
        return {
            "response": self.response,
            "family": self.family.to_dict(),
            "link": self.link.name,
            "terms": [t.to_dict() for t in self.terms],
            "exposure": self.exposure,
            "offset": self.offset,
            "weights": self.weights,
            "where": self.where,
            "criterion": self.criterion,
            "missing": self.missing,
            "max_iterations": self.max_iterations,
            "tolerance": self.tolerance,
        }

    @classmethod
    def from_dict(cls, d: dict) -> Model:
        d = dict(d)
        d["family"] = family_from_dict(d["family"]) if isinstance(d["family"], dict) else d[
            "family"]
        d["terms"] = [spec_from_dict(t) for t in d.get("terms", [])]
        return cls(**d)


def load(path) -> FitResult:
    """A fitted model from its model file (see :mod:`tallgam.outputs.modelfile`)."""
    parts = modelfile.read(path)
    try:
        model = Model.from_dict(parts.pop("model"))
    except (TallgamError, KeyError, TypeError, ValueError) as exc:
        raise ModelFileError(f"{path} is inconsistent: its model section: {exc}") from None
    return FitResult(model, **parts)

"""Scoring: the fitted model applied to any source, streamed batch by batch.

The same encoding and kernels as fitting compute η = offset + Xβ (and xᵀVx for standard
errors), so predictions and fits can never disagree about a basis. Values outside a
spline's training range are clamped to the boundary (reported with counts); unseen levels
are an error unless ``unseen="base"`` asks for the base level's effect (zero).
"""

from __future__ import annotations

import warnings
from collections import Counter
from collections.abc import Iterator
from dataclasses import dataclass, field

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from tallgam.data.inputs import O, legacy_level_key, model_inputs
from tallgam.data.sources import Source, quote
from tallgam.errors import DataError, SpecError, TallgamWarning, shorten
from tallgam.options import RunOptions
from tallgam.passes import kernels
from tallgam.passes.design import Design, batch_columns

OUTPUTS = ("response", "link", "terms")
UNSEEN = ("error", "base")


@dataclass
class ScoreReport:
    """What scoring had to adjust, with counts."""

    rows: int = 0
    clamped: Counter = field(default_factory=Counter)   # column -> rows outside the range
    unseen: Counter = field(default_factory=Counter)    # column -> rows with unseen levels

    def warn(self) -> None:
        for col, n in self.clamped.items():
            warnings.warn(TallgamWarning(
                f"{n} of {self.rows} row(s) have {col!r} outside the training range; the "
                "spline was held at its boundary value for them"), stacklevel=4)
        for col, n in self.unseen.items():
            warnings.warn(TallgamWarning(
                f"{n} of {self.rows} row(s) have a level of {col!r} not seen in training; "
                "they were given the base level's effect (unseen='base')"), stacklevel=4)


class Scorer:
    """Streams predictions of a fitted model over a source."""

    def __init__(self, fit, source: Source, *, with_offset: bool = True, unseen: str = "error",
                 keep: tuple[str, ...] = (), extra: dict[str, str] | None = None):
        if unseen not in UNSEEN:
            raise SpecError(f"unseen must be one of {', '.join(UNSEEN)}, got {shorten(unseen)}")
        self.fit = fit
        self.source = source
        self.design: Design = fit.design
        self.unseen = unseen
        self.inputs = model_inputs(fit.model, source, fit.model.terms, for_prediction=True,
                                   with_offset=with_offset)
        source.require_columns(list(keep))
        extra = dict(extra or {})  # more output columns: name -> SQL over the source
        self.keep = list(keep) + list(extra)
        self.select = self.inputs.select + [f"{quote(k)} AS {quote('__keep_' + k)}"
                                            for k in keep] + [
            f"{sql} AS {quote('__keep_' + name)}" for name, sql in extra.items()]
        self.report = ScoreReport()
        # older model files keep whole numbers of floating-point columns as '3.0'; the data's
        # keys ('3') are given the model's labels (see inputs.level_key)
        self.relabel: dict[str, dict[str, str]] = {}
        for b in self.design.bases:
            for c, levels in b.level_sets().items():
                old = {legacy_level_key(lev): lev for lev in levels if legacy_level_key(lev) != lev}
                if old:
                    self.relabel.setdefault(c, {}).update(old)
        beta = fit.coefficients_raw
        self.beta_d = np.ascontiguousarray(beta[:self.design.pd])
        self.beta_l = np.ascontiguousarray(beta[self.design.pd:])

    def batches(self, batch_rows: int, *, se: bool = False, terms: bool = False
                ) -> Iterator[tuple[pa.RecordBatch, dict[str, np.ndarray]]]:
        """Yield (batch of kept columns, dict of arrays): ``link``, ``response`` and with
        ``se`` their standard errors ``link_se``/``response_se``; with ``terms`` one array
        per term label (the centred contribution on the link scale)."""
        link = self.fit.model.link
        cov = self.fit.covariance if se else None
        for batch in self.source.batches(self.select, None,
                                         batch_rows):
            cols = batch_columns(batch.select(range(len(self.inputs.select))),
                                 self.inputs.level_names)
            for c, labels in self.relabel.items():
                cols[c] = _relabel(cols[c], labels)
            self._check(cols, batch.num_rows)
            n = batch.num_rows
            eta = cols[O].copy() if self.inputs.has_offset else np.zeros(n)
            out: dict[str, np.ndarray] = {}
            var = np.zeros(n) if se else None
            parts = {b.label: np.zeros(n) for b in self.design.bases} if terms else None
            for sl, enc in self.design.blocks(cols):
                seg = np.zeros(sl.stop - sl.start)
                kernels.linear_predictor(enc.idx, enc.val, enc.lev, self.beta_d, self.beta_l,
                                         seg)
                eta[sl] += seg
                if se:
                    v = np.empty(len(seg))
                    cov.row_variances(enc, self.design.pd, v)
                    var[sl] = v
                if terms:
                    self._term_parts(enc, sl, parts)
            out["link"] = eta
            mu = link.inverse(eta)
            out["response"] = mu
            if se:
                se_eta = np.sqrt(np.maximum(var, 0.0))
                out["link_se"] = se_eta
                out["response_se"] = np.abs(link.mu_eta(eta)) * se_eta
            if terms:
                out.update(parts)
            self.report.rows += n
            kept = batch.select(range(len(self.inputs.select), batch.num_columns))
            kept = kept.rename_columns(self.keep) if self.keep else kept
            yield kept, out

    def _term_parts(self, enc, sl, parts) -> None:
        d = self.design
        for b, rng in zip(d.bases, d.slices):
            beta = np.zeros(d.p)
            beta[rng] = self.fit.coefficients_raw[rng]
            seg = np.zeros(sl.stop - sl.start)
            kernels.linear_predictor(enc.idx, enc.val, enc.lev, beta[:d.pd], beta[d.pd:], seg)
            parts[b.label][sl] = seg

    def _check(self, cols: dict, n: int) -> None:
        """Stop on NULL/NaN in a used column or on unseen levels (unless unseen='base');
        count the rows whose values are clamped to a training range."""
        for b in self.design.bases:
            ranges = b.clamp_ranges()
            for c, kind in b.spec.input_kinds().items() if b.inputs else ():
                if kind != "numeric":
                    continue
                x = cols[c]
                bad = np.count_nonzero(~np.isfinite(x))
                if bad:
                    raise DataError(f"column {c!r} has {bad} NULL/NaN/inf value(s) in a batch "
                                    f"of {n} rows to score; fill or filter them first")
                if c in ranges:
                    lo, hi = ranges[c]
                    outside = np.count_nonzero((x < lo) | (x > hi))
                    if outside:
                        self.report.clamped[c] += outside
            for c, levels in b.level_sets().items():
                arr = cols[c]
                if arr.null_count:  # NULL is no level, so not an unseen one either
                    raise DataError(f"column {c!r} has {arr.null_count} NULL/NaN value(s) in a "
                                    f"batch of {n} rows to score; a missing value is not a level"
                                    " (unseen='base' does not apply): fill or filter them first")
                missing = _unknown(arr, levels)
                if missing.any():
                    if self.unseen == "error":
                        ex = pc.unique(arr.filter(pa.array(missing))).to_pylist()[:5]
                        raise DataError(
                            f"{int(missing.sum())} row(s) in a batch of {n} have levels of "
                            f"{c!r} not seen in training (e.g. "
                            f"{', '.join(shorten(v) for v in ex)}); pass unseen='base' to give "
                            "them the base level's effect (zero)")
                    self.report.unseen[c] += int(missing.sum())
        if O in cols and not np.all(np.isfinite(cols[O])):
            raise DataError("the offset/exposure is NULL, non-positive or non-finite in some "
                            "rows of the data to score")


def _relabel(arr, labels: dict[str, str]):
    """``arr`` (Arrow strings) with each value found in ``labels`` replaced by its label."""
    arr = arr.cast(pa.string())
    pos = pc.index_in(arr, value_set=pa.array(list(labels), pa.string()))
    new = pa.array(list(labels.values()), pa.string()).take(pos)
    return pc.if_else(pc.is_valid(pos), new, arr)


def _unknown(arr, levels: list[str]) -> np.ndarray:
    found = pc.is_in(arr, value_set=pa.array(levels, type=pa.string()))
    return ~found.fill_null(False).to_numpy(zero_copy_only=False)


def score_to_parquet(fit, data, output_path, *, keep: tuple[str, ...] | list[str] = (),
                     terms: bool = False, se: bool = False, with_offset: bool = True,
                     unseen: str = "error", batch_rows: int = 1_000_000,
                     progress=False) -> ScoreReport:
    """Stream predictions of every row of ``data`` into a Parquet file.

    Columns: the ``keep`` columns, ``prediction`` (response scale), ``link``; with ``se``
    ``prediction_se`` and ``link_se``; with ``terms`` one ``term:<label>`` column per
    term. The file appears only when complete: rows go to a temporary file in the same
    folder, renamed at the end; an error or a kill leaves no output behind.
    """
    from tallgam.atomic import check_target, replacing
    from tallgam.data.sources import open_source
    from tallgam.progress import Event, make_callback

    batch_rows = RunOptions(batch_rows=batch_rows).batch_rows
    callback = make_callback(progress)
    check_target(output_path)   # a bad output path fails before any row is read
    source = open_source(data)
    owned = source is not data
    try:
        scorer = Scorer(fit, source, with_offset=with_offset, unseen=unseen, keep=tuple(keep))
        callback(Event("start", "scoring"))

        def advance(done: int) -> None:
            callback(Event("advance", "scoring", rows=done))
        with replacing(output_path, "score") as tmp:
            done = write_scores(scorer, tmp, se=se, terms=terms, batch_rows=batch_rows,
                                on_rows=advance)
        callback(Event("end", "scoring", rows=done))
    finally:
        if owned:
            source.close()
    scorer.report.warn()
    return scorer.report


def write_scores(scorer: Scorer, path: str, *, se: bool, terms: bool, batch_rows: int,
                 on_rows=None, write_empty: bool = True, stop=None) -> int:
    """Write the predictions of ``scorer``'s source to the Parquet file ``path`` (the
    caller gives a temporary name and renames it). Returns the rows written. Without rows,
    an empty file with the columns is written, or none when ``write_empty`` is False.
    ``stop()``, checked before every batch, may raise to abandon the file."""
    import pyarrow.parquet as pq

    fit = scorer.fit
    writer = None
    done = 0
    try:
        for kept, arrays in scorer.batches(batch_rows, se=se, terms=terms):
            if stop is not None:
                stop()
            cols = {name: kept.column(i) for i, name in enumerate(kept.schema.names)}
            cols["prediction"] = pa.array(arrays["response"])
            cols["link"] = pa.array(arrays["link"])
            if se:
                cols["prediction_se"] = pa.array(arrays["response_se"])
                cols["link_se"] = pa.array(arrays["link_se"])
            if terms:
                for b in fit.bases:
                    cols[f"term:{b.label}"] = pa.array(arrays[b.label])
            table = pa.table(cols)
            if writer is None:
                writer = pq.ParquetWriter(path, table.schema)
            writer.write_table(table)
            done += table.num_rows
            if on_rows is not None:
                on_rows(done)
        if writer is None and write_empty:  # no rows: a valid, empty file with the columns
            names = list(scorer.keep) + ["prediction", "link"]
            writer = pq.ParquetWriter(path, pa.schema([(n, pa.float64()) for n in names]))
        if writer is not None:
            writer.close()
            writer = None
    finally:
        if writer is not None:
            writer.close()
    return done

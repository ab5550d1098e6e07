"""Relativity tables: every term's effect on a grid or per level, as a pricing team reads it.

For a log-link model the prediction factorises as

    μ / exposure = base rate × Π_terms relativity_term(x),

where the *base rate* is the prediction at the reference point (base levels, splines at
their reference values) and each relativity is exp(f(x) − f(reference)). References:
the base level of a categorical; zero (the average level) for random effects and
territories; the exposure-weighted median of the training data for splines, linear
terms and surfaces (or values given by the caller). A per-level curve is measured from the
base level's curve at the reference, so the product above holds row by row. Bands come
from the covariance of the difference f(x) − f(reference).

Numeric rows sit where the training data are (:func:`tallgam.terms.base.data_points`), and
every table of a term varying in one input carries ``training_weight``: the training exposure
(or weights, or rows) nearer to the row's value than to any other row's, or the level's own.
Input values and weights are tidied to 12 significant digits (no 413.89151999999996 from
grid arithmetic); effects keep every digit. The files leave the team with ``notes.txt``
beside them: what the columns mean, the base rate and references, and the caution.
"""

from __future__ import annotations

import os
from dataclasses import dataclass, field

import numpy as np
import pyarrow as pa
from scipy import stats

from tallgam.data.profile import tidy
from tallgam.errors import SpecError
from tallgam.terms.base import GRID_POINTS, Basis, term_matrix

#: the file columns in the order a pricing reader wants them (link-scale columns last)
COLUMN_ORDER = ("training_weight", "data_weight", "relativity", "relativity_lower",
                "relativity_upper", "difference", "lower", "upper", "std_error", "estimate")


@dataclass
class RelativityTables:
    """All terms' tables, by term label, with what a reader needs beside them.

    ``base_rate`` is None unless the link is log. ``titles`` gives each term's name for
    people (its columns, or the spec's ``title``); ``weight_label`` says what
    ``training_weight`` sums; ``about`` describes the model in a line (notes.txt)."""

    base_rate: float | None
    base_link: float
    references: dict[str, dict] = field(default_factory=dict)
    tables: dict[str, pa.Table] = field(default_factory=dict)
    titles: dict[str, str] = field(default_factory=dict)
    weight_label: str = "training rows"
    data_label: str | None = None
    about: str = ""
    level: float = 0.95

    def file_stems(self) -> dict[str, str]:
        """The file name (without extension) of every term's table: its title made safe
        for file names, the label's when two titles would give the same name."""
        stems = {lab: file_stem(self.titles.get(lab, lab)) for lab in self.tables}
        seen = list(stems.values())
        return {lab: (stem if seen.count(stem) == 1 and stem != "base" else file_stem(lab))
                for lab, stem in stems.items()}

    def write(self, folder, formats=("csv", "parquet")) -> list[str]:
        """Write one file per term and format, ``base.csv`` (base rate and references in
        full precision) and ``notes.txt`` (for people: the columns, the base rate, the
        caution); returns the paths."""
        import pyarrow.csv as pacsv
        import pyarrow.parquet as pq

        from tallgam.atomic import make_folder, replacing, write_text

        unknown = [f for f in formats if f not in ("csv", "parquet")]
        if unknown:
            raise SpecError(f"unknown table format {unknown[0]!r}; use csv or parquet")
        make_folder(folder)
        paths = []
        stems = self.file_stems()
        for label, table in self.tables.items():
            stem = os.path.join(folder, stems[label])
            for fmt in formats:
                path = f"{stem}.{fmt}"
                with replacing(path) as tmp:
                    if fmt == "csv":
                        pacsv.write_csv(table, tmp)
                    else:
                        pq.write_table(table, tmp)
                paths.append(path)
        base = os.path.join(folder, "base.csv")
        lines = ["item,column,value", f"base_link,,{self.base_link!r}"]
        if self.base_rate is not None:
            lines.append(f"base_rate,,{self.base_rate!r}")
        for col, value in self.reference_values().items():
            lines.append(f"reference,{_csv_text(col)},{_csv_text(value)}")
        write_text(base, "\n".join(lines) + "\n")
        paths.append(base)
        notes = os.path.join(folder, "notes.txt")
        write_text(notes, self.notes(formats))
        paths.append(notes)
        return paths

    def reference_values(self) -> dict[str, object]:
        """The reference value of every input column (one per column; numbers tidied)."""
        out: dict[str, object] = {}
        for ref in self.references.values():
            for col, value in ref.items():
                if value is not None and col not in out:
                    out[col] = (float(tidy([value])[0]) if isinstance(value, (int, float))
                                else value)
        return out

    def notes(self, formats=("csv", "parquet")) -> str:
        """notes.txt: the tables explained for the people who receive them."""
        from tallgam.outputs.formatting import CAUTION, number

        band = f"{100 * self.level:g}%"
        refs = ", ".join(f"{c} {number(v, 6) if isinstance(v, float) else v}"
                         for c, v in self.reference_values().items())
        import textwrap

        def para(text: str) -> list[str]:
            return textwrap.wrap(text, 92)

        out = para(f"Relativity tables: {self.about}" if self.about else "Relativity tables")
        out.append("")
        if self.base_rate is not None:
            out += para(f"Base rate {number(self.base_rate, 6)} per unit of exposure, at the "
                        f"reference point: {refs or 'the intercept'}.")
            out += para("A risk's expected value = base rate × exposure × the relativity of "
                        "each rating factor at the risk's value (the files below).") + [""]
        else:
            out += para(f"Linear predictor at the reference point {number(self.base_link, 6)} "
                        f"(reference: {refs or 'the intercept'}); each table gives a term's "
                        "effect on the link scale, added to it.") + [""]
        stems = self.file_stems()
        out.append("Files, one per rating factor (" + " and ".join(formats) + "):")
        names = {lab: f"{stem}.{formats[0]}" for lab, stem in stems.items()}
        width = max([len(n) for n in names.values()] + [len("base.csv")])
        for label, name in names.items():
            out.append(f"  {name:<{width}}  {self.titles.get(label, label)}")
        out += [f"  {'base.csv':<{width}}  the base rate and the reference values, every digit",
                ""]
        rows = [("(input columns)", "the rating factor's value: every value seen in training "
                 "for columns with few values, else points at exposure-weighted quantiles "
                 "with the smallest and largest value; or the level"),
                ("training_weight", f"{self.weight_label} nearer to this row's value than to "
                 "any other row's (a level: its own)")]
        if self.data_label:
            rows.append(("data_weight", f"the same for the data given to the tables: "
                         f"{self.data_label}"))
        if self.base_rate is not None:
            rows += [("relativity", "exp(effect at the row − effect at the reference): the "
                      "factor that multiplies the base rate"),
                     ("relativity_lower/upper", f"its {band} band")]
        rows += [("difference", "effect at the row − effect at the reference, link scale"),
                 ("lower/upper", f"its {band} band (link scale)"),
                 ("std_error", "standard error of the difference (link scale)"),
                 ("estimate", "the term's value at the row, link scale, centred over the "
                  "training data as fitted")]
        out.append("Columns:")
        for k, v in rows:
            out += textwrap.wrap(v, 92, initial_indent=f"  {k:<22}  ",
                                 subsequent_indent=" " * 26)
        out += [""] + para(
            "Numbers in the files are written in full (the shortest text that reads back as "
            "the same value); input values and weights are rounded to 12 significant "
            "digits.") + [""] + para(f"Caution: {CAUTION}") + [""]
        return "\n".join(out)


def _csv_text(value) -> str:
    text = repr(value) if isinstance(value, float) else str(value)
    return f'"{text.replace(chr(34), chr(34) * 2)}"' if any(c in text for c in ',"\n') \
        else text


def file_stem(name: str) -> str:
    """A file name from a term's title or label: driver_age by fuel → driver_age_by_fuel,
    spline(driver_age) → spline_driver_age."""
    keep = "".join(c if c.isalnum() else "_" for c in name)
    return "_".join(part for part in keep.split("_") if part) or "term"


def base_levels(fit) -> dict[str, str]:
    """The base level of every level column measured from one (categoricals)."""
    out: dict[str, str] = {}
    for b in fit.bases:
        out.update(b.base_levels())
    return out


def references(fit, overrides: dict | None = None) -> dict[str, dict]:
    """Reference inputs per term (see the module docstring and
    :meth:`tallgam.terms.base.Basis.reference`); ``overrides`` maps a column to a chosen
    reference value."""
    overrides = dict(overrides or {})
    bases = base_levels(fit)
    out: dict[str, dict] = {}
    for b in fit.bases[1:]:
        ref = b.reference(fit.profile, bases)
        out[b.label] = {c: overrides.get(c, v) for c, v in ref.items()}
    return out


def _point(b: Basis, ref: dict, n: int) -> dict:
    return {c: ([ref[c]] * n if kind == "levels" else np.full(n, float(ref[c])))
            for c, kind in b.spec.input_kinds().items()}


def relativity_rows(fit, label: str, grid: dict, refs: dict[str, dict] | None = None,
                    level: float = 0.95) -> dict[str, np.ndarray]:
    """A term's effect at the inputs ``grid`` (column → values), measured from its
    reference: ``estimate`` (link scale, centred as fitted), ``difference`` from the
    reference with ``std_error``, ``lower``, ``upper``, and for the log link the
    ``relativity`` exp(difference) with its bounds."""
    refs = refs if refs is not None else references(fit)
    b, sl = fit.term(label)
    beta = fit.coefficients_raw[sl]
    if b.group == "levels":
        # one coefficient per row, measured from the base level (coefficient 0, variance 0)
        # or from zero: the variance is the level's own; no L × L matrix is formed
        cols = {k: pa.array(v, type=pa.string()) if isinstance(v, list) else v
                for k, v in grid.items()}
        code = b.codes(cols)
        if np.any(code < 0):
            raise SpecError(f"{label}: levels not seen in training cannot be tabulated")
        est = beta[code]
        diff = est
        se = np.sqrt(np.maximum(fit.covariance.diagonal()[sl][code], 0.0))
    else:
        X = term_matrix(b, grid)
        n = X.shape[0]
        est = X @ beta
        point = _point(b, refs[b.label], 1)
        if any(v == [None] for v in point.values()):
            R = np.zeros_like(X)
        else:
            R = np.repeat(term_matrix(b, point), n, axis=0)
        D = X - R
        diff = D @ beta
        se = np.sqrt(np.maximum(fit.covariance.term_variances(sl, D), 0.0))
    z = stats.norm.ppf(0.5 + level / 2.0)
    out = {"estimate": est, "difference": diff, "std_error": se, "lower": diff - z * se,
           "upper": diff + z * se}
    if fit.model.link.multiplicative:
        with np.errstate(over="ignore"):  # a band beyond 1e308 is reported as inf
            out.update(relativity=np.exp(diff), relativity_lower=np.exp(diff - z * se),
                       relativity_upper=np.exp(diff + z * se))
    return out


def relativity_tables(fit, *, reference: dict | None = None, level: float = 0.95,
                      data=None, where: str | None = None) -> RelativityTables:
    """Tables of every term (see the module docstring). ``reference`` overrides the
    reference value of a column, e.g. ``{"driver_age": 40}``. With ``data`` (any source;
    ``where`` a SQL filter on it) every one-input table also gets ``data_weight``: the
    exposure (or weights, or rows) of those data at each row, as ``training_weight``."""
    from tallgam.outputs.formatting import weight_label

    refs = references(fit, reference)
    base_link = float(fit.coefficients_raw[fit.design.slices[0]][0])
    other, source = data_profile(fit, data, where) if data is not None else (None, None)
    tables: dict[str, pa.Table] = {}
    for b, sl in zip(fit.bases[1:], fit.design.slices[1:]):
        ref = refs[b.label]
        if b.group != "levels" and all(v is not None for v in ref.values()):
            base_link += float((term_matrix(b, _point(b, ref, 1)) @ fit.coefficients_raw[sl])[0])
        grid = {k: (v if isinstance(v, list) else tidy(v))
                for k, v in b.effect_grid(GRID_POINTS, fit.profile).items()}
        cols: dict = {k: (pa.array(v, type=pa.string()) if isinstance(v, list) else v)
                      for k, v in grid.items()}
        share = training_weight(fit.profile, grid)
        if share is not None:
            cols["training_weight"] = tidy(share)
        if other is not None:
            got = training_weight(other, grid)
            if got is not None:
                cols["data_weight"] = tidy(got)
        rows = relativity_rows(fit, b.label, grid, refs, level)
        cols.update({k: rows[k] for k in COLUMN_ORDER if k in rows})
        tables[b.label] = pa.table(cols)
    base_rate = float(np.exp(base_link)) if fit.model.link.multiplicative else None
    return RelativityTables(
        base_rate=base_rate, base_link=base_link, references=refs, tables=tables,
        titles={b.label: b.title for b in fit.bases[1:]},
        weight_label=training_label(fit),
        data_label=(None if other is None else weight_label(
            other.weight_name, weight_unit(fit.model, other.weight_name)).replace(
            "training ", "") + f" of {source}"),
        about=describe(fit), level=level)


CENTRAL = 0.99  # the share of the training weight whose rows set ranges and chart axes


def central_rows(weight, share: float = CENTRAL) -> np.ndarray:
    """Which rows of a table (in its order) hold the central ``share`` of its weight: a
    row counts when any of its weight lies between the (1 − share)/2 and (1 + share)/2
    points of the cumulated weight. All rows when there is no weight."""
    w = np.asarray(weight, dtype=np.float64)
    total = np.sum(w)
    if not total > 0:
        return np.ones(len(w), bool)
    tail = (1.0 - share) / 2.0
    after = np.cumsum(w) / total
    before = after - w / total
    return (after > tail) & (before < 1.0 - tail) & (w > 0)


def weight_unit(model, weight_name: str | None) -> str | None:
    """The column (or SQL) a profile's weight sums: the exposure, else the weights."""
    return model.exposure if weight_name == "exposure" else model.weights


def training_label(fit) -> str:
    """What ``training_weight`` sums, with its unit, e.g. "training exposure (Σ exposure)"."""
    from tallgam.outputs.formatting import weight_label

    return weight_label(fit.profile.weight_name,
                        weight_unit(fit.model, fit.profile.weight_name))


def describe(fit) -> str:
    """One line about a fitted model: family, link, response, training rows and filter,
    when and by which release it was fitted."""
    m = fit.model
    text = (f"{m.family.name} model of {m.response} ({m.link.name} link), "
            f"{fit.statistics['rows']:,} training rows")
    if m.where:
        text += f" where {m.where}"
    prov = fit.provenance or {}
    if prov.get("fitted_at"):
        text += f"; fitted {prov['fitted_at']} by tallgam {prov.get('tallgam_version', '?')}"
    return text


def data_profile(fit, data, where: str | None = None):
    """The value histograms of the model's input columns over ``data`` (rows meeting
    ``where``), weighted by the model's exposure (or weights) when the data hold it, and
    the data's description: (DataProfile, str)."""
    from tallgam.data.inputs import column_or_expression, model_inputs
    from tallgam.data.profile import run_profile
    from tallgam.data.sources import open_source
    from tallgam.errors import DataError

    source = open_source(data, where=where)
    owned = source is not data
    try:
        inputs = model_inputs(fit.model, source, fit.model.terms, for_prediction=True)
        fields = [f for f in inputs.profile_fields if f.role is None]
        weight, name = inputs.exprs.get("__exposure"), "exposure"
        if weight is None and fit.model.weights is not None:
            try:
                weight, name = column_or_expression(source, fit.model.weights, "weights"), \
                    "weights"
            except DataError:  # data to be priced may lack the weights: count rows
                weight = None
        return run_profile(source, fields, [], None, histograms=True, weight_expr=weight,
                           weight_name=name if weight else None), source.label
    finally:
        if owned:
            source.close()


def training_weight(profile, grid: dict) -> np.ndarray | None:
    """Training exposure (or weight, or rows) that each tabulated row stands for, when the
    rows vary in one input only: a level's own, or for a numeric input the values nearer
    to that row's value than to any other row's. None for rows varying in several inputs."""
    varying = [c for c, v in grid.items() if len(set(np.asarray(v).tolist())) > 1]
    if len(varying) != 1 or profile is None or not profile.has_column(varying[0]):
        return None
    c = varying[0]
    prof = profile.columns[c]
    if prof.kind == "levels":
        return prof.mass_of(grid[c])
    if not prof.distinct:
        return None
    x = np.asarray(grid[c], dtype=np.float64)
    order = np.argsort(x, kind="stable")
    xs = x[order]
    nearest = np.searchsorted(0.5 * (xs[1:] + xs[:-1]), prof.values, side="right")
    share = np.zeros(len(x))
    share[order] = np.bincount(nearest, weights=prof.mass, minlength=len(x))
    return share

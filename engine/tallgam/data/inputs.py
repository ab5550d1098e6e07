"""What a model reads from a source: the SQL select list, the profile fields and rules,
and the checks of the profile (empty data, NULLs, values outside the family's support).

Every read of the data (profile, data passes, scoring, validation) goes through the select
list made here, so a column is cast and quoted the same way everywhere.
"""

from __future__ import annotations

import re
from dataclasses import dataclass, field, replace

import duckdb

from tallgam.data.profile import DataProfile, Field, Rule
from tallgam.data.sources import Source, quote
from tallgam.errors import ColumnNotFound, DataError, shorten

Y, W, O, WC = "__y", "__w", "__o", "__wc"  # reserved batch aliases

#: whole numbers below this (2**53) are exact in a DOUBLE, so their key is the integer's text
_EXACT_WHOLE = 9007199254740992
_LEGACY_WHOLE = re.compile(r"-?\d+\.0")


def level_key(expr: str) -> str:
    """SQL for the key (text) of a level value of ``expr``, whatever the type it is stored in.

    Numbers stored as floating point or decimals get the key an integer column gives: 3.0
    (DOUBLE), 3 (INTEGER) and 3.00 (DECIMAL) are all ``'3'``; other numbers their shortest
    text (``'2.5'``); NaN and ±inf are missing (NULL), so the NULL policy applies to them
    rather than a level called 'nan'. Text, integers, booleans and dates keep their own text
    (codes such as '007' stay apart from '7'). The same expression serves fitting, scoring,
    validation and the SQL export, so a model fitted from one storage scores another."""
    text = f"CAST({expr} AS VARCHAR)"
    d = f"TRY_CAST({text} AS DOUBLE)"
    number = (f"CASE WHEN NOT isfinite({d}) THEN NULL WHEN {d} = trunc({d}) AND abs({d}) < "
              f"{_EXACT_WHOLE} THEN CAST(CAST({d} AS BIGINT) AS VARCHAR) "
              f"ELSE CAST({d} AS VARCHAR) END")
    return (f"(CASE WHEN typeof({expr}) IN ('FLOAT', 'DOUBLE') OR typeof({expr}) LIKE "
            f"'DECIMAL%' THEN {number} ELSE {text} END)")


def legacy_level_key(label: str) -> str:
    """The key :func:`level_key` gives today for a level label of an older model file, in
    which a whole number read from a floating-point column was written '3.0'."""
    if _LEGACY_WHOLE.fullmatch(label):
        whole = label[:-2]
        return "0" if whole == "-0" else whole
    return label


_NUMERIC_TYPES = ("TINYINT", "SMALLINT", "INTEGER", "BIGINT", "HUGEINT", "UTINYINT",
                  "USMALLINT", "UINTEGER", "UBIGINT", "UHUGEINT", "FLOAT", "DOUBLE", "DECIMAL",
                  "REAL", "BOOLEAN")


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

    @property
    def cweights_are_weights(self) -> bool:
        """The constraint weights are the prior weights (weights given, no exposure)."""
        return self.has_cweights and "__exposure" not in self.exprs

    @property
    def offset_is_log_cweights(self) -> bool:
        """The offset is ln(exposure) alone, and the exposure the constraint weights."""
        return "__exposure" in self.exprs and "__offset" not in self.exprs

    @property
    def aliases(self) -> list[str]:
        """The names of the select list's columns, in order."""
        return [item.rsplit(" AS ", 1)[1] for item in self.select]

    def over_selected(self) -> Inputs:
        """The same inputs read from a table of the select list's own columns (e.g. a sample
        drawn with :func:`sample_rows`): no expressions, no filter."""
        return replace(self, select=list(self.aliases), where=None)

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
        from tallgam.errors import nearest

        raise ColumnNotFound(
            f"{role} {shorten(text)} is neither a column of {source.label}"
            f"{nearest(text, source.schema)} nor a SQL expression DuckDB accepts ({exc})"
        ) from None
    return f"({text})"


def model_inputs(model, source: Source, design_specs, for_prediction: bool = False,
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
                            "as a number; cast it in SQL or make it a categorical term")
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
        fields_.append(Field(model.response, exprs[Y], role="response"))
        for cond, msg in model.family.rules(model.weights is not None):
            rules.append(Rule(f"response: {msg}", "response", cond.format(y="{response}"),
                              f"response {shorten(model.response)} has {msg}"))
    if W in exprs:
        select.append(f"CAST({exprs[W]} AS DOUBLE) AS {W}")
        fields_.append(Field(model.weights, exprs[W], role="weights"))
        rules.append(Rule("weights: not positive", "weights", "{weights} <= 0",
                          f"weights {shorten(model.weights)} has values ≤ 0"))
    parts = []
    if "__exposure" in exprs:
        parts.append(f"ln(CAST({exprs['__exposure']} AS DOUBLE))")
        fields_.append(Field(model.exposure, exprs["__exposure"], role="exposure"))
        rules.append(Rule("exposure: not positive", "exposure", "{exposure} <= 0",
                          f"exposure {shorten(model.exposure)} has values ≤ 0"))
    if "__offset" in exprs:
        parts.append(f"CAST({exprs['__offset']} AS DOUBLE)")
        fields_.append(Field(model.offset, exprs["__offset"], role="offset"))
    if parts:
        select.append(f"{' + '.join(parts)} AS {O}")
    cw = None
    if "__exposure" in exprs:
        cw = f"CAST({exprs['__exposure']} AS DOUBLE)"
    elif W in exprs:
        cw = f"CAST({exprs[W]} AS DOUBLE)"
    if cw is not None and not for_prediction:
        select.append(f"{cw} AS {WC}")
    for c, kind in columns.items():  # every model column once, whichever terms use it
        fields_.append(Field(c, level_key(quote(c)) if kind == "levels" else quote(c), kind))
    for c, kind in columns.items():
        value = level_key(quote(c)) if kind == "levels" else f"CAST({quote(c)} AS DOUBLE)"
        select.append(f"{value} AS {quote(c)}")
    return Inputs(select=select, where=model.where, level_names={
        c for c, k in columns.items() if k == "levels"}, has_weights=W in exprs,
        has_offset=bool(parts), has_cweights=cw is not None and not for_prediction,
        profile_fields=fields_, rules=rules, exprs=exprs)


SAMPLE_MODULUS = 1_000_003  # a prime: row hashes are cut into this many buckets


def sample_rows(source: Source, inputs: Inputs, share: float):
    """About ``share`` of the rows the model reads (its select list, after its filter), as
    an Arrow table: every row whose hash of its model values falls in the first
    ``share`` of the buckets, so the same data give the same sample whatever the threads,
    batches or file order (DuckDB's ``hash``)."""
    keep = max(1, int(round(share * SAMPLE_MODULUS)))
    where = f" WHERE {inputs.where}" if inputs.where else ""
    names = ", ".join(inputs.aliases)
    text = (f"SELECT * FROM (SELECT {', '.join(inputs.select)} FROM tallgam_source{where}) "
            f"WHERE hash({names}) % {SAMPLE_MODULUS} < {keep}")
    try:
        return source.query(text).to_arrow_table()
    except duckdb.Error as exc:
        raise DataError(f"drawing a sample of {source.label} failed: {exc}") from exc


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


def check_profile(profile: DataProfile, source: Source, model) -> None:
    """DataError for empty data, NULL/NaN/inf values and rule violations (with counts)."""
    where = f" after the filter {shorten(model.where)}" if model.where else ""
    if profile.rows == 0:
        raise DataError(f"{source.label} has no rows{where}")
    bad = []
    for name, (nulls, nonfinite) in profile.missing().items():
        prof = profile.columns.get(name)
        if prof is not None and prof.kind == "levels":
            what = f"{nulls} NULL/NaN"
        else:
            what = f"{nulls} NULL" + (f", {nonfinite} NaN/inf" if nonfinite else "")
        bad.append(f"{name!r}: {what}")
    if bad:
        raise DataError(
            f"missing or non-finite values in {len(bad)} column(s) of {profile.rows} rows — "
            + "; ".join(bad) + ". Clean them, filter them out with a where condition, or "
            "set missing to \"drop\" (the key missing of the spec file or of Model) to "
            "leave such rows out.")
    _check_magnitudes(profile, model)
    if profile.violations:
        lines = [f"{msg}: {n} row(s), e.g. {', '.join(f'{v:g}' for v in ex)}"
                 for n, ex, msg in profile.violations.values()]
        raise DataError("values outside what the model allows — " + "; ".join(lines))


#: responses and multipliers beyond this magnitude would overflow sums of squares
LARGEST_VALUE = 1e100


def _check_magnitudes(profile: DataProfile, model) -> None:
    """DataError when the response is so large (or so small, all non-zero) that sums of its
    squares leave double precision; the model's columns are measured in internal units, so
    their own scale does not matter."""
    y = profile.role("response")
    if y is None or y.min is None:
        return
    big = max(abs(y.min), abs(y.max))
    if big > LARGEST_VALUE:
        raise DataError(
            f"the response {shorten(model.response)} reaches {big:.3g}: sums of squares of "
            "such values overflow double precision. Rescale it in SQL (e.g. response = "
            "\"amount / 1e6\") and scale predictions back")
    if 0 < big < 1.0 / LARGEST_VALUE:
        raise DataError(
            f"the response {shorten(model.response)} is at most {big:.3g} in magnitude: "
            "squares of such values underflow double precision. Rescale it in SQL (e.g. "
            "response = \"rate * 1e6\")")

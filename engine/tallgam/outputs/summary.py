"""The text summary of a fit, ordered by what a pricing reviewer asks.

1. **Data**: rows used, the filter, the exposure (or weights) and the observed rate;
2. **Fit**: the deviance against that of the base rate alone and their ratio, AIC, the
   dispersion, EDF, the data passes and whether they converged, the base rate;
3. **Terms**: one row per rating factor with its kind, EDF, smoothing parameter, the range
   of its relativity over the training data and the p-value of the test of whether the term
   is needed (``fit.term_tests`` when the fit carries it);
4. **Levels**: every level term's relativities exp(β) to its base level (or to the average
   level) with their band and share of the exposure;
5. notes from the fit, then the caution.

Names are the columns (or a term's ``title``) and trade words; numbers are rounded for
people (:mod:`tallgam.outputs.formatting`). :func:`profile_text` adds the training data as
``tallgam show`` prints them.
"""

from __future__ import annotations

import textwrap

import numpy as np

from tallgam.outputs.formatting import (
    CAUTION,
    count,
    fixed,
    number,
    p_value,
    relativity,
    share,
    smoothing,
)

MAX_LEVELS = 12  # levels listed per term; the relativity tables hold them all
TEST_NAMES = {"wald": "Wald test", "wald_truncated": "Wood (2013) test for penalized terms"}
WIDTH = 92


def summary_text(fit, *, caution: bool = True) -> str:
    """The summary of ``fit`` (see the module docstring); ``caution`` ends it with the
    caution on actuarial review and rating-factor law."""
    rel = fit.relativities()
    lines = [_heading(fit), ""]
    lines += _section("Data", _data_rows(fit))
    lines += _section("Fit", _fit_rows(fit, rel))
    lines += _terms(fit, rel)
    lines += _levels(fit, rel)
    if fit.notes:
        lines += ["Notes"]
        for note in fit.notes:
            lines += textwrap.wrap(note, WIDTH, initial_indent="  - ", subsequent_indent="    ")
        lines.append("")
    if caution:
        lines += textwrap.wrap(f"Caution: {CAUTION}", WIDTH)
    return "\n".join(lines).rstrip() + "\n"


def profile_text(fit) -> str:
    """The training data as the model saw them: each column's range or level count, then
    when and by which release the model was fitted."""
    prof = fit.profile
    lines = [f"Training data: {count(prof.rows)} rows"]
    width = max([len(c) for c in prof.columns] + [6]) + 2
    for name, col in prof.columns.items():
        if col.kind == "numeric":
            mid = col.weighted_median()
            lines.append(f"  {name:<{width}}{number(col.min)} to {number(col.max)}"
                         + (f", weighted median {number(mid)}" if mid is not None else ""))
        else:
            lines.append(f"  {name:<{width}}{count(col.distinct)} levels")
    prov = fit.provenance or {}
    if prov:
        lines += ["", f"Fitted {prov.get('fitted_at', '?')} by tallgam "
                      f"{prov.get('tallgam_version', '?')}"]
    return "\n".join(lines) + "\n"


# ---------------------------------------------------------------------------------------


def _section(name: str, rows: list[tuple[str, str]]) -> list[str]:
    width = max(len(k) for k, _ in rows) + 3
    out = [name]
    for key, value in rows:
        out += textwrap.wrap(value, WIDTH, initial_indent=f"  {key:<{width}}",
                             subsequent_indent=" " * (width + 2)) or [f"  {key}"]
    return out + [""]


def _heading(fit) -> str:
    m, s = fit.model, fit.statistics
    fitted = s.get("family_parameters") or m.family.params()
    params = ", ".join(f"{k} {v:.4g}" for k, v in fitted.items() if v is not None)
    family = f"{m.family.name} family" + (f" ({params})" if params else "")
    how = ("fixed smoothing" if s["criterion"] == "fixed"
           else f"smoothing chosen by {str(s['criterion']).upper()}")
    return f"Model of {m.response}: {family}, {m.link.name} link; {how}"


def _role_sum(fit, role: str) -> float | None:
    prof = fit.profile.role(role)
    if prof is None or prof.mean is None:
        return None
    return prof.mean * fit.profile.rows


def _data_rows(fit) -> list[tuple[str, str]]:
    m, s = fit.model, fit.statistics
    rows = [("rows", count(s["rows"]))]
    if m.where:
        rows.append(("filter", m.where))
    exposure = _role_sum(fit, "exposure")
    weights = _role_sum(fit, "weights")
    response = _role_sum(fit, "response")
    if exposure is not None:
        rows.append(("exposure", f"{number(exposure)} (Σ {m.exposure})"))
        if response is not None and exposure > 0:
            rows.append(("observed", f"{number(response / exposure)} {m.response} per unit of "
                                     "exposure"))
    elif weights is not None:
        rows.append(("weights", f"{number(weights)} (Σ {m.weights})"))
    elif response is not None and s["rows"]:
        rows.append(("observed", f"{number(response / s['rows'])} {m.response} per row"))
    if m.offset:
        rows.append(("offset", m.offset))
    dropped = s.get("dropped_rows") or 0
    if dropped:
        rows.append(("dropped", f"{count(dropped)} rows with missing values"))
    return rows


def _fit_rows(fit, rel) -> list[tuple[str, str]]:
    m, s = fit.model, fit.statistics
    dev, null = s["deviance"], s["null_deviance"]
    ratio = dev / null if null else float("nan")
    rows = [("deviance", f"{number(dev, 6)} against {number(null, 6)} for the base rate "
                         f"alone: ratio {fixed(ratio, 4)}")]
    if fit.r2_adjusted is not None:
        rows.append(("R²", f"{fixed(fit.r2_adjusted, 4)} (adjusted for the EDF)"))
    rows.append(("AIC", number(s["aic"], 7)))
    if m.family.scale_known:
        rows.append(("dispersion", "1 (fixed by the family)"))
    else:
        rows.append(("dispersion", f"{number(s['scale'], 5)} (estimated)"))
    p = fit.design.p
    rows.append(("EDF", f"{number(fit.edf['total'], 4)} for {count(p)} "
                        f"coefficient{'s' if p != 1 else ''}"))
    passes = s["passes"]
    status = "converged" if s["converged"] else "NOT CONVERGED (the estimates are those of " \
        "the last pass)"
    rows.append(("passes", f"{passes} data pass{'es' if passes != 1 else ''} after the "
                           f"profile; {status}"))
    refs = rel.reference_values()
    where = ", ".join(f"{c} {number(v, 6) if isinstance(v, float) else v}"
                      for c, v in refs.items())
    if rel.base_rate is not None:
        unit = "per unit of exposure" if m.exposure else f"({m.response})"
        rows.append(("base rate", f"{number(rel.base_rate, 5)} {unit} at the reference point"
                                  + (f": {where}" if where else "")))
    else:
        rows.append(("reference", f"linear predictor {number(rel.base_link, 5)} at the "
                                  "reference point" + (f": {where}" if where else "")))
    return rows


def _tests(fit) -> dict:
    """The term tests by term label (and title), when the fit carries them."""
    tests = getattr(fit, "term_tests", None)
    if tests is None:
        return {}
    rows = tests.to_pylist() if hasattr(tests, "to_pylist") else list(tests)
    return {str(r.get("term")): r for r in rows if isinstance(r, dict)}


def _ranges(fit, rel) -> dict[str, tuple[float, float]]:
    """Smallest and largest relativity (log link) or effect of every term over the rows of
    its table holding the central 99% of the training weight (numeric inputs: a handful of
    extreme policies at the ends do not set it), every level with training weight, or all
    rows of a table without weights."""
    from tallgam.outputs.tables import central_rows

    key = "relativity" if rel.base_rate is not None else "difference"
    out = {}
    for label, table in rel.tables.items():
        values = table.column(key).to_numpy()
        if "training_weight" in table.column_names:
            weight = table.column("training_weight").to_numpy()
            keep = weight > 0 if fit.term(label)[0].drawn_as == "levels" else \
                central_rows(weight)
            if keep.any():
                values = values[keep]
        if len(values):
            out[label] = (float(np.min(values)), float(np.max(values)))
    return out


def _terms(fit, rel) -> list[str]:
    tests = _tests(fit)
    ranges = _ranges(fit, rel)
    log = rel.base_rate is not None
    head = ["rating factor", "kind", "EDF", "smoothing λ",
            "relativity range" if log else "effect range", "p-value"]
    rows = []
    names = set()
    for b in fit.bases[1:]:
        lo_hi = ranges.get(b.label)
        spread = "–" if lo_hi is None else f"{relativity(lo_hi[0])} to {relativity(lo_hi[1])}"
        test = tests.get(b.label) or tests.get(b.title)
        if test is not None and test.get("p_value") is not None:
            names.add(TEST_NAMES.get(str(test.get("test")), str(test.get("test"))))
        rows.append([b.title, b.kind.replace("_", " "), fixed(fit.edf.get(b.label), 2),
                     smoothing(fit.smoothing.get(b.label)), spread,
                     p_value(test.get("p_value")) if test is not None else "–"])
    if not rows:
        return ["Terms", "  none: the model is the base rate alone", ""]
    widths = [max(len(r[i]) for r in [head, *rows]) for i in range(len(head))]
    right = {2, 3}

    def line(cells):
        return "  " + "  ".join(c.rjust(w) if i in right else c.ljust(w)
                                for i, (c, w) in enumerate(zip(cells, widths))).rstrip()

    out = ["Terms", line(head)] + [line(r) for r in rows]
    what = ("relativity range: smallest and largest relativity over the training data "
            "(numeric factors: the central 99% of the training weight; every level)"
            if log else "effect range: smallest and largest effect (link scale) over the "
            "training data (numeric factors: the central 99% of the training weight)")
    out += textwrap.wrap(what, WIDTH, initial_indent="  ", subsequent_indent="  ")
    if tests:
        used = "; ".join(sorted(n for n in names if n))
        note = "p-value: the test that the term is not needed" + (f" ({used})" if used else "")
    else:
        note = "p-value: no test of the terms in this model file"
    out += textwrap.wrap(note, WIDTH, initial_indent="  ", subsequent_indent="  ")
    return out + [""]


def _levels(fit, rel) -> list[str]:
    log = rel.base_rate is not None
    blocks = []
    band = f"{100 * rel.level:g}% band"
    for b in fit.bases[1:]:
        if b.drawn_as != "levels" or b.label not in rel.tables:
            continue
        table = rel.tables[b.label].to_pydict()
        column = [c for c in table if c in b.inputs][0]
        base = rel.references.get(b.label, {}).get(column)
        weight = np.asarray(table.get("training_weight", [np.nan] * len(table[column])),
                            dtype=np.float64)
        total = np.nansum(weight)
        order = list(range(len(table[column])))
        if len(order) > MAX_LEVELS:
            heavy = np.argsort(-np.nan_to_num(weight), kind="stable")[:MAX_LEVELS]
            order = sorted(int(i) for i in heavy)
        against = f"to {base} (the base level)" if base is not None else \
            "to the average level"
        what = "relativity" if log else "effect (link scale)"
        blocks.append(f"  {b.title}: {what} {against}, {band}, share of "
                      f"{rel.weight_label}")
        width = max(len(str(table[column][i])) for i in order) + 2
        for i in order:
            level = str(table[column][i])
            w = share(weight[i] / total) if total > 0 else "–"
            if base is not None and level == str(base):
                blocks.append(f"    {level:<{width}}{'base':>7}  {'':<19}{w:>7}")
                continue
            if log:
                est, lo, hi = (table[k][i] for k in ("relativity", "relativity_lower",
                                                     "relativity_upper"))
            else:
                est, lo, hi = (table[k][i] for k in ("difference", "lower", "upper"))
            blocks.append(f"    {level:<{width}}{relativity(est):>7}  "
                          f"{relativity(lo) + ' to ' + relativity(hi):<19}{w:>7}")
        more = len(table[column]) - len(order)
        if more:
            blocks.append(f"    ... and {more} more levels with less weight (all in the "
                          "relativity tables)")
    return (["Levels"] + blocks + [""]) if blocks else []

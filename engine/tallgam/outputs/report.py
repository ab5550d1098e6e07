"""The self-contained HTML report of a fit: one page a pricing reviewer reads in a browser.

Order: the caution, the summary (:mod:`tallgam.outputs.summary`), every rating factor's
figure and table, the hold-out validation with the check of the hold-out against the
training data, the training data, the caution again. Titles are the terms' titles (their
columns, or a spec's ``title``); the tables show the columns a pricing reader needs
(the input, its training weight, the relativity and its band; on the link scale only for
links other than log), rounded for people; the files from ``tallgam tables`` keep every
column and digit. Images are embedded, so the file opens anywhere without a network.
"""

from __future__ import annotations

from tallgam.outputs.formatting import CAUTION, count, fixed, number, relativity
from tallgam.outputs.summary import profile_text, summary_text

__all__ = ["CAUTION", "banding_page", "banding_section", "html_report", "write_report"]

_CSS = """
body{font-family:system-ui,-apple-system,"Segoe UI",Helvetica,Arial,sans-serif;margin:0;
color:#1d232a;background:#fbfaf7}
main{max-width:1020px;margin:0 auto;padding:24px 28px 60px}
h1{font-size:1.55em;margin:0 0 4px;color:#16324f}
h2{font-size:1.2em;margin:36px 0 10px;padding-bottom:4px;border-bottom:2px solid #16324f;
color:#16324f}
h3{font-size:1.02em;margin:24px 0 8px}
.meta{color:#5b6570;font-size:.9em}
.caution{border-left:5px solid #b5542b;background:#f6ece6;padding:10px 14px;margin:18px 0}
pre{background:#f0eee9;padding:12px;overflow-x:auto;font-size:.82em;line-height:1.35}
table{border-collapse:collapse;font-size:.82em;margin:6px 0 14px}
th,td{padding:3px 9px;border-bottom:1px solid #ddd;text-align:right}
th{background:#ebe8e1;position:sticky;top:0}
td:first-child,th:first-child{text-align:left}
figure{margin:10px 0}
img{max-width:100%;height:auto;border:1px solid #e3e0da;background:white}
.grid{display:grid;grid-template-columns:1fr 1fr;gap:14px}
.note{color:#5b6570;font-size:.85em}
nav a{margin-right:14px}
"""

_CHECK_SCRIPT = """
window.addEventListener("load", function () {
  var imgs = Array.prototype.slice.call(document.images);
  var broken = imgs.filter(function (i) { return !(i.complete && i.naturalWidth > 0); });
  document.body.setAttribute("data-images", broken.length ? "broken:" + broken.length
                                                          : "ok:" + imgs.length);
});
"""

MAX_TABLE_ROWS = 40


def _esc(text) -> str:
    import html

    return html.escape(str(text))


def _html_table(columns: list[tuple[str, list, object]], max_rows: int = MAX_TABLE_ROWS,
                export: str = "the tables export") -> str:
    """A table from (header, values, formatter) columns; long ones show evenly spaced rows."""
    n = len(columns[0][1]) if columns else 0
    step = -(-n // max_rows) if n > max_rows else 1
    rows = range(0, n, step)
    head = "".join(f"<th>{_esc(h)}</th>" for h, _, _ in columns)
    body = "".join("<tr>" + "".join(f"<td>{_esc(fmt(vals[i]))}</td>" for _, vals, fmt in columns)
                   + "</tr>" for i in rows)
    note = (f'<p class="note">{len(rows)} of {n} rows shown (evenly spaced); every row is in '
            f"{export}.</p>" if len(rows) < n else "")
    return f"<table><thead><tr>{head}</tr></thead><tbody>{body}</tbody></table>{note}"


def _text(v) -> str:
    return "–" if v is None else str(v)


def _number(v) -> str:
    return number(v, 5) if isinstance(v, (int, float)) else _text(v)


def _img(png: bytes, alt: str) -> str:
    import base64

    data = base64.b64encode(png).decode("ascii")
    return f'<figure><img alt="{_esc(alt)}" src="data:image/png;base64,{data}"></figure>'


def _relativity_table(table, weight_label: str, log_link: bool, band: str) -> str:
    """A term's table for people: inputs, training weight, relativity (or effect) and band."""
    from tallgam.outputs.plots import STAT_COLUMNS

    d = table.to_pydict()
    cols = [(c, d[c], _number) for c in table.column_names if c not in STAT_COLUMNS]
    if "training_weight" in d:
        cols.append((weight_label, d["training_weight"], lambda v: number(v, 5)))
    if log_link:
        cols += [("relativity", d["relativity"], relativity),
                 (f"{band} band from", d["relativity_lower"], relativity),
                 ("to", d["relativity_upper"], relativity)]
    else:
        cols += [("effect (link scale)", d["difference"], lambda v: number(v, 4)),
                 (f"{band} band from", d["lower"], lambda v: number(v, 4)),
                 ("to", d["upper"], lambda v: number(v, 4))]
    return _html_table(cols)


def _validation_tables(v) -> dict[str, str]:
    """The hold-out tables for people, by section."""
    name = v.exposure_name
    d = v.lift.to_pydict()
    out = {"lift": _html_table([
        ("band", d["band"], _text), (name, d["exposure"], number),
        ("actual", d["actual"], number), ("expected", d["expected"], number),
        ("actual rate", d["actual_rate"], number),
        ("predicted rate", d["expected_rate"], number),
        ("actual / expected", d["actual_over_expected"], lambda x: fixed(x, 3))])}
    if v.double_lift is not None:
        d = v.double_lift.to_pydict()
        out["double"] = _html_table([
            ("band", d["band"], _text), (name, d["exposure"], number),
            ("actual", d["actual"], number),
            ("expected, this model", d["expected"], number),
            ("expected, challenger", d["expected_b"], number),
            ("actual / expected, this model", d["actual_over_expected"],
             lambda x: fixed(x, 3)),
            ("actual / expected, challenger", d["actual_over_expected_b"],
             lambda x: fixed(x, 3))])
    for column, table in v.actual_vs_expected.items():
        d = table.to_pydict()
        first = ([(column, d["band"], _text)] if "band" in d else
                 [(f"{column} from", d["band_from"], _number), ("to", d["band_to"], _number)])
        out[f"ave:{column}"] = _html_table(first + [
            ("rows", d["rows"], count), (name, d["exposure"], number),
            ("actual", d["actual"], number), ("expected", d["expected"], number),
            ("actual / expected", d["actual_over_expected"], lambda x: fixed(x, 3))])
    return out


def html_report(fit, validation=None, *, title: str | None = None, check=None,
                banding=None) -> str:
    """One self-contained HTML page: summary, every term's figure and table, the data
    profile, hold-out validation (if given), the cost of banding of a tariff built from
    the model (``banding``, from ``Tariff.cost``) and the cautions. Images are embedded."""
    from tallgam.outputs import plots

    log_link = fit.model.link.multiplicative
    rel = fit.relativities()
    band = f"{100 * rel.level:g}%"
    title = title or f"Model of {fit.model.response}"
    prov = fit.provenance or {}
    parts = [f"<h1>{_esc(title)}</h1>",
             f'<p class="meta">{_esc(fit.model.family.name)} family, '
             f"{_esc(fit.model.link.name)} link · {count(fit.statistics['rows'])} training "
             f'rows · fitted {_esc(prov.get("fitted_at", "?"))} by tallgam '
             f'{_esc(prov.get("tallgam_version", "?"))}</p>',
             f'<div class="caution"><strong>Caution.</strong> {_esc(CAUTION)}</div>',
             '<nav><a href="#summary">Summary</a><a href="#terms">Rating factors</a>'
             '<a href="#validation">Validation</a>'
             + ('<a href="#tariff">Tariff</a>' if banding is not None else "")
             + '<a href="#data">Training data</a></nav>',
             '<h2 id="summary">Summary</h2>',
             f"<pre>{_esc(summary_text(fit, caution=False))}</pre>"]
    if rel.base_rate is not None:
        parts.append(f"<p>Base rate at the reference point: <strong>"
                     f"{number(rel.base_rate, 5)}</strong>"
                     + (" per unit of exposure" if fit.model.exposure else "")
                     + "; every relativity below multiplies it.</p>")
    parts.append('<h2 id="terms">Rating factors</h2>')
    for label, table in rel.tables.items():
        basis = fit.term(label)[0]
        name = rel.titles.get(label, label)
        parts.append(f"<h3>{_esc(name)} <span class=\"note\">{_esc(basis.kind)}</span></h3>")
        ref = {k: v for k, v in rel.references.get(label, {}).items() if v is not None}
        if ref:
            shown = ", ".join(f"{k} {number(v, 6) if isinstance(v, float) else v}"
                              for k, v in ref.items())
            parts.append(f'<p class="note">reference (relativity 1): {_esc(shown)}</p>')
        if basis.drawn_as == "surface":
            fig = plots.surface_figure(table, name, log_link=log_link)
        else:
            point = [v for k, v in ref.items() if isinstance(v, float)]
            prof = fit.profile.columns.get(basis.inputs[0]) if basis.inputs else None
            histogram = (prof.values, prof.mass) if (
                prof is not None and prof.kind == "numeric" and prof.distinct
                and prof.mass is not None) else None
            fig = plots.effect_figure(table, name, log_link=log_link,
                                      weight_label=rel.weight_label,
                                      reference=point[0] if len(point) == 1 else None,
                                      histogram=histogram)
        parts.append(_img(plots.to_png(fig), f"effect of {name}"))
        parts.append(_relativity_table(table, rel.weight_label, log_link, band))
    parts.append('<h2 id="validation">Validation</h2>')
    if validation is None:
        parts.append('<p class="note">No hold-out data was given; run <code>tallgam report '
                     "MODEL HOLDOUT -o REPORT.html</code> (with <code>--where</code> to pick "
                     "the hold-out rows) to add lift, Gini and actual-versus-expected "
                     "tables.</p>")
    else:
        v = validation
        tables = _validation_tables(v)
        rate = "rate per unit of exposure" if v.exposure_name == "exposure" else \
            f"mean per unit of {v.exposure_name}"
        parts.append(f"<pre>{_esc(v.summary())}</pre>")
        parts.append('<div class="grid">'
                     + _img(plots.to_png(plots.lift_figure(v.lift, rate)), "lift chart")
                     + _img(plots.to_png(plots.lorenz_figure(v.lorenz, v.gini)), "Lorenz curve")
                     + "</div>")
        parts.append(tables["lift"])
        if v.double_lift is not None:
            parts.append("<h3>Double lift against the challenger</h3>")
            parts.append(_img(plots.to_png(plots.double_lift_figure(v.double_lift)),
                              "double lift"))
            parts.append(tables["double"])
        kinds = {c: k for b in fit.bases for c, k in b.spec.input_kinds().items()}
        for column, table in v.actual_vs_expected.items():
            ordered = kinds.get(column) == "numeric"
            parts.append(f"<h3>Actual over expected by {_esc(column)}</h3>")
            parts.append(_img(plots.to_png(plots.actual_vs_expected_figure(
                table, column, ordered=ordered, exposure_name=v.exposure_name)),
                f"actual over expected by {column}"))
            parts.append(tables[f"ave:{column}"])
    if check is not None:
        parts.append('<h3 id="check">The hold-out against the training data</h3>')
        parts.append(f"<pre>{_esc(check.summary())}</pre>")
    if banding is not None:
        parts.append(banding_section(banding))
    parts.append('<h2 id="data">Training data</h2>')
    parts.append(f"<pre>{_esc(profile_text(fit))}</pre>")
    parts.append(f'<div class="caution">{_esc(CAUTION)}</div>')
    return _page(title, parts)


def _page(title: str, parts: list[str]) -> str:
    body = "\n".join(parts)
    return (f'<!DOCTYPE html>\n<html lang="en"><head><meta charset="utf-8">'
            f'<meta name="viewport" content="width=device-width, initial-scale=1">'
            f"<title>{_esc(title)}</title><style>{_CSS}</style></head>"
            f"<body><main>{body}</main><script>{_CHECK_SCRIPT}</script></body></html>\n")


def write_report(fit, path, *, data=None, where: str | None = None, against=None,
                 title: str | None = None, progress=False, banding=None) -> str:
    """Validate on ``data`` (if given; the rows meeting the SQL condition ``where``) and
    write the HTML report atomically; returns the path. The output path is checked first,
    so a bad one fails before the validation pass. ``banding``: the cost of banding of a
    tariff built from the model (a section)."""
    from tallgam.atomic import check_target, write_text

    check_target(path)
    validation = check = None
    if data is not None:
        validation = fit.validate(data, against=against, where=where, progress=progress)
        check = fit.check(data, where=where)
    write_text(path, html_report(fit, validation, title=title, check=check,
                                 banding=banding))
    return str(path)


def _arrow_table(table) -> str:
    """Any Arrow table for people: its column names, numbers rounded (:func:`_number`)."""
    d = table.to_pydict()
    return _html_table([(c, d[c], _number) for c in table.column_names])


def banding_section(cost) -> str:
    """HTML of the cost of banding (:class:`~tallgam.outputs.banding_cost.BandingCost`):
    the cost table, how far premiums move, and per banded factor its bands against the
    fitted curve and actual over expected of tariff and model."""
    from tallgam.outputs import plots

    t = cost.threshold
    parts = ['<h2 id="tariff">Tariff: the cost of banding</h2>',
             f"<p>The banded tariff against the smooth model(s) ({_esc(', '.join(cost.models))})"
             f" on {count(cost.rows)} hold-out rows. The premium of "
             f"<strong>{100 * cost.moved:.2f}%</strong> of policies moves by more than "
             f"{100 * t:g}% ({100 * cost.moved_up:.2f}% up, {100 * cost.moved_down:.2f}% down; "
             f"{100 * cost.moved_exposure:.2f}% of exposure).</p>",
             _arrow_table(cost.table()),
             f'<p class="note">deviance: {_esc(cost.deviance_note)}</p>',
             _img(plots.to_png(plots.premium_ratio_figure(cost.ratio_bands, t)),
                  "ratio of tariff to model premium"),
             '<div class="grid">' + _arrow_table(cost.ratio_bands)
             + _arrow_table(cost.ratio_quantiles) + "</div>",
             "<h3>Double lift: bands of the ratio tariff / model premium</h3>",
             _arrow_table(cost.double_lift)]
    for name, table in cost.by_band.items():
        parts.append(f"<h3>{_esc(name)}</h3>")
        curve = cost.curves.get(name)
        if curve is not None:
            parts.append(_img(plots.to_png(plots.banded_curve_figure(curve, name)),
                              f"fitted relativity and tariff bands of {name}"))
        parts.append(_img(plots.to_png(plots.actual_vs_expected_figure(table, name)),
                          f"actual versus expected by band of {name}"))
        parts.append(_arrow_table(table))
    return "\n".join(parts)


def banding_page(cost, *, title: str = "The cost of banding") -> str:
    """A self-contained HTML page of the cost of banding, with the cautions."""
    parts = [f"<h1>{_esc(title)}</h1>",
             f'<div class="caution"><strong>Caution.</strong> {_esc(CAUTION)}</div>',
             banding_section(cost), f'<div class="caution">{_esc(CAUTION)}</div>']
    return _page(title, parts)

"""Human-readable output of a fit: the text summary and the self-contained HTML report."""

from __future__ import annotations

import numpy as np

CAUTION = ("Model outputs support, and do not replace, review by a qualified actuary; the use "
           "of rating factors is governed by local law and regulation.")


def _num(x, digits: int = 4) -> str:
    if x is None or (isinstance(x, float) and not np.isfinite(x)):
        return "–"
    ax = abs(x)
    if ax != 0 and (ax >= 1e6 or ax < 1e-3):
        return f"{x:.{digits - 1}e}"
    return f"{x:,.{digits}g}" if ax >= 1e4 else f"{x:.{digits}g}"


def summary_text(fit) -> str:
    """A plain-text summary: header, a table of terms, fit statistics, notes."""
    m, s = fit.model, fit.statistics
    crit = s["criterion"].upper() if s["criterion"] != "fixed" else "fixed smoothing"
    status = "converged" if s["converged"] else "NOT CONVERGED"
    passes = f"{s['passes']} data pass{'es' if s['passes'] != 1 else ''} after the profile"
    fitted = s.get("family_parameters") or m.family.params()
    fam = m.family.name + "".join(f", {k} {v:.4g}" for k, v in fitted.items() if v is not None)
    lines = [
        f"tallgam additive model · {fam} family, {m.link.name} link · {crit}",
        f"  response    {m.response}",
    ]
    if m.exposure:
        lines.append(f"  exposure    {m.exposure}  (offset ln exposure)")
    if m.offset:
        lines.append(f"  offset      {m.offset}")
    if m.weights:
        lines.append(f"  weights     {m.weights}")
    if m.where:
        lines.append(f"  filter      {m.where}")
    dropped = f", {s['dropped_rows']:,} dropped for missing values" if s.get("dropped_rows") else ""
    lines += [
        f"  rows        {s['rows']:,}{dropped}",
        f"  iterations  {passes}, {status}",
        "",
        f"  {'term':<32}{'columns':>8}{'EDF':>9}  {'smoothing λ':<22}",
    ]
    for b, sl in zip(fit.bases, fit.design.slices):
        lam = fit.smoothing.get(b.label)
        if isinstance(lam, list) and len(lam) > 2:
            lam_s = f"{len(lam)}: {_num(min(lam), 2)}–{_num(max(lam), 2)}"
        elif isinstance(lam, list):
            lam_s = "/".join(_num(v, 3) for v in lam)
        else:
            lam_s = _num(lam, 3) if lam is not None else "–"
        lines.append(f"  {b.label:<32}{sl.stop - sl.start:>8}{fit.edf.get(b.label, 0):>9.2f}"
                     f"  {lam_s:<22}".rstrip())
    lines.append(f"  {'all terms':<32}{fit.design.p:>8}{fit.edf['total']:>9.2f}")
    coef = fit.coefficients
    unpenalized = {b.label for b in fit.bases if b.n_penalties == 0}
    shown = [i for i, t in enumerate(coef["term"].to_pylist()) if t in unpenalized]
    if shown:
        lines += ["", f"  {'parametric coefficient':<40}{'estimate':>12}{'std. error':>12}"]
        terms = coef["term"].to_pylist()
        names = coef["name"].to_pylist()
        est = coef["estimate"].to_numpy()
        se = coef["std_error"].to_numpy()
        per_term: dict[str, int] = {}
        for i in shown:
            per_term[terms[i]] = per_term.get(terms[i], 0) + 1
            if per_term[terms[i]] > 12:
                continue
            label = f"{terms[i]} {names[i]}" if terms[i] != "intercept" else "intercept"
            lines.append(f"  {label[:40]:<40}{_num(est[i]):>12}{_num(se[i]):>12}")
        for t, k in per_term.items():
            if k > 12:
                lines.append(f"  ... {t}: {k - 12} more levels (see fit.coefficients)")
    lines += [
        "",
        f"  deviance {_num(s['deviance'], 6)} against {_num(s['null_deviance'], 6)} for the "
        f"null model: {100 * s['deviance_explained']:.2f}% explained",
        f"  scale φ {_num(s['scale'], 5)} · adjusted R² {_num(s['r2_adjusted'], 4)} · "
        f"AIC {_num(s['aic'], 7)} · {s['criterion']} criterion {_num(s['criterion_value'], 7)}",
    ]
    if fit.notes:
        lines += ["", "  notes:"] + [f"  - {n}" for n in fit.notes]
    return "\n".join(lines)


# ---------------------------------------------------------------------------------------
# the self-contained HTML report

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


def _cell(v) -> str:
    if isinstance(v, float):
        return _esc(_num(v, 5))
    return _esc(v if v is not None else "–")


def _html_table(table, max_rows: int = MAX_TABLE_ROWS) -> str:
    rows = table.to_pylist()
    cols = table.column_names
    shown = rows if len(rows) <= max_rows else rows[:: -(-len(rows) // max_rows)]
    head = "".join(f"<th>{_esc(c)}</th>" for c in cols)
    body = "".join("<tr>" + "".join(f"<td>{_cell(r[c])}</td>" for c in cols) + "</tr>"
                   for r in shown)
    note = (f'<p class="note">{len(shown)} of {len(rows)} rows shown (evenly spaced); the full '
            "table is in the tables export.</p>" if len(shown) < len(rows) else "")
    return f"<table><thead><tr>{head}</tr></thead><tbody>{body}</tbody></table>{note}"


def _img(png: bytes, alt: str) -> str:
    import base64

    data = base64.b64encode(png).decode("ascii")
    return f'<figure><img alt="{_esc(alt)}" src="data:image/png;base64,{data}"></figure>'


def _profile_table(fit) -> str:
    rows = []
    for name, col in fit.profile.columns.items():
        if col.kind == "numeric":
            rows.append((name, "numeric", f"{_num(col.min)} to {_num(col.max)}",
                         _num(col.mean), _num(col.weighted_median())))
        else:
            rows.append((name, "levels", f"{col.distinct} levels", "–", "–"))
    head = "".join(f"<th>{h}</th>" for h in ("column", "kind", "range", "mean",
                                             "weighted median"))
    body = "".join("<tr>" + "".join(f"<td>{_esc(v)}</td>" for v in r) + "</tr>" for r in rows)
    return f"<table><thead><tr>{head}</tr></thead><tbody>{body}</tbody></table>"


def html_report(fit, validation=None, *, title: str | None = None, check=None,
                banding=None) -> str:
    """One self-contained HTML page: summary, every term's figure and table, the data
    profile, hold-out validation (if given), the cost of banding of a tariff built from
    the model (``banding``, from ``Tariff.cost``) and the cautions. Images are embedded."""
    from tallgam.outputs import plots

    log_link = fit.model.link.multiplicative
    rel = fit.relativities()
    title = title or f"{fit.model.family.name} model of {fit.model.response}"
    parts = [f"<h1>{_esc(title)}</h1>",
             f'<p class="meta">tallgam {_esc(fit.provenance.get("tallgam_version", ""))} · '
             f'fitted {_esc(fit.provenance.get("fitted_at", ""))} · '
             f'{fit.statistics["rows"]:,} training rows</p>',
             f'<div class="caution"><strong>Caution.</strong> {_esc(CAUTION)}</div>',
             '<nav><a href="#summary">Summary</a><a href="#terms">Terms</a>'
             '<a href="#validation">Validation</a>'
             + ('<a href="#tariff">Tariff</a>' if banding is not None else "")
             + '<a href="#data">Data</a></nav>',
             '<h2 id="summary">Summary</h2>', f"<pre>{_esc(summary_text(fit))}</pre>"]
    if rel.base_rate is not None:
        parts.append(f"<p>Base rate at the reference point: <strong>{rel.base_rate:.6g}"
                     "</strong> per unit of exposure; every relativity below multiplies it.</p>")
    parts.append('<h2 id="terms">Terms</h2>')
    for label, table in rel.tables.items():
        parts.append(f"<h3>{_esc(label)}</h3>")
        ref = rel.references.get(label, {})
        if ref:
            shown = ", ".join(f"{k} = {v}" for k, v in ref.items() if v is not None)
            if shown:
                parts.append(f'<p class="note">reference: {_esc(shown)}</p>')
        keys = [c for c in table.column_names if c not in plots.STAT_COLUMNS]
        if len(keys) == 2 and fit.term(label)[0].drawn_as == "surface":
            fig = plots.surface_figure(table, label, log_link=log_link)
        else:
            fig = plots.effect_figure(table, label, log_link=log_link)
        parts.append(_img(plots.to_png(fig), f"effect of {label}"))
        parts.append(_html_table(table))
    parts.append('<h2 id="validation">Validation</h2>')
    if validation is None:
        parts.append('<p class="note">No hold-out data was given; run <code>tallgam report '
                     "MODEL --data HOLDOUT</code> to add lift, Gini and actual-versus-expected "
                     "tables.</p>")
    else:
        v = validation
        parts.append(f"<pre>{_esc(v.summary())}</pre>")
        parts.append('<div class="grid">'
                     + _img(plots.to_png(plots.lift_figure(v.lift)), "lift chart")
                     + _img(plots.to_png(plots.lorenz_figure(v.lorenz, v.gini)), "Lorenz curve")
                     + "</div>")
        parts.append(_html_table(v.lift))
        if v.double_lift is not None:
            parts.append("<h3>Double lift against the challenger</h3>")
            parts.append(_img(plots.to_png(plots.double_lift_figure(v.double_lift)),
                              "double lift"))
            parts.append(_html_table(v.double_lift))
        for column, table in v.actual_vs_expected.items():
            parts.append(f"<h3>Actual versus expected by {_esc(column)}</h3>")
            parts.append(_img(plots.to_png(plots.actual_vs_expected_figure(table, column)),
                              f"actual versus expected by {column}"))
            parts.append(_html_table(table))
    if check is not None:
        parts.append('<h3 id="check">The hold-out against the training data</h3>')
        parts.append(f"<pre>{_esc(check.summary())}</pre>")
    if banding is not None:
        parts.append(banding_section(banding))
    parts.append('<h2 id="data">Training data</h2>')
    parts.append(f"<p>{fit.profile.rows:,} rows"
                 + (f", filter <code>{_esc(fit.model.where)}</code>" if fit.model.where else "")
                 + ".</p>")
    parts.append(_profile_table(fit))
    parts.append(f'<div class="caution">{_esc(CAUTION)}</div>')
    return _page(title, parts)


def _page(title: str, parts: list[str]) -> str:
    body = "\n".join(parts)
    return (f'<!DOCTYPE html>\n<html lang="en"><head><meta charset="utf-8">'
            f'<meta name="viewport" content="width=device-width, initial-scale=1">'
            f"<title>{_esc(title)}</title><style>{_CSS}</style></head>"
            f"<body><main>{body}</main><script>{_CHECK_SCRIPT}</script></body></html>\n")


def write_report(fit, path, *, data=None, against=None, title: str | None = None,
                 progress=False, banding=None) -> str:
    """Validate on ``data`` (if given) and write the HTML report atomically; returns path.
    The output path is checked first, so a bad one fails before the validation pass.
    ``banding``: the cost of banding of a tariff built from the model (a section)."""
    from tallgam.atomic import check_target, write_text

    check_target(path)
    validation = check = None
    if data is not None:
        validation = fit.validate(data, against=against, progress=progress)
        check = fit.check(data)
    write_text(path, html_report(fit, validation, title=title, check=check,
                                 banding=banding))
    return str(path)


def banding_section(cost) -> str:
    """HTML of the cost of banding (:class:`~tallgam.outputs.banding_cost.BandingCost`):
    the cost table, how far premiums move, and per banded factor its bands against the
    fitted curve and actual over expected of tariff and model."""
    from tallgam.outputs import plots

    t = cost.threshold
    parts = ['<h2 id="tariff">Tariff: the cost of banding</h2>',
             f"<p>The banded tariff against the smooth model(s) ({_esc(', '.join(cost.models))})"
             f" on {cost.rows:,} hold-out rows. The premium of "
             f"<strong>{100 * cost.moved:.2f}%</strong> of policies moves by more than "
             f"{100 * t:g}% ({100 * cost.moved_up:.2f}% up, {100 * cost.moved_down:.2f}% down; "
             f"{100 * cost.moved_exposure:.2f}% of exposure).</p>",
             _html_table(cost.table()),
             f'<p class="note">deviance: {_esc(cost.deviance_note)}</p>',
             _img(plots.to_png(plots.premium_ratio_figure(cost.ratio_bands, t)),
                  "ratio of tariff to model premium"),
             '<div class="grid">' + _html_table(cost.ratio_bands)
             + _html_table(cost.ratio_quantiles) + "</div>",
             "<h3>Double lift: bands of the ratio tariff / model premium</h3>",
             _html_table(cost.double_lift)]
    for name, table in cost.by_band.items():
        parts.append(f"<h3>{_esc(name)}</h3>")
        curve = cost.curves.get(name)
        if curve is not None:
            parts.append(_img(plots.to_png(plots.banded_curve_figure(curve, name)),
                              f"fitted relativity and tariff bands of {name}"))
        parts.append(_img(plots.to_png(plots.actual_vs_expected_figure(table, name)),
                          f"actual versus expected by band of {name}"))
        parts.append(_html_table(table))
    return "\n".join(parts)


def banding_page(cost, *, title: str = "The cost of banding") -> str:
    """A self-contained HTML page of the cost of banding, with the cautions."""
    parts = [f"<h1>{_esc(title)}</h1>",
             f'<div class="caution"><strong>Caution.</strong> {_esc(CAUTION)}</div>',
             banding_section(cost), f'<div class="caution">{_esc(CAUTION)}</div>']
    return _page(title, parts)

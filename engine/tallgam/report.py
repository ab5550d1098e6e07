"""Human-readable output of a fit: the text summary (the HTML report grows here later)."""

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
    shown = [i for i, t in enumerate(coef["term"].to_pylist())
             if t.startswith(("linear(", "categorical(", "intercept"))]
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

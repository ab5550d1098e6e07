"""A fitted model as one DuckDB SQL expression, for scoring inside the warehouse.

The expression reproduces ``predict(output="response")``: every term writes its own SQL
(:meth:`tallgam.terms.base.Basis.sql`: a spline its piecewise cubic polynomial with the
column clamped to the training range, a level term a CASE over its levels, where an unseen
level gives NULL and ``predict`` would raise), then the offset and the inverse link.
"""

from __future__ import annotations

from tallgam.errors import SpecError


def link_sql(fit, *, with_offset: bool = True) -> str:
    """SQL of the linear predictor η (including the offset unless with_offset=False)."""
    parts = [b.sql(fit.coefficients_raw[sl]) for b, sl in zip(fit.bases, fit.design.slices)]
    if with_offset:
        exprs = fit.expressions
        if "exposure" in exprs:
            parts.append(f"ln(CAST({exprs['exposure']} AS DOUBLE))")
        if "offset" in exprs:
            parts.append(f"CAST({exprs['offset']} AS DOUBLE)")
    return "(" + "\n + ".join(parts) + ")"


def to_sql(fit, *, output: str = "response", with_offset: bool = True) -> str:
    """One DuckDB SQL expression of the prediction (``"response"`` or ``"link"``)."""
    eta = link_sql(fit, with_offset=with_offset)
    if output == "link":
        return eta
    if output != "response":
        raise SpecError(f"output must be 'response' or 'link', got {output!r}")
    return fit.model.link.sql_inverse(eta)

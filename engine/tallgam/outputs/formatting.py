"""Numbers and names for people: what the summary, the report and the command line print.

Files keep every digit (the shortest text that reads back as the same float); what people
read is rounded here, in one place: counts and large sums with thousands separators and no
exponent (124,102 rather than 1.241e+05), other values to a few significant digits,
p-values as "< 0.001" below a thousandth. Nothing here imports the engine, so the command
line can use it without loading numba or DuckDB.
"""

from __future__ import annotations

import math

CAUTION = ("Model outputs support, and do not replace, review by a qualified actuary; the use "
           "of rating factors is governed by local law and regulation.")


def _finite(x) -> bool:
    try:
        return x is not None and math.isfinite(float(x))
    except (TypeError, ValueError):
        return False


def number(x, digits: int = 4, *, zeros: bool = False) -> str:
    """``x`` for people: ``digits`` significant digits; from 10^digits up, a whole number
    with thousands separators (never an exponent for sums and counts); an exponent only
    for magnitudes below 1e-4 or from 1e15. None, NaN and inf print as "–". ``zeros``
    keeps trailing zeros (0.05500), so that a column of rates lines up."""
    if not _finite(x):
        return "–"
    x = float(x)
    ax = abs(x)
    if ax == 0:
        return "0"
    if ax < 1e-4 or ax >= 1e15:
        return f"{x:.{max(digits - 1, 0)}e}"
    if ax >= 10 ** digits:
        return f"{x:,.0f}"
    text = f"{x:{'#' if zeros else ''},.{digits}g}".rstrip(".")
    if "e" in text:  # .g picks an exponent just below 10**digits after rounding
        return f"{x:,.0f}"
    return text


def fixed(x, decimals: int = 3) -> str:
    """``x`` with a fixed number of decimals (relativities: 1.000, 0.873)."""
    return f"{float(x):,.{decimals}f}" if _finite(x) else "–"


def relativity(x) -> str:
    """A relativity (or an effect) for people: three decimals up to 10, then fewer
    (0.874, 1.250, 12.31, 305)."""
    if not _finite(x):
        return "–"
    ax = abs(float(x))
    return fixed(x, 3) if ax < 10 else fixed(x, 2) if ax < 100 else number(x, 3)


def count(n) -> str:
    """A whole number with thousands separators."""
    return f"{int(n):,}" if _finite(n) else "–"


def share(x, decimals: int = 1) -> str:
    """A fraction as a percentage: 0.0324 → 3.2%."""
    return f"{100 * float(x):.{decimals}f}%" if _finite(x) else "–"


def p_value(p) -> str:
    """A p-value for people: "< 0.001" below a thousandth, else three decimals."""
    if not _finite(p):
        return "–"
    return "< 0.001" if float(p) < 0.001 else f"{float(p):.3f}"


def smoothing(lam) -> str:
    """A smoothing parameter (or several) for people: two significant digits in exponent
    form (λ spans many orders of magnitude: 6.5e+04, 4.0e+08)."""
    if lam is None:
        return "–"
    if isinstance(lam, (list, tuple)):
        values = [v for v in lam if _finite(v)]
        if len(values) > 2:
            return f"{len(values)} values {min(values):.1e} to {max(values):.1e}"
        return " / ".join(f"{v:.1e}" for v in values) or "–"
    return f"{float(lam):.1e}" if _finite(lam) else "–"


def weight_label(weight_name: str | None, unit: str | None) -> str:
    """What the training weight of a table row or chart bar is, with its unit:
    ``"training exposure (Σ exposure)"``, ``"training weight (Σ claim_count)"`` or
    ``"training rows"``. ``weight_name`` is the profile's (``"exposure"``, ``"weights"``
    or None) and ``unit`` the model's exposure or weights column (or SQL)."""
    if weight_name is None or not unit:
        return "training rows"
    what = "exposure" if weight_name == "exposure" else "weight"
    return f"training {what} (Σ {unit})"

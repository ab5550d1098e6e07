"""Cubic B-spline bases and their penalties: plain numerical functions.

A basis of ``size`` cubic B-splines on ``[lo, hi]`` is defined by a clamped knot vector
``t`` of length ``size + 4``: four knots at ``lo``, ``size - 4`` interior knots, four at
``hi``. Each row of the basis has at most four non-zeros, in consecutive columns starting
at ``first``; :func:`evaluate` returns exactly those (first column, four values), which is
what the accumulation kernels consume.
"""

from __future__ import annotations

import numba
import numpy as np
from scipy.interpolate import BSpline

DEGREE = 3
ORDER = DEGREE + 1  # non-zeros per row


def clamped_knots(interior: np.ndarray, lo: float, hi: float) -> np.ndarray:
    """Full knot vector (length ``len(interior) + 8``) with 4-fold boundary knots."""
    interior = np.asarray(interior, dtype=np.float64)
    return np.concatenate([np.full(ORDER, lo), interior, np.full(ORDER, hi)])


def interior_from_quantiles(values: np.ndarray, counts: np.ndarray, size: int) -> np.ndarray:
    """Interior knots at equally spaced quantiles of a (value, count) histogram.

    ``values`` must be sorted and distinct; ``counts`` are their frequencies (or weights).
    Returns at most ``size - 4`` strictly increasing knots strictly inside the range;
    ties in the quantiles collapse, so fewer knots come back when values are few.
    """
    n_int = size - ORDER
    if n_int <= 0:
        return np.empty(0)
    cum = np.cumsum(counts, dtype=np.float64)
    total = cum[-1]
    probs = np.arange(1, n_int + 1) / (n_int + 1)
    # inverse of the empirical distribution, interpolated between distinct values
    mid = (cum - 0.5 * counts) / total
    knots = np.interp(probs, mid, values)
    lo, hi = values[0], values[-1]
    knots = np.unique(knots[(knots > lo) & (knots < hi)])
    return knots


def interior_uniform(lo: float, hi: float, size: int) -> np.ndarray:
    """``size - 4`` equally spaced interior knots on ``(lo, hi)``."""
    n_int = size - ORDER
    return np.linspace(lo, hi, n_int + 2)[1:-1] if n_int > 0 else np.empty(0)


@numba.njit(cache=True, inline="always")
def _span(t: np.ndarray, size: int, x: float) -> int:
    """Index s with t[s] <= x < t[s+1], clamped to [3, size-1] (binary search)."""
    lo = DEGREE
    hi = size  # t[size] is the right boundary
    if x >= t[hi]:
        return size - 1
    if x <= t[lo]:
        return lo
    while hi - lo > 1:
        mid = (lo + hi) >> 1
        if x < t[mid]:
            hi = mid
        else:
            lo = mid
    return lo


@numba.njit(cache=True, inline="always")
def _basis_row(t: np.ndarray, s: int, x: float, out: np.ndarray) -> None:
    """The four non-zero cubic B-spline values at x in span s.

    The Cox–de Boor recursion (de Boor 1978) unrolled for degree 3, without allocation.
    """
    left1 = x - t[s]
    left2 = x - t[s - 1]
    left3 = x - t[s - 2]
    right1 = t[s + 1] - x
    right2 = t[s + 2] - x
    right3 = t[s + 3] - x
    # degree 1
    temp = 1.0 / (right1 + left1)
    n0 = right1 * temp
    n1 = left1 * temp
    # degree 2
    temp = n0 / (right1 + left2)
    m0 = right1 * temp
    saved = left2 * temp
    temp = n1 / (right2 + left1)
    m1 = saved + right2 * temp
    m2 = left1 * temp
    # degree 3
    temp = m0 / (right1 + left3)
    out[0] = right1 * temp
    saved = left3 * temp
    temp = m1 / (right2 + left2)
    out[1] = saved + right2 * temp
    saved = left2 * temp
    temp = m2 / (right3 + left1)
    out[2] = saved + right3 * temp
    out[3] = left1 * temp


@numba.njit(cache=True, parallel=True)
def _evaluate(t, size, x, first, values):
    lo = t[DEGREE]
    hi = t[size]
    for i in numba.prange(x.shape[0]):
        xi = min(max(x[i], lo), hi)
        s = _span(t, size, xi)
        first[i] = s - DEGREE
        _basis_row(t, s, xi, values[i])


def evaluate(knots: np.ndarray, x: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Non-zero cubic B-spline values at ``x`` (clamped to the knot range).

    Returns ``first`` (int32, shape (n,)), the index of the first non-zero basis
    function of each row, and ``values`` (float64, shape (n, 4)).
    """
    knots = np.ascontiguousarray(knots, dtype=np.float64)
    x = np.ascontiguousarray(x, dtype=np.float64)
    size = knots.shape[0] - ORDER
    first = np.empty(x.shape[0], dtype=np.int32)
    values = np.empty((x.shape[0], ORDER), dtype=np.float64)
    _evaluate(knots, size, x, first, values)
    return first, values


def dense_matrix(knots: np.ndarray, x: np.ndarray) -> np.ndarray:
    """The dense basis matrix, shape (n, size); for small grids and checks only."""
    first, values = evaluate(knots, x)
    size = len(knots) - ORDER
    out = np.zeros((len(x), size))
    rows = np.arange(len(x))[:, None]
    out[rows, first[:, None] + np.arange(ORDER)] = values
    return out


def curvature_penalty(knots: np.ndarray, lo: float | None = None,
                      hi: float | None = None) -> np.ndarray:
    """S with S[i, j] = ∫ B_i''(x) B_j''(x) dx over [lo, hi] (default: the knot range).

    B'' is piecewise linear, so two-point Gauss–Legendre per knot interval is exact.
    Units: 1 / (x units)^3 times coefficient units squared.
    """
    size = len(knots) - ORDER
    breaks = np.unique(knots)
    if lo is not None:
        breaks = breaks[(breaks >= lo) & (breaks <= hi)]
    gx, gw = np.polynomial.legendre.leggauss(2)
    a, b = breaks[:-1], breaks[1:]
    half = 0.5 * (b - a)
    pts = (0.5 * (a + b))[:, None] + half[:, None] * gx[None, :]
    wts = half[:, None] * gw[None, :]
    second = BSpline(knots, np.eye(size), DEGREE, extrapolate=False).derivative(2)(pts.ravel())
    second = np.nan_to_num(second)
    s = (second * wts.ravel()[:, None]).T @ second
    return 0.5 * (s + s.T)


def unit_exponent(span: float) -> int:
    """e with 2**e the power of two nearest ``span``: the unit a column is measured in
    inside the engine, so penalties and design values stay within floating point whatever
    the column's own units (scaling by a power of two is exact)."""
    span = abs(float(span))
    if not (np.isfinite(span) and span > 0):
        return 0
    return int(np.round(np.log2(span)))


def difference_penalty(size: int, order: int = 2) -> np.ndarray:
    """P-spline penalty DᵀD with D the ``order``-th difference matrix (Eilers & Marx 1996)."""
    d = np.diff(np.eye(size), n=order, axis=0)
    return d.T @ d


def periodic_knots(breaks: np.ndarray, period: float) -> np.ndarray:
    """Extended knot vector for a periodic cubic basis on one period.

    ``breaks`` are the k + 1 knots τ₀ < … < τ_k = τ₀ + period. The vector continues the
    spacing periodically by three knots at each end, giving k + 3 ordinary cubic
    B-splines on [τ₀, τ_k]; functions i and i + k are then the same periodic function,
    which :func:`periodic_fold` exploits.
    """
    b = np.asarray(breaks, dtype=np.float64)
    k = len(b) - 1
    return np.concatenate([b[k - 3:k] - period, b, b[1:4] + period])


def periodic_fold(k: int) -> np.ndarray:
    """The (k + 3) × k matrix summing extended basis function i into column i mod k."""
    w = np.zeros((k + 3, k))
    w[np.arange(k + 3), np.arange(k + 3) % k] = 1.0
    return w


_NONE_I = np.empty(0, dtype=np.int32)
_NONE_F = np.empty(0, dtype=np.float64)


@numba.njit(cache=True, parallel=True)
def _encode_rows(t, size, x, col0, codes, stride, mult, period, wrap, idx, val):
    n = x.shape[0]
    lo = t[DEGREE]
    hi = t[size]
    for i in numba.prange(n):
        xi = x[i]
        if period > 0.0:
            xi = lo + (xi - lo) % period
        xi = min(max(xi, lo), hi)
        s = _span(t, size, xi)
        row = val[i]
        _basis_row(t, s, xi, row)
        off = col0
        scale = 1.0
        if codes.shape[0] > 0:
            c = codes[i]
            if c < 0:
                scale = 0.0
                c = 0
            off += c * stride
        if mult.shape[0] > 0:
            scale *= mult[i]
        for a in range(ORDER):
            col = s - DEGREE + a
            if wrap > 0:
                col = col % wrap
            idx[i, a] = off + col
            if scale != 1.0:
                row[a] *= scale


def encode_rows(knots: np.ndarray, x: np.ndarray, col0: int, idx: np.ndarray,
                val: np.ndarray, *, codes: np.ndarray | None = None, stride: int = 0,
                multiplier: np.ndarray | None = None, period: float = 0.0,
                wrap: int = 0) -> None:
    """Write a cubic B-spline's sparse rows straight into the design block: ``idx``
    (n × 4, int32) and ``val`` (n × 4), which may be column slices of wider arrays.

    ``codes``/``stride``: one curve per level (level c uses columns c·stride onwards; a
    negative code gives zero values). ``multiplier``: values times z. ``period``/``wrap``:
    a periodic basis (x wrapped into one period, columns taken modulo ``wrap``).
    """
    knots = np.ascontiguousarray(knots, dtype=np.float64)
    size = knots.shape[0] - ORDER
    _encode_rows(knots, size, np.ascontiguousarray(x, dtype=np.float64), int(col0),
                 _NONE_I if codes is None else np.ascontiguousarray(codes, dtype=np.int32),
                 int(stride), _NONE_F if multiplier is None
                 else np.ascontiguousarray(multiplier, dtype=np.float64),
                 float(period), int(wrap), idx, val)


@numba.njit(cache=True, parallel=True)
def _encode_tensor2(t1, size1, x1, t2, size2, x2, col0, stride1, idx, val):
    n = x1.shape[0]
    lo1, hi1 = t1[DEGREE], t1[size1]
    lo2, hi2 = t2[DEGREE], t2[size2]
    for i in numba.prange(n):
        b1 = np.empty(ORDER)
        b2 = np.empty(ORDER)
        u = min(max(x1[i], lo1), hi1)
        v = min(max(x2[i], lo2), hi2)
        s1 = _span(t1, size1, u)
        s2 = _span(t2, size2, v)
        _basis_row(t1, s1, u, b1)
        _basis_row(t2, s2, v, b2)
        k = 0
        for a in range(ORDER):
            for b in range(ORDER):
                idx[i, k] = col0 + (s1 - DEGREE + a) * stride1 + (s2 - DEGREE + b)
                val[i, k] = b1[a] * b2[b]
                k += 1


def encode_tensor2(knots1: np.ndarray, x1: np.ndarray, knots2: np.ndarray, x2: np.ndarray,
                   col0: int, idx: np.ndarray, val: np.ndarray) -> None:
    """The 16 non-zeros of a two-margin tensor-product row (column (i₁·k₂ + i₂))."""
    k1 = np.ascontiguousarray(knots1, dtype=np.float64)
    k2 = np.ascontiguousarray(knots2, dtype=np.float64)
    _encode_tensor2(k1, k1.shape[0] - ORDER, np.ascontiguousarray(x1, dtype=np.float64),
                    k2, k2.shape[0] - ORDER, np.ascontiguousarray(x2, dtype=np.float64),
                    int(col0), k2.shape[0] - ORDER, idx, val)

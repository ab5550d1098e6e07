"""Numba kernels over encoded row blocks: the only code that touches every row.

A batch arrives encoded (see :mod:`tallgam.design`) as

* ``idx`` (int32, n × q) and ``val`` (float64, n × q): the q non-zeros of each row in
  the *dense group* of columns (intercept, splines, linear terms, surfaces), as column
  index and value; a column appears at most once per row;
* ``lev`` (int32, n × m): for each of the m *level terms* (categoricals, random effects),
  the global index of the row's level among all level columns, or -1 for none.

The kernels know nothing of term kinds: a new kind of term only changes the encoding.
Rows are split into one contiguous range per thread; every thread owns its accumulators,
and the caller sums them in thread order, so no atomics and a fixed reduction order.
"""

from __future__ import annotations

import numba


@numba.njit(cache=True, parallel=True)
def accumulate(idx, val, lev, w, r, wc, dense, cross, diag, rhs_d, rhs_l, col_d, col_l,
               with_dense):
    """Add one block of rows to per-thread normal-equation accumulators.

    Parameters
    ----------
    idx, val, lev : encoded rows (see module docstring).
    w : (n,) working weights.  r : (n,) working residuals z - (η - offset) at the anchor β.
    wc : (n,) constraint weights (exposure, else prior weights): the weighted column sums
        Σ wc·x that fix the identifiability constraints; length 0: not summed.
    dense : (T, pd, pd) upper triangle of XᵀWX within the dense group (only when
        ``with_dense``; else the caller forms it, see :func:`dense_rows`).
    cross : (T, L, pd) level-by-dense cross products.  diag : (T, L) level block diagonal.
    rhs_d : (T, pd), rhs_l : (T, L) XᵀW r.  col_d : (T, pd), col_l : (T, L) Xᵀwp.
    """
    n, q = idx.shape
    m = lev.shape[1]
    with_wc = wc.shape[0] == n
    n_threads = dense.shape[0]
    chunk = (n + n_threads - 1) // n_threads
    for t in numba.prange(n_threads):
        lo = t * chunk
        hi = min(n, lo + chunk)
        dt = dense[t]
        ct = cross[t]
        for i in range(lo, hi):
            wi = w[i]
            wri = wi * r[i]
            wpi = wc[i] if with_wc else 0.0
            for a in range(q):
                ia = idx[i, a]
                va = val[i, a]
                rhs_d[t, ia] += wri * va
                if with_wc:
                    col_d[t, ia] += wpi * va
                if with_dense:
                    wva = wi * va
                    for b in range(a, q):
                        ib = idx[i, b]
                        if ia <= ib:
                            dt[ia, ib] += wva * val[i, b]
                        else:
                            dt[ib, ia] += wva * val[i, b]
            for k in range(m):
                lk = lev[i, k]
                if lk < 0:
                    continue
                diag[t, lk] += wi
                rhs_l[t, lk] += wri
                if with_wc:
                    col_l[t, lk] += wpi
                for a in range(q):
                    ct[lk, idx[i, a]] += wi * val[i, a]


@numba.njit(cache=True, parallel=True)
def dense_rows(idx, val, sw, out):
    """out[i] = √wᵢ·xᵢ over the dense group (rows i < n of ``out``, (≥ n) × pd): the block
    whose Gram matrix BLAS forms (``sw`` (n,) the square roots of the working weights)."""
    n, q = idx.shape
    pd = out.shape[1]
    for i in numba.prange(n):
        for j in range(pd):
            out[i, j] = 0.0
        s = sw[i]
        for a in range(q):
            out[i, idx[i, a]] += s * val[i, a]


@numba.njit(cache=True)
def accumulate_level_pair(lev_a, lev_b, off_a, off_b, w, out):
    """Cross products of two level terms: out[a, b] += w for each row (serial, cheap).

    ``lev_a``/``lev_b`` hold global level indices; ``off_a``/``off_b`` are the first global
    index of each term, so out is indexed by the terms' own level numbers."""
    for i in range(lev_a.shape[0]):
        la = lev_a[i]
        lb = lev_b[i]
        if la >= 0 and lb >= 0:
            out[la - off_a, lb - off_b] += w[i]


@numba.njit(cache=True, parallel=True)
def linear_predictor(idx, val, lev, beta_d, beta_l, out):
    """out[i] += Σ_a val[i,a]·beta_d[idx[i,a]] + Σ_k beta_l[lev[i,k]]  (shape (n,))."""
    n, q = idx.shape
    m = lev.shape[1]
    for i in numba.prange(n):
        s = 0.0
        for a in range(q):
            s += val[i, a] * beta_d[idx[i, a]]
        for k in range(m):
            lk = lev[i, k]
            if lk >= 0:
                s += beta_l[lk]
        out[i] += s


@numba.njit(cache=True, parallel=True)
def quadratic_form_rows(idx, val, lev, pd, cov, out):
    """out[i] = xᵢᵀ V xᵢ for the sparse rows xᵢ (shape (n,)).

    ``cov`` is the full (p × p) covariance, dense-group columns first (``pd`` of them),
    then the level columns; level index l sits at row/column ``pd + l``.
    """
    n, q = idx.shape
    m = lev.shape[1]
    for i in numba.prange(n):
        s = 0.0
        for a in range(q):
            ia = idx[i, a]
            va = val[i, a]
            for b in range(q):
                s += va * cov[ia, idx[i, b]] * val[i, b]
        for k in range(m):
            lk = lev[i, k]
            if lk < 0:
                continue
            gk = pd + lk
            for a in range(q):
                s += 2.0 * cov[gk, idx[i, a]] * val[i, a]
            for k2 in range(m):
                l2 = lev[i, k2]
                if l2 >= 0:
                    s += cov[gk, pd + l2]
        out[i] = s


@numba.njit(cache=True, parallel=True)
def quadratic_form_rows_eliminated(idx, val, lev, pd, position, cov, e_start, e_diag, e_cross,
                                   out):
    """out[i] = xᵢᵀ V xᵢ when one level term's covariance is kept structured (shape (n,)).

    ``position`` (p,) maps a raw column to its row of ``cov`` (the kept columns' covariance)
    or −1 for a level of the eliminated term, whose raw columns start at ``e_start``;
    ``e_diag`` (L,) are its levels' variances and ``e_cross`` (L × k) their covariances with
    the kept columns. A row touches one level of that term, so nothing more is needed.
    """
    n, q = idx.shape
    m = lev.shape[1]
    for i in numba.prange(n):
        s = 0.0
        for a in range(q):
            ia = position[idx[i, a]]
            va = val[i, a]
            for b in range(q):
                s += va * cov[ia, position[idx[i, b]]] * val[i, b]
        le = -1
        for k in range(m):
            lk = lev[i, k]
            if lk < 0:
                continue
            gk = position[pd + lk]
            if gk < 0:
                le = pd + lk - e_start
                continue
            for a in range(q):
                s += 2.0 * cov[gk, position[idx[i, a]]] * val[i, a]
            for k2 in range(m):
                l2 = lev[i, k2]
                if l2 >= 0 and position[pd + l2] >= 0:
                    s += cov[gk, position[pd + l2]]
        if le >= 0:
            s += e_diag[le]
            for a in range(q):
                s += 2.0 * e_cross[le, position[idx[i, a]]] * val[i, a]
            for k in range(m):
                lk = lev[i, k]
                if lk >= 0 and position[pd + lk] >= 0:
                    s += 2.0 * e_cross[le, position[pd + lk]]
        out[i] = s


# --------------------------------------------------------------------------- binned
# Rows arrive as codes, one row of ``codes`` (F × n) per term: the row of that term's table
# of distinct design rows (see :mod:`tallgam.passes.binned`); vec_off[f] is the first
# per-code slot of term f. Loops run term by term (and pair by pair) over a thread's rows,
# so one pair's table stays in cache while the rows stream past it.

BINNED_BLOCK = 65_536  # rows a thread takes through all pairs before the next block


@numba.njit(cache=True, parallel=True)
def accumulate_binned(codes, w, r, wc, vec_off, mode, pa, pb, off, stride, f_start,
                      tab_off, tab_idx, tab_val, tab_width, cells, vec):
    """Add one block of coded rows (``codes`` F × n) to per-thread cross-tables.

    vec : (T, 3, Σm) per-code sums of w, w·r and wc (wc of length 0: not summed, e.g. in
    passes after the first, whose column sums are not used).  cells : (T, C) the pair tables: mode
    0 a cross-table C[code_a, code_b] += w (stride m_b); mode 1 the code of a against the
    expanded design row of b, H[code_a, j] += w·x_bj (stride n_raw_b); mode 2 both expanded,
    F[i, j] += w·x_ai·x_bj (stride n_raw_b). Threads own contiguous row ranges.
    """
    F, n = codes.shape
    P = mode.shape[0]
    with_wc = wc.shape[0] == n
    n_threads = cells.shape[0]
    chunk = (n + n_threads - 1) // n_threads
    for t in numba.prange(n_threads):
        lo = t * chunk
        hi = min(n, lo + chunk)
        ct = cells[t]
        v0 = vec[t, 0]
        v1 = vec[t, 1]
        v2 = vec[t, 2]
        for s in range(lo, hi, BINNED_BLOCK):
            e = min(hi, s + BINNED_BLOCK)
            for f in range(F):
                cf = codes[f]
                base = vec_off[f]
                if with_wc:
                    for i in range(s, e):
                        j = base + cf[i]
                        v0[j] += w[i]
                        v1[j] += w[i] * r[i]
                        v2[j] += wc[i]
                else:
                    for i in range(s, e):
                        j = base + cf[i]
                        v0[j] += w[i]
                        v1[j] += w[i] * r[i]
            for p in range(P):
                a = pa[p]
                b = pb[p]
                ca = codes[a]
                cb = codes[b]
                o = off[p]
                st = stride[p]
                md = mode[p]
                if md == 0:
                    for i in range(s, e):
                        ct[o + ca[i] * st + cb[i]] += w[i]
                elif md == 1:
                    tb = tab_off[b]
                    wb = tab_width[b]
                    o -= f_start[b]
                    for i in range(s, e):
                        rb = tb + cb[i]
                        base = o + ca[i] * st
                        wi = w[i]
                        for y in range(wb):
                            ct[base + tab_idx[rb, y]] += wi * tab_val[rb, y]
                else:
                    ta = tab_off[a]
                    tb = tab_off[b]
                    wa_ = tab_width[a]
                    wb = tab_width[b]
                    for i in range(s, e):
                        ra = ta + ca[i]
                        rb = tb + cb[i]
                        wi = w[i]
                        for x in range(wa_):
                            wa = wi * tab_val[ra, x]
                            base = o + (tab_idx[ra, x] - f_start[a]) * st - f_start[b]
                            for y in range(wb):
                                ct[base + tab_idx[rb, y]] += wa * tab_val[rb, y]


@numba.njit(cache=True, parallel=True)
def binned_predictor(codes, coef, vec_off, out):
    """out[i] += Σ_f coef[vec_off[f] + codes[f, i]]  (codes F × n, out (n,))."""
    F, n = codes.shape
    for i in numba.prange(n):
        s = 0.0
        for f in range(F):
            s += coef[vec_off[f] + codes[f, i]]
        out[i] += s


@numba.njit(cache=True, parallel=True)
def grid_codes(x, mid, lo, scale, lut, out):
    """out[i] = the index of the grid value nearest x[i] = #(mid < x[i]) (shape (n,)).

    ``mid`` (m,) holds the midpoints between sorted grid values; ``lut[j]`` is that count
    at the start of bucket j of an even split of the range (``scale`` buckets per unit,
    from ``lo``), so a value needs a step or two from there instead of a binary search."""
    n = x.shape[0]
    m = mid.shape[0]
    L = lut.shape[0]
    for i in numba.prange(n):
        v = x[i]
        j = int((v - lo) * scale) if v > lo else 0
        if j >= L:
            j = L - 1
        k = lut[j]
        while k < m and mid[k] < v:
            k += 1
        while k > 0 and mid[k - 1] >= v:
            k -= 1
        out[i] = k


@numba.njit(cache=True, parallel=True)
def whole_codes(x, lo, m, out):
    """out[i] = x[i] − lo for whole-number values in [lo, lo + m); returns how many values
    fall outside (their codes are 0)."""
    n = x.shape[0]
    bad = 0
    for i in numba.prange(n):
        c = x[i] - lo
        if c >= 0.0 and c < m:
            out[i] = int(c)
        else:
            out[i] = 0
            bad += 1
    return bad

